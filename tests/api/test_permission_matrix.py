"""Every endpoint x every role x own / other site -> the exact status code.

Roles: lead, technician, verifier and auditor hold that role at the "own" site (north);
the outsider is the lead of the "other" site (south); anonymous sends no credentials.
Objects at a site where the user holds no role answer 404; a reference to such an object
in a request body answers 400 (it does not exist for that user).
"""

from __future__ import annotations

import datetime as dt

import pytest
from django.core.cache import cache
from django.db import transaction
from django.utils import timezone

from register.models import ChainEntry
from register.services import current_version
from tests import factories as f
from tests.api import ROLES, build_world

pytestmark = pytest.mark.django_db

# Expected codes in the order of ROLES: lead, technician, verifier, auditor, outsider, anon.
READ = ((200, 200, 200, 200, 404, 401), (404, 404, 404, 404, 200, 401))
LIST = ((200, 200, 200, 200, 200, 401),) * 2
NOT_ALLOWED = ((405, 405, 405, 405, 405, 401),) * 2
LEAD_CREATES = ((201, 403, 403, 403, 400, 401), (400, 403, 403, 403, 201, 401))
LEAD_CHANGES = ((200, 403, 403, 403, 404, 401), (404, 403, 403, 403, 200, 401))
FIELD_CREATES = ((201, 201, 403, 403, 400, 401), (400, 400, 403, 403, 201, 401))
FIELD_ACTS = ((200, 200, 403, 403, 404, 401), (404, 404, 403, 403, 200, 401))
SIGNED_REFUSED = ((409, 409, 403, 403, 404, 401), (404, 404, 403, 403, 409, 401))
CORRECTS = ((201, 201, 403, 403, 404, 401), (404, 404, 403, 403, 201, 401))
# Only the performer signs: the lead at the site is refused by the service.
SIGNS = ((403, 200, 403, 403, 404, 401), (404, 404, 403, 403, 200, 401))
# Lead and verifier countersign; at the other site the outsider performed the test.
VERIFIES = ((200, 403, 200, 403, 404, 401), (404, 403, 404, 403, 400, 401))
OWN_ONLY = ((200, 200, 200, 200, 200, 401), (404, 404, 404, 404, 404, 401))
# Evidence packs: the export right (lead, verifier, auditor) at the pack's site.
EXPORT_READ = ((200, 404, 200, 200, 404, 401), (404, 404, 404, 404, 200, 401))
EXPORT_CREATES = ((201, 403, 201, 201, 400, 401), (400, 403, 400, 400, 201, 401))
# A signing grant: whoever may record tests somewhere (it signs nothing by itself).
GRANTS = ((200, 200, 403, 403, 200, 401),) * 2
# The lead decides a deferral (and authorises a bypass); at the other site the outsider
# asked for it himself, and the decider is never the requester.
DECIDES = ((200, 403, 403, 403, 404, 401), (404, 403, 403, 403, 400, 401))


def _ago(**kw):
    return (timezone.now() - dt.timedelta(**kw)).isoformat()


def _design(extra):
    return {**extra, "change_reason": "New trip added", "change_reference": "CR-42"}


def _change(obj, extra):
    """A design change based on the record's current version."""
    return _design({**extra, "expected_version": current_version(obj)})


