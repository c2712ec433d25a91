"""The field rules, in one place: judging a measured value against its test step, which
steps a device is asked for, what a judgement proposes (verdicts, failure mode and the
failure description), and the rules a component result must follow.

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

import hashlib
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
    """The subsystem role whose devices a step concerns, or None when it concerns every
    device.

    The step's own setting decides: its role (``applies_to_role``), else the role of its
    device type (``applies_to_type``). A step with neither (every step written before the
    setting existed) is read from what it measures: the words of its measured quantity
    (then of its instruction), a time in seconds (the final elements' stroke), or a target
    equal to the SIF's trip setpoint (the sensors); None when that says nothing."""
    if getattr(step, "applies_to_role", ""):
        return step.applies_to_role
    if getattr(step, "applies_to_type_id", None) is not None:
        return step.applies_to_type.role
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


def steps_for(component, steps: Iterable, *, roles_present: set[str],
              types_present: set[int] | None = None, sif=None) -> list:
    """The steps ``component`` is asked for (a value, or a check to confirm).

    A step set to a device type is asked of the devices of that type; one set to a role,
    of the devices of that role; one with neither, as :func:`step_role` reads it. A step
    that concerns no device of the test is not dropped: a device type no device has falls
    back to the type's role, and a role no device has (e.g. a plan naming only valves) to
    every device. ``roles_present`` and ``types_present`` (device type ids; None: not
    known, taken as present) describe the devices of the test."""
    role, own_type = component.subsystem.role, component.device_type_id
    out = []
    for step in steps:
        type_id = getattr(step, "applies_to_type_id", None)
        if type_id is not None and (types_present is None or type_id in types_present):
            if type_id == own_type:
                out.append(step)
            continue
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
PROPOSED_DESCRIPTION = gettext_lazy("Proposed from the value found: check it and add what "
                                    "you saw.")
WITHDRAWN = gettext_lazy("The values are back within their criterion, so the proposal was "
                         "withdrawn: choose again.")
DESCRIPTION_WITHDRAWN = gettext_lazy("The values are back within their criterion, so the "
                                     "proposed description was withdrawn.")


@dataclass
class Proposal:
    """Values to preselect (``""`` clears a choice), the fields now holding a proposal
    the technician has not changed, and a note per preselected field.

    ``description_mark`` identifies the failure description the rule wrote (empty: the
    text shown is the technician's, or none was proposed); the page sends it back so a
    proposed text the technician has not edited can follow the values."""

    changes: dict[str, str]
    marked: set[str]
    notes: dict[str, str]
    description_mark: str = ""


def failure_text(judged: Iterable[JudgedValue]) -> str:
    """The failure description proposed from the values found outside their criterion:
    each step's quantity with the judgement's reason, e.g. "Trip value as found: 83.2 % is
    3.2 % above 80 %, more than the ± 1 % allowed." Empty when no value was."""
    return " ".join(
        _("%(quantity)s as found: %(reason)s") % {"quantity": item.step.measured_quantity,
                                                  "reason": item.judgement.reason}
        for item in judged if item.phase == "found" and item.judgement.outside)


def text_mark(text: str) -> str:
    """A short fingerprint of a text as the page sends it back (spacing and line ends
    ignored): tells whether a proposed description was edited."""
    return hashlib.sha256(" ".join((text or "").split()).encode()).hexdigest()[:16]


def propose(*, outside_found: bool, outside_left: bool, as_found: str, as_left: str,
            failure_mode: str, marked: Iterable[str] = (), failure_description: str = "",
            description_mark: str = "", found_outside: Iterable[JudgedValue] = ()
            ) -> Proposal:
    """What the server's judgement preselects for the technician, who can change it.

    A value outside its criterion proposes *fail* for its phase (unless "not tested" was
    chosen), and a failed as-found proposes *dangerous undetected* when no failure mode
    is chosen and, when the description is empty, a description written from the values
    found outside (``found_outside``, :func:`failure_text`). A proposal the technician
    left untouched is withdrawn when the values come back within (a typing slip
    corrected) and a proposed description follows the values while it is not edited; a
    choice or a text of the technician's is never undone.
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
    # The failure description: written from the values while the technician has not.
    text = failure_description or ""
    untouched = bool(description_mark) and text_mark(text) == description_mark
    wanted = failure_text(found_outside) if found_now == fail and outside_found else ""
    mark = description_mark if untouched else ""
    if wanted and (untouched or not text.strip()):
        if text_mark(text) != text_mark(wanted):
            changes["failure_description"] = wanted
            notes["failure_description"] = PROPOSED_DESCRIPTION
        mark = text_mark(wanted)
    elif untouched and text.strip():
        changes["failure_description"] = ""
        notes["failure_description"] = DESCRIPTION_WITHDRAWN
        mark = ""
    return Proposal(changes, marked, notes, mark)


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
