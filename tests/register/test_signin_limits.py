"""Sign-in and credentials: repeated failures lock one user name at one address (web form,
admin and API token alike), password-reset requests are limited per address, passwords
follow Django's validators, API tokens expire and are revoked by a password change, and
signed-in sessions end after an idle time."""

import datetime as dt
import json
from pathlib import Path

import pytest
import time_machine
from axes.models import AccessAttempt
from django.conf import settings
from django.contrib.auth import get_user_model, password_validation
from django.core import mail
from django.core.exceptions import ValidationError
from django.utils import timezone
from rest_framework.authtoken.models import Token
from rest_framework.test import APIClient

from register import choices
from register.demo import DEMO_FILE, DEMO_PASSWORD
from tests import factories as f

pytestmark = pytest.mark.django_db

HOME = "10.20.0.1"
AWAY = "10.20.0.2"
LIMIT = settings.AXES_FAILURE_LIMIT


def _web(client, username, password, address=HOME):
    return client.post("/accounts/login/", {"username": username, "password": password},
                       REMOTE_ADDR=address)


def _api(username, password, address=HOME):
    return APIClient().post("/api/token/", {"username": username, "password": password},
                            format="json", REMOTE_ADDR=address)


def _signed_in(client) -> bool:
    return "_auth_user_id" in client.session


# --- the lock on a user name at an address ---------------------------------------------


def test_the_limit_is_five_failures_for_fifteen_minutes():
    assert LIMIT == 5
    assert dt.timedelta(minutes=15) == settings.AXES_COOLOFF_TIME
    assert settings.AXES_LOCKOUT_PARAMETERS == [["username", "ip_address"]]
    assert settings.AXES_HANDLER == "axes.handlers.database.AxesDatabaseHandler"


def test_five_web_failures_lock_the_user_at_that_address_only(client):
    f.user("alice")
    f.user("bob")
    for _ in range(LIMIT - 1):
        r = _web(client, "alice", "wrong")
        assert r.status_code == 200
        assert b"enter a correct" in r.content and b"locked" not in r.content
    fifth = _web(client, "alice", "wrong")
    assert fifth.status_code == 429
    sixth = _web(client, "alice", f.PASSWORD)
    assert sixth.status_code == 429
    assert not _signed_in(client)
    page = sixth.content.decode()
    assert "Too many failed sign-in attempts" in page and "locked until" in page
    assert "css/ledger.css" in page and "Sign-in locked" in page  # the app's own page
    assert 0 < int(sixth["Retry-After"]) <= 15 * 60

    other_user = type(client)()
    assert _web(other_user, "bob", f.PASSWORD).status_code == 302
    assert _signed_in(other_user)
    elsewhere = type(client)()
    assert _web(elsewhere, "alice", f.PASSWORD, address=AWAY).status_code == 302
    assert _signed_in(elsewhere)


def test_a_correct_password_before_the_limit_signs_in_and_clears_the_count(client):
    f.user("carol")
    for _ in range(LIMIT - 1):
        _web(client, "carol", "wrong")
    assert _web(client, "carol", f.PASSWORD).status_code == 302
    client.logout()
    for _ in range(LIMIT - 1):  # a fresh count: four more failures do not lock
        assert _web(client, "carol", "wrong").status_code == 200
    assert _web(client, "carol", f.PASSWORD).status_code == 302


def test_the_token_endpoint_counts_and_answers_in_json():
    f.user("dave")
    f.user("erin")
    for _ in range(LIMIT - 1):
        assert _api("dave", "wrong").status_code == 400
    fifth = _api("dave", "wrong")
    assert fifth.status_code == 429 and fifth["Content-Type"].startswith("application/json")
    sixth = _api("dave", f.PASSWORD)
    assert sixth.status_code == 429
    body = sixth.json()
    assert "Too many failed sign-in attempts" in body["detail"]
    assert "token" not in body
    until = dt.datetime.fromisoformat(body["locked_until"])
    assert dt.timedelta(minutes=14) < until - timezone.now() <= dt.timedelta(minutes=15)
    assert 0 < body["retry_after_seconds"] == int(sixth["Retry-After"]) <= 15 * 60
    assert _api("erin", f.PASSWORD).status_code == 200
    assert _api("dave", f.PASSWORD, address=AWAY).status_code == 200


