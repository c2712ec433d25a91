"""Findings: each failure found, and its follow-up until a signed passing retest closes it.

What opens a finding (one per device and event):

* a signed test record with a dangerous failure of a device (``failure_mode`` DU or DD, the
  same modes the inbox calls dangerous): :func:`after_record_signed`, called by
  ``register.services.records.sign_record``;
* a device that failed to act on a real demand or a trip: :func:`open_for_demand`, called
  by ``register.services.operations.record_demand``.

A finding gets an owner (the SIF's owner, else the first lead of the site), the corrective
work (the work done noted in the result, to start with) and, set later, the date its
retest is due. It closes when a *retest* is signed (:func:`retest_problem` is the one rule
of what counts: a later, signed, current full proof test or validation, or a partial test
for a failure a partial test found, in which the device passed as found and as left), or
when a lead closes it with a reason (:func:`close_finding`). A correction of the record
that found a failure carries its findings over to the correcting record, or withdraws them
when the correction no longer shows the failure. Every write has a history row (so it is
in the chain) attributed to the person whose act caused it.
"""

from __future__ import annotations

import datetime as dt

from django.core.exceptions import PermissionDenied, ValidationError
from django.db import transaction
from django.utils import timezone

from register import choices
from register.changes import attribute
from register.days import local_date
from register.inbox.notices import DANGEROUS
from register.models import (
    Demand,
    Finding,
    Membership,
    SafetyFunction,
    TestRecord,
)
from register.people import person_name
from register.permissions import Action, can, require

Status = choices.FindingStatus
Kind = choices.TestKind
PASS = choices.Verdict.PASS

#: Test kinds that retest any failure; a partial test also retests a failure that a
#: partial test found (:func:`retest_kinds`).
RETEST_KINDS = frozenset({Kind.FULL, Kind.VALIDATION})


# ---------------------------------------------------------------------------------------
# Owner, retest rule, ageing
# ---------------------------------------------------------------------------------------


def default_owner(sif: SafetyFunction):
    """The SIF's owner when active, else the first active lead of the site, else None."""
    if sif.owner_id and sif.owner.is_active:
        return sif.owner
    member = (Membership.objects.filter(site_id=sif.unit.site_id, role=choices.Role.LEAD,
                                        user__is_active=True)
              .select_related("user").order_by("user_id").first())
    return member.user if member else None


def retest_kinds(finding: Finding) -> frozenset[str]:
    if finding.result_id and finding.result.record.kind == Kind.PARTIAL:
        return RETEST_KINDS | {Kind.PARTIAL}
    return RETEST_KINDS


def retest_problem(finding: Finding, record: TestRecord) -> str | None:
    """Why ``record`` is not a retest that closes ``finding``; None when it is one."""
    tag = finding.component.tag
    if not record.is_signed:
        return "That record is a draft: a retest counts once it is signed."
    if record.sif_id != finding.sif_id:
        return "That record is of another SIF."
    if TestRecord.objects.filter(supersedes_id=record.pk).exists():
        return "That record has been corrected: choose the record that corrects it."
    if finding.result_id and record.pk == finding.result.record_id:
        return "The record that found the failure is not its retest."
    if record.performed_at <= finding.found_at:
        return (f"The retest must come after the failure was found "
                f"({finding.found_at:%Y-%m-%d %H:%M}).")
    kinds = retest_kinds(finding)
    if record.kind not in kinds:
        names = " or ".join(str(Kind(k).label).lower() for k in sorted(kinds))
        return f"A {record.get_kind_display().lower()} does not retest this failure: a {names} does."
    result = record.results.filter(component_id=finding.component_id).first()
    if result is None:
        return f"{tag} is not in that record."
    if result.as_found != PASS or result.as_left != PASS:
        return (f"{tag} did not pass in that record (as found {result.get_as_found_display()}"
                f", as left {result.get_as_left_display()}).")
    return None


def retest_candidates(finding: Finding, *, newest_first: bool = True,
                      limit: int = 20) -> list[TestRecord]:
    """Signed records that would close ``finding`` as its retest (at most ``limit``)."""
    records = (TestRecord.objects.filter(sif_id=finding.sif_id,
                                         performed_at__gt=finding.found_at,
                                         results__component_id=finding.component_id,
                                         results__as_found=PASS)
               .exclude(status=choices.RecordStatus.DRAFT)
               .order_by("-performed_at" if newest_first else "performed_at"))
    return [r for r in records[:limit] if retest_problem(finding, r) is None]


