"""Shared fixtures: the rule that services must exist in CI, a fresh cache per test, and
the demo plant loaded once per session (``demo_plant``).

In CI (``CI=true`` or ``REQUIRE_SERVICES=1``) a missing PostgreSQL, Redis or Chromium
fails the run instead of skipping tests.
"""

import contextlib
import datetime as dt
import os
import shutil
from dataclasses import dataclass

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


@pytest.fixture(scope="session", autouse=True)
def _patient_browser_checks():
    """Browser checks wait up to 20 s for what they expect (Playwright's default is 5 s):
    the suite's processes share two cores, and a live answer through htmx can take longer
    than 5 s to come back while the rest of the suite runs. What is expected is unchanged."""
    try:
        from playwright.sync_api import expect
    except ImportError:  # pragma: no cover - playwright is a test dependency
        yield
        return
    expect.set_options(timeout=20_000)
    yield


@pytest.fixture(autouse=True)
def _fresh_cache():
    """Each test starts with an empty cache (cached statistics are keyed by history ids,
    which a rolled-back test may reuse)."""
    from django.core.cache import cache

    cache.clear()
    yield


@pytest.fixture(autouse=True)
def _own_chain_anchors(settings, tmp_path):
    """Each test anchors the change chain in a file of its own (a rolled-back test reuses
    entry numbers another test anchored)."""
    settings.CHAIN_ANCHOR_FILE = str(tmp_path / "chain-anchors.jsonl")


# ---------------------------------------------------------------------------------------
# The demo plant, loaded once per session into a database of its own
# ---------------------------------------------------------------------------------------


@dataclass
class DemoWorld:
    """The loaded demo plant: its site, SIFs by tag, latest assessments by SIF id, and what
    ``load_demo`` printed while loading it."""

    site: object
    sifs: dict
    latest: dict
    load_output: str
    today: dt.date


@contextlib.contextmanager
def _pointed_at(connection, name: str):
    """Point the default connection at the database ``name`` for a while, then back.

    (An in-memory SQLite test database disappears when its connection closes, so that
    connection is set aside and put back instead of being closed.)"""
    saved_name = connection.settings_dict["NAME"]
    kept = None
    if connection.vendor == "sqlite" and connection.is_in_memory_db():
        kept, connection.connection = connection.connection, None
    else:
        connection.close()
    connection.settings_dict["NAME"] = name
    try:
        yield
    finally:
        connection.close()
        connection.settings_dict["NAME"] = saved_name
        if kept is not None:
            connection.connection = kept


def _create_demo_database(connection, folder) -> tuple[str, bool]:
    """A copy of the (migrated, empty) test database for the demo; returns its name and
    whether it still needs migrating (a PostgreSQL copy needs the test database free)."""
    if connection.vendor == "sqlite":
        import sqlite3

        path = str(folder / "demo.sqlite3")
        connection.ensure_connection()
        target = sqlite3.connect(path)
        try:
            connection.connection.backup(target)
        finally:
            target.close()
        return path, False
    from django.db import DatabaseError

    source = connection.settings_dict["NAME"]
    name = f"{source}_demo"
    connection.close()
    with connection._nodb_cursor() as cursor:
        cursor.execute(f'DROP DATABASE IF EXISTS "{name}"')
        try:
            cursor.execute(f'CREATE DATABASE "{name}" TEMPLATE "{source}"')
            return name, False
        except DatabaseError:  # another session is on the test database
            cursor.execute(f'CREATE DATABASE "{name}"')
            return name, True


def _drop_demo_database(connection, name: str) -> None:
    if connection.vendor != "sqlite":
        with connection._nodb_cursor() as cursor:
            cursor.execute(f'DROP DATABASE IF EXISTS "{name}"')


def _asks_for_test_database(item) -> bool:
    """Whether pytest-django sets up the test database for this test (its own rule)."""
    return bool(item.get_closest_marker("django_db")) or bool(
        {"db", "transactional_db", "live_server"} & set(getattr(item, "fixturenames", ())))


@pytest.fixture(scope="session")
def _demo_database(request, django_db_setup, django_db_blocker, tmp_path_factory):
    """The demo plant loaded once per session, by ``load_demo`` as a user loads it (each
    step committed), into its own database: a copy of the test database, so no other test
    ever sees it. Tests reach it through ``demo_plant``."""
    import io

    from django.core.management import call_command
    from django.db import connections
    from django.utils import timezone

    from register.models import SafetyFunction, Site

    connection = connections["default"]
    with django_db_blocker.unblock():
        own_test_db = None
        if not any(_asks_for_test_database(item) for item in request.session.items):
            # pytest-django sets up the test database only when a collected test asks for
            # it; none did: set it up here (never touching the database the settings name).
            from django.test.utils import setup_databases

            own_test_db = setup_databases(verbosity=0, interactive=False,
                                          aliases={"default"})
        name, to_migrate = _create_demo_database(connection, tmp_path_factory.mktemp("demo"))
        try:
            with _pointed_at(connection, name):
                if to_migrate:
                    call_command("migrate", verbosity=0, interactive=False)
                today = timezone.localdate()
                out = io.StringIO()
                call_command("load_demo", stdout=out)
                site = Site.objects.get()
                sifs = {s.tag: s for s in SafetyFunction.objects.filter(unit__site=site)}
                from register.calculations import calculations

                latest = calculations().latest_assessments([s.pk for s in sifs.values()])
            yield name, DemoWorld(site, sifs, latest, out.getvalue(), today)
        finally:
            _drop_demo_database(connection, name)
            if own_test_db is not None:
                from django.test.utils import teardown_databases

                teardown_databases(own_test_db, verbosity=0)


@pytest.fixture
def demo_plant(request, _demo_database, django_db_blocker):
    """The demo plant (a :class:`DemoWorld`), shared by the whole session: the test runs
    in a transaction on the demo's database, rolled back at its end, so what one test
    writes no other test sees. Not for tests marked ``django_db`` (their transaction is on
    the test database)."""
    from django.db import connections, transaction

    if request.node.get_closest_marker("django_db"):
        pytest.fail("demo_plant runs the test on the demo's own database: remove the "
                    "django_db mark from this test", pytrace=False)
    name, world = _demo_database
    with (django_db_blocker.unblock(), _pointed_at(connections["default"], name),
          transaction.atomic()):
        yield world
        transaction.set_rollback(True)


def pytest_collection_modifyitems(config, items):
    """In a parallel run (``-n``), keep the tests that read the demo plant in one process
    (it is loaded once per process) and the tests that start real workers and servers in
    one process (they would otherwise compete for the two cores they time)."""
    for item in items:
        if "demo_plant" in getattr(item, "fixturenames", ()):
            item.add_marker(pytest.mark.xdist_group("demo"))
        elif "/integration/" in str(item.path):
            item.add_marker(pytest.mark.xdist_group("services"))
