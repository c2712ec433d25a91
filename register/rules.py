"""The field rules, in one place: judging a measured value against its test step, which
steps a device is asked for, what a judgement proposes, and the rules a component result
must follow.

Used by the field form and its live judging endpoint, by ``MeasuredValue`` (the stored
``within_criterion`` flag), by ``ComponentResult.clean`` and by the spreadsheet import,
so each rule and each message exists once.

How a value is judged: in decimal arithmetic on the numbers as written. Each number
(typed value, target, tolerance, limit, required response time) is taken as the
shortest decimal that round-trips its float (``repr``), and the comparison is exact on
those decimals. A value on the boundary is within: 2.4 against 2.3 ± 0.1 is within,
2.41 is outside. Binary floating point would judge 2.4 outside (|2.4 - 2.3| is
0.10000000000000009 in floats), which is not what anyone reading the numbers means.
"""

from __future__ import annotations

import re
from collections.abc import Iterable
from dataclasses import dataclass
from decimal import Decimal

from django.utils.translation import gettext as _
from django.utils.translation import gettext_lazy

from register import choices

WITHIN, OUTSIDE, NOT_JUDGED = "within", "outside", "not_judged"
LABELS = {WITHIN: "Within criterion", OUTSIDE: "Outside criterion", NOT_JUDGED: ""}

SECOND_UNITS = ("s", "sec", "secs", "second", "seconds")


# ---------------------------------------------------------------------------------------
# Judging a measured value
# ---------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Judgement:
    """The verdict on one measured value: ``status`` is within, outside or not_judged."""

    status: str
    reason: str
    label: str = ""

    @property
    def within(self) -> bool | None:
        """True / False / None, as stored in ``MeasuredValue.within_criterion``."""
        return {WITHIN: True, OUTSIDE: False}.get(self.status)

    @property
    def outside(self) -> bool:
        return self.status == OUTSIDE


def _judgement(status: str, reason: str) -> Judgement:
    return Judgement(status, reason, LABELS[status])


def not_a_number(raw: str) -> Judgement:
    """What the page shows for a value that could not be read as a number."""
    return Judgement(NOT_JUDGED, _("“%(raw)s” is not a number. Type digits, e.g. 12.5.")
                     % {"raw": raw}, _("Not a number"))


def _dec(number: float) -> Decimal:
    """The number as written: the shortest decimal that round-trips the float."""
    return Decimal(repr(float(number)))


def _txt(number: Decimal) -> str:
    text = f"{number.normalize():f}"
    return "0" if text in ("-0", "0") else text


def _with_unit(number: Decimal, unit: str) -> str:
    return f"{_txt(number)} {unit}".strip()


def is_timing_step(step) -> bool:
    """A step that times the function in seconds (e.g. a closing time): it is also held to
    the SIF's required response time."""
    return (step.unit or "").strip().lower() in SECOND_UNITS and \
        "time" in (step.measured_quantity or "").lower()


def criterion_text(step, sif=None) -> str:
    """The acceptance criterion in words, including the SIF's response time when it applies."""
    parts = [step.describe_criterion()] if step.describe_criterion() else []
    limit = _response_time(step, sif)
    if limit is not None:
        parts.append(_("SIF response ≤ %(t)s s") % {"t": _txt(limit)})
    return "; ".join(parts)


def _response_time(step, sif) -> Decimal | None:
    if sif is None or sif.required_response_time_s is None or not is_timing_step(step):
        return None
    return _dec(sif.required_response_time_s)


def _judge_criterion(step, value: Decimal) -> Judgement | None:
    """The step's own criterion; None for an observation-only step."""
    unit = (step.unit or "").strip()
    kind = step.criterion
    v = _with_unit(value, unit)
    if kind == choices.CriterionKind.AROUND_SETPOINT:
        if step.target_value is None or step.tolerance is None:
            return _judgement(NOT_JUDGED, _("The step has no target value or tolerance set, "
                                            "so the value is recorded but not judged."))
        target, tol = _dec(step.target_value), _dec(step.tolerance)
        off = abs(value - target)
        side = _("above") if value > target else _("below")
        args = {"v": v, "off": _with_unit(off, unit), "side": side,
                "target": _with_unit(target, unit), "tol": _with_unit(tol, unit)}
        if off == 0:
            return _judgement(WITHIN, _("%(v)s is exactly the target.") % args)
        if off <= tol:
            return _judgement(WITHIN, _("%(v)s is %(off)s %(side)s %(target)s, within "
                                        "± %(tol)s.") % args)
        return _judgement(OUTSIDE, _("%(v)s is %(off)s %(side)s %(target)s, more than the "
                                     "± %(tol)s allowed.") % args)
    if kind in (choices.CriterionKind.AT_MOST, choices.CriterionKind.AT_LEAST):
        if step.limit is None:
            return _judgement(NOT_JUDGED, _("The step has no limit set, so the value is "
                                            "recorded but not judged."))
        limit = _dec(step.limit)
        args = {"v": v, "limit": _with_unit(limit, unit),
                "by": _with_unit(abs(value - limit), unit)}
        if kind == choices.CriterionKind.AT_MOST:
            if value <= limit:
                return _judgement(WITHIN, _("%(v)s is within the limit of at most "
                                            "%(limit)s.") % args)
            return _judgement(OUTSIDE, _("%(v)s is over the limit of %(limit)s by "
                                         "%(by)s.") % args)
        if value >= limit:
            return _judgement(WITHIN, _("%(v)s meets the minimum of %(limit)s.") % args)
        return _judgement(OUTSIDE, _("%(v)s is under the minimum of %(limit)s by %(by)s.")
                          % args)
    return None


