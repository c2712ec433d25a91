"""The operations log: bypasses (asked for, authorised by another lead, closed), demands and
spurious trips with what each device did, the observed demand and trip rates, and the
findings of failures found until a signed passing retest closes them. Pages, services, the
API and the evidence pack, on the real database; the world is built once for the module."""

from __future__ import annotations

import csv
import datetime as dt
import io
import json
import math
from types import SimpleNamespace

import pytest
from django.core.exceptions import PermissionDenied, ValidationError
from django.db import IntegrityError, transaction
from django.test import Client
from django.utils import timezone
from rest_framework.test import APIClient

from calcs import adapter
from register import choices, services
from register.audit import chain as audit
from register.audit import evidence
from register.days import start_of_day
from register.models import (
    Bypass,
    ChainEntry,
    Component,
    Demand,
    EvidencePack,
    Finding,
    SafetyFunction,
    TestPlan,
)
from register.operations import services as findings
from register.operations.rates import observed_rates
from tests import factories as f
from tests.register.test_evidence_pack import _pdf_text, _unzip

pytestmark = pytest.mark.django_db

Auth = choices.BypassAuthorisation
HOURS_PER_YEAR = 8760.0  # 1 year = 8760 h, the project's convention (DEVELOPERS.md)


@pytest.fixture(scope="module")
def world(django_db_setup, django_db_blocker):
    """Two sites; at north a lead (first lead, so the default finding owner), a second
    lead, a technician, a verifier and an auditor; the outsider leads south."""
    with django_db_blocker.unblock(), transaction.atomic():
        north, south = f.site("north"), f.site("south")
        unit = f.unit(north, "U1")
        today = timezone.localdate()
        started = today - dt.timedelta(days=3 * 365)
        w = SimpleNamespace(
            north=north, south=south, unit=unit, today=today, started=started,
            lead=f.user("lead", site=north, role=choices.Role.LEAD),
            lead2=f.user("lead2", site=north, role=choices.Role.LEAD),
            tech=f.user("tech", site=north, role=choices.Role.TECHNICIAN),
            verifier=f.user("verifier", site=north, role=choices.Role.VERIFIER),
            auditor=f.user("auditor", site=north, role=choices.Role.AUDITOR),
            outsider=f.user("outsider", site=south, role=choices.Role.LEAD))
        w.sif = f.sif(unit, tag="U1-SIF-101", in_service=started)
        w.owned = f.sif(unit, tag="U1-SIF-102", in_service=started, owner=w.lead2)
        w.far = f.sif(f.unit(south, "S1"), tag="S1-SIF-900", in_service=started)
        w.lt, w.xv = _devices(w.sif)
        yield w
        transaction.set_rollback(True)


def _devices(sif):
    comps = list(Component.objects.filter(subsystem__sif=sif).order_by("subsystem__position"))
    return comps[0], comps[-1]


def _client(user) -> Client:
    c = Client()
    c.force_login(user)
    return c


def _ago(**kw) -> dt.datetime:
    return timezone.now() - dt.timedelta(**kw)


def _local(moment: dt.datetime) -> str:
    return timezone.localtime(moment).strftime("%Y-%m-%dT%H:%M")


def _bypass(w, user=None, sif=None, **kw):
    values = {"started_at": _ago(hours=2), "authorised_hours": 8.0,
              "reason": "Transmitter swap", "compensating_measures": "Operator at gauge"}
    values.update(kw)
    return services.open_bypass(user=user or w.tech, sif=sif or w.sif, **values)


def _record(w, kind, when, *, fail=None, sif=None, user=None):
    """Sign a record of every device of the SIF; ``fail``: the device found failed DU."""
    sif = sif or w.sif
    user = user or w.tech
    results = [services.ResultInput(
        component=c, as_found="fail" if c == fail else "pass", as_left="pass",
        failure_mode="du" if c == fail else "",
        failure_description="Valve stuck open as found" if c == fail else "",
        work_done="Solenoid replaced, valve re-stroked" if c == fail else "")
        for c in Component.objects.filter(subsystem__sif=sif)]
    rec = services.save_draft(user=user, sif=sif, kind=kind, performed_at=when,
                              results=results)
    return services.sign_record(rec, user, f.PASSWORD)


