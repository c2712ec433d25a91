"""The sign-in lock is one count for every web process: two real gunicorn processes on the
same PostgreSQL database, five failures spread over both, then the right password is
refused by either of them (API token endpoint and the sign-in page), while another user
still signs in."""

import contextlib
import re

import pytest
import requests
from django.contrib.auth.hashers import PBKDF2PasswordHasher
from django.db import connection

from bench.bench_api_load import serve
from tests import factories as f
from tests.conftest import need

pytestmark = [pytest.mark.services, pytest.mark.django_db(transaction=True)]

PASSWORD = "slow-river-gauge-41"


def _database_url() -> str:
    s = connection.settings_dict
    auth = s["USER"] + (f":{s['PASSWORD']}" if s.get("PASSWORD") else "")
    return f"postgres://{auth}@{s['HOST'] or '127.0.0.1'}:{s['PORT'] or 5432}/{s['NAME']}"


def _person(username):
    """A user whose password the servers (default hashers, not the suite's) can check."""
    user = f.user(username)
    user.password = PBKDF2PasswordHasher().encode(PASSWORD, "saltsaltsalt", iterations=1000)
    user.save()
    return user


def _token(base, username, password):
    return requests.post(f"{base}/api/token/", json={"username": username,
                                                     "password": password}, timeout=30)


def _web_sign_in(base, username, password):
    s = requests.Session()
    page = s.get(f"{base}/accounts/login/", timeout=30)
    csrf = re.search(r'name="csrfmiddlewaretoken" value="([^"]+)"', page.text)[1]
    return s.post(f"{base}/accounts/login/", data={
        "username": username, "password": password, "csrfmiddlewaretoken": csrf},
        headers={"Referer": f"{base}/accounts/login/"}, allow_redirects=False, timeout=30)


def test_failures_on_two_processes_add_up_and_lock_on_both():
    need(connection.vendor == "postgresql", "PostgreSQL not configured (set DATABASE_URL)")
    _person("nina")
    _person("omar")
    url = _database_url()
    with contextlib.ExitStack() as stack:
        one = stack.enter_context(serve(url, workers=1, threads=2))
        two = stack.enter_context(serve(url, workers=1, threads=2))
        assert one != two
        assert _token(one, "nina", PASSWORD).status_code == 200  # the password is right
        codes = [_token(base, "nina", "wrong").status_code
                 for base in (one, two, one, two, one)]
        assert codes == [400, 400, 400, 400, 429]
        for base in (one, two):
            refused = _token(base, "nina", PASSWORD)
            assert refused.status_code == 429, base
            assert "Too many failed sign-in attempts" in refused.json()["detail"]
            assert "token" not in refused.json()
            page = _web_sign_in(base, "nina", PASSWORD)
            assert page.status_code == 429 and "locked until" in page.text
        assert _token(two, "omar", PASSWORD).status_code == 200
        assert _web_sign_in(one, "omar", PASSWORD).status_code == 302
