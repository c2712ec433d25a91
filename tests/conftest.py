"""Shared fixtures: personas at two sites, and the rule that services must exist in CI.

In CI (``CI=true`` or ``REQUIRE_SERVICES=1``) a missing PostgreSQL, Redis or Chromium
fails the run instead of skipping tests.
"""

import os
import shutil

import pytest

os.environ.setdefault("DJANGO_ALLOW_ASYNC_UNSAFE", "true")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # see config/celery.py

REQUIRE_SERVICES = os.environ.get("CI", "").lower() == "true" or os.environ.get(
    "REQUIRE_SERVICES", "") == "1"


def need(condition: bool, reason: str):
    """Skip on a bare laptop; fail in CI."""
    if condition:
        return
    if REQUIRE_SERVICES:
        pytest.fail(f"{reason} (required in CI)", pytrace=False)
    pytest.skip(reason)


@pytest.fixture(scope="session")
def browser_type_launch_args(browser_type_launch_args):
    return {
        **browser_type_launch_args,
        "executable_path": shutil.which("chromium") or "/usr/bin/chromium",
        "args": ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--no-first-run"],
    }


@pytest.fixture(autouse=True)
def _fresh_cache():
    """Each test starts with an empty cache (cached statistics are keyed by history ids,
    which a rolled-back test may reuse)."""
    from django.core.cache import cache

    cache.clear()
    yield
