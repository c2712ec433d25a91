"""Deferrals of proof tests: asked for by a technician or lead, decided by the site's lead
(never the person who asked), withdrawn by the register once the deferred test is done.

The rules of a deferral live here: which dates may be proposed (:func:`check_proposed_on`),
the projected effect shown to the decider and stored with the decision
(:func:`projected_effect`, from ``calcs.adapter.deferral_projection``), who may decide, and
when a pending request has become moot (:func:`withdraw_done_deferrals`).
"""

from __future__ import annotations

import datetime as dt

from django.core.exceptions import ValidationError
from django.db import transaction
from django.utils import timezone

from register import choices
from register.calculations import calculations
from register.changes import attribute
from register.days import local_date
from register.inbox import notices
from register.models import Deferral, TestPlan
from register.models.base import free_text_errors
from register.permissions import Action, require
from register.reauth import confirm_password
from register.schedule import followup
from register.schedule.due import PlanStatus, add_months, compute_statuses, status_of

Status = choices.DeferralStatus


def today_at(plan: TestPlan, at: dt.datetime | None = None) -> dt.date:
    """The calendar day of the plan's site at ``at`` (default now)."""
    return local_date(at or timezone.now(), plan.sif.unit.site)


def latest_proposal(plan: TestPlan, today: dt.date) -> dt.date:
    """The latest date that may be proposed: one test interval from today. A deferral
    postpones one test; it never skips a whole test cycle."""
    return add_months(today, plan.interval_months)


def check_proposed_on(plan: TestPlan, proposed_on: dt.date, today: dt.date) -> None:
    """The proposed date must be after today and at most one plan interval away.

    (That it is also after the due date being deferred is the model's own rule,
    ``Deferral.clean``.) Raises ValidationError keyed ``proposed_on``.
    """
    if proposed_on <= today:
        raise ValidationError({"proposed_on": f"The proposed date must be after today "
                                              f"({today:%Y-%m-%d})."})
    latest = latest_proposal(plan, today)
    if proposed_on > latest:
        raise ValidationError({"proposed_on": (
            f"The proposed date can be at most one test interval ({plan.interval_months} "
            f"months) from today: {latest:%Y-%m-%d} at the latest.")})


def projected_effect(plan: TestPlan, proposed_on: dt.date, *, as_of: dt.datetime | None = None,
                     status: PlanStatus | None = None) -> dict:
    """What the decider sees: the SIF's projected PFDavg with the next full test at the
    baseline and on the proposed date, over the same horizon, against the target.

    The baseline is the due date, or testing today when the test is already overdue
    (``test_now``): a deferral is never compared with a due date in the past. A projection
    that cannot be calculated gives ``{"error": ...}`` instead of the figures.
    """
    as_of = as_of or timezone.now()
    status = status or status_of(plan, today_at(plan, as_of))
    try:
        cmp, target = calculations().deferral_projection(plan, proposed_on, as_of)
    except (calculations().EngineError, ValueError, OverflowError) as exc:
        return {"error": str(exc)}
    test_now = status.due_on is None or status.days_overdue > 0
    return {"on_due": cmp.on_due_date.pfd_avg, "deferred": cmp.deferred.pfd_avg,
            "increase": cmp.relative_increase, "target": target,
            "horizon_end": cmp.deferred.window_end, "test_now": test_now,
            "baseline_on": today_at(plan, as_of) if test_now else status.due_on,
            "proposed_on": proposed_on, "days_overdue": status.days_overdue,
            "meets": target is None or cmp.deferred.pfd_avg <= target}


@transaction.atomic
def request_deferral(*, user, plan: TestPlan, proposed_on: dt.date, reason: str,
                     due_on: dt.date | None = None, at: dt.datetime | None = None) -> Deferral:
    """Ask to postpone the plan's current due date to ``proposed_on``.

    ``due_on`` (callers inside the register only, never a client) names the due date
    deferred when it is not the current one; ``at`` dates the request (its history row)
    and is "today" for the date rules.
    """
    require(user, Action.REQUEST_DEFERRAL, plan.sif.unit.site_id)
    today = today_at(plan, at)
    errors: dict[str, list[str]] = {}
    if not reason.strip():
        errors["reason"] = ["Give the reason for the deferral."]
    try:
        check_proposed_on(plan, proposed_on, today)
    except ValidationError as exc:
        errors.update(exc.message_dict)
    current_due = due_on or status_of(plan, today).due_on
    if current_due is None:
        raise ValidationError("This plan has no due date to defer.")
    deferral = Deferral(plan=plan, due_on=current_due, proposed_on=proposed_on, reason=reason,
                        requested_by=user)
    try:
        deferral.full_clean()
    except ValidationError as exc:
        for key, messages in exc.message_dict.items():
            errors.setdefault(key, messages)
    if errors:
        raise ValidationError(errors)
    if Deferral.objects.filter(plan=plan, due_on=current_due, status=Status.PENDING).exists():
        raise ValidationError("A deferral of this due date is already awaiting a decision.")
    attribute(deferral, user, "deferral requested", at=at).save()
    notices.deferral_requested(deferral)
    return deferral


