"""The field rules of ``register.rules``: judging a measured value (one rule, exact on the
numbers as written) and the component-result rules, whose messages are the same whether
a result comes through the model, the field form or the spreadsheet import."""

from __future__ import annotations

import csv
import datetime as dt
import io

import pytest
from django.core.exceptions import ValidationError
from django.db import transaction

from register import choices, rules, services
from register.field.forms import ComponentForm
from register.lead import spreadsheet
from register.models import Component, ComponentResult, MeasuredValue, TestPlan, TestStep
from tests import factories as f

# --- judging a value (no database) ------------------------------------------------------


def _step(**kw) -> TestStep:
    values = dict(measured_quantity="Trip value", unit="bar",
                  criterion=choices.CriterionKind.AROUND_SETPOINT, target_value=2.3,
                  tolerance=0.1)
    values.update(kw)
    return TestStep(**values)


class _Sif:  # only what the rule reads
    required_response_time_s = 8.0
    trip_setpoint = None
    setpoint_unit = ""


# The boundary belongs to the criterion ("within ± tolerance" includes its ends): the rule
# decided in register/rules.py, common practice, no source. In binary floating point
# |2.4 - 2.3| is 0.10000000000000009 and would be refused.
@pytest.mark.parametrize(("value", "status"), [
    (2.4, rules.WITHIN), (2.2, rules.WITHIN), (2.3, rules.WITHIN), (2.35, rules.WITHIN),
    (2.41, rules.OUTSIDE), (2.19, rules.OUTSIDE), (2.4000001, rules.OUTSIDE),
])
def test_value_on_the_tolerance_boundary_is_within(value, status):
    judged = rules.judge_measurement(_step(), value)
    assert judged.status == status
    assert judged.label == ("Within criterion" if status == rules.WITHIN
                            else "Outside criterion")
    assert (abs(2.4 - 2.3) <= 0.1) is False  # what a float comparison would have said


def test_reasons_say_by_how_much_in_plain_words():
    assert rules.judge_measurement(_step(), 2.4).reason == \
        "2.4 bar is 0.1 bar above 2.3 bar, within ± 0.1 bar."
    assert rules.judge_measurement(_step(), 2.41).reason == \
        "2.41 bar is 0.11 bar above 2.3 bar, more than the ± 0.1 bar allowed."
    limit = _step(measured_quantity="Closing time", unit="s",
                  criterion=choices.CriterionKind.AT_MOST, limit=10.0, target_value=None,
                  tolerance=None)
    assert rules.judge_measurement(limit, 12.5).reason == \
        "12.5 s is over the limit of 10 s by 2.5 s."


def test_limits_and_the_sif_response_time_include_their_boundary():
    closing = _step(measured_quantity="Closing time", unit="s",
                    criterion=choices.CriterionKind.AT_MOST, limit=10.0)
    assert rules.judge_measurement(closing, 10.0).status == rules.WITHIN
    assert rules.judge_measurement(closing, 10.01).status == rules.OUTSIDE
    # A timing step is also held to the SIF's required response time (8 s here).
    assert rules.judge_measurement(closing, 8.0, sif=_Sif).status == rules.WITHIN
    over = rules.judge_measurement(closing, 8.1, sif=_Sif)
    assert over.status == rules.OUTSIDE and "required response time of 8 s" in over.reason
    least = _step(criterion=choices.CriterionKind.AT_LEAST, limit=0.7)
    assert rules.judge_measurement(least, 0.7).status == rules.WITHIN
    assert rules.judge_measurement(least, 0.69).status == rules.OUTSIDE


def test_observation_only_and_missing_values_are_not_judged():
    observe = _step(criterion=choices.CriterionKind.NONE)
    assert rules.judge_measurement(observe, 5.0).status == rules.NOT_JUDGED
    assert rules.judge_measurement(observe, 5.0).within is None
    assert rules.judge_measurement(_step(), None).status == rules.NOT_JUDGED


# --- shared data, built once for the module ------------------------------------------------


