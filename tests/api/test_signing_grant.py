"""Signing grants: one re-entered password lets the bulk API sign for a short while.

A grant is issued only for the right password (wrong ones count towards the confirming
lock), signs bulk results in the performer's name like the password does, and is refused
once it has expired, after a password change, for another user or another credential, or
when it was altered (many clients at once: ``test_signing_grant_load.py``).
"""

from __future__ import annotations

import datetime as dt

import pytest
import time_machine
from django.contrib.auth import get_user_model
from django.core.cache import cache
from django.core.exceptions import ValidationError
from django.db import transaction
from django.utils import timezone
from rest_framework.authtoken.models import Token
from rest_framework.test import APIClient

from register import choices, reauth
from register.models import ChainEntry, TestRecord
from tests import factories as f
from tests.api import build_world

pytestmark = pytest.mark.django_db

GRANT, BULK = "/api/signing-grant/", "/api/test-results/bulk/"


@pytest.fixture(scope="module")
def world(django_db_setup, django_db_blocker):
    """The API tests' two-site plant, built once; each test runs in a savepoint of it."""
    with django_db_blocker.unblock(), transaction.atomic():
        w = build_world()
        w.users["second"] = f.user("second-tech", site=w.own.site,
                                   role=choices.Role.TECHNICIAN)
        yield w
        transaction.set_rollback(True)


@pytest.fixture(autouse=True)
def _fresh_cache():
    cache.clear()  # throttling and wrong-password counters


def _item(world, key, hours=2):
    return {"client_key": key, "sif": world.own.sif.pk, "kind": "full",
            "performed_at": (timezone.now() - dt.timedelta(hours=hours)).isoformat(),
            "results": [{"component": c.pk, "as_found": "pass", "as_left": "pass"}
                        for c in world.own.components]}


def _grant(client) -> dict:
    r = client.post(GRANT, {"password": f.PASSWORD}, format="json")
    assert r.status_code == 200, r.content
    return r.json()


def _refused_grant(response, why: str):
    assert response.status_code == 400, response.content[:400]
    assert why in " ".join(response.json()["signing_grant"]), response.json()


@pytest.mark.parametrize("body", [{}, {"password": ""}, {"password": "not-the-password-1"}])
def test_a_grant_is_issued_only_for_the_right_password(world, body):
    r = world.client("technician").post(GRANT, body, format="json")
    assert r.status_code == 400 and "password" in r.json(), r.content
    assert "signing_grant" not in r.json()


def test_a_grant_lasts_the_configured_minutes(world, settings):
    settings.SIGNING_GRANT_MINUTES = 7
    before = timezone.now()
    got = _grant(world.client("technician"))
    expires = dt.datetime.fromisoformat(got["expires_at"])
    assert got["lifetime_seconds"] == 7 * 60
    assert before + dt.timedelta(minutes=7) <= expires <= timezone.now() + dt.timedelta(minutes=7)


def test_wrong_passwords_for_a_grant_lock_confirming(world, settings):
    client = world.client("technician")
    for _ in range(settings.AXES_FAILURE_LIMIT):
        r = client.post(GRANT, {"password": "not-the-password-1"}, format="json")
        assert r.status_code == 400 and "not correct" in " ".join(r.json()["password"])
    r = client.post(GRANT, {"password": f.PASSWORD}, format="json")
    assert r.status_code == 400 and "Too many" in " ".join(r.json()["password"])
    # and the lock is the one of every signature: the password in a bulk post is refused too
    r = client.post(BULK, {"password": f.PASSWORD, "results": [_item(world, "g-lock")]},
                    format="json")
    assert r.status_code == 400 and "Too many" in " ".join(r.json()["password"])
    assert not TestRecord.objects.filter(client_key="g-lock").exists()


def test_grants_switched_off_are_neither_issued_nor_accepted(world, settings):
    client = world.client("technician")
    grant = _grant(client)["signing_grant"]
    settings.SIGNING_GRANT_MINUTES = 0
    r = client.post(GRANT, {"password": f.PASSWORD}, format="json")
    assert r.status_code == 400 and "switched off" in " ".join(r.json()["password"])
    _refused_grant(client.post(BULK, {"signing_grant": grant,
                                      "results": [_item(world, "g-off")]}, format="json"),
                   "switched off")


