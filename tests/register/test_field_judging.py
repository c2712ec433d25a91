"""Judging on the test entry page: each device is asked only for its own steps (as the
step's setting or, without one, its words say), the live judging endpoint answers with the
server's verdict (and only to people who may record at the site), and the judgement
preselects the as-found verdict, the failure mode and the failure description."""

from __future__ import annotations

import datetime as dt
import re
from html.parser import HTMLParser

import pytest
from django.db import transaction
from django.test import Client
from django.urls import reverse
from django.utils import timezone

from register import choices, rules
from register.models import Component, SafetyFunction, Subsystem, TestPlan, TestRecord, TestStep
from tests import factories as f

HTMX = {"HTTP_HX_REQUEST": "true"}


@pytest.fixture(scope="module")
def world(django_db_setup, django_db_blocker):
    """A SIF laid out like the demo: a level transmitter, a logic solver and a valve, and a
    full proof test of three steps (trip value; logic, nothing measured; closing time)."""
    with django_db_blocker.unblock(), transaction.atomic():
        site = f.site("judge")
        unit = f.unit(site, code="J1")
        sif = f.sif(unit, tag="J1-SIF-301", in_service=dt.date(2021, 1, 1))
        SafetyFunction.objects.filter(pk=sif.pk).update(
            required_response_time_s=8.0, trip_setpoint=80.0, setpoint_unit="%")
        sif.refresh_from_db()
        logic = Subsystem.objects.create(sif=sif, role="logic", name="Logic solver",
                                         voting="1oo1", position=2)
        Component.objects.create(subsystem=logic, tag="SLS-J1-301", in_service_on=dt.date(
            2021, 1, 1), device_type=f.device_type(role="logic"))
        lt = Component.objects.get(subsystem__sif=sif, subsystem__role="sensing")
        xv = Component.objects.get(subsystem__sif=sif, subsystem__role="final")
        plan = TestPlan.objects.get(sif=sif)
        trip = TestStep.objects.create(
            plan=plan, position=1, instruction="Apply a test signal; note the trip value.",
            measured_quantity="Trip value", unit="%",
            criterion=choices.CriterionKind.AROUND_SETPOINT, target_value=80.0, tolerance=1.0)
        TestStep.objects.create(plan=plan, position=2,
                                instruction="Confirm the logic solver sets its outputs.")
        closing = TestStep.objects.create(
            plan=plan, position=3, instruction="Trip the valve; time the stroke.",
            measured_quantity="Closing time", unit="s",
            criterion=choices.CriterionKind.AT_MOST, limit=10.0)
        other = f.sif(f.unit(f.site("judge-other"), code="J9"), tag="J9-SIF-1")
        people = {
            "tech": f.user("j-tech", site=site, role=choices.Role.TECHNICIAN),
            "lead": f.user("j-lead", site=site, role=choices.Role.LEAD),
            "verifier": f.user("j-verifier", site=site, role=choices.Role.VERIFIER),
            "auditor": f.user("j-auditor", site=site, role=choices.Role.AUDITOR),
            "outsider": f.user("j-outsider", site=other.unit.site,
                               role=choices.Role.TECHNICIAN),
        }
        yield {"sif": sif, "plan": plan, "lt": lt, "xv": xv,
               "sls": Component.objects.get(tag="SLS-J1-301"), "trip": trip,
               "closing": closing, **people}
        transaction.set_rollback(True)


def _client(user) -> Client:
    c = Client()
    c.force_login(user)
    return c


def judge_url(w, comp):
    return reverse("field:judge", args=[w["plan"].pk, comp.pk])


def _checked(html: str, name: str) -> str | None:
    """The value of the checked radio called ``name`` in ``html``."""
    for tag in re.findall(r"<input[^>]*>", html):
        if f'name="{name}"' in tag and "checked" in tag:
            return re.search(r'value="([^"]*)"', tag).group(1)
    return None


# --- which steps each device is asked for --------------------------------------------------


