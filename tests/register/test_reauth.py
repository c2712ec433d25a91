"""Every signature, countersignature, deferral decision, bypass authorisation, bulk result
and import asks for the person's password again, on the web and through the API; a missing
or wrong one is refused naming the password field and writes nothing. Nobody decides their
own deferral or authorises their own bypass. A write names only objects of its own SIF."""

from __future__ import annotations

import datetime as dt

import pytest
from django.core.cache import cache
from django.core.exceptions import ValidationError
from django.db import transaction
from django.test import Client
from django.urls import reverse
from django.utils import timezone
from rest_framework.test import APIClient

from register import choices, services
from register.models import (
    Bypass,
    ChainEntry,
    Component,
    Deferral,
    Demand,
    Membership,
    SafetyFunction,
    TestPlan,
    TestRecord,
    TestStep,
)
from tests import factories as f
from tests.api import build_world
from tests.register.test_spreadsheet import _csv

pytestmark = pytest.mark.django_db

MISSING, WRONG = None, "not-the-password-1"


@pytest.fixture(scope="module")
def world(django_db_setup, django_db_blocker):
    """The API tests' two-site plant, built once; each test runs in a savepoint of it."""
    with django_db_blocker.unblock(), transaction.atomic():
        w = build_world()
        # a lead at both sites: he can see (and so name) the other site's objects
        w.users["both"] = f.user("both", site=w.own.site, role=choices.Role.LEAD)
        Membership.objects.create(user=w.users["both"], site=w.other.site,
                                  role=choices.Role.LEAD)
        w.second = f.sif(w.own.unit, tag="SIF-200")  # another SIF at the same site
        yield w
        transaction.set_rollback(True)


@pytest.fixture(autouse=True)
def _fresh_throttle():
    cache.clear()


def _api(user) -> APIClient:
    c = APIClient()
    c.force_authenticate(user)
    return c


def _web(user) -> Client:
    c = Client()
    c.force_login(user)
    return c


def _with(password) -> dict:
    return {} if password is None else {"password": password}


def _refused(response, status=400):
    assert response.status_code == status, response.content[:400]
    body = response.json() if response["Content-Type"].startswith("application/json") \
        else None
    if body is not None:
        assert "password" in body, body
    return response


# --- API: every signing path asks for the password -------------------------------------


def _draft(world):
    comp = world.own.components[0]
    return services.save_draft(
        user=world.users["technician"], sif=world.own.sif, plan=world.own.plan,
        kind=choices.TestKind.FULL, performed_at=timezone.now() - dt.timedelta(hours=4),
        results=[services.ResultInput(component=comp, as_found="pass", as_left="pass")])


@pytest.mark.parametrize("password", [MISSING, WRONG, ""])
def test_api_sign_and_verify_refuse_a_missing_or_wrong_password(world, password):
    draft = _draft(world)
    before = ChainEntry.objects.count()
    _refused(_api(world.users["technician"]).post(
        f"/api/test-records/{draft.pk}/sign/", _with(password), format="json"))
    _refused(_api(world.users["verifier"]).post(
        f"/api/test-records/{world.own.signed.pk}/verify/", _with(password), format="json"))
    assert ChainEntry.objects.count() == before
    assert TestRecord.objects.get(pk=draft.pk).status == choices.RecordStatus.DRAFT
    assert TestRecord.objects.get(pk=world.own.signed.pk).verified_by is None


def _bulk_item(world, key):
    return {"client_key": key, "sif": world.own.sif.pk, "kind": "full",
            "performed_at": (timezone.now() - dt.timedelta(hours=2)).isoformat(),
            "results": [{"component": c.pk, "as_found": "pass", "as_left": "pass"}
                        for c in world.own.components]}


@pytest.mark.parametrize("body", ["list", "no password", "wrong", "empty"])
def test_api_bulk_refuses_without_the_performers_password(world, body):
    items = [_bulk_item(world, "cmms-1"), _bulk_item(world, "cmms-2")]
    sent = {"list": items, "no password": {"results": items},
            "wrong": {"password": WRONG, "results": items},
            "empty": {"password": "", "results": items}}[body]
    before = (TestRecord.objects.count(), ChainEntry.objects.count())
    r = _refused(_api(world.users["technician"]).post("/api/test-results/bulk/", sent,
                                                      format="json"))
    assert r.json()["password"]  # a message for the password field
    assert (TestRecord.objects.count(), ChainEntry.objects.count()) == before


