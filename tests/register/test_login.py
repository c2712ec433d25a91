"""Sign-in is limited after repeated failures, for the app and the admin."""

import pytest

from tests import factories as f

pytestmark = pytest.mark.django_db


@pytest.mark.parametrize("url", ["/accounts/login/", "/admin/login/"])
def test_repeated_failures_lock_the_user_name(client, url):
    user = f.user("alice", is_staff=True)
    for _ in range(4):
        r = client.post(url, {"username": "alice", "password": "wrong"})
        assert r.status_code == 200
    # the fifth failure locks (register/accounts/signin.py; more in test_signin_limits.py)
    assert client.post(url, {"username": "alice", "password": "wrong"}).status_code == 429
    r = client.post(url, {"username": "alice", "password": f.PASSWORD})
    assert r.status_code == 429
    assert b"Too many failed sign-in attempts" in r.content
    assert "_auth_user_id" not in client.session
    del user


def test_a_correct_password_before_the_limit_signs_in(client):
    f.user("bob")
    for _ in range(3):
        client.post("/accounts/login/", {"username": "bob", "password": "wrong"})
    r = client.post("/accounts/login/", {"username": "bob", "password": f.PASSWORD})
    assert r.status_code == 302
    assert client.session["_auth_user_id"]