@pytest.mark.django_db
def test_each_device_is_asked_only_for_its_own_steps(world):
    w = world
    page = _client(w["tech"]).get(reverse("field:start", args=[w["plan"].pk]))
    html = page.content.decode()
    lt, xv, sls, trip, closing = w["lt"], w["xv"], w["sls"], w["trip"], w["closing"]
    # The transmitter is asked for its trip value, never for the valve's closing time.
    assert f'name="c{lt.pk}-v{trip.pk}_found"' in html
    assert f'name="c{lt.pk}-v{closing.pk}_found"' not in html
    assert f'name="c{xv.pk}-v{closing.pk}_found"' in html
    assert f'name="c{xv.pk}-v{trip.pk}_found"' not in html
    # The logic solver has no value box: only its verdicts.
    assert f'name="c{sls.pk}-v' not in html and f'name="c{sls.pk}-as_found"' in html
    assert html.count('class="measured"') == 4  # two devices x (as found, as left)


def test_step_roles_are_read_from_what_the_step_measures():
    class Sif:
        trip_setpoint, setpoint_unit = 12.5, "bar"

    def role(quantity, unit="", instruction="", target=None):
        return rules.step_role(TestStep(measured_quantity=quantity, unit=unit,
                                        instruction=instruction, target_value=target), Sif)

    assert role("Trip value", "%") == choices.SubsystemRole.SENSING
    assert role("Closing time", "s") == choices.SubsystemRole.FINAL
    assert role("Stroke time", "s") == choices.SubsystemRole.FINAL
    assert role("Time to safe state", "s") == choices.SubsystemRole.FINAL  # a timing step
    assert role("Pressure at trip", "bar", target=12.5) == choices.SubsystemRole.SENSING
    assert role("Reading", "mA", instruction="") == choices.SubsystemRole.SENSING
    assert role("Current", "mA", instruction="Check the valve solenoid current.") == \
        choices.SubsystemRole.FINAL
    assert role("Insulation resistance", "MΩ") is None  # unknown: every device is asked


def test_a_step_whose_role_no_device_has_is_asked_of_everyone():
    valve = Component(subsystem=Subsystem(role=choices.SubsystemRole.FINAL))
    trip = TestStep(measured_quantity="Trip value", unit="%")
    closing = TestStep(measured_quantity="Closing time", unit="s")
    assert rules.steps_for(valve, [trip, closing], roles_present={"final"}) == [trip, closing]
    assert rules.steps_for(valve, [trip, closing], roles_present={"final", "sensing"}) == \
        [closing]


# --- the live judging endpoint ------------------------------------------------------------


@pytest.mark.django_db
def test_endpoint_returns_the_servers_verdict_on_the_boundary(world,
                                                              django_assert_max_num_queries):
    w = world
    lt, trip = w["lt"], w["trip"]
    client = _client(w["tech"])
    with django_assert_max_num_queries(12):
        resp = client.get(judge_url(w, lt), {f"c{lt.pk}-v{trip.pk}_found": "81"}, **HTMX)
    html = resp.content.decode()
    assert resp.status_code == 200 and resp["Cache-Control"] == "private, no-store"
    assert f'id="id_c{lt.pk}-v{trip.pk}_found-judged" hx-swap-oob="innerHTML"' in html
    assert "Within criterion" in html and "81 % is 1 % above 80 %, within ± 1 %." in html
    assert "Outside criterion" not in html
    assert "-as_found-choices" not in html  # nothing to preselect: the choices are not sent

    out = client.get(judge_url(w, lt), {f"c{lt.pk}-v{trip.pk}_found": "81.01"}, **HTMX)
    assert "Outside criterion" in out.content.decode()
    assert "more than the ± 1 % allowed" in out.content.decode()
    bad = client.get(judge_url(w, lt), {f"c{lt.pk}-v{trip.pk}_found": "8o"}, **HTMX)
    assert "Not a number" in bad.content.decode()


@pytest.mark.django_db
def test_timing_step_is_held_to_the_sif_response_time(world):
    w = world
    xv, closing = w["xv"], w["closing"]
    client = _client(w["tech"])
    html = client.get(judge_url(w, xv), {f"c{xv.pk}-v{closing.pk}_found": "9"},
                      **HTMX).content.decode()
    assert "Outside criterion" in html and "required response time of 8 s" in html
    html = client.get(judge_url(w, xv), {f"c{xv.pk}-v{closing.pk}_found": "8"},
                      **HTMX).content.decode()
    assert "Within criterion" in html


