"""Deferrals of proof tests: asked for by a technician or lead, decided by the site's lead."""

from __future__ import annotations

import datetime as dt

from django.core.exceptions import ValidationError
from django.db import transaction
from django.utils import timezone

from register import choices
from register.changes import attribute
from register.models import Deferral, TestPlan
from register.permissions import Action, require
from register.schedule import followup


@transaction.atomic
def request_deferral(*, user, plan: TestPlan, proposed_on: dt.date, reason: str,
                     due_on: dt.date | None = None) -> Deferral:
    """Ask to postpone the plan's current due date to ``proposed_on``."""
    from register.schedule.due import due_date

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
    attribute(deferral, user, "deferral requested").save()
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
    attribute(deferral, user, f"deferral {deferral.status}").save()
    followup.after_plan_change(deferral.plan_id)
    return deferral