def age_days(finding: Finding, today: dt.date) -> int:
    """Days since the failure was found (to the closing day once closed)."""
    site = finding.sif.unit.site
    end = local_date(finding.closed_at, site) if finding.closed_at else today
    return max(0, (end - local_date(finding.found_at, site)).days)


def failure_text(finding: Finding) -> str:
    """What failed, in words that fit how it was found."""
    if finding.demand_id:
        return "Dangerous: failed to act on demand"
    return finding.get_failure_mode_display()


def retest_overdue(finding: Finding, today: dt.date) -> bool:
    return finding.is_open and finding.retest_due_on is not None and finding.retest_due_on < today


# ---------------------------------------------------------------------------------------
# Opening (from the services that record failures)
# ---------------------------------------------------------------------------------------


def _moment(at: dt.datetime | None) -> dt.datetime:
    return at or timezone.now()


def _open(finding: Finding, user, reason: str, at) -> Finding:
    """Store a new finding. When a signed passing retest is already on record (a failure
    entered after later tests were signed), it closes the finding at once."""
    finding.owner = default_owner(finding.sif)
    finding.opened_at = _moment(at)
    finding.full_clean()
    attribute(finding, user, reason, at=at).save()
    earlier = retest_candidates(finding, newest_first=False, limit=5)
    if earlier:
        retest = earlier[0]
        when = max(finding.opened_at, retest.signed_at or retest.performed_at)
        _close(finding, user, retest=retest, note="", when=when, at=when)
    return finding


def after_record_signed(record: TestRecord, user, *, at: dt.datetime | None = None
                        ) -> tuple[list[Finding], list[Finding]]:
    """A record has just been signed (inside ``sign_record``'s transaction): carry over or
    withdraw the findings of the record it corrects, open a finding for each dangerous
    failure it found, and close the open findings it retests. Returns (opened, closed).
    ``record`` is the instance being signed, as ``sign_record`` read it under its lock;
    its results are read once for the signing (``TestRecord.results_with_components``)."""
    results = record.results_with_components()
    dangerous = {r.component_id: r for r in results if r.failure_mode in DANGEROUS}
    if record.supersedes_id:
        _carry_over(record, dangerous, user, at)
    opened = []
    for result in dangerous.values():
        if Finding.objects.filter(result=result).exists():
            continue
        finding = Finding(sif=record.sif, component=result.component,
                          source=choices.FindingSource.TEST, result=result,
                          found_at=record.performed_at, failure_mode=result.failure_mode,
                          description=result.failure_description,
                          corrective_action=result.work_done)
        opened.append(_open(finding, user, f"finding opened: failure found by test "
                                           f"#{record.pk}", at))
    closed = []
    tested = [r.component_id for r in results if r.as_found == PASS and r.as_left == PASS]
    for finding in (Finding.objects.select_for_update(of=("self",))
                    .filter(sif_id=record.sif_id, component_id__in=tested, status=Status.OPEN)
                    .select_related("component", "result__record", "sif__unit__site")):
        if retest_problem(finding, record) is None:
            closed.append(_close(finding, user, retest=record, note="",
                                 when=at or record.signed_at or timezone.now(), at=at))
    return opened, closed


def _carry_over(record: TestRecord, dangerous: dict, user, at) -> None:
    """The findings of the corrected record follow the correction: to the correcting
    record's result for the same device, or withdrawn if it no longer shows the failure."""
    for finding in (Finding.objects.select_for_update(of=("self",))
                    .filter(result__record_id=record.supersedes_id)
                    .select_related("component", "sif__unit__site")):
        result = dangerous.get(finding.component_id)
        if result is not None:
            finding.result = result
            finding.found_at = record.performed_at
            finding.failure_mode = result.failure_mode
            finding.description = result.failure_description
            finding.full_clean()
            attribute(finding, user, f"finding carried over to the correction #{record.pk}",
                      at=at).save()
        elif finding.is_open:
            finding.status = Status.WITHDRAWN
            finding.closed_at = _moment(at)
            finding.closed_by = user
            finding.closure_note = (f"Withdrawn: the correcting record #{record.pk} shows no "
                                    f"dangerous failure of {finding.component.tag}.")
            finding.full_clean()
            attribute(finding, user, "finding withdrawn: record corrected", at=at).save()


