"""Behaviour of the API: immutability of signed records, the bulk endpoint, filters,
pagination, query counts, throttled token login."""

from __future__ import annotations

import datetime as dt

import pytest
from django.core.cache import cache
from django.db import connection
from django.test.utils import CaptureQueriesContext
from django.utils import timezone

from register import choices
from register.models import ComponentResult, SafetyFunction, TestRecord
from tests import factories as f
from tests.api import build_world

pytestmark = pytest.mark.django_db


@pytest.fixture(autouse=True)
def _fresh_throttle():
    cache.clear()


@pytest.fixture
def world():
    return build_world()


def _item(place, key, **over):
    item = {"client_key": key, "sif": place.sif.pk, "plan": place.plan.pk, "kind": "full",
            "performed_at": (timezone.now() - dt.timedelta(hours=3)).isoformat(),
            "results": [{"component": c.pk, "as_found": "pass", "as_left": "pass"}
                        for c in place.components]}
    item.update(over)
    return item


def test_signed_record_cannot_be_changed_or_deleted(world):
    rec = world.own.signed
    before = (rec.remarks, rec.kind, rec.performed_at, list(rec.results.values_list(
        "as_found", flat=True)))
    c = world.client("technician")
    for method in ("patch", "put"):
        r = getattr(c, method)(f"/api/test-records/{rec.pk}/", {
            "sif": rec.sif_id, "kind": "partial", "remarks": "edited",
            "performed_at": timezone.now().isoformat(),
            "results": [{"component": world.own.components[0].pk, "as_found": "fail",
                         "as_left": "pass"}]}, format="json")
        assert r.status_code == 409
        assert "signed" in r.json()["detail"] and "correction" in r.json()["detail"]
    assert c.delete(f"/api/test-records/{rec.pk}/").status_code == 409
    rec.refresh_from_db()
    assert (rec.remarks, rec.kind, rec.performed_at, list(rec.results.values_list(
        "as_found", flat=True))) == before


def test_draft_edit_sign_then_frozen_and_correction(world):
    c = world.client("technician")
    draft = world.own.draft
    r = c.patch(f"/api/test-records/{draft.pk}/", {"remarks": "valve slow"}, format="json")
    assert r.status_code == 200 and r.json()["remarks"] == "valve slow"
    assert r.json()["draft_version"] == 2
    bad = c.post(f"/api/test-records/{draft.pk}/sign/", {"password": "nope"}, format="json")
    assert bad.status_code == 400 and "password" in bad.json()
    r = c.post(f"/api/test-records/{draft.pk}/sign/", {"password": f.PASSWORD}, format="json")
    assert r.status_code == 200 and r.json()["status"] == "signed"
    assert c.patch(f"/api/test-records/{draft.pk}/", {"remarks": "x"},
                   format="json").status_code == 409
    r = c.post(f"/api/test-records/{draft.pk}/correction/", {"reason": "typo"}, format="json")
    assert r.status_code == 201
    assert r.json()["supersedes"] == draft.pk and r.json()["status"] == "draft"


def test_validation_errors_are_keyed_by_field(world):
    c = world.client("technician")
    r = c.post("/api/test-records/", {
        "sif": world.own.sif.pk, "kind": "full",
        "performed_at": (timezone.now() + dt.timedelta(days=3)).isoformat(),
        "results": [{"component": world.own.components[0].pk, "as_found": "fail",
                     "as_left": "pass"}]}, format="json")
    assert r.status_code == 400
    body = r.json()
    assert "performed_at" in body
    assert TestRecord.objects.count() == 4  # two per site from the world, nothing new


def _signed(items: list) -> dict:
    """A bulk body: the items and the performer's password they are signed with."""
    return {"password": f.PASSWORD, "results": items}


def test_bulk_is_all_or_nothing_and_names_item_and_field(world):
    c = world.client("technician")
    before = (TestRecord.objects.count(), ComponentResult.objects.count())
    items = [_item(world.own, "wo-1"),
             _item(world.own, "wo-2", results=[{"component": world.own.components[0].pk,
                                                "as_found": "fail", "as_left": "pass"}]),
             _item(world.own, "wo-3", kind="nonsense")]
    r = c.post("/api/test-results/bulk/", _signed(items), format="json")
    assert r.status_code == 400
    assert r.json()["detail"] == "Nothing was written."
    errors = {(e["index"], e["field"]) for e in r.json()["errors"]}
    assert (2, "kind") in errors
    # Item 1 is well formed but breaks a rule of the model (a failure must be classified).
    items.pop()
    r = c.post("/api/test-results/bulk/", _signed(items), format="json")
    assert r.status_code == 400
    assert {(e["index"], e["field"]) for e in r.json()["errors"]} == {
        (1, "results[0].failure_mode")}
    assert (TestRecord.objects.count(), ComponentResult.objects.count()) == before


def test_bulk_is_idempotent_by_client_key(world):
    c = world.client("technician")
    items = [_item(world.own, "wo-10"), _item(world.own, "wo-11", plan=None)]
    first = c.post("/api/test-results/bulk/", _signed(items), format="json")
    assert first.status_code == 201, first.content
    ids = [i["record"]["id"] for i in first.json()["items"]]
    assert all(i["record"]["status"] == "signed" for i in first.json()["items"])
    count = TestRecord.objects.count()
    again = c.post("/api/test-results/bulk/", _signed(items), format="json")
    assert again.status_code == 200
    assert [i["record"]["id"] for i in again.json()["items"]] == ids
    assert again.json()["created"] == 0 and TestRecord.objects.count() == count
    changed = [items[0], {**items[1], "remarks": "different"}]
    conflict = c.post("/api/test-results/bulk/", _signed(changed), format="json")
    assert conflict.status_code == 409
    assert conflict.json()["errors"][0]["index"] == 1
    assert TestRecord.objects.count() == count
    # The performer is the token's user and the record is signed in their name.
    rec = TestRecord.objects.get(pk=ids[0])
    assert rec.performed_by == world.users["technician"] and rec.signed_at is not None