def test_api_bulk_with_the_password_signs_every_item_in_the_performers_name(world):
    tech = world.users["technician"]
    r = _api(tech).post("/api/test-results/bulk/", {
        "password": f.PASSWORD, "results": [_bulk_item(world, "cmms-3"),
                                            _bulk_item(world, "cmms-4")]}, format="json")
    assert r.status_code == 201, r.content
    stored = TestRecord.objects.filter(client_key__in=["cmms-3", "cmms-4"])
    assert stored.count() == 2
    assert {(s.status, s.performed_by_id) for s in stored} == {
        (choices.RecordStatus.SIGNED, tech.pk)}


@pytest.mark.parametrize("password", [MISSING, WRONG])
def test_api_authorise_and_decide_refuse_a_missing_or_wrong_password(world, password):
    lead = _api(world.users["lead"])
    before = ChainEntry.objects.count()
    _refused(lead.post(f"/api/bypasses/{world.own.bypass.pk}/authorise/", _with(password),
                       format="json"))
    _refused(lead.post(f"/api/deferrals/{world.own.deferral.pk}/decide/",
                       {"approve": True, "note": "ok", **_with(password)}, format="json"))
    assert ChainEntry.objects.count() == before
    assert Bypass.objects.get(pk=world.own.bypass.pk).authorised_by is None
    assert Deferral.objects.get(pk=world.own.deferral.pk).status == \
        choices.DeferralStatus.PENDING


def test_api_authorise_and_decide_with_the_password(world):
    lead = _api(world.users["lead"])
    r = lead.post(f"/api/bypasses/{world.own.bypass.pk}/authorise/",
                  {"password": f.PASSWORD}, format="json")
    assert r.status_code == 200 and r.json()["authorised_by"] == world.users["lead"].pk
    r = lead.post(f"/api/deferrals/{world.own.deferral.pk}/decide/",
                  {"approve": False, "note": "Test on time", "password": f.PASSWORD},
                  format="json")
    assert r.status_code == 200 and r.json()["status"] == choices.DeferralStatus.REJECTED


def test_the_password_proof_of_one_person_does_not_sign_for_another(world):
    draft = _draft(world)
    proof = services.confirm_password(world.users["lead"], f.PASSWORD)
    with pytest.raises(ValidationError) as exc:
        services.sign_record(draft, world.users["technician"], proof)
    assert "password" in exc.value.message_dict
    assert TestRecord.objects.get(pk=draft.pk).status == choices.RecordStatus.DRAFT


# --- Web: the decision, authorisation and import forms ---------------------------------


@pytest.mark.parametrize("password", ["", WRONG])
def test_web_decision_asks_for_the_password_and_keeps_the_form(world, password):
    url = reverse("deferrals:decide", args=[world.own.deferral.pk])
    web = _web(world.users["lead"])
    assert 'name="password"' in web.get(url).content.decode()
    resp = web.post(url, {"decision": "approve", "note": "Risk accepted",
                          "password": password})
    assert resp.status_code == 400
    html = resp.content.decode()
    assert 'id="err_password"' in html and "password" in html
    assert "Risk accepted" in html  # the note stays
    assert Deferral.objects.get(pk=world.own.deferral.pk).status == \
        choices.DeferralStatus.PENDING
    resp = web.post(url, {"decision": "approve", "note": "Risk accepted",
                          "password": f.PASSWORD})
    assert resp.status_code == 302
    assert Deferral.objects.get(pk=world.own.deferral.pk).status == \
        choices.DeferralStatus.APPROVED


def test_the_sif_pages_decision_form_asks_for_the_password(world):
    html = _web(world.users["lead"]).get(
        reverse("register:sif_detail", args=[world.own.sif.pk])).content.decode()
    form = html[html.index(reverse("deferrals:decide", args=[world.own.deferral.pk])):]
    assert 'type="password" name="password"' in form[:form.index("</form>")]