def judge_measurement(step, value: float | None, *, sif=None) -> Judgement:
    """Judge ``value`` against ``step``'s criterion and, for a timing step, against the
    SIF's required response time (``sif`` may be None). See the module docstring for how
    numbers are compared."""
    if value is None:
        return _judgement(NOT_JUDGED, _("No value entered."))
    number = _dec(value)
    verdict = _judge_criterion(step, number)
    limit = _response_time(step, sif)
    if limit is not None and not (verdict and verdict.outside):
        args = {"v": _with_unit(number, "s"), "t": _with_unit(limit, "s")}
        if number > limit:
            return _judgement(OUTSIDE, _("%(v)s is longer than the SIF's required response "
                                         "time of %(t)s.") % args)
        if verdict is None or verdict.status == NOT_JUDGED:
            return _judgement(WITHIN, _("%(v)s is within the SIF's required response time "
                                        "of %(t)s.") % args)
    if verdict is None:
        return _judgement(NOT_JUDGED, _("Observation only: this step has no acceptance "
                                        "criterion, so the value is recorded but not "
                                        "judged."))
    return verdict


# ---------------------------------------------------------------------------------------
# Which steps a device is asked for
# ---------------------------------------------------------------------------------------

_ROLE_WORDS = [
    (choices.SubsystemRole.FINAL, re.compile(
        r"\b(clos|open|stroke|travel|valve|actuat|damper|leak|seat|breaker|contactor|"
        r"motor|pump)", re.I)),
    (choices.SubsystemRole.SENSING, re.compile(
        r"\b(trip (value|point|level|pressure|temperature)|set ?point|transmitter|sensor|"
        r"switch|calibrat|reading|detector|analy[sz]er)", re.I)),
    (choices.SubsystemRole.LOGIC, re.compile(r"\b(logic|solver|plc|scan)", re.I)),
]


def _role_from_words(text: str) -> str | None:
    found = {role for role, words in _ROLE_WORDS if words.search(text or "")}
    return found.pop() if len(found) == 1 else None


def step_role(step, sif=None) -> str | None:
    """The subsystem role whose devices a step measures, or None when it concerns every
    device. A step has no role field, so it is read from what the step measures: the
    words of its measured quantity (then of its instruction), a time in seconds (the
    final elements' stroke), or a target equal to the SIF's trip setpoint (the sensors)."""
    role = _role_from_words(step.measured_quantity)
    if role:
        return role
    if is_timing_step(step):
        return choices.SubsystemRole.FINAL
    if sif is not None and sif.trip_setpoint is not None and step.target_value is not None \
            and _dec(sif.trip_setpoint) == _dec(step.target_value) \
            and (step.unit or "").strip() == (sif.setpoint_unit or "").strip():
        return choices.SubsystemRole.SENSING
    return _role_from_words(step.instruction)


def steps_for(component, steps: Iterable, *, roles_present: set[str], sif=None) -> list:
    """The steps that ask ``component`` for a value. A step whose role no device of the
    test has (e.g. a plan naming only valves) is asked of every device, so no step is
    silently dropped."""
    role = component.subsystem.role
    out = []
    for step in steps:
        concerns = step_role(step, sif)
        if concerns is None or concerns not in roles_present or concerns == role:
            out.append(step)
    return out


# ---------------------------------------------------------------------------------------
# What a judgement proposes
# ---------------------------------------------------------------------------------------

PROPOSED_FAIL = gettext_lazy("Proposed: fail (a value is outside its criterion). Check "
                             "before saving.")
PROPOSED_DU = gettext_lazy("Proposed: dangerous undetected, as a failure found by a proof "
                           "test usually is. Change it if the failure is safe or was "
                           "already detected, and describe the failure below.")
WITHDRAWN = gettext_lazy("The values are back within their criterion, so the proposal was "
                         "withdrawn: choose again.")


@dataclass
class Proposal:
    """Values to preselect (``""`` clears a choice), the fields now holding a proposal
    the technician has not changed, and a note per preselected field."""

    changes: dict[str, str]
    marked: set[str]
    notes: dict[str, str]