@pytest.mark.django_db
def test_outside_value_preselects_fail_and_dangerous_undetected(world):
    w = world
    lt, trip = w["lt"], w["trip"]
    p = f"c{lt.pk}"
    client = _client(w["tech"])
    html = client.get(judge_url(w, lt), {f"{p}-v{trip.pk}_found": "83.2",
                                         f"{p}-as_found": "pass"}, **HTMX).content.decode()
    assert _checked(html, f"{p}-as_found") == "fail"
    assert _checked(html, f"{p}-failure_mode") == "du"
    assert str(rules.PROPOSED_FAIL) in html and str(rules.PROPOSED_DU) in html
    assert 'value="as_found,failure_mode"' in html  # the page remembers what it proposed
    # A slip corrected: the untouched proposals are withdrawn.
    back = client.get(judge_url(w, lt), {f"{p}-v{trip.pk}_found": "80.2",
                                         f"{p}-as_found": "fail", f"{p}-failure_mode": "du",
                                         f"{p}-proposed": "as_found,failure_mode"},
                      **HTMX).content.decode()
    assert _checked(back, f"{p}-as_found") is None
    assert _checked(back, f"{p}-failure_mode") == ""  # "No failure"
    assert str(rules.WITHDRAWN) in back
    # The technician's own choices are kept: "not tested", and a safe failure.
    own = client.get(judge_url(w, lt), {f"{p}-v{trip.pk}_found": "83.2",
                                        f"{p}-as_found": "fail", f"{p}-failure_mode": "safe"},
                     **HTMX).content.decode()
    assert "-as_found-choices" not in own and "-failure_mode-choices" not in own
    kept = client.get(judge_url(w, lt), {f"{p}-v{trip.pk}_found": "83.2",
                                         f"{p}-as_found": "not_tested"},
                      **HTMX).content.decode()
    assert "-as_found-choices" not in kept


@pytest.mark.django_db
def test_endpoint_has_the_rights_of_the_form_page(world):
    w = world
    lt, trip = w["lt"], w["trip"]
    params = {f"c{lt.pk}-v{trip.pk}_found": "80"}
    start = reverse("field:start", args=[w["plan"].pk])
    for who, status in (("tech", 200), ("lead", 200), ("verifier", 403), ("auditor", 403),
                        ("outsider", 404)):
        client = _client(w[who])
        assert client.get(judge_url(w, lt), params, **HTMX).status_code == status, who
        assert client.get(start).status_code == status, who
    anonymous = Client().get(judge_url(w, lt), params, **HTMX)
    assert anonymous.status_code == 302 and "/login/" in anonymous.url
    other = Component.objects.exclude(subsystem__sif=w["sif"]).first()
    assert _client(w["tech"]).get(judge_url(w, other), params,
                                  **HTMX).status_code == 404
    assert _client(w["tech"]).post(judge_url(w, lt), params).status_code == 405


# --- without JavaScript ------------------------------------------------------------------


def _typed(w, *, token: str, action: str, trip_found: str, **extra) -> dict:
    """What the technician sends: the transmitter's trip value as found and its as-left
    verdict, the valve's closing time, pass for the valve and the logic solver."""
    lt, xv, sls = w["lt"], w["xv"], w["sls"]
    when = (timezone.localtime() - dt.timedelta(hours=1)).strftime("%Y-%m-%dT%H:%M")
    return {"form_token": token * 32, "kind": "full", "performed_at": when, "action": action,
            f"c{lt.pk}-v{w['trip'].pk}_found": trip_found, f"c{lt.pk}-as_left": "pass",
            f"c{xv.pk}-v{w['closing'].pk}_found": "6.1", f"c{xv.pk}-as_found": "pass",
            f"c{xv.pk}-as_left": "pass", f"c{sls.pk}-as_found": "pass",
            f"c{sls.pk}-as_left": "pass", **extra}


