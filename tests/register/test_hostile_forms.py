"""Hostile and careless input through the web forms that write.

One table, like the API's (tests/api/test_hostile_input.py, whose values it reuses): each
form that writes (test entry, correction of a signed test, bypass open and close, demand,
deferral request and decision, design changes of a component, subsystem and plan, finding
follow-up and closure) x each bad value (NaN, Infinity, 1e308, -1, year 1, year 9999, a NUL character, 200,000
characters). Every case answers 400, or 200 with the form shown again, with a message
beside the field; writes nothing (rows, history and chain counted before and after); and
the pages that show the object still answer 200 afterwards.
"""

from __future__ import annotations

import datetime as dt
import re
import uuid
from collections.abc import Callable
from dataclasses import dataclass

import pytest
from django.core.cache import cache
from django.db import transaction
from django.test import Client
from django.utils import timezone

from register import choices, services
from register.models import (
    Bypass,
    Component,
    Deferral,
    Demand,
    Finding,
    Subsystem,
    TestPlan,
    TestRecord,
    TestStep,
)
from tests import factories as f
from tests.api import build_world
from tests.api.test_hostile_input import VALUES, _counts

pytestmark = pytest.mark.django_db

LOCAL = "%Y-%m-%dT%H:%M"


def _local(**ago) -> str:
    return timezone.localtime(timezone.now() - dt.timedelta(**ago)).strftime(LOCAL)


def _entry(w) -> dict:
    """A good test entry: every device passes, the level sensor's trip value measured."""
    body = {"form_token": uuid.uuid4().hex, "kind": "full", "performed_at": _local(hours=2),
            "remarks": "Annual test", "action": "save"}
    for c in w.own.components:
        body[f"c{c.pk}-as_found"] = body[f"c{c.pk}-as_left"] = "pass"
    body[w.names["measured"]] = "80.2"
    return body


def _design(**fields) -> dict:
    return {**fields, "reason": "Certificate revision", "reference": "CR-77"}


@dataclass
class Form:
    url: Callable  # world -> address of the form
    body: Callable  # world -> a good body
    model: type
    fields: dict  # kind ("number", "date", "datetime", "text") -> field name
    pages: Callable  # world -> the pages that show the object
    creates: bool = True  # a good body adds a row (else it changes one)
    preview: bool = False  # the design forms: preview, then save what was previewed


