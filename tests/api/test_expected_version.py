"""A design change through the API names the version it was based on: the id of the
record's newest history row, read as ``version``. Missing: 400 naming expected_version;
stale: 409 with the current version; nothing is written either way."""

from __future__ import annotations

import pytest
from django.db import connection, transaction
from django.test.utils import CaptureQueriesContext

from register import services
from register.models import ChainEntry, Component, SafetyFunction, Subsystem, TestPlan
from tests import factories as f
from tests.api import build_world

pytestmark = pytest.mark.django_db

REASON = {"change_reason": "Data sheet revised", "change_reference": "CR-314"}

# (endpoint, model, object of the world's own place, a change)
DESIGN = [
    ("sifs", SafetyFunction, lambda p: p.sif, {"name": "High high level trip"}),
    ("subsystems", Subsystem, lambda p: p.subsystem, {"mttr_hours": 12}),
    ("components", Component, lambda p: p.components[0], {"proof_test_coverage": 0.8}),
    ("test-plans", TestPlan, lambda p: p.plan, {"interval_months": 18}),
]


@pytest.fixture(scope="module")
def world(django_db_setup, django_db_blocker):
    with django_db_blocker.unblock(), transaction.atomic():
        yield build_world()
        transaction.set_rollback(True)


def _newest(model, pk) -> int:
    return model.history.filter(id=pk).order_by("-history_id").first().history_id


@pytest.mark.parametrize(("endpoint", "model", "pick", "change"), DESIGN,
                         ids=[d[0] for d in DESIGN])
def test_a_change_needs_the_current_version(world, endpoint, model, pick, change):
    obj = pick(world.own)
    api = world.client("lead")
    url = f"/api/{endpoint}/{obj.pk}/"
    version = api.get(url).json()["version"]
    assert version == _newest(model, obj.pk)
    rows = (model.history.filter(id=obj.pk).count(), ChainEntry.objects.count())

    missing = api.patch(url, {**change, **REASON}, format="json")
    assert missing.status_code == 400 and list(missing.json()) == ["expected_version"]

    assert (model.history.filter(id=obj.pk).count(), ChainEntry.objects.count()) == rows

    # Someone else changes the record after it was read: the read version is stale.
    services.update_design(model.objects.get(pk=obj.pk), world.users["lead"],
                           reason="Other change", reference="CR-313", changes={})
    current = _newest(model, obj.pk)
    assert current > version
    rows = (model.history.filter(id=obj.pk).count(), ChainEntry.objects.count())
    stale = api.patch(url, {**change, **REASON, "expected_version": version},
                      format="json")
    assert stale.status_code == 409
    assert stale.json()["version"] == current and "expected_version" in stale.json()
    assert (model.history.filter(id=obj.pk).count(), ChainEntry.objects.count()) == rows
    field, value = next(iter(change.items()))
    assert getattr(model.objects.get(pk=obj.pk), field) != value

    ok = api.patch(url, {**change, **REASON, "expected_version": current}, format="json")
    assert ok.status_code == 200, ok.content
    assert ok.json()[field] == value and getattr(model.objects.get(pk=obj.pk), field) == value
    assert ok.json()["version"] == _newest(model, obj.pk) > current
    # the version that change was based on is now stale in turn
    again = api.patch(url, {**change, **REASON, "expected_version": current}, format="json")
    assert again.status_code == 409 and again.json()["version"] == ok.json()["version"]


def test_a_full_replacement_needs_it_too(world):
    sub = world.own.subsystem
    api = world.client("lead")
    url = f"/api/subsystems/{sub.pk}/"
    body = {k: v for k, v in api.get(url).json().items()
            if k not in ("id", "version", "sif")}
    body.update(REASON, mttr_hours=24)
    assert list(api.put(url, body, format="json").json()) == ["expected_version"]
    version = _newest(Subsystem, sub.pk)
    r = api.put(url, {**body, "expected_version": version}, format="json")
    assert r.status_code == 200 and r.json()["mttr_hours"] == 24


def test_a_new_record_sends_no_version(world):
    r = world.client("lead").post("/api/subsystems/", {
        "sif": world.own.sif.pk, "role": "logic", "name": "Logic solver", "voting": "1oo1",
        "expected_version": 1, **REASON}, format="json")
    assert r.status_code == 400 and list(r.json()) == ["expected_version"]


def test_lists_show_each_rows_version_in_a_fixed_number_of_queries(world):
    api = world.client("lead")
    api.get("/api/sifs/")  # warm the user's role cache and the session
    with CaptureQueriesContext(connection) as few:
        first = api.get("/api/sifs/").json()["results"]
    for i in range(5):
        f.sif(world.own.unit, tag=f"SIF-V{i}")
    with CaptureQueriesContext(connection) as more:
        rows = api.get("/api/sifs/").json()["results"]
    assert len(rows) == len(first) + 5
    assert len(more.captured_queries) == len(few.captured_queries)
    assert all(r["version"] == _newest(SafetyFunction, r["id"]) for r in rows)