# ---------------------------------------------------------------------------------------
# Bypasses
# ---------------------------------------------------------------------------------------


def test_a_bypass_waits_until_a_lead_who_did_not_ask_authorises_it(world):
    w = world
    chain_before = ChainEntry.objects.count()
    b = _bypass(w)
    assert (b.requested_by, b.authorised_by, b.authorised_at) == (w.tech, None, None)
    assert b.authorisation == Auth.PENDING
    with pytest.raises(PermissionDenied):
        services.authorise_bypass(b, w.tech)  # technicians do not authorise
    own = _bypass(w, user=w.lead, sif=w.owned)
    with pytest.raises(ValidationError) as refused:
        services.authorise_bypass(own, w.lead)
    assert "another lead" in refused.value.message_dict["authorised_by"][0]
    own.refresh_from_db()
    assert own.authorised_by is None

    done = services.authorise_bypass(b, w.lead, f.PASSWORD)
    assert done.authorised_by == w.lead and done.authorisation == Auth.AUTHORISED
    assert abs((done.authorised_at - timezone.now()).total_seconds()) < 60
    with pytest.raises(ValidationError, match="already authorised"):
        services.authorise_bypass(b, w.lead2, f.PASSWORD)
    reasons = list(Bypass.history.filter(id=b.pk).order_by("history_id").values_list(
        "history_change_reason", "history_user"))
    assert reasons == [("bypass opened", w.tech.pk), ("bypass authorised", w.lead.pk)]
    assert ChainEntry.objects.count() == chain_before + 3  # two opened, one authorised
    assert audit.verify_chain().ok
    # The database refuses a requester as authoriser too (a write that skips the service).
    with pytest.raises(IntegrityError), transaction.atomic():
        Bypass.objects.filter(pk=own.pk).update(authorised_by=w.lead,
                                                authorised_at=timezone.now())


@pytest.mark.parametrize(("hours", "message"), [
    (0, "more than 0 h"), (-4, "more than 0 h"), (math.nan, "number of hours"),
    (math.inf, "number of hours"), (-math.inf, "number of hours"), (720.5, "At most 720 h"),
    (1e9, "At most 720 h")])
def test_absurd_durations_are_refused_with_a_message(world, hours, message):
    before = Bypass.objects.count()
    with pytest.raises(ValidationError) as refused:
        _bypass(world, authorised_hours=hours)
    assert message in refused.value.message_dict["authorised_hours"][0]
    assert Bypass.objects.count() == before


def test_the_longest_authorisation_is_thirty_days(world):
    assert _bypass(world, authorised_hours=720).authorised_hours == 720


def test_bypass_time_counts_from_its_start_authorised_or_not(world):
    """A bypass in place disables the function whether or not the paperwork is done, so
    its time counts from ``started_at`` either way (common practice, no source)."""
    w = world
    sif = f.sif(w.unit, tag="U1-SIF-150", in_service=w.started)
    start = _ago(hours=10)
    b = _bypass(w, sif=sif, started_at=start, authorised_hours=12, compensating_measures="")
    as_of = start + dt.timedelta(hours=10)
    pending = adapter.recompute_many(SafetyFunction.objects.filter(pk=sif.pk), trigger="t",
                                     as_of=as_of)[0]
    assert pending.detail["bypass_hours_12m"] == pytest.approx(10.0, abs=1e-6)
    services.authorise_bypass(b, w.lead, f.PASSWORD)
    authorised = adapter.recompute_many(SafetyFunction.objects.filter(pk=sif.pk),
                                        trigger="t", as_of=as_of)[0]
    assert authorised.detail["bypass_hours_12m"] == pending.detail["bypass_hours_12m"]
    assert authorised.observed_unavailability == pending.observed_unavailability > 0


