"""Every write that matters, one function each.

Each service takes the acting user (and a reason where the record is controlled), checks
the right in ``register.permissions``, validates with ``full_clean()``, writes inside one
transaction, leaves a history entry attributed to the actor, and enqueues follow-up work
(due dates, recompute) only after the transaction commits. Forms, the API, the import and
the demo loader all write through here.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field

from django.core.exceptions import PermissionDenied, ValidationError
from django.db import transaction
from django.utils import timezone

from . import choices, followup, rules
from .models import (
    Attachment,
    Bypass,
    Component,
    ComponentResult,
    Deferral,
    Demand,
    MeasuredValue,
    SafetyFunction,
    TestPlan,
    TestRecord,
    TestStep,
)
from .people import person_name
from .permissions import Action, require, site_id_of


def _attribute(instance, user, reason: str = ""):
    """Make the history entry of the next save name the actor and the reason."""
    instance._history_user = user
    if reason:
        instance._change_reason = reason[:100]
    return instance


# ---------------------------------------------------------------------------------------
# Test records
# ---------------------------------------------------------------------------------------


@dataclass
class MeasurementInput:
    quantity: str
    value: float
    phase: str = "found"  # "found" or "left"
    unit: str = ""
    step: TestStep | None = None


@dataclass
class ResultInput:
    component: Component
    as_found: str
    as_left: str
    work_done: str = ""
    failure_mode: str = ""
    failure_description: str = ""
    measurements: list[MeasurementInput] = field(default_factory=list)


class StaleDraftError(ValidationError):
    """The draft was saved by someone else since it was opened."""


@transaction.atomic
def save_draft(
    *,
    user,
    sif: SafetyFunction,
    kind: str,
    performed_at: dt.datetime,
    results: list[ResultInput],
    plan: TestPlan | None = None,
    remarks: str = "",
    record: TestRecord | None = None,
    expected_version: int | None = None,
    supersedes: TestRecord | None = None,
    correction_reason: str = "",
    client_key: str | None = None,
) -> TestRecord:
    """Create or update a draft test record with its component results.

    ``expected_version`` guards against two people saving the same draft: if the stored
    draft's version differs, nothing is written and :class:`StaleDraftError` is raised.
    """
    require(user, Action.RECORD_TEST, sif.unit.site_id)
    if record is None:
        record = TestRecord(sif=sif, performed_by=user)
    else:
        record = TestRecord.objects.select_for_update().get(pk=record.pk)
        if record.is_signed:
            raise ValidationError("This record is signed and cannot be changed; record a "
                                  "correction instead.")
        if record.performed_by_id != user.pk:
            raise PermissionDenied("Only the person who started this draft can change it.")
        if expected_version is not None and record.draft_version != expected_version:
            raise StaleDraftError(
                "This draft was saved elsewhere since you opened it (another tab or device). "
                "Your entries are kept on the page; reload the draft to see the newer version."
            )
        record.draft_version += 1
    record.plan = plan
    record.kind = kind
    record.performed_at = performed_at
    record.remarks = remarks
    record.supersedes = supersedes
    record.correction_reason = correction_reason
    record.client_key = client_key
    record.full_clean()
    _attribute(record, user, "draft saved").save()

    record.results.all().delete()
    errors = {}
    for index, item in enumerate(results):
        result = ComponentResult(
            record=record, component=item.component, as_found=item.as_found,
            as_left=item.as_left, work_done=item.work_done, failure_mode=item.failure_mode,
            failure_description=item.failure_description,
        )
        try:
            result.full_clean()
        except ValidationError as exc:
            for key, msgs in exc.message_dict.items():
                errors[f"results[{index}].{key}"] = [f"{item.component.tag}: {m}" for m in msgs]
            continue
        judged = [rules.JudgedValue(mv.step, mv.phase, mv.value,
                                    rules.judge_measurement(mv.step, mv.value, sif=sif))
                  for mv in item.measurements if mv.step is not None]
        outside = {k: v for k, v in rules.result_problems(
            as_found=item.as_found, as_left=item.as_left, failure_mode=item.failure_mode,
            failure_description=item.failure_description, work_done=item.work_done,
            judged=judged).items() if k in ("as_found", "as_left")}
        if outside:  # a value outside its criterion cannot be passed (every entry point)
            for key, msg in outside.items():
                errors[f"results[{index}].{key}"] = [f"{item.component.tag}: {msg}"]
            continue
        _attribute(result, user).save()
        for mv in item.measurements:
            # MeasuredValue.save judges a value with a step by the one rule
            MeasuredValue.objects.create(
                result=result, step=mv.step, phase=mv.phase, quantity=mv.quantity,
                value=mv.value, unit=mv.unit, within_criterion=None,
            )
    if errors:
        raise ValidationError(errors)
    return record


@transaction.atomic
def sign_record(record: TestRecord, user, password: str | None, *, check_password=True,
                signed_at: dt.datetime | None = None) -> TestRecord:
    """The performer signs a draft by re-entering the password; the record is then frozen.

    ``signed_at`` is for loading historical records (import, demo); it defaults to now.
    """
    record = TestRecord.objects.select_for_update().get(pk=record.pk)
    require(user, Action.RECORD_TEST, record.sif.unit.site_id)
    if record.is_signed:
        raise ValidationError("This record is already signed.")
    if record.performed_by_id != user.pk:
        raise PermissionDenied("Only the performer can sign this record.")
    if check_password and not user.check_password(password or ""):
        raise ValidationError({"password": "The password is not correct; the record is "
                                           "still a draft."})
    if not record.results.exists():
        raise ValidationError("Record at least one component result before signing.")
    record.full_clean()
    record.status = choices.RecordStatus.SIGNED
    record.signed_at = signed_at or timezone.now()
    record.performed_by_name = person_name(user)
    _attribute(record, user, "signed by performer").save()
    followup.after_test_change(record.sif_id)
    return record


@transaction.atomic
def verify_record(record: TestRecord, user, password: str | None, *, check_password=True,
                  verified_at: dt.datetime | None = None) -> TestRecord:
    """A verifier (never the performer) countersigns a signed record."""
    record = TestRecord.objects.select_for_update().get(pk=record.pk)
    require(user, Action.VERIFY_TEST, record.sif.unit.site_id)
    if record.status != choices.RecordStatus.SIGNED:
        raise ValidationError("Only a signed record awaiting verification can be "
                              "countersigned.")
    if record.performed_by_id == user.pk:
        raise ValidationError({"verified_by": "The verifier must be another person than "
                                              "the performer."})
    if check_password and not user.check_password(password or ""):
        raise ValidationError({"password": "The password is not correct; nothing was "
                                           "countersigned."})
    record.verified_by = user
    record.verified_by_name = person_name(user)
    record.verified_at = verified_at or timezone.now()
    record.status = choices.RecordStatus.VERIFIED
    _attribute(record, user, "countersigned by verifier").save()
    followup.after_test_change(record.sif_id)
    return record


@transaction.atomic
def start_correction(original: TestRecord, user, reason: str) -> TestRecord:
    """Start a correction: a new draft, copied from the signed original, that supersedes it."""
    original = TestRecord.objects.select_for_update().get(pk=original.pk)
    require(user, Action.RECORD_TEST, original.sif.unit.site_id)
    if not original.is_signed:
        raise ValidationError("A draft can simply be edited; only signed records are "
                              "corrected.")
    if hasattr(original, "superseded_by"):
        raise ValidationError("This record has already been corrected; correct the newest "
                              "version instead.")
    if not reason.strip():
        raise ValidationError({"correction_reason": "A correction needs a reason."})
    results = [
        ResultInput(
            component=r.component, as_found=r.as_found, as_left=r.as_left,
            work_done=r.work_done, failure_mode=r.failure_mode,
            failure_description=r.failure_description,
            measurements=[MeasurementInput(quantity=mv.quantity, value=mv.value,
                                           phase=mv.phase, unit=mv.unit, step=mv.step)
                          for mv in r.measurements.all()],
        )
        for r in original.results.select_related("component").prefetch_related(
            "measurements__step")
    ]
    return save_draft(user=user, sif=original.sif, plan=original.plan, kind=original.kind,
                      performed_at=original.performed_at, results=results,
                      remarks=original.remarks, supersedes=original,
                      correction_reason=reason)


@transaction.atomic
def add_attachment(*, user, record: TestRecord, file, original_name: str, content_type: str,
                   size_bytes: int, sha256: str) -> Attachment:
    """Attach a checked file (photo, scan) to a draft by its performer, with history (so
    it is chained and listed in evidence packs). A signed record takes no more files."""
    require(user, Action.RECORD_TEST, site_id_of(record))
    if record.status != choices.RecordStatus.DRAFT or record.performed_by_id != user.pk:
        raise ValidationError({"attachments": "Files can be added to your own draft only."})
    att = Attachment(record=record, file=file, original_name=original_name[:200],
                     content_type=content_type, size_bytes=size_bytes, sha256=sha256,
                     uploaded_by=user)
    att.full_clean(exclude=["file"])
    _attribute(att, user, "file attached").save()
    return att


# ---------------------------------------------------------------------------------------
# Demands, bypasses, deferrals
# ---------------------------------------------------------------------------------------


@transaction.atomic
def record_demand(*, user, sif: SafetyFunction, occurred_at: dt.datetime, successful: bool,
                  description: str, spurious: bool = False,
                  components_exercised=(), failed_components=()) -> Demand:
    require(user, Action.RECORD_DEMAND, sif.unit.site_id)
    demand = Demand(sif=sif, occurred_at=occurred_at, successful=successful, spurious=spurious,
                    description=description, recorded_by=user)
    demand.full_clean()
    _attribute(demand, user, "demand recorded").save()
    demand.components_exercised.set(components_exercised)
    demand.failed_components.set(failed_components)
    followup.after_test_change(sif.pk)
    return demand


@transaction.atomic
def open_bypass(*, user, sif: SafetyFunction, started_at: dt.datetime, authorised_hours: float,
                reason: str, compensating_measures: str = "", measures_effective: bool = False,
                component: Component | None = None) -> Bypass:
    require(user, Action.MANAGE_BYPASS, sif.unit.site_id)
    bypass = Bypass(sif=sif, component=component, started_at=started_at,
                    authorised_hours=authorised_hours, reason=reason, authorised_by=user,
                    compensating_measures=compensating_measures,
                    measures_effective=measures_effective)
    bypass.full_clean()
    _overlap_check(bypass)
    _attribute(bypass, user, "bypass opened").save()
    followup.after_test_change(sif.pk)
    return bypass


def _overlap_check(bypass: Bypass):
    far_future = timezone.now() + dt.timedelta(days=36500)
    end = bypass.ended_at or far_future
    overlapping = Bypass.objects.filter(sif=bypass.sif, component=bypass.component,
                                        started_at__lt=end).exclude(pk=bypass.pk)
    for other in overlapping:
        if (other.ended_at or far_future) > bypass.started_at:
            raise ValidationError({"started_at": (
                f"This overlaps the bypass started {other.started_at:%Y-%m-%d %H:%M} on the "
                "same equipment; close or correct that one first.")})


@transaction.atomic
def close_bypass(bypass: Bypass, user, ended_at: dt.datetime | None = None) -> Bypass:
    bypass = Bypass.objects.select_for_update().get(pk=bypass.pk)
    require(user, Action.MANAGE_BYPASS, bypass.sif.unit.site_id)
    if bypass.ended_at is not None:
        raise ValidationError("This bypass is already closed.")
    bypass.ended_at = ended_at or timezone.now()
    bypass.cached_state = choices.BypassState.CLOSED
    bypass.full_clean()
    _attribute(bypass, user, "bypass closed").save()
    followup.after_test_change(bypass.sif_id)
    return bypass


@transaction.atomic
def request_deferral(*, user, plan: TestPlan, proposed_on: dt.date, reason: str,
                     due_on: dt.date | None = None) -> Deferral:
    """Ask to postpone the plan's current due date to ``proposed_on``."""
    from .scheduling import due_date

    require(user, Action.REQUEST_DEFERRAL, plan.sif.unit.site_id)
    if not reason.strip():
        raise ValidationError({"reason": "Give the reason for the deferral."})
    current_due = due_on or due_date(plan)
    if current_due is None:
        raise ValidationError("This plan has no due date to defer.")
    if Deferral.objects.filter(plan=plan, due_on=current_due,
                               status=choices.DeferralStatus.PENDING).exists():
        raise ValidationError("A deferral of this due date is already awaiting a decision.")
    deferral = Deferral(plan=plan, due_on=current_due, proposed_on=proposed_on, reason=reason,
                        requested_by=user)
    deferral.full_clean()
    _attribute(deferral, user, "deferral requested").save()
    return deferral