# (name, method, url(place, world, role), body(place) or None, expected)
TABLE = [
    ("sites list", "get", lambda p, w, r: "/api/sites/", None, LIST),
    ("sites detail", "get", lambda p, w, r: f"/api/sites/{p.site.pk}/", None, READ),
    ("sites create", "post", lambda p, w, r: "/api/sites/", lambda p: {"code": "x"},
     NOT_ALLOWED),
    ("sites update", "patch", lambda p, w, r: f"/api/sites/{p.site.pk}/",
     lambda p: {"name": "x"}, NOT_ALLOWED),
    ("sites delete", "delete", lambda p, w, r: f"/api/sites/{p.site.pk}/", None, NOT_ALLOWED),
    ("units list", "get", lambda p, w, r: "/api/units/", None, LIST),
    ("units detail", "get", lambda p, w, r: f"/api/units/{p.unit.pk}/", None, READ),
    ("units update", "patch", lambda p, w, r: f"/api/units/{p.unit.pk}/",
     lambda p: {"name": "x"}, NOT_ALLOWED),
    ("scenarios list", "get", lambda p, w, r: "/api/scenarios/", None, LIST),
    ("scenarios detail", "get", lambda p, w, r: f"/api/scenarios/{p.scenario.pk}/", None,
     READ),
    ("scenarios delete", "delete", lambda p, w, r: f"/api/scenarios/{p.scenario.pk}/", None,
     NOT_ALLOWED),
    ("device types list", "get", lambda p, w, r: "/api/device-types/", None, LIST),
    ("device types detail", "get",
     lambda p, w, r: f"/api/device-types/{p.components[0].device_type_id}/", None, LIST),
    ("device types create", "post", lambda p, w, r: "/api/device-types/",
     lambda p: {"name": "x"}, NOT_ALLOWED),
    ("sifs list", "get", lambda p, w, r: "/api/sifs/", None, LIST),
    ("sifs detail", "get", lambda p, w, r: f"/api/sifs/{p.sif.pk}/", None, READ),
    ("sifs create", "post", lambda p, w, r: "/api/sifs/", lambda p: _design({
        "unit": p.unit.pk, "tag": "SIF-NEW", "name": "Low flow trip",
        "safe_state": "Pump stopped", "target_sil": 2, "target_pfd_avg": 5e-3}),
     LEAD_CREATES),
    ("sifs update", "patch", lambda p, w, r: f"/api/sifs/{p.sif.pk}/",
     lambda p: _change(p.sif, {"name": "High high level trip"}), LEAD_CHANGES),
    ("sifs delete", "delete", lambda p, w, r: f"/api/sifs/{p.sif.pk}/", None, NOT_ALLOWED),
    ("subsystems list", "get", lambda p, w, r: "/api/subsystems/", None, LIST),
    ("subsystems detail", "get", lambda p, w, r: f"/api/subsystems/{p.subsystem.pk}/", None,
     READ),
    ("subsystems create", "post", lambda p, w, r: "/api/subsystems/", lambda p: _design({
        "sif": p.sif.pk, "role": "logic", "name": "Logic solver", "voting": "1oo1"}),
     LEAD_CREATES),
    ("subsystems update", "patch", lambda p, w, r: f"/api/subsystems/{p.subsystem.pk}/",
     lambda p: _change(p.subsystem, {"mttr_hours": 12}), LEAD_CHANGES),
    ("subsystems delete", "delete", lambda p, w, r: f"/api/subsystems/{p.subsystem.pk}/",
     None, NOT_ALLOWED),
    ("components list", "get", lambda p, w, r: "/api/components/", None, LIST),
    ("components detail", "get",
     lambda p, w, r: f"/api/components/{p.components[0].pk}/", None, READ),
    ("components create", "post", lambda p, w, r: "/api/components/", lambda p: _design({
        "subsystem": p.subsystem.pk, "tag": "LT-NEW", "in_service_on": "2021-05-01",
        "device_type": p.components[0].device_type_id}), LEAD_CREATES),
    ("components update", "patch",
     lambda p, w, r: f"/api/components/{p.components[0].pk}/",
     lambda p: _change(p.components[0], {"proof_test_coverage": 0.9}), LEAD_CHANGES),
    ("components delete", "delete",
     lambda p, w, r: f"/api/components/{p.components[0].pk}/", None, NOT_ALLOWED),
    ("test plans list", "get", lambda p, w, r: "/api/test-plans/", None, LIST),
    ("test plans detail", "get", lambda p, w, r: f"/api/test-plans/{p.plan.pk}/", None, READ),
    ("test plans create", "post", lambda p, w, r: "/api/test-plans/", lambda p: _design({
        "sif": p.sif.pk, "name": "Valve stroke test", "kind": "partial",
        "interval_months": 3, "coverage": 0.6}), LEAD_CREATES),
    ("test plans update", "patch", lambda p, w, r: f"/api/test-plans/{p.plan.pk}/",
     lambda p: _change(p.plan, {"interval_months": 24}), LEAD_CHANGES),
    ("test plans delete", "delete", lambda p, w, r: f"/api/test-plans/{p.plan.pk}/", None,
     NOT_ALLOWED),
    ("test records list", "get", lambda p, w, r: "/api/test-records/", None, LIST),
    ("test records detail", "get", lambda p, w, r: f"/api/test-records/{p.signed.pk}/",
     None, READ),
    ("test records create", "post", lambda p, w, r: "/api/test-records/", lambda p: {
        "sif": p.sif.pk, "plan": p.plan.pk, "kind": "full", "performed_at": _ago(hours=5),
        "results": [{"component": c.pk, "as_found": "pass", "as_left": "pass"}
                    for c in p.components]}, FIELD_CREATES),
    ("signed record update", "patch", lambda p, w, r: f"/api/test-records/{p.signed.pk}/",
     lambda p: {"remarks": "changed afterwards"}, SIGNED_REFUSED),
    ("signed record replace", "put", lambda p, w, r: f"/api/test-records/{p.signed.pk}/",
     lambda p: {"sif": p.sif.pk, "kind": "full", "performed_at": _ago(days=9),
                "results": [{"component": p.components[0].pk, "as_found": "fail",
                             "as_left": "pass"}]}, SIGNED_REFUSED),
    ("signed record delete", "delete", lambda p, w, r: f"/api/test-records/{p.signed.pk}/",
     None, SIGNED_REFUSED),
    ("draft sign", "post", lambda p, w, r: f"/api/test-records/{p.draft.pk}/sign/",
     lambda p: {"password": f.PASSWORD}, SIGNS),
    ("record verify", "post", lambda p, w, r: f"/api/test-records/{p.signed.pk}/verify/",
     lambda p: {"password": f.PASSWORD}, VERIFIES),
    ("record correction", "post",
     lambda p, w, r: f"/api/test-records/{p.signed.pk}/correction/",
     lambda p: {"reason": "Wrong component ticked"}, CORRECTS),
    ("bulk results", "post", lambda p, w, r: "/api/test-results/bulk/", lambda p: {
        "password": f.PASSWORD, "results": [{
            "client_key": f"cmms-{p.site.code}-1", "sif_tag": p.sif.tag, "site": p.site.code,
            "kind": "full", "performed_at": _ago(hours=2),
            "results": [{"component_tag": c.tag, "as_found": "pass", "as_left": "pass"}
                        for c in p.components]}]}, FIELD_CREATES),
    ("signing grant", "post", lambda p, w, r: "/api/signing-grant/",
     lambda p: {"password": f.PASSWORD}, GRANTS),
    ("demands list", "get", lambda p, w, r: "/api/demands/", None, LIST),
    ("demands detail", "get", lambda p, w, r: f"/api/demands/{p.demand.pk}/", None, READ),
    ("demands create", "post", lambda p, w, r: "/api/demands/", lambda p: {
        "sif": p.sif.pk, "occurred_at": _ago(days=1), "successful": True,
        "description": "Trip on high level", "components_exercised": [p.components[0].pk]},
     FIELD_CREATES),
    ("demands update", "patch", lambda p, w, r: f"/api/demands/{p.demand.pk}/",
     lambda p: {"description": "x"}, NOT_ALLOWED),
    ("demands delete", "delete", lambda p, w, r: f"/api/demands/{p.demand.pk}/", None,
     NOT_ALLOWED),
    ("bypasses list", "get", lambda p, w, r: "/api/bypasses/", None, LIST),
    ("bypasses detail", "get", lambda p, w, r: f"/api/bypasses/{p.bypass.pk}/", None, READ),
    ("bypasses create", "post", lambda p, w, r: "/api/bypasses/", lambda p: {
        "sif": p.sif.pk, "component": p.components[0].pk, "started_at": _ago(hours=1),
        "authorised_hours": 4, "reason": "Valve maintenance"}, FIELD_CREATES),
    ("bypasses authorise", "post",
     lambda p, w, r: f"/api/bypasses/{p.bypass.pk}/authorise/",
     lambda p: {"password": f.PASSWORD}, DECIDES),
    ("bypasses close", "post", lambda p, w, r: f"/api/bypasses/{p.bypass.pk}/close/",
     lambda p: {}, FIELD_ACTS),
    ("bypasses delete", "delete", lambda p, w, r: f"/api/bypasses/{p.bypass.pk}/", None,
     NOT_ALLOWED),
    ("deferrals list", "get", lambda p, w, r: "/api/deferrals/", None, LIST),
    ("deferrals detail", "get", lambda p, w, r: f"/api/deferrals/{p.deferral.pk}/", None,
     READ),
    ("deferrals create", "post", lambda p, w, r: "/api/deferrals/", lambda p: {
        "plan": p.plan.pk, "due_on": "2030-01-01",  # the server sets the due date
        "proposed_on": (timezone.localdate() + dt.timedelta(days=45)).isoformat(),
        "reason": "Shutdown moved by six weeks"}, FIELD_CREATES),
    ("deferrals decide", "post", lambda p, w, r: f"/api/deferrals/{p.deferral.pk}/decide/",
     lambda p: {"approve": True, "note": "Risk acceptable", "password": f.PASSWORD},
     DECIDES),
    ("deferrals update", "patch", lambda p, w, r: f"/api/deferrals/{p.deferral.pk}/",
     lambda p: {"reason": "x"}, NOT_ALLOWED),
    ("assessments list", "get", lambda p, w, r: "/api/assessments/", None, LIST),
    ("assessments detail", "get", lambda p, w, r: f"/api/assessments/{p.assessment.pk}/",
     None, READ),
    ("assessments delete", "delete",
     lambda p, w, r: f"/api/assessments/{p.assessment.pk}/", None, NOT_ALLOWED),
    # Notifications: "own" is the user's own message, "other" somebody else's.
    ("notifications list", "get", lambda p, w, r: "/api/notifications/", None, LIST),
    ("notifications detail", "get", lambda p, w, r: f"/api/notifications/{_note(w, r, p)}/",
     None, OWN_ONLY),
    ("notifications read", "post",
     lambda p, w, r: f"/api/notifications/{_note(w, r, p)}/read/", lambda p: {}, OWN_ONLY),
    ("evidence packs list", "get", lambda p, w, r: "/api/evidence-packs/", None, LIST),
    ("evidence packs detail", "get", lambda p, w, r: f"/api/evidence-packs/{p.pack.pk}/",
     None, EXPORT_READ),
    ("evidence packs create", "post", lambda p, w, r: "/api/evidence-packs/",
     lambda p: {"scope": "site", "site": p.site.pk, "period_start": "2025-01-01",
                "period_end": "2025-12-31"}, EXPORT_CREATES),
    ("evidence packs delete", "delete", lambda p, w, r: f"/api/evidence-packs/{p.pack.pk}/",
     None, NOT_ALLOWED),
]