def open_for_demand(demand: Demand, failed_components, user, *,
                    at: dt.datetime | None = None) -> list[Finding]:
    """One finding per device that failed to act on ``demand`` (inside ``record_demand``)."""
    what = "a spurious trip" if demand.spurious else "a real demand"
    out = []
    for component in failed_components:
        finding = Finding(sif=demand.sif, component=component,
                          source=choices.FindingSource.DEMAND, demand=demand,
                          found_at=demand.occurred_at,
                          failure_mode=choices.FailureMode.DANGEROUS_UNDETECTED,
                          description=f"Failed to act on {what}: {demand.description}")
        out.append(_open(finding, user, "finding opened: device failed to act on demand", at))
    return out


# ---------------------------------------------------------------------------------------
# Follow-up and closing (the findings pages)
# ---------------------------------------------------------------------------------------


def _locked(finding: Finding) -> Finding:
    return (Finding.objects.select_for_update(of=("self",))
            .select_related("sif__unit__site", "component", "result__record", "owner")
            .get(pk=finding.pk))


@transaction.atomic
def update_finding(finding: Finding, user, *, owner, corrective_action: str,
                   retest_due_on: dt.date | None, at: dt.datetime | None = None) -> bool:
    """Change the owner, the corrective work or the retest date of an open finding.
    Returns False (and writes nothing) when nothing changed."""
    finding = _locked(finding)
    site_id = finding.sif.unit.site_id
    require(user, Action.MANAGE_FINDING, site_id)
    if not finding.is_open:
        raise ValidationError("This finding is closed; it is no longer changed.")
    errors = {}
    if owner is None:
        errors["owner"] = ["Name the person who sees the follow-up through."]
    elif not can(owner, Action.MANAGE_FINDING, site_id):
        errors["owner"] = [f"{person_name(owner)} is not a lead or technician of this site."]
    if errors:
        raise ValidationError(errors)
    corrective_action = (corrective_action or "").strip()
    if (finding.owner_id, finding.corrective_action, finding.retest_due_on) == (
            owner.pk, corrective_action, retest_due_on):
        return False
    finding.owner = owner
    finding.corrective_action = corrective_action
    finding.retest_due_on = retest_due_on
    finding.full_clean()
    attribute(finding, user, "finding updated", at=at).save()
    return True


def _close(finding: Finding, user, *, retest, note: str, when, at) -> Finding:
    finding.status = Status.CLOSED
    finding.retest = retest
    finding.closure_note = note
    finding.closed_at = when
    finding.closed_by = user
    finding.full_clean()
    reason = (f"finding closed: retest #{retest.pk} passed" if retest is not None
              else "finding closed without a retest")
    attribute(finding, user, reason, at=at).save()
    return finding


@transaction.atomic
def close_finding(finding: Finding, user, *, retest: TestRecord | None = None,
                  reason: str = "", at: dt.datetime | None = None) -> Finding:
    """Close an open finding with its signed passing retest, or, a lead only, with a reason
    why no retest is needed. ``at`` is the moment of the closing (default now)."""
    finding = _locked(finding)
    site_id = finding.sif.unit.site_id
    require(user, Action.MANAGE_FINDING, site_id)
    if not finding.is_open:
        raise ValidationError("This finding is already closed.")
    reason = (reason or "").strip()
    if retest is not None:
        problem = retest_problem(finding, retest)
        if problem:
            raise ValidationError({"retest": [problem]})
    elif not reason:
        raise ValidationError({"closure_note": [
            "Choose the signed passing retest, or say why the finding is closed without "
            "one."]})
    elif not can(user, Action.CLOSE_FINDING_WITHOUT_RETEST, site_id):
        raise PermissionDenied("Only a lead of the site closes a finding without a signed "
                               "passing retest.")
    return _close(finding, user, retest=retest, note=reason, when=_moment(at), at=at)


def open_findings(user):
    """The open findings at the user's sites, oldest first."""
    return (Finding.objects.restrict(user).filter(status=Status.OPEN)
            .select_related("sif__unit__site", "component", "owner", "result__record",
                            "demand")
            .order_by("found_at", "id"))