@pytest.mark.django_db
def test_without_javascript_the_verdict_and_proposal_show_after_submit(world):
    w = world
    lt = w["lt"]
    client = _client(w["tech"])
    start = reverse("field:start", args=[w["plan"].pk])
    data = _typed(w, token="7", action="save", trip_found="83.2")
    resp = client.post(start, data)
    html = resp.content.decode()
    assert resp.status_code == 400 and not TestRecord.objects.filter(sif=w["sif"]).exists()
    assert "Outside criterion" in html and "Within criterion" in html
    assert _checked(html, f"c{lt.pk}-as_found") == "fail"
    assert _checked(html, f"c{lt.pk}-failure_mode") == "du"
    assert str(rules.PROPOSED_FAIL) in html
    # Accepting the proposal and describing the failure saves at the next attempt.
    data.update({f"c{lt.pk}-as_found": "fail", f"c{lt.pk}-failure_mode": "du",
                 f"c{lt.pk}-failure_description": "Trip 3.2 % high (drift).",
                 f"c{lt.pk}-proposed": "as_found,failure_mode"})
    saved = client.post(start, data)
    assert saved.status_code == 302, saved.content.decode()[:3000]
    record = TestRecord.objects.get(sif=w["sif"])
    draft = client.get(saved.url).content.decode()  # the draft shows the saved verdicts
    assert "Outside criterion" in draft and "Within criterion" in draft
    result = record.results.get(component=lt)
    assert (result.as_found, result.failure_mode) == ("fail", "du")
    assert result.measurements.get().within_criterion is False


# --- the step's own setting, on the page --------------------------------------------------


@pytest.mark.django_db
def test_the_steps_own_setting_decides_which_device_is_asked(world):
    """A step set to a role is asked of that role's devices whatever its words say; a step
    without a value to measure shows as a check on the devices it concerns."""
    w = world
    lt, xv, sls = w["lt"], w["xv"], w["sls"]
    scan = TestStep.objects.create(
        plan=w["plan"], position=4, instruction="Time the solver from input to output.",
        measured_quantity="Response time", unit="s", criterion=choices.CriterionKind.AT_MOST,
        limit=0.5, applies_to_role=choices.SubsystemRole.LOGIC)
    assert rules.step_role(TestStep(measured_quantity="Response time", unit="s")) == "final"
    html = _client(w["tech"]).get(reverse("field:start", args=[w["plan"].pk])).content.decode()
    assert f'name="c{sls.pk}-v{scan.pk}_found"' in html
    assert f'name="c{lt.pk}-v{scan.pk}_found"' not in html
    assert f'name="c{xv.pk}-v{scan.pk}_found"' not in html
    assert html.count('class="measured"') == 6
    # The logic check (nothing measured) is shown to the logic solver, and only there.
    check = "Confirm the logic solver sets its outputs."
    assert html.count(check) == 1
    panels = html.split('<fieldset class="panel device"')[1:]
    assert [check in p for p in panels] == ["SLS-J1-301" in p for p in panels]


# --- the failure description the judgement proposes -----------------------------------------


def _textarea(html: str, name: str) -> str | None:
    import html as html_lib

    found = re.search(rf'<textarea[^>]*name="{name}"[^>]*>(.*?)</textarea>', html, re.S)
    return html_lib.unescape(found.group(1)).strip() if found else None


def _hidden(html: str, name: str) -> str | None:
    found = re.search(rf'<input type="hidden" name="{name}"[^>]*value="([^"]*)"', html)
    return found.group(1) if found else None