FORMS = {
    "test entry": Form(
        lambda w: f"/field/plans/{w.own.plan.pk}/start/", _entry, TestRecord,
        {"number": "{measured}", "datetime": "performed_at", "text": "remarks"},
        lambda w: ["/field/", f"/field/records/{w.own.signed.pk}/"]),
    "correction": Form(
        lambda w: f"/field/records/{w.own.signed.pk}/correct/",
        lambda w: {"reason": "Wrong device tag recorded"}, TestRecord, {"text": "reason"},
        lambda w: ["/field/", f"/field/records/{w.own.signed.pk}/"]),
    "bypass": Form(
        lambda w: f"/operations/sifs/{w.second.pk}/bypass/",
        lambda w: {"component": "", "started_at": _local(minutes=30),
                   "authorised_hours": "6", "reason": "Transmitter swap",
                   "compensating_measures": "Operator at the local gauge"}, Bypass,
        {"number": "authorised_hours", "datetime": "started_at", "text": "reason"},
        lambda w: ["/operations/", f"/sifs/{w.second.pk}/"]),
    "bypass close": Form(
        lambda w: f"/operations/bypasses/{w.own.bypass.pk}/close/",
        lambda w: {"ended_at": _local(minutes=1)}, Bypass, {"datetime": "ended_at"},
        lambda w: ["/operations/", f"/operations/bypasses/{w.own.bypass.pk}/"],
        creates=False),
    "demand": Form(
        lambda w: f"/operations/sifs/{w.own.sif.pk}/demand/",
        lambda w: {"kind": "real", "occurred_at": _local(hours=3), "successful": "yes",
                   "cause": "process_upset", "description": "High level trip",
                   **{f"dev-{c.pk}": "acted" for c in w.own.components}}, Demand,
        {"datetime": "occurred_at", "text": "description"},
        lambda w: ["/operations/", f"/sifs/{w.own.sif.pk}/"]),
    "deferral request": Form(
        lambda w: f"/deferrals/plans/{w.own.plan.pk}/new/",
        lambda w: {"proposed_on": (timezone.localdate() + dt.timedelta(days=45)).isoformat(),
                   "reason": "Spare on order", "submit": "1"}, Deferral,
        {"date": "proposed_on", "text": "reason"}, lambda w: ["/deferrals/"]),
    "deferral decision": Form(
        lambda w: f"/deferrals/{w.own.deferral.pk}/decide/",
        lambda w: {"decision": "reject", "note": "Turnaround stays", "password": f.PASSWORD},
        Deferral, {"text": "note"},
        lambda w: ["/deferrals/", f"/deferrals/{w.own.deferral.pk}/decide/"], creates=False),
    "component": Form(
        lambda w: f"/design/component/{w.own.components[0].pk}/edit/",
        lambda w: _design(lambda_du_per_hour="2e-6", lambda_dd_per_hour="",
                          lambda_s_per_hour="", proof_test_coverage="0.9",
                          partial_test_coverage="0"), Component,
        {"number": "lambda_du_per_hour", "text": "reason"},
        lambda w: ["/sifs/", f"/sifs/{w.own.sif.pk}/"], creates=False, preview=True),
    "subsystem": Form(
        lambda w: f"/design/subsystem/{w.own.subsystem.pk}/edit/",
        lambda w: _design(voting=w.own.subsystem.voting, beta="0.05", beta_d="0.02"),
        Subsystem, {"number": "beta", "text": "reason"},
        lambda w: ["/sifs/", f"/sifs/{w.own.sif.pk}/"], creates=False, preview=True),
    "plan": Form(
        lambda w: f"/design/plan/{w.own.plan.pk}/edit/",
        lambda w: _design(interval_months="24", coverage="0.9", effective_from=""),
        TestPlan, {"number": "interval_months", "date": "effective_from", "text": "reason"},
        lambda w: ["/field/", f"/sifs/{w.own.sif.pk}/"], creates=False, preview=True),
    "finding follow-up": Form(
        lambda w: f"/operations/findings/{w.finding.pk}/update/",
        lambda w: {"owner": str(w.users["lead"].pk), "corrective_action": "Solenoid fitted",
                   "retest_due_on": (timezone.localdate() + dt.timedelta(days=7))
                   .isoformat()}, Finding,
        {"date": "retest_due_on", "text": "corrective_action"},
        lambda w: ["/operations/findings/", f"/operations/findings/{w.finding.pk}/"],
        creates=False),
    "finding closure": Form(
        lambda w: f"/operations/findings/{w.finding.pk}/close/",
        lambda w: {"retest": "", "reason": "Device removed from service"}, Finding,
        {"text": "reason"},
        lambda w: ["/operations/findings/", f"/operations/findings/{w.finding.pk}/"],
        creates=False),
}
# A measured value may be negative (a pressure below zero on a gauge, a temperature).
ALLOWED = {("test entry", "-1")}


def _field(form: Form, kind: str) -> str | None:
    if kind == "date":
        return form.fields.get("date") or form.fields.get("datetime")
    return form.fields.get(kind)


def _typed(form: Form, name: str, kind: str, value) -> str:
    """What a person or a script types: numbers as words ("NaN", "1e308"), a date in the
    input's own format (a time of day where the input takes one)."""
    if kind == "number":
        return name
    if kind == "date" and "datetime" in form.fields:
        return f"{value}T{'00:00' if value.startswith('0001') else '23:59'}"
    return value


# Cases once refused or written as they stand, put right since: none is expected to fail.
KNOWN: dict[tuple[str, str], str] = {}


