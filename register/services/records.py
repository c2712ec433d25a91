"""Test records: drafts, signing, countersigning, corrections, attachments."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field

from django.core.exceptions import NON_FIELD_ERRORS, PermissionDenied, ValidationError
from django.db import IntegrityError, transaction
from django.db.models import prefetch_related_objects
from django.utils import timezone
from simple_history.signals import post_create_historical_record

from register import choices, rules
from register.changes import attribute
from register.models import (
    Attachment,
    Component,
    ComponentResult,
    MeasuredValue,
    SafetyFunction,
    TestPlan,
    TestRecord,
    TestStep,
)
from register.operations import services as findings
from register.people import person_name
from register.permissions import Action, require, site_id_of
from register.schedule import followup
from register.services.base import Reauthenticated, confirm_password, reference_errors

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


class KeyReusedError(ValidationError):
    """A client key already names another submission (different content or performer)."""


def _submission(*, user, sif, plan, kind, performed_at, remarks, results) -> tuple:
    """What a submission says, in a form two submissions can be compared by."""
    return (user.pk, sif.pk, plan.pk if plan else None, kind, performed_at, remarks or "",
            frozenset((r.component.pk, r.as_found, r.as_left, r.work_done or "",
                       r.failure_mode or "", r.failure_description or "",
                       frozenset((m.step.pk if m.step else None, m.phase, m.quantity,
                                  float(m.value)) for m in r.measurements))
                      for r in results))


def _stored_submission(record: TestRecord) -> tuple:
    results = record.results.prefetch_related("measurements").select_related("component")
    return (record.performed_by_id, record.sif_id, record.plan_id, record.kind,
            record.performed_at, record.remarks or "",
            frozenset((r.component_id, r.as_found, r.as_left, r.work_done or "",
                       r.failure_mode or "", r.failure_description or "",
                       frozenset((m.step_id, m.phase, m.quantity, float(m.value))
                                 for m in r.measurements.all()))
                      for r in results))


def save_draft_once(*, client_key: str, user, sif: SafetyFunction, kind: str,
                    performed_at: dt.datetime, results: list[ResultInput],
                    plan: TestPlan | None = None, remarks: str = "") -> tuple[TestRecord, bool]:
    """The one idempotency rule of new test records, for the field form and the API.

    A client key names one submission. The first time it is sent the draft is saved
    (``save_draft``) and ``(record, True)`` returned. Sent again with the same content
    (a form sent twice, a retried API call, a race between the two), nothing is written and
    ``(stored record, False)`` is returned; with other content, or by another person,
    :class:`KeyReusedError` is raised and nothing is written.
    """
    sent = _submission(user=user, sif=sif, plan=plan, kind=kind, performed_at=performed_at,
                       remarks=remarks, results=results)

    def stored():
        found = TestRecord.objects.filter(client_key=client_key,
                                          key_site_id=sif.unit.site_id).first()
        if found is not None and _stored_submission(found) != sent:
            raise KeyReusedError({"client_key": [
                "This key was already used for a different test result."]})
        return found

    existing = stored()
    if existing is not None:
        existing.was_written = False
        return existing, False
    try:
        with transaction.atomic():  # an IntegrityError (a concurrent twin) rolls back here
            return _save_draft(user=user, sif=sif, plan=plan, kind=kind,
                               performed_at=performed_at, remarks=remarks, results=results,
                               client_key=client_key, key_checked=True), True
    except IntegrityError:
        existing = stored()  # stored by a concurrent request a moment ago
        if existing is None:
            raise
        existing.was_written = False
        return existing, False


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
    at: dt.datetime | None = None,
) -> TestRecord:
    """Create or update a draft test record with its component results.

    ``expected_version`` guards against two people saving the same draft: if the stored
    draft's version differs, nothing is written and :class:`StaleDraftError` is raised,
    unless the stored draft already holds exactly these entries (the same form sent twice),
    when nothing is written either. ``record.was_written`` tells which happened.
    ``at`` dates the history rows when the test is loaded from the past (the demo).
    A :class:`ValidationError` leaves nothing written.
    """
    return _save_draft(user=user, sif=sif, kind=kind, performed_at=performed_at,
                       results=results, plan=plan, remarks=remarks, record=record,
                       expected_version=expected_version, supersedes=supersedes,
                       correction_reason=correction_reason, client_key=client_key, at=at)


def _save_draft(*, user, sif, kind, performed_at, results, plan=None, remarks="",
                record=None, expected_version=None, supersedes=None, correction_reason="",
                client_key=None, at=None, key_checked=False) -> TestRecord:
    """``save_draft`` without its own savepoint: the caller's atomic block rolls back on
    an error. ``key_checked``: the caller has just looked the client key up in this
    transaction and found it free (``save_draft_once``)."""
    require(user, Action.RECORD_TEST, sif.unit.site_id)
    _check_draft_references(sif, results)
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
            if _stored_submission(record) == _submission(
                    user=user, sif=sif, plan=plan, kind=kind, performed_at=performed_at,
                    remarks=remarks, results=results):
                record.was_written = False  # the same entries sent twice: nothing to do
                return record
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
    record.key_site = sif.unit.site if client_key else None
    if key_checked:
        record._constraints_checked = {TestRecord.KEY_CONSTRAINT}
    record.full_clean()
    adding = record._state.adding
    attribute(record, user, "draft saved", at=at).save()

    if not adding:  # a new record has no results yet
        record.results.all().delete()
    # Each device's SIF is checked by ComponentResult.clean: read the subsystems of the
    # devices not loaded with theirs at once.
    prefetch_related_objects([item.component for item in results], "subsystem")
    errors = {}
    rows: list[tuple[ComponentResult, ResultInput]] = []
    seen: set[int] = set()
    for index, item in enumerate(results):
        result = ComponentResult(
            record=record, component=item.component, as_found=item.as_found,
            as_left=item.as_left, work_done=item.work_done, failure_mode=item.failure_mode,
            failure_description=item.failure_description,
        )
        try:
            # The one constraint, a result once per device, concerns only these inputs
            # (the record's results were just removed): checked here without a query.
            result.full_clean(validate_constraints=False)
            if item.component.pk in seen:
                raise ValidationError({NON_FIELD_ERRORS: [result.unique_error_message(
                    ComponentResult, ("record", "component"))]})
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
        seen.add(item.component.pk)
        rows.append((attribute(result, user, at=at), item))
    if errors:
        raise ValidationError(errors)
    # The record is a draft locked by this transaction (new, or read under a row lock):
    # its results and values are inserted at once, each with its history row.
    _insert_with_history(ComponentResult, [result for result, _ in rows])
    values = []
    for result, item in rows:
        for mv in item.measurements:
            value = MeasuredValue(
                result=result, step=mv.step, phase=mv.phase, quantity=mv.quantity,
                value=mv.value, unit=mv.unit, within_criterion=None,
            )
            if value.step_id is not None:  # as MeasuredValue.save: the one rule's verdict
                value.within_criterion = value.judge().within
            values.append(attribute(value, user, at=at) if at else value)
    _insert_with_history(MeasuredValue, values)
    record.was_written = True
    return record


def _insert_with_history(model, objs: list) -> None:
    """Insert ``objs`` (rows of a draft's parts) in one statement and their history rows
    in another, then announce each history row as a save does
    (``post_create_historical_record``), so each joins the chain. The history rows name
    the actor, reason (none: NULL, as a save stores) and moment set by ``attribute`` as a
    save's would."""
    if not objs:
        return
    model.objects.bulk_create(objs)
    history = model.history.bulk_history_create(objs, default_change_reason=None)
    if history is None:  # history switched off (SIMPLE_HISTORY_ENABLED)
        return
    for obj, row in zip(objs, history, strict=True):
        post_create_historical_record.send(
            sender=type(row), instance=obj, history_instance=row,
            history_date=row.history_date, history_user=row.history_user,
            history_change_reason=row.history_change_reason, using=None)


def _check_draft_references(sif, results) -> None:
    """Each step a measurement names is of the draft's own SIF
    (``services.base.check_references``), keyed by its field. (The plan, the corrected
    record and each device are checked by the models' ``clean``.)"""
    refs = {f"results[{i}].measurements[{j}].step": m.step
            for i, item in enumerate(results) for j, m in enumerate(item.measurements)}
    errors = reference_errors(sif, **refs)
    if errors:
        raise ValidationError(errors)


@transaction.atomic
def discard_draft(record: TestRecord, user) -> None:
    """Delete an unsigned draft of one's own, with its results, measurements and
    attachments; the history keeps the deletion, attributed. A signed record is never
    deleted (record a correction instead)."""
    record = TestRecord.objects.select_for_update().get(pk=record.pk)
    require(user, Action.RECORD_TEST, record.sif.unit.site_id)
    if record.is_signed:
        raise ValidationError("This record is signed and cannot be deleted; record a "
                              "correction instead.")
    if record.performed_by_id != user.pk:
        raise PermissionDenied("Only the person who started this draft can delete it.")
    attribute(record, user, "draft discarded").delete()


@transaction.atomic
def sign_record(record: TestRecord, user, password: str | Reauthenticated | None, *,
                check_password=True, signed_at: dt.datetime | None = None,
                at: dt.datetime | None = None) -> TestRecord:
    """The performer signs a draft by re-entering the password; the record is then frozen.

    ``password``: what the performer typed, or their ``Reauthenticated`` proof from
    ``services.base.confirm_password`` (a batch checks once). ``check_password=False`` is
    for the demo loader's invented past only; no request path passes it.
    ``signed_at`` is for loading historical records (import, demo); it defaults to now.
    ``at`` dates the history row the same way (default: now).
    """
    # Read under a row lock with what the signing reads of it (its SIF and site, plan and
    # the record it corrects), so nothing below reads them again.
    record = (TestRecord.objects.select_for_update(of=("self",))
              .select_related("sif__unit__site", "plan", "supersedes").get(pk=record.pk))
    require(user, Action.RECORD_TEST, record.sif.unit.site_id)
    if record.is_signed:
        raise ValidationError("This record is already signed.")
    if record.performed_by_id != user.pk:
        raise PermissionDenied("Only the performer can sign this record.")
    if check_password:
        confirm_password(user, password, outcome="the record is still a draft")
    if not record.results_with_components():  # shared with the findings and notices
        raise ValidationError("Record at least one component result before signing.")
    record.performed_by = user
    if record.key_site_id is not None and record.key_site_id == record.sif.unit.site_id:
        record.key_site = record.sif.unit.site
    record._constraints_checked = {TestRecord.KEY_CONSTRAINT}  # signing changes no key field
    record.full_clean()
    record.status = choices.RecordStatus.SIGNED
    record.signed_at = signed_at or timezone.now()
    record.performed_by_name = person_name(user)
    record._draft_under_lock = True  # read as a draft under the lock above
    attribute(record, user, "signed by performer", at=at).save()
    followup.after_test_change(record.sif_id)
    findings.after_record_signed(record, user, at=at)  # open, carry over, close findings
    if signed_at is None:  # not for records loaded from the past (import, demo)
        from register.inbox import notices

        notices.failure_found(record)
        notices.waiting_for_countersignature(record)
    return record


@transaction.atomic
def verify_record(record: TestRecord, user, password: str | Reauthenticated | None, *,
                  check_password=True, verified_at: dt.datetime | None = None,
                  at: dt.datetime | None = None) -> TestRecord:
    """A verifier (never the performer) countersigns a signed record."""
    record = TestRecord.objects.select_for_update().get(pk=record.pk)
    require(user, Action.VERIFY_TEST, record.sif.unit.site_id)
    if record.status != choices.RecordStatus.SIGNED:
        raise ValidationError("Only a signed record awaiting verification can be "
                              "countersigned.")
    if record.performed_by_id == user.pk:
        raise ValidationError({"verified_by": "The verifier must be another person than "
                                              "the performer."})
    if check_password:
        confirm_password(user, password, outcome="nothing was countersigned")
    record.verified_by = user
    record.verified_by_name = person_name(user)
    record.verified_at = verified_at or timezone.now()
    record.status = choices.RecordStatus.VERIFIED
    attribute(record, user, "countersigned by verifier", at=at).save()
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
    attribute(att, user, "file attached").save()
    return att