def test_closing_records_who_and_when_and_whether_it_ran_over(world):
    w = world
    b = _bypass(w, started_at=_ago(hours=5), authorised_hours=2)
    with pytest.raises(ValidationError) as future:
        services.close_bypass(b, w.tech, ended_at=_ago(hours=-3))
    assert "future" in future.value.message_dict["ended_at"][0]
    with pytest.raises(ValidationError) as early:
        services.close_bypass(b, w.tech, ended_at=_ago(hours=6))
    assert "before it starts" in early.value.message_dict["ended_at"][0]
    closed = services.close_bypass(b, w.tech, ended_at=_ago(hours=1))
    assert closed.closed_by == w.tech
    # 4 h in place against 2 h authorised (hand computation)
    assert closed.duration_hours(timezone.now()) == pytest.approx(4.0, abs=1e-3)
    assert closed.ran_over(timezone.now()) and closed.authorisation == Auth.NONE
    with pytest.raises(ValidationError, match="has ended"):
        services.authorise_bypass(closed, w.lead)
    short = _bypass(w, started_at=_ago(hours=3), authorised_hours=8, component=w.xv)
    assert not services.close_bypass(short, w.lead, ended_at=_ago(hours=1)).ran_over(
        timezone.now())


def test_the_operations_page_lists_what_the_overview_counts_as_open(world):
    w = world
    _bypass(w)
    services.authorise_bypass(_bypass(w, sif=w.owned), w.lead, f.PASSWORD)
    services.close_bypass(_bypass(w, sif=w.owned, started_at=_ago(hours=30),
                                  component=_devices(w.owned)[0]), w.tech,
                          ended_at=_ago(hours=29))
    _bypass(w, user=w.outsider, sif=w.far)
    for user, expected in ((w.lead, 2), (w.auditor, 2), (w.outsider, 1)):
        c = _client(user)
        overview = sum(s["total"].bypasses for s in c.get("/").context["sites"])
        page = c.get("/operations/")
        assert page.status_code == 200
        assert overview == len(page.context["bypass_rows"]) == expected, user
    rows = _client(w.lead).get("/operations/").context["bypass_rows"]
    assert rows[0]["auth"]["label"] == "Awaiting authorisation"  # the pending one first


def test_the_bypass_form_refuses_bad_input_and_keeps_what_was_typed(world):
    w = world
    c = _client(w.tech)
    url = f"/operations/sifs/{w.sif.pk}/bypass/"
    assert c.get(url).status_code == 200
    form = {"component": str(w.lt.pk), "started_at": _local(_ago(minutes=30)),
            "authorised_hours": "NaN", "reason": "Replace LT-101 electronics board",
            "compensating_measures": "Operator watches the local sight glass"}
    for hours, message in (("NaN", "number of hours"), ("Infinity", "number of hours"),
                           ("1e9", "At most 720 h"), ("0", "more than 0 h"),
                           ("eight", "number of hours")):
        resp = c.post(url, {**form, "authorised_hours": hours})
        page = resp.content.decode()
        assert resp.status_code == 400 and message in page, hours
        assert "Replace LT-101 electronics board" in page and "local sight glass" in page
        assert f'value="{hours}"' in page
    resp = c.post(url, {**form, "authorised_hours": "6", "started_at": _local(_ago(hours=-2))})
    assert resp.status_code == 400 and "in the future" in resp.content.decode()
    resp = c.post(url, {**form, "authorised_hours": "6", "reason": "   "})
    assert resp.status_code == 400 and "Say why the SIF is bypassed." in resp.content.decode()
    assert not Bypass.objects.filter(reason__startswith="Replace LT-101").exists()

    resp = c.post(url, {**form, "authorised_hours": "6"})
    b = Bypass.objects.get(reason__startswith="Replace LT-101")
    assert resp.status_code == 302 and resp["Location"] == f"/operations/bypasses/{b.pk}/"
    assert (b.component, b.requested_by, b.authorised_hours) == (w.lt, w.tech, 6.0)
    assert "Awaiting authorisation" in c.get(resp["Location"]).content.decode()

    lead = _client(w.lead)
    resp = lead.post(f"/operations/bypasses/{b.pk}/authorise/", {})
    assert resp.status_code == 400 and "Confirm" in resp.content.decode()
    assert c.post(f"/operations/bypasses/{b.pk}/authorise/",
                  {"confirm": "yes"}).status_code == 403
    b.refresh_from_db()
    assert b.authorised_by is None
    assert lead.post(f"/operations/bypasses/{b.pk}/authorise/",
                     {"confirm": "yes", "password": f.PASSWORD}).status_code == 302
    b.refresh_from_db()
    assert b.authorised_by == w.lead

    sif_page = lead.get(f"/sifs/{w.sif.pk}/").content.decode()
    row = sif_page[sif_page.index(f'data-bypass="{b.pk}"'):]
    row = row[:row.index("</tr>")]
    assert "Tech" in row and "Lead" in row and 'data-ran-over="no"' in row
    assert "LT-" in row and "6 h" in row

    resp = c.post(f"/operations/bypasses/{b.pk}/close/", {"ended_at": "yesterday"})
    assert resp.status_code == 400 and "date and time" in resp.content.decode()
    resp = c.post(f"/operations/bypasses/{b.pk}/close/", {"ended_at": _local(_ago(minutes=1))})
    assert resp.status_code == 302
    b.refresh_from_db()
    assert b.closed_by == w.tech and b.ended_at is not None