def test_a_bulk_post_with_a_grant_signs_every_item_in_the_performers_name(world):
    tech = world.users["technician"]
    client = world.client("technician")
    grant = _grant(client)["signing_grant"]
    chained = ChainEntry.objects.count()
    r = client.post(BULK, {"signing_grant": grant, "results": [
        _item(world, "g-1"), _item(world, "g-2", hours=3)]}, format="json")
    assert r.status_code == 201, r.content
    assert r.json()["created"] == 2
    stored = TestRecord.objects.filter(client_key__in=["g-1", "g-2"])
    assert {(s.status, s.performed_by_id) for s in stored} == {
        (choices.RecordStatus.SIGNED, tech.pk)}
    assert all(s.signed_at is not None for s in stored)
    # each signature is in the audit trail as the performer's, like a password signature
    reasons = set(TestRecord.history.filter(id__in=[s.pk for s in stored])
                  .values_list("history_change_reason", "history_user_id"))
    assert ("signed by performer", tech.pk) in reasons
    assert ChainEntry.objects.count() > chained
    # the same grant signs again (a maintenance system posts many batches with one)
    again = client.post(BULK, {"signing_grant": grant, "results": [_item(world, "g-3")]},
                        format="json")
    assert again.status_code == 201, again.content


def test_a_bulk_post_sends_the_password_or_a_grant_not_both(world):
    client = world.client("technician")
    grant = _grant(client)["signing_grant"]
    r = client.post(BULK, {"password": f.PASSWORD, "signing_grant": grant,
                           "results": [_item(world, "g-both")]}, format="json")
    assert r.status_code == 400 and "password" in r.json()
    assert not TestRecord.objects.filter(client_key="g-both").exists()


def test_a_grant_expires(world, settings):
    settings.SIGNING_GRANT_MINUTES = 5
    start = timezone.now()
    client = world.client("technician")
    with time_machine.travel(start, tick=False):
        grant = _grant(client)["signing_grant"]
    with time_machine.travel(start + dt.timedelta(minutes=4, seconds=50), tick=False):
        r = client.post(BULK, {"signing_grant": grant, "results": [_item(world, "g-in")]},
                        format="json")
        assert r.status_code == 201, r.content
    with time_machine.travel(start + dt.timedelta(minutes=5, seconds=2), tick=False):
        before = ChainEntry.objects.count()
        _refused_grant(client.post(BULK, {"signing_grant": grant,
                                          "results": [_item(world, "g-late")]},
                                   format="json"), "expired")
        assert ChainEntry.objects.count() == before
    assert not TestRecord.objects.filter(client_key="g-late").exists()


def test_a_password_change_ends_the_grant(world):
    tech = get_user_model().objects.get(pk=world.users["technician"].pk)
    client = world.client("technician")
    grant = _grant(client)["signing_grant"]
    credential = f"token:{Token.objects.get(user=tech).key}"
    proof = reauth.redeem_grant(tech, grant, credential)
    assert proof.user_id == tech.pk and proof.how.startswith("signing grant issued ")
    issued = dt.datetime.fromisoformat(proof.how.rsplit(" ", 1)[1])
    assert abs(timezone.now() - issued) < dt.timedelta(minutes=1)
    tech.set_password("a-new-long-password-2027")
    tech.save()
    # the token went with the old password; so does the grant, whatever carries it
    assert client.post(BULK, {"signing_grant": grant, "results": [_item(world, "g-old")]},
                       format="json").status_code == 401
    with pytest.raises(ValidationError, match="password has changed"):
        reauth.redeem_grant(tech, grant, credential)
    new = APIClient()
    new.credentials(HTTP_AUTHORIZATION=f"Token {Token.objects.create(user=tech).key}")
    _refused_grant(new.post(BULK, {"signing_grant": grant,
                                   "results": [_item(world, "g-old")]}, format="json"),
                   "another user or credential")
    assert not TestRecord.objects.filter(client_key="g-old").exists()


def test_a_grant_signs_only_for_its_user_and_credential(world):
    grant = _grant(world.client("technician"))["signing_grant"]
    _refused_grant(world.client("second").post(
        BULK, {"signing_grant": grant, "results": [_item(world, "g-other")]}, format="json"),
        "another user or credential")
    # the same person signed in with a session instead of the token
    web = APIClient()
    web.force_login(world.users["technician"])
    _refused_grant(web.post(BULK, {"signing_grant": grant,
                                   "results": [_item(world, "g-web")]}, format="json"),
                   "another user or credential")
    # a session's own grant works for that session
    web_grant = _grant(web)["signing_grant"]
    assert web.post(BULK, {"signing_grant": web_grant, "results": [_item(world, "g-web")]},
                    format="json").status_code == 201
    altered = grant[:-2] + ("A" if grant[-2] != "A" else "B") + grant[-1]
    _refused_grant(world.client("technician").post(
        BULK, {"signing_grant": altered, "results": [_item(world, "g-alt")]}, format="json"),
        "not a valid signing grant")
    assert not TestRecord.objects.filter(client_key__in=["g-other", "g-alt"]).exists()