def _marks(form: str, name: str) -> list:
    reason = KNOWN.get((form, name))
    return [pytest.mark.xfail(reason=reason, strict=True)] if reason else []


CASES = [
    pytest.param(form, name, kind, value, id=f"{form}-{name}", marks=_marks(form, name))
    for form, spec in FORMS.items() for name, kind, value in VALUES
    if kind != "unknown" and _field(spec, kind) and (form, name) not in ALLOWED
]


@pytest.fixture(scope="module")
def world(django_db_setup, django_db_blocker):
    """The API tests' two-site plant, built once, with a measured step on the plan and an
    open finding, and a second SIF free of bypasses; each case runs in a savepoint rolled back."""
    with django_db_blocker.unblock(), transaction.atomic():
        w = build_world()
        sensor = w.own.components[0]
        step = TestStep.objects.create(
            plan=w.own.plan, position=1, instruction="Raise the level until trip.",
            measured_quantity="Trip value", unit="%",
            criterion=choices.CriterionKind.AROUND_SETPOINT, target_value=80.0,
            tolerance=1.0)
        w.second = f.sif(w.own.unit, tag="SIF-200")
        w.names = {"measured": f"c{sensor.pk}-v{step.pk}_found"}
        demand = services.record_demand(
            user=w.users["technician"], sif=w.own.sif,
            occurred_at=timezone.now() - dt.timedelta(days=3), successful=False,
            description="Valve stayed open", cause=choices.DemandCause.PROCESS_UPSET,
            components_exercised=[sensor], failed_components=[w.own.components[-1]])
        w.finding = Finding.objects.get(demand=demand)
        yield w
        transaction.set_rollback(True)


@pytest.fixture
def case(world):
    cache.clear()  # sign-in and password counters
    with transaction.atomic():
        yield world
        transaction.set_rollback(True)


def _browser(w) -> Client:
    c = Client()
    c.force_login(w.users["lead"])
    return c


PREVIEWED = re.compile(r'name="previewed" value="([^"]+)"')


def _send(client, form: Form, url: str, body: dict):
    """Post the form; a design form is previewed first and, when the preview offers to
    save, saved with the fingerprint of what was previewed (as the page does)."""
    if not form.preview:
        return client.post(url, body)
    response = client.post(url, {**body, "action": "preview"})
    shown = PREVIEWED.search(response.content.decode())
    if shown is None:
        return response
    return client.post(url, {**body, "action": "save",
                             "previewed": shown.group(1).replace("&quot;", '"')})


def _error_beside(html: str, name: str) -> str:
    """The error message shown between the input named ``name`` and the next input."""
    start = html.find(f'name="{name}"')
    assert start >= 0, f"no input named {name}"
    end = html.find(' name="', start + len(name) + 7)
    near = html[start:end if end > 0 else len(html)]
    found = re.search(r'class="error"[^>]*>([^<]+)<', near)
    assert found, (name, near[:600])
    return found.group(1).strip()


def _messages(html: str) -> list[str]:
    """The errors a page shows (for the message of a failing check)."""
    return re.findall(r'class="error"[^>]*>([^<]+)<|<div class="alert"[^>]*>(.{0,300})', html)


@pytest.mark.parametrize(("form", "name", "kind", "value"), CASES)
def test_refused_beside_the_field_and_nothing_written(case, form, name, kind, value):
    spec = FORMS[form]
    field = _field(spec, kind).format(**case.names)
    client = _browser(case)
    before = _counts(spec.model)
    body = {**spec.body(case), field: _typed(spec, name, kind, value)}
    response = _send(client, spec, spec.url(case), body)
    assert response.status_code in (200, 400), (form, name, response.status_code,
                                                 response.content[:300])
    assert _error_beside(response.content.decode(), field), (form, name)
    assert _counts(spec.model) == before, (form, name)
    for page in spec.pages(case):
        assert client.get(page).status_code == 200, (form, name, page)