def test_the_api_records_the_caller_as_requester_never_as_authoriser(world):
    w = world
    api = {u: APIClient() for u in (w.tech, w.lead, w.lead2)}
    for u, c in api.items():
        c.force_authenticate(u)
    body = {"sif": w.sif.pk, "component": w.xv.pk, "started_at": _ago(hours=1).isoformat(),
            "authorised_hours": 4, "reason": "Valve actuator seal change"}
    resp = api[w.tech].post("/api/bypasses/", body, format="json")
    assert resp.status_code == 201, resp.content
    data = resp.json()
    assert (data["requested_by"], data["authorised_by"], data["authorised_at"]) == (
        w.tech.pk, None, None)
    # The authoriser cannot be sent: it is read only.
    resp = api[w.tech].post("/api/bypasses/", {**body, "sif": w.owned.pk,
                                               "component": _devices(w.owned)[1].pk,
                                               "authorised_by": w.tech.pk}, format="json")
    assert resp.status_code == 201 and resp.json()["authorised_by"] is None
    assert api[w.tech].post(f"/api/bypasses/{data['id']}/authorise/").status_code == 403
    mine = api[w.lead].post("/api/bypasses/", {**body, "sif": w.far.pk}, format="json")
    assert mine.status_code == 400  # another site's SIF does not exist for him
    mine = api[w.lead].post("/api/bypasses/", {**body, "component": w.lt.pk}, format="json")
    assert mine.status_code == 201
    refused = api[w.lead].post(f"/api/bypasses/{mine.json()['id']}/authorise/",
                              {"password": f.PASSWORD}, format="json")
    assert refused.status_code == 400 and "authorised_by" in refused.json()
    ok = api[w.lead].post(f"/api/bypasses/{data['id']}/authorise/",
                         {"password": f.PASSWORD}, format="json")
    assert ok.status_code == 200 and ok.json()["authorised_by"] == w.lead.pk
    assert api[w.lead2].post(f"/api/bypasses/{mine.json()['id']}/authorise/",
                            {"password": f.PASSWORD}, format="json").status_code == 200
    for hours in (1e9, -1, 0, "NaN"):
        resp = api[w.tech].post("/api/bypasses/", {**body, "component": None,
                                                   "authorised_hours": hours}, format="json")
        assert resp.status_code == 400 and "authorised_hours" in resp.json(), hours


# ---------------------------------------------------------------------------------------
# Demands and rates
# ---------------------------------------------------------------------------------------