@pytest.mark.parametrize("password", ["", WRONG])
def test_web_bypass_authorisation_asks_for_the_password(world, password):
    url = f"/operations/bypasses/{world.own.bypass.pk}/authorise/"
    web = _web(world.users["lead"])
    resp = web.post(url, {"confirm": "yes", "password": password})
    assert resp.status_code == 400 and "password" in resp.content.decode()
    assert Bypass.objects.get(pk=world.own.bypass.pk).authorised_by is None
    assert web.post(url, {"confirm": "yes", "password": f.PASSWORD}).status_code == 302
    assert Bypass.objects.get(pk=world.own.bypass.pk).authorised_by == world.users["lead"]


def test_import_confirm_asks_for_the_password_and_keeps_the_checked_file(world):
    from django.core.files.uploadedfile import SimpleUploadedFile

    sif = world.own.sif
    rows = [{"record": "sif", "unit": world.own.unit.code, "sif_tag": sif.tag,
             "sif_name": "Renamed by import", "safe_state": sif.safe_state,
             "target_sil": str(sif.target_sil), "target_pfd_avg": str(sif.target_pfd_avg),
             "in_service_on": sif.in_service_on.isoformat()}]
    web = _web(world.users["lead"])
    resp = web.post("/import/", {"step": "check", "site": world.own.site.pk,
                                 "reference": "CR-90", "file": SimpleUploadedFile(
                                     "c.csv", _csv(rows), content_type="text/csv")})
    assert resp.status_code == 200 and 'id="id_import_password"' in resp.content.decode()
    before = ChainEntry.objects.count()
    for password in ("", WRONG):
        resp = web.post("/import/", {"step": "confirm", "password": password})
        assert resp.status_code == 400
        assert 'id="err_import_password"' in resp.content.decode()
        assert "Confirm the import" in resp.content.decode()  # the checked file stays ready
    assert ChainEntry.objects.count() == before
    assert SafetyFunction.objects.get(pk=sif.pk).name != "Renamed by import"
    resp = web.post("/import/", {"step": "confirm", "password": f.PASSWORD})
    assert resp.status_code == 302
    assert SafetyFunction.objects.get(pk=sif.pk).name == "Renamed by import"


# --- Separation of duties ---------------------------------------------------------------


def test_nobody_approves_their_own_deferral_even_with_the_password(world):
    lead = world.users["lead"]
    own = Deferral.objects.create(
        plan=world.own.plan, due_on=world.own.deferral.due_on + dt.timedelta(days=1),
        proposed_on=world.own.deferral.proposed_on, reason="Asked by the lead",
        requested_by=lead)
    r = _api(lead).post(f"/api/deferrals/{own.pk}/decide/",
                        {"approve": True, "note": "", "password": f.PASSWORD}, format="json")
    assert r.status_code == 400 and "decided_by" in r.json()
    resp = _web(lead).post(reverse("deferrals:decide", args=[own.pk]),
                           {"decision": "approve", "password": f.PASSWORD})
    assert resp.status_code == 400
    assert Deferral.objects.get(pk=own.pk).status == choices.DeferralStatus.PENDING


def test_nobody_authorises_their_own_bypass_even_with_the_password(world):
    lead = world.users["lead"]
    own = services.open_bypass(user=lead, sif=world.second,
                               started_at=timezone.now() - dt.timedelta(hours=1),
                               authorised_hours=4, reason="Lead's own bypass")
    r = _api(lead).post(f"/api/bypasses/{own.pk}/authorise/", {"password": f.PASSWORD},
                        format="json")
    assert r.status_code == 400 and "authorised_by" in r.json()
    resp = _web(lead).post(f"/operations/bypasses/{own.pk}/authorise/",
                           {"confirm": "yes", "password": f.PASSWORD})
    assert resp.status_code == 400
    assert Bypass.objects.get(pk=own.pk).authorised_by is None


def test_the_server_keeps_its_own_projection_and_due_date(world):
    """A client's projected PFDavg and due date are read-only: the stored ones are the
    server's (the plan's current due date; the projection computed at the decision)."""
    lead, tech = _api(world.users["lead"]), _api(world.users["technician"])
    proposed = (timezone.localdate() + dt.timedelta(days=50)).isoformat()
    r = tech.post("/api/deferrals/", {"plan": world.second.plans.get().pk,
                                      "due_on": "2020-01-01", "projected_pfd_avg": 0.5,
                                      "proposed_on": proposed, "reason": "Spares late"},
                  format="json")
    assert r.status_code == 201, r.content
    stored = Deferral.objects.get(pk=r.json()["id"])
    assert stored.due_on.isoformat() != "2020-01-01" and stored.projected_pfd_avg is None
    r = lead.post(f"/api/deferrals/{stored.pk}/decide/",
                  {"approve": True, "note": "", "projected_pfd_avg": 0.5,
                   "password": f.PASSWORD}, format="json")
    assert r.status_code == 200, r.content
    stored.refresh_from_db()
    assert stored.projected_pfd_avg is not None and stored.projected_pfd_avg != 0.5