@pytest.mark.parametrize("form", list(FORMS))
def test_the_same_forms_with_good_values_are_taken(case, form):
    """The table's bodies are good apart from the one bad value (else it proves little)."""
    spec = FORMS[form]
    before = _counts(spec.model)
    response = _send(_browser(case), spec, spec.url(case), spec.body(case))
    assert response.status_code == 302, (form, _messages(response.content.decode()))
    rows, history, chain = _counts(spec.model)
    assert rows == before[0] + spec.creates, form
    assert history > before[1] and chain > before[2], form


@pytest.mark.parametrize("typed", [name for name, kind, _ in VALUES if kind == "number"]
                         + ["1e400", "8O,2", "--1"])
def test_live_judging_of_a_bad_number_answers_and_writes_nothing(case, typed):
    """The entry page asks the server to judge each value as it is typed (nothing saved):
    a value that is no number, or none a gauge could show, is not judged (no fail is
    proposed for a typing error); -1 is a real reading, outside this trip criterion."""
    sensor = case.own.components[0]
    before = _counts(TestRecord)
    response = _browser(case).get(
        f"/field/plans/{case.own.plan.pk}/judge/{sensor.pk}/", {case.names["measured"]: typed})
    assert response.status_code == 200, (typed, response.content[:300])
    assert _counts(TestRecord) == before
    shown = response.content.decode()
    assert ("Outside criterion" in shown) == (typed == "-1"), (typed, shown[:600])
    if typed == "1e308":
        assert "The value must be between" in shown


def test_a_negative_measured_value_is_saved(case):
    """-1 is a real reading (a gauge below zero): the one bad number the entry takes."""
    spec = FORMS["test entry"]
    before = TestRecord.objects.count()
    sensor = f"c{case.own.components[0].pk}"
    response = _browser(case).post(spec.url(case), {
        **spec.body(case), case.names["measured"]: "-1", f"{sensor}-as_found": "fail",
        f"{sensor}-failure_mode": "du", f"{sensor}-failure_description": "Reads -1 % at trip",
        f"{sensor}-work_done": "Transmitter replaced and re-ranged"})
    assert response.status_code == 302, _messages(response.content.decode())
    assert TestRecord.objects.count() == before + 1
    saved = TestRecord.objects.latest("pk")
    assert [m.value for r in saved.results.all() for m in r.measurements.all()] == [-1.0]


# Keys a careless or hostile client adds to a good form; each names what the register
# decides itself (who asked, who authorised, the state of a record or a request).
EXTRA = {
    "bypass": (lambda w: {"authorised_by": str(w.users["verifier"].pk),
                          "authorisation": "authorised", "requested_by":
                          str(w.users["verifier"].pk)},
               lambda w, b: (b.authorised_by_id, b.requested_by_id) == (
                   None, w.users["lead"].pk)),
    "test entry": (lambda w: {"status": "signed", "performed_by": str(w.users["verifier"].pk),
                              "signed_by": str(w.users["verifier"].pk)},
                   lambda w, r: (r.status, r.performed_by_id, r.signed_at) == (
                       choices.RecordStatus.DRAFT, w.users["lead"].pk, None)),
    "deferral request": (lambda w: {"status": "approved",
                                    "decided_by": str(w.users["verifier"].pk)},
                         lambda w, d: (d.status, d.decided_by_id, d.requested_by_id) == (
                             choices.DeferralStatus.PENDING, None, w.users["lead"].pk)),
    "demand": (lambda w: {"recorded_by": str(w.users["verifier"].pk), "spurious": "on"},
               lambda w, d: not d.spurious),
}


@pytest.mark.parametrize("form", list(EXTRA))
def test_keys_the_form_does_not_have_change_nothing(case, form):
    spec = FORMS[form]
    extra, kept = EXTRA[form]
    before = spec.model.objects.count()
    response = _browser(case).post(spec.url(case), {**spec.body(case), **extra(case)})
    assert response.status_code == 302, _messages(response.content.decode())
    assert spec.model.objects.count() == before + 1
    assert kept(case, spec.model.objects.latest("pk")), form