def test_observed_rates_against_a_hand_computation(world):
    """Three real demands and one spurious trip in 730 days of service.

    Hand computation: 730 d x 24 h = 17,520 h = 2.0 years of 8,760 h; demand rate
    3 / 2.0 = 1.5 per year; spurious trip rate 1 / 2.0 = 0.5 per year. A demand before the
    in-service date and one after the evaluation moment do not count."""
    w = world
    since = w.today - dt.timedelta(days=800)
    sif = f.sif(w.unit, tag="U1-SIF-170", in_service=since)
    as_of = start_of_day(since + dt.timedelta(days=730))
    comps = list(Component.objects.filter(subsystem__sif=sif))
    valve = comps[-1]
    events = [(since + dt.timedelta(days=10), True, False),
              (since + dt.timedelta(days=400), False, False),
              (since + dt.timedelta(days=700), True, False),
              (since + dt.timedelta(days=500), True, True),
              (since - dt.timedelta(days=5), True, False),
              (since + dt.timedelta(days=760), True, False)]
    for day, ok, spurious in events:
        services.record_demand(
            user=w.tech, sif=sif, occurred_at=start_of_day(day) + dt.timedelta(hours=9),
            successful=ok, spurious=spurious, description="High level",
            cause=choices.DemandCause.PROCESS_UPSET,
            components_exercised=comps if ok else comps[:-1],
            failed_components=[] if ok else [valve])
    rates = observed_rates(Demand.objects.filter(sif=sif), since, as_of)
    assert rates.years == pytest.approx(730 * 24 / HOURS_PER_YEAR) == pytest.approx(2.0)
    assert (rates.real, rates.failed, rates.spurious) == (3, 1, 1)
    assert rates.demand_per_year == pytest.approx(1.5)
    assert rates.spurious_per_year == pytest.approx(0.5)

    page = _client(w.lead).get(f"/sifs/{sif.pk}/").content.decode()
    years = (timezone.now() - start_of_day(since)).total_seconds() / 3600 / HOURS_PER_YEAR
    assert f"{4 / years:.2f} /year (4 real demands, 1 failed)" in page
    assert f"{1 / years:.2f} /year (1 spurious trip)" in page


def test_a_failed_demand_from_the_phone_opens_a_finding_for_the_device(world):
    w = world
    c = _client(w.tech)
    url = f"/operations/sifs/{w.sif.pk}/demand/"
    assert c.get(url).status_code == 200
    form = {"kind": "real", "occurred_at": _local(_ago(hours=3)), "successful": "no",
            "cause": "process_upset", "description": "High level; XV-101 stayed open",
            f"dev-{w.lt.pk}": "acted", f"dev-{w.xv.pk}": "none"}
    before = (Demand.objects.count(), Finding.objects.count())
    resp = c.post(url, form)
    page = resp.content.decode()
    assert resp.status_code == 400 and "name the device or devices that failed" in page
    assert "XV-101 stayed open" in page  # nothing typed is lost
    resp = c.post(url, {**form, "cause": "", "occurred_at": "3 hours ago"})
    page = resp.content.decode()
    assert resp.status_code == 400 and "Choose the cause" in page and "date and time" in page
    assert (Demand.objects.count(), Finding.objects.count()) == before

    resp = c.post(url, {**form, f"dev-{w.xv.pk}": "failed"})
    assert resp.status_code == 302
    demand = Demand.objects.get(description="High level; XV-101 stayed open")
    assert (demand.successful, demand.spurious, demand.cause) == (False, False,
                                                                  "process_upset")
    assert list(demand.failed_components.all()) == [w.xv]
    assert list(demand.components_exercised.all()) == [w.lt]
    finding = Finding.objects.get(demand=demand)
    assert (finding.component, finding.source, finding.status, finding.owner) == (
        w.xv, "demand", "open", w.lead)  # no SIF owner: the site's first lead
    assert finding.found_at == demand.occurred_at
    assert Finding.history.get(id=finding.pk).history_user == w.tech

    page = _client(w.lead).get(f"/sifs/{w.sif.pk}/").content.decode()
    assert f'data-finding="{finding.pk}"' in page and "failed on demand" in page
    assert f"{w.xv.tag}: <strong class=\"error\">failed to act</strong>" in page


def test_a_spurious_trip_on_a_sif_without_a_plan_is_recorded(world):
    w = world
    sif = f.sif(w.unit, tag="U1-SIF-180", in_service=w.started)
    TestPlan.objects.filter(sif=sif).delete()
    lt, xv = _devices(sif)
    resp = _client(w.tech).post(f"/operations/sifs/{sif.pk}/demand/", {
        "kind": "spurious", "occurred_at": _local(_ago(hours=1)), "cause": "instrument",
        "description": "Transmitter signal spike tripped the pump",
        f"dev-{lt.pk}": "none", f"dev-{xv.pk}": "acted"})
    assert resp.status_code == 302
    d = Demand.objects.get(sif=sif)
    assert (d.spurious, d.successful, d.cause) == (True, True, "instrument")
    assert not Finding.objects.filter(demand=d).exists()
    assert list(d.components_exercised.all()) == [xv]