def test_bulk_refuses_auditor_and_other_sites(world):
    assert world.client("auditor").post("/api/test-results/bulk/", _signed([_item(world.own, "a")]),
                                        format="json").status_code == 403
    r = world.client("technician").post("/api/test-results/bulk/",
                                        _signed([_item(world.other, "b")]), format="json")
    assert r.status_code == 400 and r.json()["errors"][0]["field"] == "sif"
    assert not TestRecord.objects.filter(client_key__in=["a", "b"]).exists()


def test_filters_and_pagination(world):
    c = world.client("lead")
    for i in range(60):
        f.sif(world.own.unit, tag=f"PT-{i:03d}", target_sil=1, target_pfd=5e-2)
    r = c.get("/api/sifs/")
    body = r.json()
    assert body["count"] == 61 and len(body["results"]) == 50 and body["next"]
    assert len(c.get(body["next"]).json()["results"]) == 11
    assert c.get("/api/sifs/", {"target_sil": 1}).json()["count"] == 60
    assert c.get("/api/sifs/", {"q": "PT-01"}).json()["count"] == 10
    assert c.get("/api/sifs/", {"open_bypass": "true"}).json()["count"] == 1
    recs = c.get("/api/test-records/", {"status": "draft"}).json()
    assert [x["id"] for x in recs["results"]] == [world.own.draft.pk]
    assert c.get("/api/bypasses/", {"open": "true"}).json()["count"] == 1
    assert c.get("/api/components/", {"sif": world.own.sif.pk}).json()["count"] == 2


@pytest.mark.parametrize("url", ["/api/sifs/", "/api/test-records/", "/api/components/",
                                 "/api/scenarios/", "/api/test-plans/", "/api/demands/"])
def test_list_query_count_does_not_grow(url):
    from register import services

    s = f.site("east")
    u = f.unit(s)
    lead = f.user("lead", site=s, role=choices.Role.LEAD)
    tech = f.user("tech", site=s, role=choices.Role.TECHNICIAN)
    from tests.api import World

    client = World(users={"lead": lead}, own=None, other=None).client("lead")

    def add(n):
        for _ in range(n):
            sif = f.sif(u)
            f.scenario(s)
            comp = sif.subsystems.first().components.first()
            rec = services.save_draft(
                user=tech, sif=sif, kind="full",
                performed_at=timezone.now() - dt.timedelta(days=1),
                results=[services.ResultInput(component=comp, as_found="pass",
                                              as_left="pass")])
            services.sign_record(rec, tech, f.PASSWORD)
            services.record_demand(user=tech, sif=sif, occurred_at=timezone.now(),
                                   successful=True, description="trip",
                                   components_exercised=[comp])

    def count():
        with CaptureQueriesContext(connection) as ctx:
            assert client.get(url).status_code == 200
        return len(ctx.captured_queries)

    add(3)
    small = count()
    add(17)
    assert SafetyFunction.objects.count() == 20
    assert count() == small


def test_token_login_is_throttled():
    f.user("maint", site=f.site(), role=choices.Role.TECHNICIAN)
    from rest_framework.test import APIClient

    c = APIClient()
    r = c.post("/api/token/", {"username": "maint", "password": f.PASSWORD}, format="json")
    assert r.status_code == 200 and r.json()["token"]
    # a new user name each time, so the address limit answers, not the lock on one name
    codes = [c.post("/api/token/", {"username": f"maint{i}", "password": "wrong"},
                    format="json").status_code for i in range(12)]
    assert codes[:9] == [400] * 9 and codes[-1] == 429


def test_session_login_works_and_schema_needs_login(client):
    f.user("ann", site=f.site(), role=choices.Role.AUDITOR)
    assert client.get("/api/schema/").status_code in (401, 403)
    client.post("/accounts/login/", {"username": "ann", "password": f.PASSWORD})
    assert client.get("/api/sifs/").status_code == 200
    assert client.get("/api/schema/").status_code == 200
    docs = client.get("/api/docs/")
    assert docs.status_code == 200 and b"/api/docs/assets/swagger-ui-bundle.js" in docs.content
    assert client.get("/api/docs/assets/swagger-ui.css").status_code == 200


def test_an_auditor_asks_for_a_pack_and_downloads_it(django_capture_on_commit_callbacks):
    import io
    import zipfile

    world = build_world()
    client = world.client("auditor")
    with django_capture_on_commit_callbacks(execute=True):
        r = client.post("/api/evidence-packs/", {
            "scope": "sif", "site": world.own.site.pk, "sif": world.own.sif.pk,
            "period_start": "2020-01-01", "period_end": timezone.localdate().isoformat()},
            format="json")
    assert r.status_code == 201, r.content
    detail = client.get(f"/api/evidence-packs/{r.json()['id']}/").json()
    assert detail["status"] == "done" and detail["download"]
    zipped = client.get(detail["download"])
    assert zipped.status_code == 200
    names = zipfile.ZipFile(io.BytesIO(b"".join(zipped.streaming_content))).namelist()
    assert {"report.pdf", "manifest.json", "tests.csv"} <= set(names)
    # A unit of another site cannot be named.
    r = client.post("/api/evidence-packs/", {
        "scope": "unit", "site": world.own.site.pk, "unit": world.other.unit.pk,
        "period_start": "2020-01-01", "period_end": "2021-01-01"}, format="json")
    assert r.status_code == 400 and "unit" in r.json()