def test_web_and_api_failures_add_up_to_one_count(client):
    f.user("fay")
    for _ in range(3):
        _web(client, "fay", "wrong")
    assert _api("fay", "wrong").status_code == 400
    assert _api("fay", "wrong").status_code == 429
    assert _web(client, "fay", f.PASSWORD).status_code == 429
    attempt = AccessAttempt.objects.get(username="fay", ip_address=HOME)
    assert attempt.failures_since_start == LIMIT


def test_the_admin_sign_in_is_under_the_same_lock(client):
    f.user("gale", is_staff=True)
    for _ in range(LIMIT):
        client.post("/admin/login/", {"username": "gale", "password": "wrong"},
                    REMOTE_ADDR=HOME)
    r = client.post("/admin/login/", {"username": "gale", "password": f.PASSWORD},
                    REMOTE_ADDR=HOME)
    assert r.status_code == 429 and not _signed_in(client)
    assert _web(client, "gale", f.PASSWORD).status_code == 429


def test_the_lock_ends_after_the_stated_time(client):
    f.user("hugo")
    start = timezone.now()
    with time_machine.travel(start, tick=False):
        for _ in range(LIMIT):
            _web(client, "hugo", "wrong")
    with time_machine.travel(start + dt.timedelta(minutes=14), tick=False):
        assert _web(client, "hugo", f.PASSWORD).status_code == 429  # refused, not counted
    with time_machine.travel(start + dt.timedelta(minutes=15, seconds=5), tick=False):
        assert _web(client, "hugo", f.PASSWORD).status_code == 302


def test_behind_the_trusted_proxy_the_forwarded_address_counts(client, settings):
    settings.TRUSTED_PROXIES = ["10.9.9.9"]
    f.user("ivan")

    def via_proxy(forwarded, password):
        return client.post("/accounts/login/", {"username": "ivan", "password": password},
                           REMOTE_ADDR="10.9.9.9", HTTP_X_FORWARDED_FOR=forwarded)

    for _ in range(LIMIT):
        via_proxy("198.51.100.7", "wrong")
    assert via_proxy("198.51.100.7", f.PASSWORD).status_code == 429
    assert AccessAttempt.objects.filter(ip_address="198.51.100.7").exists()
    assert via_proxy("198.51.100.8", f.PASSWORD).status_code == 302  # another client
    client.logout()
    for _ in range(LIMIT):  # not from the proxy: a forged header changes nothing
        client.post("/accounts/login/", {"username": "ivan", "password": "wrong"},
                    REMOTE_ADDR=HOME, HTTP_X_FORWARDED_FOR="203.0.113.9")
    assert _web(client, "ivan", f.PASSWORD).status_code == 429


# --- password-reset requests -----------------------------------------------------------


def test_password_reset_requests_are_limited_per_address(client):
    f.user("iris", email="iris@example.invalid")
    limit = int(settings.REST_FRAMEWORK["DEFAULT_THROTTLE_RATES"]["password_reset"]
                .split("/")[0])
    for _ in range(limit):
        r = client.post("/accounts/password_reset/", {"email": "iris@example.invalid"},
                        REMOTE_ADDR=HOME)
        assert r.status_code == 302
    assert len(mail.outbox) == limit
    refused = client.post("/accounts/password_reset/", {"email": "iris@example.invalid"},
                          REMOTE_ADDR=HOME)
    assert refused.status_code == 429
    assert b"Too many password-reset requests from this address" in refused.content
    assert b"Nothing was sent" in refused.content and int(refused["Retry-After"]) > 0
    assert len(mail.outbox) == limit
    other = client.post("/accounts/password_reset/", {"email": "iris@example.invalid"},
                        REMOTE_ADDR=AWAY)
    assert other.status_code == 302 and len(mail.outbox) == limit + 1


# --- password rules --------------------------------------------------------------------


def test_short_common_numeric_and_look_alike_passwords_are_refused():
    tech2 = f.user("tech2", email="tech2@example.invalid")
    with pytest.raises(ValidationError) as short:
        password_validation.validate_password("tech2tech2", tech2)
    assert "at least 12 characters" in " ".join(short.value.messages)
    verifier = f.user("verifier")
    for bad, who, words in [("password1234", tech2, "too common"),
                            ("839201746352", tech2, "entirely numeric"),
                            ("verifier2026", verifier, "too similar to the username")]:
        with pytest.raises(ValidationError) as err:
            password_validation.validate_password(bad, who)
        assert words in " ".join(err.value.messages), bad
    password_validation.validate_password("quiet-valve-rotates", tech2)  # accepted