def test_demand_devices_must_be_the_sifs_and_act_or_fail_not_both(world):
    w = world
    other_valve = _devices(w.owned)[1]
    with pytest.raises(ValidationError) as refused:
        services.record_demand(user=w.tech, sif=w.sif, occurred_at=_ago(hours=1),
                               successful=True, description="trip",
                               components_exercised=[w.lt, other_valve],
                               failed_components=[w.lt])
    errors = refused.value.message_dict
    assert other_valve.tag in errors["components_exercised"][0]
    assert "not both" in errors["failed_components"][0]
    with pytest.raises(PermissionDenied):
        services.record_demand(user=w.verifier, sif=w.sif, occurred_at=_ago(hours=1),
                               successful=True, description="trip")


# ---------------------------------------------------------------------------------------
# Findings
# ---------------------------------------------------------------------------------------


def test_a_failure_found_is_followed_until_a_passing_retest_closes_it(world):
    w = world
    found = _record(w, choices.TestKind.FULL, _ago(days=20), fail=w.xv)
    finding = Finding.objects.get(result__record=found)
    assert (finding.component, finding.owner, finding.status) == (w.xv, w.lead, "open")
    assert finding.corrective_action == "Solenoid replaced, valve re-stroked"
    assert finding.found_at == found.performed_at
    # A partial stroke does not retest a failure a full proof test found.
    _record(w, choices.TestKind.PARTIAL, _ago(days=10))
    finding.refresh_from_db()
    assert finding.is_open
    retest = _record(w, choices.TestKind.FULL, _ago(days=2))
    finding.refresh_from_db()
    assert (finding.status, finding.retest, finding.closed_by) == ("closed", retest, w.tech)
    reasons = list(Finding.history.filter(id=finding.pk).order_by("history_id")
                   .values_list("history_change_reason", flat=True))
    assert reasons == [f"finding opened: failure found by test #{found.pk}",
                       f"finding closed: retest #{retest.pk} passed"]
    # The SIF's owner owns the findings of that SIF.
    _record(w, choices.TestKind.FULL, _ago(days=5), fail=_devices(w.owned)[1], sif=w.owned)
    assert Finding.objects.get(sif=w.owned).owner == w.lead2


def test_a_correction_carries_a_finding_over_or_withdraws_it(world):
    w = world
    original = _record(w, choices.TestKind.FULL, _ago(days=30), fail=w.xv)
    finding = Finding.objects.get(result__record=original)

    def correct(record, fail, why):
        draft = services.start_correction(record, w.tech, why)
        results = [services.ResultInput(
            component=c, as_found="fail" if c == fail else "pass", as_left="pass",
            failure_mode="du" if c == fail else "",
            failure_description="Valve slow to close (11 s)" if c == fail else "",
            work_done="Actuator serviced" if c == fail else "")
            for c in Component.objects.filter(subsystem__sif=w.sif)]
        draft = services.save_draft(user=w.tech, sif=w.sif, kind=record.kind,
                                    performed_at=record.performed_at, results=results,
                                    record=draft, supersedes=record, correction_reason=why)
        return services.sign_record(draft, w.tech, f.PASSWORD)

    kept = correct(original, w.xv, "Failure description was wrong")
    finding.refresh_from_db()
    assert finding.is_open and finding.result.record == kept
    assert finding.description == "Valve slow to close (11 s)"
    assert Finding.objects.filter(sif=w.sif, component=w.xv, status="open").count() == 1
    cleared = correct(kept, None, "The failure was on another SIF")
    finding.refresh_from_db()
    assert finding.status == "withdrawn" and f"#{cleared.pk}" in finding.closure_note