@transaction.atomic
def decide_deferral(deferral: Deferral, user, password=None, *, approve: bool, note: str = "",
                    check_password=True, decided_at: dt.datetime | None = None,
                    at: dt.datetime | None = None) -> Deferral:
    """The site's functional-safety lead, never the requester, approves or rejects,
    re-entering the password (``register.services.base.confirm_password``;
    ``check_password=False`` is for the demo loader's invented past only).

    The projected PFDavg kept with the decision is computed here, never taken from the
    caller. Approval needs a proposed date still valid today (:func:`check_proposed_on`)
    and a projection that could be calculated; rejection needs a note. ``at`` dates the
    decision and its history row (default now).
    """
    deferral = Deferral.objects.select_for_update().select_related(
        "plan__sif__unit__site").get(pk=deferral.pk)
    plan = deferral.plan
    require(user, Action.DECIDE_DEFERRAL, plan.sif.unit.site_id)
    if deferral.status == Status.WITHDRAWN:
        raise ValidationError(f"{deferral.decision_note} There is nothing to decide.")
    if deferral.status != Status.PENDING:
        raise ValidationError("This deferral has already been decided.")
    if deferral.requested_by_id == user.pk:
        raise ValidationError({"decided_by": "You asked for this deferral, so you cannot "
                                             "decide it: another lead of the site decides."})
    note = note.strip()
    if not approve and not note:
        raise ValidationError({"decision_note": "Say why the deferral is rejected."})
    moment = decided_at or at or timezone.now()
    effect = None
    if approve:
        check_proposed_on(plan, deferral.proposed_on, today_at(plan, moment))
        if Deferral.objects.filter(plan=plan, due_on=deferral.due_on,
                                   status=Status.APPROVED).exists():
            raise ValidationError("A deferral of this due date was already approved; a due "
                                  "date is deferred once.")
        effect = projected_effect(plan, deferral.proposed_on, as_of=moment)
        if "error" in effect:
            raise ValidationError("The projected effect could not be calculated "
                                  f"({effect['error']}); a deferral is approved only with "
                                  "its effect known.")
    else:
        try:
            check_proposed_on(plan, deferral.proposed_on, today_at(plan, moment))
            effect = projected_effect(plan, deferral.proposed_on, as_of=moment)
        except ValidationError:
            effect = None  # a rejected date out of range has no projection to keep
    deferral.decision_note = note
    errors = free_text_errors(deferral, "decision_note")
    if errors:
        raise ValidationError(errors)
    if check_password:  # last, so that the person hears of any other problem first
        confirm_password(user, password, outcome="the deferral is not decided")
    deferral.status = Status.APPROVED if approve else Status.REJECTED
    deferral.decided_by = user
    deferral.decided_at = moment
    deferral.projected_pfd_avg = (effect or {}).get("deferred")
    attribute(deferral, user, f"deferral {deferral.status}", at=at or decided_at).save()
    notices.deferral_decided(deferral)
    followup.after_plan_change(deferral.plan_id)
    return deferral


# ---------------------------------------------------------------------------------------
# Withdrawal: a pending request whose test has been done is moot.
# ---------------------------------------------------------------------------------------


def _cycle_due(plan: TestPlan, status: PlanStatus) -> dt.date | None:
    """The due date of the plan's current cycle before any approved deferral moved it."""
    if not status.deferred:
        return status.due_on
    return (Deferral.objects.filter(plan=plan, status=Status.APPROVED,
                                    proposed_on=status.due_on)
            .order_by("-due_on").values_list("due_on", flat=True).first())


def deferred_test_done_on(deferral: Deferral, status: PlanStatus) -> dt.date | None:
    """The day of the credit (a signed test, or a demand where the plan counts it) that
    replaced the due date this deferral defers, or None while that due date still stands.

    ``status``: the plan's status now (``register.schedule.due``). The due date is replaced
    when the plan's current cycle falls due later than it, and the plan's latest credit is
    what moved it: the day before that credit, the cycle was the deferred one or later.
    """
    plan = deferral.plan
    if status.last_credit_on is None:
        return None
    current = _cycle_due(plan, status)
    if current is None or current <= deferral.due_on:
        return None
    before = _cycle_due(plan, status_of(plan, status.last_credit_on - dt.timedelta(days=1)))
    if before is None or before < deferral.due_on:
        return None  # the cycle moved for another reason (a plan change), not a test
    return status.last_credit_on


def withdraw_done_deferrals(sif_id: int, *, at: dt.datetime | None = None) -> list[Deferral]:
    """Withdraw the pending deferrals of the SIF's plans whose deferred test has been done.

    Run after the plans are refreshed following a test change
    (``followup._refresh_sif``). Each withdrawal is a history entry naming the cause
    ("the deferred test was done on <date>") and a notice to the requester. Idempotent:
    only pending requests are looked at, so a second run changes nothing.
    """
    if not Deferral.objects.filter(plan__sif_id=sif_id, status=Status.PENDING).exists():
        return []
    done = []
    with transaction.atomic():
        pending = list(Deferral.objects.select_for_update(of=("self",))
                       .filter(plan__sif_id=sif_id, status=Status.PENDING)
                       .select_related("plan__sif__unit__site", "requested_by"))
        plans = TestPlan.objects.filter(pk__in={d.plan_id for d in pending})
        first = pending[0].plan
        statuses = compute_statuses(plans, today_at(first, at))
        for deferral in pending:
            done_on = deferred_test_done_on(deferral, statuses[deferral.plan_id])
            if done_on is None:
                continue
            cause = f"the deferred test was done on {done_on:%Y-%m-%d}"
            deferral.status = Status.WITHDRAWN
            deferral.decided_at = at or timezone.now()
            deferral.decision_note = f"Withdrawn: {cause}."
            attribute(deferral, None, f"deferral withdrawn: {cause}", at=at).save()
            notices.deferral_withdrawn(deferral)
            done.append(deferral)
    return done