@pytest.mark.django_db
def test_an_outside_value_prefills_the_failure_description_live(world):
    w = world
    lt, trip = w["lt"], w["trip"]
    p = f"c{lt.pk}"
    client = _client(w["tech"])
    html = client.get(judge_url(w, lt), {f"{p}-v{trip.pk}_found": "83.2"},
                      **HTMX).content.decode()
    text = "Trip value as found: 83.2 % is 3.2 % above 80 %, more than the ± 1 % allowed."
    assert _checked(html, f"{p}-as_found") == "fail" and _checked(html, f"{p}-failure_mode") \
        == "du"
    assert f'id="id_{p}-failure_description-box" hx-swap-oob="innerHTML"' in html
    assert _textarea(html, f"{p}-failure_description") == text
    assert str(rules.PROPOSED_DESCRIPTION) in html
    mark = _hidden(html, f"{p}-proposed_text")
    assert mark == rules.text_mark(text)
    shown = {f"{p}-as_found": "fail", f"{p}-failure_mode": "du",
             f"{p}-proposed": "as_found,failure_mode", f"{p}-failure_description": text,
             f"{p}-proposed_text": mark}
    # The value retyped: the untouched description follows it.
    html = client.get(judge_url(w, lt), {**shown, f"{p}-v{trip.pk}_found": "83.5"},
                      **HTMX).content.decode()
    assert _textarea(html, f"{p}-failure_description").startswith(
        "Trip value as found: 83.5 % is 3.5 % above 80 %")
    # Edited by the technician: the text is theirs and is not sent back or replaced.
    own = {**shown, f"{p}-failure_description": text + " Impulse line blocked."}
    for value in ("83.5", "80.2"):
        html = client.get(judge_url(w, lt), {**own, f"{p}-v{trip.pk}_found": value},
                          **HTMX).content.decode()
        assert _textarea(html, f"{p}-failure_description") is None
        assert _hidden(html, f"{p}-proposed_text") == ""


class _Fields(HTMLParser):
    """What a browser without JavaScript sends for the form ``form_id`` as the page shows
    it: text, hidden and date inputs, checked radios and textareas (no buttons, no files)."""

    def __init__(self, form_id):
        super().__init__(convert_charrefs=True)
        self.form_id, self.inside, self.data, self._textarea = form_id, False, {}, None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "form":
            self.inside = a.get("id") == self.form_id
        elif self.inside and tag == "input" and a.get("name"):
            kind = a.get("type", "text")
            if kind in ("radio", "checkbox"):
                if "checked" in a:
                    self.data[a["name"]] = a.get("value", "on")
            elif kind not in ("file", "submit", "button"):
                self.data[a["name"]] = a.get("value") or ""
        elif self.inside and tag == "textarea":
            self._textarea = a["name"]
            self.data[a["name"]] = ""

    def handle_endtag(self, tag):
        if tag == "form":
            self.inside = False
        elif tag == "textarea":
            self._textarea = None

    def handle_data(self, data):
        if self._textarea:
            self.data[self._textarea] += data.lstrip("\n") if not self.data[
                self._textarea] else data


def _as_shown(html: str) -> dict:
    parser = _Fields("entry-form")
    parser.feed(html)
    return parser.data


@pytest.mark.django_db
def test_without_javascript_accepting_the_proposal_signs_at_the_next_attempt(world):
    """Signing with a value outside: the server shows its verdict and fills in the failure
    it implies (fail, dangerous undetected, the description); sending the page back as it
    is, with the password, signs."""
    w = world
    lt, xv = w["lt"], w["xv"]
    client = _client(w["tech"])
    start = reverse("field:start", args=[w["plan"].pk])
    first = client.post(start, _typed(w, token="8", action="sign", trip_found="82.5", **{
        "password": f.PASSWORD, f"c{lt.pk}-v{w['trip'].pk}_left": "80.1"}))
    html = first.content.decode()
    assert first.status_code == 400 and not TestRecord.objects.filter(sif=w["sif"]).exists()
    shown = _as_shown(html)
    text = "Trip value as found: 82.5 % is 2.5 % above 80 %, more than the ± 1 % allowed."
    assert (shown[f"c{lt.pk}-as_found"], shown[f"c{lt.pk}-failure_mode"],
            shown[f"c{lt.pk}-failure_description"]) == ("fail", "du", text)
    assert f'<details class="failure-section" id="c{lt.pk}-failure" open>' in html
    assert f'<details class="failure-section" id="c{xv.pk}-failure">' in html  # passed: shut
    again = client.post(start, {**shown, "action": "sign", "password": f.PASSWORD})
    assert again.status_code == 302, again.content.decode()[:3000]
    record = TestRecord.objects.get(sif=w["sif"])
    assert record.status == choices.RecordStatus.SIGNED
    result = record.results.get(component=lt)
    assert (result.as_found, result.as_left, result.failure_mode, result.failure_description) \
        == ("fail", "pass", "du", text)