def test_closing_a_finding_needs_a_retest_or_a_leads_reason(world):
    w = world
    found = _record(w, choices.TestKind.FULL, _ago(days=40), fail=w.lt)
    finding = Finding.objects.get(result__record=found)
    with pytest.raises(ValidationError) as refused:
        findings.close_finding(finding, w.lead)
    assert "retest" in refused.value.message_dict["closure_note"][0]
    with pytest.raises(PermissionDenied):
        findings.close_finding(finding, w.tech, reason="Looks fine")
    with pytest.raises(PermissionDenied):
        findings.close_finding(finding, w.auditor, reason="Looks fine")
    with pytest.raises(ValidationError) as not_a_retest:
        findings.close_finding(finding, w.lead, retest=found)
    assert "not its retest" in not_a_retest.value.message_dict["retest"][0]
    closed = findings.close_finding(finding, w.lead, reason="Transmitter replaced by a new "
                                                           "unit, calibrated on the bench")
    assert (closed.status, closed.retest, closed.closed_by) == ("closed", None, w.lead)
    with pytest.raises(ValidationError, match="already closed"):
        findings.close_finding(finding, w.lead, reason="again")
    # The database keeps a closed finding with neither retest nor reason out.
    with pytest.raises(IntegrityError), transaction.atomic():
        Finding.objects.filter(pk=finding.pk).update(closure_note="")


def test_the_findings_pages_show_age_owner_and_follow_up(world):
    w = world
    found = _record(w, choices.TestKind.FULL, _ago(days=12), fail=w.xv)
    finding = Finding.objects.get(result__record=found)
    age = (w.today - timezone.localtime(found.performed_at).date()).days  # by hand: 12
    assert age == 12
    lead, tech = _client(w.lead), _client(w.tech)
    listing = lead.get("/operations/findings/")
    row = next(r for r in listing.context["rows"] if r["obj"].pk == finding.pk)
    assert row["age"] == age and row["owner"] == "Lead"
    assert f'data-age="{age}"' in listing.content.decode()
    assert _client(w.outsider).get(f"/operations/findings/{finding.pk}/").status_code == 404

    url = f"/operations/findings/{finding.pk}/update/"
    bad = tech.post(url, {"owner": str(w.auditor.pk), "corrective_action": "Order spare",
                          "retest_due_on": "2026-13-40"})
    page = bad.content.decode()
    assert bad.status_code == 400 and "YYYY-MM-DD" in page and "Order spare" in page
    due = w.today + dt.timedelta(days=7)
    ok = tech.post(url, {"owner": str(w.tech.pk), "corrective_action": "Spare solenoid fitted",
                         "retest_due_on": due.isoformat()})
    assert ok.status_code == 302
    finding.refresh_from_db()
    assert (finding.owner, finding.corrective_action, finding.retest_due_on) == (
        w.tech, "Spare solenoid fitted", due)
    with pytest.raises(ValidationError) as refused:
        findings.update_finding(finding, w.lead, owner=w.auditor, corrective_action="x",
                                retest_due_on=None)
    assert "not a lead or technician" in refused.value.message_dict["owner"][0]

    close = f"/operations/findings/{finding.pk}/close/"
    resp = tech.post(close, {"retest": "", "reason": ""})
    assert resp.status_code == 400 and "signed passing retest" in resp.content.decode()
    retest = _record(w, choices.TestKind.FULL, _ago(days=1), fail=w.lt)  # XV passes here
    finding.refresh_from_db()
    assert finding.status == "closed" and finding.retest == retest
    page = lead.get(f"/operations/findings/{finding.pk}/").content.decode()
    assert "finding closed: retest" in page and "Spare solenoid fitted" in page


def test_findings_and_bypass_authorisers_are_in_the_evidence_pack(world, settings, tmp_path):
    w = world
    settings.VAR_DIR = tmp_path
    found = _record(w, choices.TestKind.FULL, _ago(days=15), fail=w.xv)
    finding = Finding.objects.get(result__record=found)
    b = _bypass(w, started_at=_ago(days=3), authorised_hours=6)
    services.authorise_bypass(b, w.lead2, f.PASSWORD)
    services.close_bypass(b, w.tech, ended_at=_ago(days=3) + dt.timedelta(hours=9))
    pack = EvidencePack.objects.create(scope="sif", site=w.north, sif=w.sif,
                                       requested_by=w.auditor,
                                       period_start=w.today - dt.timedelta(days=60),
                                       period_end=w.today)
    evidence.run(pack.pk)
    pack.refresh_from_db()
    assert pack.status == "done", pack.error
    files = _unzip(evidence.pack_file(pack).read_bytes())
    [entry] = json.loads(files["pack.json"])["sifs"]
    [fd] = [x for x in entry["findings"] if x["id"] == finding.pk]
    assert (fd["component"], fd["owner"], fd["status"]) == (w.xv.tag, "Lead", "Open")
    assert fd["corrective_action"] == "Solenoid replaced, valve re-stroked"
    rows = list(csv.DictReader(io.StringIO(files["findings.csv"].decode())))
    assert any(r["id"] == str(finding.pk) and r["found_by"].startswith(f"test #{found.pk}")
               for r in rows)
    [bp] = list(csv.DictReader(io.StringIO(files["bypasses.csv"].decode())))
    assert (bp["requested_by"], bp["authorised_by"], bp["closed_by"]) == ("Tech", "Lead2",
                                                                         "Tech")
    assert bp["over_authorised"] == "True"  # 9 h in place, 6 h authorised
    text = _pdf_text(files["report.pdf"], tmp_path)
    assert "Findings and their follow-up" in text and "Tech / Lead2" in text