def test_changing_to_tech2tech2_on_the_page_is_refused(client):
    tech2 = f.user("tech2")
    client.force_login(tech2)
    r = client.post("/accounts/password_change/", {
        "old_password": f.PASSWORD, "new_password1": "tech2tech2",
        "new_password2": "tech2tech2"})
    assert r.status_code == 200
    assert "at least 12 characters" in r.content.decode()
    tech2.refresh_from_db()
    assert tech2.check_password(f.PASSWORD)


def test_the_demo_password_meets_the_rules_for_every_demo_person():
    people = json.loads(Path(DEMO_FILE).read_text(encoding="utf-8"))["people"]
    assert {"lead", "tech", "tech2", "verifier", "auditor"} <= {p["username"] for p in people}
    for p in people:
        person = get_user_model()(username=p["username"], first_name=p["first_name"],
                                  last_name=p["last_name"],
                                  email=f"{p['username']}@saltmere.invalid")
        password_validation.validate_password(DEMO_PASSWORD, person)


# --- API tokens ------------------------------------------------------------------------


def _sifs(key):
    return APIClient().get("/api/sifs/", HTTP_AUTHORIZATION=f"Token {key}")


def test_a_password_change_revokes_the_users_tokens():
    user = f.user("jane", site=f.site(), role=choices.Role.AUDITOR)
    issued = _api("jane", f.PASSWORD).json()
    assert _sifs(issued["token"]).status_code == 200
    user.first_name = "Janet"
    user.save()  # not a password change: the token stays
    assert _sifs(issued["token"]).status_code == 200
    user.set_password("another-long-phrase-9")
    user.save()
    r = _sifs(issued["token"])
    assert r.status_code == 401
    assert "revoked" in r.json()["detail"] and "POST /api/token/" in r.json()["detail"]
    assert not Token.objects.filter(user=user).exists()
    assert _api("jane", "another-long-phrase-9").status_code == 200


def test_a_password_changed_on_the_page_revokes_too(client):
    user = f.user("kate", site=f.site(), role=choices.Role.AUDITOR)
    key = _api("kate", f.PASSWORD).json()["token"]
    client.force_login(user)
    r = client.post("/accounts/password_change/", {
        "old_password": f.PASSWORD, "new_password1": "lantern-gauge-orbit",
        "new_password2": "lantern-gauge-orbit"})
    assert r.status_code == 302
    assert _sifs(key).status_code == 401


def test_a_token_expires_after_the_stated_days_and_a_new_one_is_issued():
    assert settings.API_TOKEN_DAYS == 30
    f.user("liam", site=f.site(), role=choices.Role.AUDITOR)
    start = timezone.now()
    with time_machine.travel(start, tick=False):
        issued = _api("liam", f.PASSWORD).json()
    assert dt.datetime.fromisoformat(issued["expires_at"]) == start + dt.timedelta(days=30)
    with time_machine.travel(start + dt.timedelta(days=29, hours=23), tick=False):
        assert _sifs(issued["token"]).status_code == 200
        assert _api("liam", f.PASSWORD).json()["token"] == issued["token"]  # still in force
    with time_machine.travel(start + dt.timedelta(days=30, minutes=1), tick=False):
        r = _sifs(issued["token"])
        assert r.status_code == 401
        assert "Token expired at" in r.json()["detail"]
        fresh = _api("liam", f.PASSWORD).json()["token"]
        assert fresh != issued["token"] and _sifs(fresh).status_code == 200


# --- idle sessions ---------------------------------------------------------------------


def test_a_session_ends_after_an_idle_hour_and_activity_keeps_it(client):
    assert settings.SESSION_COOKIE_AGE == 60 * 60 and settings.SESSION_SAVE_EVERY_REQUEST
    f.user("mona", site=f.site(), role=choices.Role.AUDITOR)
    start = timezone.now()
    with time_machine.travel(start, tick=False):
        assert _web(client, "mona", f.PASSWORD).status_code == 302
    with time_machine.travel(start + dt.timedelta(minutes=50), tick=False):
        assert client.get("/api/sifs/").status_code == 200  # activity moves the end
    with time_machine.travel(start + dt.timedelta(minutes=100), tick=False):
        assert client.get("/api/sifs/").status_code == 200
    with time_machine.travel(start + dt.timedelta(minutes=161), tick=False):
        assert client.get("/api/sifs/").status_code in (401, 403)
        assert client.get("/start/").status_code == 302