@pytest.fixture(scope="module")
def world(django_db_setup, django_db_blocker):
    with django_db_blocker.unblock(), transaction.atomic():
        site = f.site("rules")
        unit = f.unit(site, code="R1")
        sif = f.sif(unit, tag="R1-SIF-7", in_service=dt.date(2021, 1, 1))
        plan = TestPlan.objects.get(sif=sif)
        step = TestStep.objects.create(
            plan=plan, position=1, instruction="Apply pressure until trip.",
            measured_quantity="Trip value", unit="bar",
            criterion=choices.CriterionKind.AROUND_SETPOINT, target_value=2.3, tolerance=0.1)
        tech = f.user("rules-tech", site=site, role=choices.Role.TECHNICIAN)
        comp = Component.objects.filter(subsystem__sif=sif, subsystem__role="sensing").first()
        yield {"site": site, "unit": unit, "sif": sif, "plan": plan, "step": step,
               "tech": tech, "comp": comp}
        transaction.set_rollback(True)


@pytest.mark.django_db
@pytest.mark.parametrize(("value", "stored"), [(2.4, True), (2.41, False)])
def test_stored_flag_is_the_rules_verdict(world, value, stored):
    record = services.save_draft(
        user=world["tech"], sif=world["sif"], plan=world["plan"], kind="full",
        performed_at=dt.datetime(2024, 5, 2, 9, 0, tzinfo=dt.UTC),
        results=[services.ResultInput(
            component=world["comp"], as_found="pass" if stored else "fail", as_left="pass",
            failure_mode="" if stored else "du",
            failure_description="" if stored else "Trip late.",
            measurements=[services.MeasurementInput("Trip value", value, "found", "bar",
                                                    world["step"])])])
    mv = MeasuredValue.objects.get(result__record=record)
    assert mv.within_criterion is stored


# --- the result rules: one message, whichever way the result comes in ---------------------

RULES = [
    pytest.param("mode_needed", "failure_mode",
                 {"as_found": "fail", "as_left": "pass", "failure_description": "Stuck."},
                 id="as-found-fail-needs-a-failure-mode"),
    pytest.param("description_needed", "failure_description",
                 {"as_found": "fail", "as_left": "pass", "failure_mode": "dd"},
                 id="a-failure-needs-a-description"),
    pytest.param("du_needs_fail", "failure_mode",
                 {"as_found": "pass", "as_left": "pass", "failure_mode": "du",
                  "failure_description": "Stuck."},
                 id="dangerous-undetected-needs-as-found-fail"),
    pytest.param("work_needed", "work_done", {"as_found": "pass", "as_left": "fail"},
                 id="as-left-fail-needs-work-done"),
]


def _via_model(world, values):
    result = ComponentResult(component=world["comp"], **values)
    with pytest.raises(ValidationError) as exc:
        result.full_clean(exclude=["record"])
    return exc.value.message_dict


def _via_form(world, values):
    prefix = f"c{world['comp'].pk}"
    form = ComponentForm({f"{prefix}-{k}": v for k, v in values.items()},
                         component=world["comp"], steps=[world["step"]], sif=world["sif"])
    assert not form.is_valid()
    return form.errors


def _via_import(world, values):
    row = {"record": "test", "unit": world["unit"].code, "sif_tag": world["sif"].tag,
           "component_tag": world["comp"].tag, "test_performed_at": "2024-03-01 10:00",
           "test_kind": "full", **values}
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=spreadsheet.COLUMNS)
    writer.writeheader()
    writer.writerow(row)
    table = spreadsheet.read_table("results.csv", buf.getvalue().encode())
    errors = {}
    for e in spreadsheet.plan_import(world["site"], table).errors:
        errors.setdefault(e.column, []).append(e.message)
    return errors


@pytest.mark.django_db
@pytest.mark.parametrize(("rule", "field", "values"), RULES)
def test_each_result_rule_says_the_same_through_model_form_and_import(world, rule, field,
                                                                      values):
    message = str(rules.MESSAGES[rule])
    assert rules.result_problems(**values) == {field: message}
    assert _via_model(world, values)[field] == [message]
    assert _via_form(world, values)[field] == [message]
    assert _via_import(world, values)[field] == [message]