def _note(world, role, place):
    mine = place is world.own
    if role == "anonymous":
        return world.notes["lead"].pk
    if mine:
        return world.notes[role].pk
    other = "technician" if role != "technician" else "auditor"
    return world.notes[other].pk


CASES = [
    pytest.param(row, role, where, row[4][where == "other"][ROLES.index(role)],
                 id=f"{row[0]}-{role}-{where}")
    for row in TABLE for role in ROLES for where in ("own", "other")
    if not (row[4][0] == row[4][1] and where == "other")  # site-independent rows once
]


@pytest.fixture(scope="module")
def world(django_db_setup, django_db_blocker):
    """One two-site world for the whole table, built once; each case runs in its own
    savepoint inside it and is rolled back, and the world is rolled back at the end."""
    with django_db_blocker.unblock(), transaction.atomic():
        yield build_world()
        transaction.set_rollback(True)


@pytest.mark.parametrize(("row", "role", "where", "expected"), CASES)
def test_status(world, row, role, where, expected):
    cache.clear()  # throttling counters
    place = world.own if where == "own" else world.other
    name, method, url, body, _ = row
    client = world.client(role)
    kwargs = {"format": "json"}
    if body is not None:
        kwargs["data"] = body(place)
    before = ChainEntry.objects.count()
    response = getattr(client, method)(url(place, world, role), **kwargs)
    assert response.status_code == expected, (name, role, where, response.content[:400])
    if expected >= 400:  # a refused request wrote nothing (every write appends to the chain)
        assert ChainEntry.objects.count() == before, (name, role, where)