def propose(*, outside_found: bool, outside_left: bool, as_found: str, as_left: str,
            failure_mode: str, marked: Iterable[str] = ()) -> Proposal:
    """What the server's judgement preselects for the technician, who can change it.

    A value outside its criterion proposes *fail* for its phase (unless "not tested" was
    chosen), and a failed as-found proposes *dangerous undetected* when no failure mode
    is chosen. A proposal the technician left untouched is withdrawn when the values come
    back within (a typing slip corrected); a choice the technician made is never undone.
    """
    fail, du = choices.Verdict.FAIL, choices.FailureMode.DANGEROUS_UNDETECTED
    marked = set(marked)
    current = {"as_found": as_found or "", "as_left": as_left or "",
               "failure_mode": failure_mode or ""}
    ours = {"as_found": fail, "as_left": fail, "failure_mode": du}
    marked = {f for f in marked if f in ours and current[f] == ours[f]}  # still untouched
    changes, notes = {}, {}
    for name, outside in (("as_found", outside_found), ("as_left", outside_left)):
        if outside and current[name] in ("", choices.Verdict.PASS):
            changes[name], notes[name] = fail, PROPOSED_FAIL
            marked.add(name)
        elif not outside and name in marked:
            changes[name], notes[name] = "", WITHDRAWN
            marked.discard(name)
    found_now = changes.get("as_found", current["as_found"])
    if found_now == fail and outside_found and not current["failure_mode"]:
        changes["failure_mode"], notes["failure_mode"] = du, PROPOSED_DU
        marked.add("failure_mode")
    elif found_now != fail and "failure_mode" in marked:
        changes["failure_mode"], notes["failure_mode"] = "", WITHDRAWN
        marked.discard("failure_mode")
    return Proposal(changes, marked, notes)


# ---------------------------------------------------------------------------------------
# The rules of a component result
# ---------------------------------------------------------------------------------------

MESSAGES = {
    "mode_needed": gettext_lazy("Classify the failure found (DU, DD or safe)."),
    "description_needed": gettext_lazy("Describe the failure found."),
    "du_needs_fail": gettext_lazy(
        "A dangerous undetected failure is one this test found: mark as found “Fail”, or "
        "choose another failure class."),
    "work_needed": gettext_lazy(
        "A device left failed needs a note of what was done and what follows (bypass, "
        "work order)."),
    "outside_passed": gettext_lazy(
        "The %(quantity)s as %(phase)s (%(value)s) is outside %(criterion)s: mark it fail, "
        "or correct the value."),
}


@dataclass(frozen=True)
class JudgedValue:
    """A measured value with its step and judgement, for :func:`result_problems`."""

    step: object
    phase: str  # "found" or "left"
    value: float
    judgement: Judgement
    criterion: str = ""


def result_problems(*, as_found: str | None, as_left: str | None,
                    failure_mode: str | None = "", failure_description: str | None = "",
                    work_done: str | None = "", judged: Iterable[JudgedValue] = (),
                    ahead: bool = False) -> dict[str, str]:
    """Every rule a component result must follow, as {field: message}; empty when valid.

    - as found *fail* needs a failure mode;
    - a failure mode needs a description;
    - a dangerous undetected failure needs as found *fail* (the test found it);
    - as left *fail* needs the work done and what follows;
    - with ``judged`` (the form has the values; the model and the import do not): a value
      outside its criterion cannot be passed in its phase.

    ``ahead`` (the field form) also names what the result will need once its missing
    failure mode is chosen (every mode needs a description), so one correction is enough.
    """
    fail = choices.Verdict.FAIL
    problems: dict[str, str] = {}
    unclassified = as_found == fail and not failure_mode
    if unclassified:
        problems["failure_mode"] = str(MESSAGES["mode_needed"])
    if failure_mode == choices.FailureMode.DANGEROUS_UNDETECTED and as_found != fail:
        problems["failure_mode"] = str(MESSAGES["du_needs_fail"])
    if (failure_mode or (ahead and unclassified)) and not (failure_description or "").strip():
        problems["failure_description"] = str(MESSAGES["description_needed"])
    if as_left == fail and not (work_done or "").strip():
        problems["work_done"] = str(MESSAGES["work_needed"])
    verdicts = {"found": as_found, "left": as_left}
    for item in judged:
        if item.judgement.outside and verdicts.get(item.phase) == choices.Verdict.PASS:
            name = f"as_{item.phase}"
            text = str(MESSAGES["outside_passed"]) % {
                "quantity": item.step.measured_quantity.lower(), "phase": item.phase,
                "value": f"{_txt(_dec(item.value))} {item.step.unit}".strip(),
                "criterion": item.criterion or item.step.describe_criterion()}
            problems[name] = f"{problems[name]} {text}" if name in problems else text
    return problems