@transaction.atomic
def decide_deferral(deferral: Deferral, user, *, approve: bool, note: str = "",
                    projected_pfd_avg: float | None = None,
                    decided_at: dt.datetime | None = None) -> Deferral:
    """Only the site's functional-safety lead approves or rejects; the decision is kept."""
    deferral = Deferral.objects.select_for_update().get(pk=deferral.pk)
    require(user, Action.DECIDE_DEFERRAL, deferral.plan.sif.unit.site_id)
    if deferral.status != choices.DeferralStatus.PENDING:
        raise ValidationError("This deferral has already been decided.")
    if approve and Deferral.objects.filter(plan=deferral.plan, due_on=deferral.due_on,
                                           status=choices.DeferralStatus.APPROVED).exists():
        raise ValidationError("A deferral of this due date was already approved; a due date "
                              "is deferred once.")
    if not approve and not note.strip():
        raise ValidationError({"decision_note": "Say why the deferral is rejected."})
    deferral.status = (choices.DeferralStatus.APPROVED if approve
                       else choices.DeferralStatus.REJECTED)
    deferral.decided_by = user
    deferral.decided_at = decided_at or timezone.now()
    deferral.decision_note = note
    deferral.projected_pfd_avg = projected_pfd_avg
    _attribute(deferral, user, f"deferral {deferral.status}").save()
    followup.after_plan_change(deferral.plan_id)
    return deferral


@transaction.atomic
def update_design(instance, user, *, reason: str, reference: str, changes: dict):
    """Change design data of a register record under change control.

    ``reason`` and ``reference`` (change request number) are required and are kept in the
    change history with the change.
    """
    site_id = site_id_of(instance)
    require(user, Action.EDIT_REGISTER, site_id)
    if not reason.strip() or not reference.strip():
        raise ValidationError({"reason": "A design change needs a reason and a change "
                                         "request reference."})
    for name, value in changes.items():
        setattr(instance, name, value)
    instance.full_clean()
    _attribute(instance, user, f"[{reference}] {reason}").save()
    sif_id = _sif_id_of(instance)
    if sif_id:
        followup.after_test_change(sif_id)
    return instance


def _sif_id_of(instance) -> int | None:
    if isinstance(instance, SafetyFunction):
        return instance.pk
    for path in ("sif_id", "subsystem.sif_id", "plan.sif_id"):
        obj = instance
        try:
            for part in path.split("."):
                obj = getattr(obj, part)
            return obj
        except AttributeError:
            continue
    return None