@pytest.mark.django_db
def test_the_form_also_names_what_the_failure_will_need_once_classified(world):
    """A failure found but not classified: the model and the import name the missing mode;
    the form names the description it will need as well, so one correction is enough."""
    values = {"as_found": "fail", "as_left": "pass"}
    mode, described = str(rules.MESSAGES["mode_needed"]), str(rules.MESSAGES[
        "description_needed"])
    assert _via_model(world, values) == {"failure_mode": [mode]}
    assert _via_import(world, values) == {"failure_mode": [mode]}
    assert _via_form(world, values) == {"failure_mode": [mode],
                                        "failure_description": [described]}


@pytest.mark.django_db
def test_a_valid_result_passes_everywhere(world):
    values = {"as_found": "fail", "as_left": "pass", "failure_mode": "du",
              "failure_description": "Trip late.", "work_done": ""}
    assert rules.result_problems(**values) == {}
    ComponentResult(component=world["comp"], **values).full_clean(exclude=["record"])
    assert _via_import(world, values) == {}


@pytest.mark.django_db
def test_a_value_outside_cannot_be_passed(world):
    """The form knows the values (the model and the import do not): passing a value the
    rule judges outside is refused with the rule's message; on the boundary it is not."""
    step, prefix = world["step"], f"c{world['comp'].pk}"
    passed = {"as_found": "pass", "as_left": "pass"}
    errors = _via_form(world, {**passed, f"v{step.pk}_found": "2.41"})
    assert errors["as_found"] == [str(rules.MESSAGES["outside_passed"]) % {
        "quantity": "trip value", "phase": "found", "value": "2.41 bar",
        "criterion": "2.3 ± 0.1 bar"}]
    boundary = ComponentForm({f"{prefix}-{k}": v for k, v in
                              {**passed, f"v{step.pk}_found": "2,4"}.items()},
                             component=world["comp"], steps=[step], sif=world["sif"])
    assert boundary.is_valid(), boundary.errors


@pytest.mark.django_db
def test_the_service_refuses_a_passed_value_outside_its_criterion(world):
    """Every entry point (API, import, form) goes through save_draft: a value the rule
    judges outside cannot be recorded as passed there either, with the rule's message."""
    with pytest.raises(ValidationError) as exc:
        services.save_draft(
            user=world["tech"], sif=world["sif"], plan=world["plan"], kind="full",
            performed_at=dt.datetime(2024, 5, 3, 9, 0, tzinfo=dt.UTC),
            results=[services.ResultInput(
                component=world["comp"], as_found="pass", as_left="pass",
                measurements=[services.MeasurementInput("Trip value", 2.41, "found", "bar",
                                                        world["step"])])])
    [(key, [msg])] = exc.value.message_dict.items()
    assert key == "results[0].as_found" and "2.41 bar" in msg


# --- which steps a device is asked for: the step's own setting (no database) ---------------


def _device(role, type_pk):
    from register.models import DeviceType, Subsystem

    return Component(subsystem=Subsystem(role=role),
                     device_type=DeviceType(pk=type_pk, role=role))


def test_a_steps_own_role_or_device_type_decides_over_its_words():
    from register.models import DeviceType

    lt, sls = _device("sensing", 1), _device("logic", 2)
    ball, globe = _device("final", 3), _device("final", 4)
    devices = [lt, sls, ball, globe]
    roles, types = {"sensing", "logic", "final"}, {1, 2, 3, 4}
    # Its words read "final" (a time in seconds), its setting says the logic solver.
    response = _step(measured_quantity="Response time", unit="s",
                     criterion=choices.CriterionKind.AT_MOST, limit=1.0,
                     applies_to_role=choices.SubsystemRole.LOGIC)
    assert rules.step_role(_step(measured_quantity="Response time", unit="s")) == "final"
    leak = _step(measured_quantity="Seat leakage", unit="ml/min",
                 applies_to_type=DeviceType(pk=4, role="final"))
    # A device type no device of the test has: asked of the devices of its role.
    gone = _step(measured_quantity="Stroke time", unit="s",
                 applies_to_type=DeviceType(pk=99, role="final"))
    unclear = _step(measured_quantity="Insulation resistance", unit="MΩ")

    def asked(device):
        return rules.steps_for(device, [response, leak, gone, unclear], roles_present=roles,
                               types_present=types)

    assert [asked(d) for d in devices] == [
        [unclear], [response, unclear], [gone, unclear], [leak, gone, unclear]]
    # A role no device of the test has (a plan naming only valves): asked of everyone.
    assert rules.steps_for(ball, [response], roles_present={"final"},
                           types_present={3}) == [response]