def test_the_api_records_demands_by_the_same_rules(world):
    w = world
    api = APIClient()
    api.force_authenticate(w.tech)
    body = {"sif": w.sif.pk, "occurred_at": _ago(hours=4).isoformat(), "successful": False,
            "description": "High pressure; XV stayed open", "cause": "process_upset",
            "components_exercised": [w.lt.pk]}
    refused = api.post("/api/demands/", body, format="json")
    assert refused.status_code == 400 and "failed_components" in refused.json()
    assert api.post("/api/demands/", {**body, "cause": "gremlins",
                                      "failed_components": [w.xv.pk]},
                    format="json").status_code == 400
    assert not Demand.objects.filter(description=body["description"]).exists()
    made = api.post("/api/demands/", {**body, "failed_components": [w.xv.pk]}, format="json")
    assert made.status_code == 201, made.content
    [finding_id] = made.json()["findings"]
    finding = Finding.objects.get(pk=finding_id)
    assert (finding.component, finding.source, finding.status) == (w.xv, "demand", "open")


def test_legacy_bypasses_keep_their_person_as_requester_and_wait_for_authorisation(world):
    """Before the operations log a bypass named one person, as its "authoriser": always the
    person who entered it. The migration's data step makes that person the requester and
    leaves the bypass unauthorised; the earlier history row keeps what was recorded."""
    import importlib

    from django.apps import apps

    step = importlib.import_module("register.migrations.0012_operations_log")
    w = world
    [old] = Bypass.objects.bulk_create([Bypass(  # a row as the earlier register wrote it
        sif=w.owned, started_at=_ago(hours=5), authorised_hours=8, reason="Old entry",
        authorised_by=w.tech)])
    step.legacy_bypasses(apps, None)
    old.refresh_from_db()
    assert (old.requested_by, old.authorised_by, old.authorised_at) == (w.tech, None, None)
    assert old.authorisation == Auth.PENDING
    rows = [r for r in open_rows(_client(w.lead)) if r["obj"].pk == old.pk]
    assert rows and rows[0]["requester"] == "Tech" and rows[0]["authoriser"] == ""


def open_rows(client):
    return client.get("/operations/").context["bypass_rows"]


def test_a_failure_entered_after_its_retest_was_signed_closes_at_once(world):
    """A demand entered late: the valve that failed to act on it has since passed a signed
    full proof test, so the finding is opened and closed by that retest together."""
    w = world
    sif = f.sif(w.unit, tag="U1-SIF-190", in_service=w.started)
    lt, xv = _devices(sif)
    retest = _record(w, choices.TestKind.FULL, _ago(days=2), sif=sif)
    demand = services.record_demand(user=w.tech, sif=sif, occurred_at=_ago(days=10),
                                    successful=False, description="Valve stayed open",
                                    components_exercised=[lt], failed_components=[xv])
    finding = demand.findings.get()
    assert (finding.status, finding.retest, finding.closed_by) == ("closed", retest, w.tech)
    assert finding.closed_at >= retest.signed_at
    # ...but a retest older than the failure does not.
    late = services.record_demand(user=w.tech, sif=sif, occurred_at=_ago(days=1),
                                  successful=False, description="Stayed open again",
                                  components_exercised=[lt], failed_components=[xv])
    assert late.findings.get().is_open