# --- References: one SIF, one site -----------------------------------------------------


def _demand_body(world, **over):
    body = {"sif": world.own.sif.pk, "occurred_at": (timezone.now() - dt.timedelta(
        days=1)).isoformat(), "successful": False, "description": "Valve stuck"}
    body.update(over)
    return body


@pytest.mark.parametrize(("field", "where"), [
    ("failed_components", "other site"), ("components_exercised", "other site"),
    ("failed_components", "other SIF"), ("components_exercised", "other SIF")])
def test_a_demand_naming_a_device_of_another_site_or_sif_is_refused(world, field, where):
    foreign = (world.other.components[0] if where == "other site"
               else Component.objects.filter(subsystem__sif=world.second).first())
    own = world.own.components[0]
    refs = {"failed_components": [own.pk], field: [foreign.pk]} \
        if field == "components_exercised" else {field: [foreign.pk]}
    before = (Demand.objects.count(), ChainEntry.objects.count())
    r = _api(world.users["both"]).post("/api/demands/", _demand_body(world, **refs),
                                       format="json")
    assert r.status_code == 400, r.content
    assert list(r.json()) == [field], r.json()
    assert foreign.tag in r.json()[field][0]
    assert (Demand.objects.count(), ChainEntry.objects.count()) == before


def test_a_measurement_naming_a_step_of_another_sif_is_refused(world):
    step = TestStep.objects.create(plan=world.second.plans.get(), position=1,
                                   instruction="Read the trip value",
                                   measured_quantity="level", unit="%")
    comp = world.own.components[0]
    before = TestRecord.objects.count()
    r = _api(world.users["technician"]).post("/api/test-records/", {
        "sif": world.own.sif.pk, "kind": "full",
        "performed_at": (timezone.now() - dt.timedelta(hours=1)).isoformat(),
        "results": [{"component": comp.pk, "as_found": "pass", "as_left": "pass",
                     "measurements": [{"quantity": "level", "value": 80.0,
                                       "step": step.pk}]}]}, format="json")
    assert r.status_code == 400, r.content
    assert "results[0].measurements[0].step" in r.json(), r.json()
    assert TestRecord.objects.count() == before


def test_a_plan_scope_naming_a_device_of_another_sif_is_refused(world):
    plan = TestPlan.objects.get(pk=world.own.plan.pk)
    foreign = world.other.components[0]
    with pytest.raises(ValidationError) as exc:
        services.update_design(plan, world.users["both"], reason="scope", reference="CR-1",
                               changes={"components": [world.own.components[0], foreign]})
    assert list(exc.value.message_dict) == ["components"]
    assert foreign.tag in exc.value.message_dict["components"][0]
    assert set(plan.components.values_list("pk", flat=True)) == set(
        TestPlan.objects.get(pk=plan.pk).components.values_list("pk", flat=True))


def test_wrong_passwords_when_confirming_lock_confirming_like_sign_in(settings):
    """Five wrong re-entered passwords in a row lock confirming for that person (so a
    stolen session or token cannot guess the password by signing); the right one is then
    refused too, a new password starts again, and other people are unaffected."""
    from register.reauth import confirm_password

    cache.clear()
    site = f.site()
    tech = f.user("guessed", site=site, role=choices.Role.TECHNICIAN)
    other = f.user("other", site=site, role=choices.Role.TECHNICIAN)
    for _ in range(settings.AXES_FAILURE_LIMIT):
        with pytest.raises(ValidationError, match="not correct"):
            confirm_password(tech, "not-the-password")
    with pytest.raises(ValidationError, match="Too many wrong passwords"):
        confirm_password(tech, f.PASSWORD)
    assert confirm_password(other, f.PASSWORD).user_id == other.pk
    tech.set_password("a-new-long-password-2027")
    tech.save()
    assert confirm_password(tech, "a-new-long-password-2027").user_id == tech.pk