@pytest.mark.django_db
def test_a_step_cannot_name_a_device_type_of_another_role(world):
    valve_type = f.device_type(role="final")
    step = TestStep(plan=world["plan"], position=5, instruction="Check the seat.",
                    applies_to_role=choices.SubsystemRole.SENSING, applies_to_type=valve_type)
    with pytest.raises(ValidationError) as exc:
        step.full_clean()
    assert exc.value.message_dict == {"applies_to_type": [
        "A step asked of the sensing cannot name a device type used for final elements: "
        "change the role or the type."]}
    step.applies_to_role = choices.SubsystemRole.FINAL
    step.full_clean()


# --- what an outside value proposes for the failure description (no database) -------------


def _outside(value, step=None):
    step = step or _step()
    return rules.JudgedValue(step, "found", value, rules.judge_measurement(step, value))


def test_an_outside_value_proposes_a_failure_described_from_the_step_and_value():
    found = _outside(2.6)
    text = rules.failure_text([found])
    assert text == "Trip value as found: 2.6 bar is 0.3 bar above 2.3 bar, more than the " \
                   "± 0.1 bar allowed."
    got = rules.propose(outside_found=True, outside_left=False, as_found="", as_left="",
                        failure_mode="", found_outside=[found])
    assert got.changes == {"as_found": "fail", "failure_mode": "du",
                           "failure_description": text}
    assert got.marked == {"as_found", "failure_mode"}
    assert got.description_mark == rules.text_mark(text)
    assert got.notes["failure_description"] == rules.PROPOSED_DESCRIPTION
    # Every value found outside is named; a value left outside is not a failure found.
    closing = _step(measured_quantity="Closing time", unit="s",
                    criterion=choices.CriterionKind.AT_MOST, limit=10.0)
    left = rules.JudgedValue(_step(), "left", 2.7, rules.judge_measurement(_step(), 2.7))
    both = rules.failure_text([found, left, _outside(12.5, closing)])
    assert both == f"{text} Closing time as found: 12.5 s is over the limit of 10 s by 2.5 s."


def test_a_proposed_description_follows_the_values_until_the_technician_edits_it():
    first = rules.failure_text([_outside(2.6)])
    mark = rules.text_mark(first)
    common = {"outside_left": False, "as_found": "fail", "as_left": "",
              "failure_mode": "du", "marked": ["as_found", "failure_mode"]}
    # A typing slip corrected, still outside: the untouched text follows the new value.
    again = rules.propose(outside_found=True, failure_description=first,
                          description_mark=mark, found_outside=[_outside(2.45)], **common)
    assert again.changes == {"failure_description": rules.failure_text([_outside(2.45)])}
    assert again.description_mark == rules.text_mark(again.changes["failure_description"])
    # The same value again: nothing to change (the browser's line ends do not count).
    same = rules.propose(outside_found=True, failure_description=first.replace(" ", "\r\n", 1),
                         description_mark=mark, found_outside=[_outside(2.6)], **common)
    assert same.changes == {} and same.description_mark == mark
    # Back within: the untouched text is withdrawn with the other proposals.
    back = rules.propose(outside_found=False, failure_description=first,
                         description_mark=mark, **common)
    assert back.changes == {"as_found": "", "failure_mode": "", "failure_description": ""}
    assert back.notes["failure_description"] == rules.DESCRIPTION_WITHDRAWN
    assert back.description_mark == ""
    # An edited text is the technician's: never replaced nor withdrawn.
    own = first + " Impulse line partly blocked."
    for outside, found in ((True, [_outside(2.45)]), (False, [])):
        kept = rules.propose(outside_found=outside, failure_description=own,
                             description_mark=mark, found_outside=found, **common)
        assert "failure_description" not in kept.changes and kept.description_mark == ""
    # "Not tested" as found: no failure is proposed, so no description either.
    untested = rules.propose(outside_found=True, outside_left=False, as_found="not_tested",
                             as_left="", failure_mode="", found_outside=[_outside(2.6)])
    assert untested.changes == {} and untested.description_mark == ""
