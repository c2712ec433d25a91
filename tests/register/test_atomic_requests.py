"""Every request is one transaction: a request that fails half-way leaves nothing written,
not even what an earlier step of the same request had already saved."""

import pytest
from django.test import Client

from register.inbox import notices
from register.models import ChainEntry, ComponentResult, MeasuredValue, TestRecord
from tests import factories as f
from tests.register.test_field_views import entry_data, plant, start_url  # noqa: F401

pytestmark = pytest.mark.django_db


def _counts():
    return (TestRecord.objects.count(), ComponentResult.objects.count(),
            MeasuredValue.objects.count(), TestRecord.history.count(), ChainEntry.objects.count())


def test_a_sign_that_fails_after_the_draft_was_saved_leaves_nothing(plant, monkeypatch):  # noqa: F811
    client = Client(raise_request_exception=False)
    client.force_login(plant["tech"])
    before = _counts()

    def broken(record):
        raise RuntimeError("notification store unavailable")

    # the request saves the draft, signs it, then fails while telling the verifiers
    monkeypatch.setattr(notices, "waiting_for_countersignature", broken)
    resp = client.post(start_url(plant), entry_data(plant, action="sign", password=f.PASSWORD))
    assert resp.status_code == 500
    assert _counts() == before

    monkeypatch.undo()  # the same entries, nothing broken: all of it is written
    resp = client.post(start_url(plant), entry_data(plant, action="sign", password=f.PASSWORD))
    assert resp.status_code == 302
    assert TestRecord.objects.filter(status="signed").count() == 1
    assert all(a > b for a, b in zip(_counts(), before, strict=True))
