"""The periodic follow-up scan: test plans and bypasses, their state changes, notifications.

``scan(as_of)`` is the one entry point, used by the Celery beat task and the
``scan_plans`` command. It is idempotent: each notification has a unique
``(recipient, subject_key)`` where the subject key names the plan (or bypass), the
state and the due cycle, so a second run, or a run after a worker was killed mid-way,
creates nothing twice and still creates whatever the first run missed. Emails are
claimed row by row (``emailed_at``) before sending, so a notification is emailed at
most once; the in-app notification always exists.
"""

from __future__ import annotations

import datetime as dt
from collections import Counter
from dataclasses import dataclass, field

from django.db import transaction
from django.urls import reverse
from django.utils import timezone

from register import choices
from register.days import end_of_day
from register.inbox.delivery import send_pending_emails
from register.models import (
    Bypass,
    Membership,
    Notification,
    TestPlan,
)
from register.schedule.due import PlanStatus, active_plans, refresh_plans

PlanState = choices.PlanState
ESCALATIONS = {PlanState.ESCALATED, PlanState.ESCALATED_2}
NOTIFY_STATES = {PlanState.DUE_SOON, PlanState.OVERDUE, *ESCALATIONS}
#: A bypass open longer than this multiple of its authorised duration is escalated.
BYPASS_ESCALATION_FACTOR = 2.0


@dataclass
class ScanResult:
    as_of: dt.date
    plans: dict[int, PlanStatus] = field(default_factory=dict)
    counts: Counter = field(default_factory=Counter)
    bypass_states: dict[int, str] = field(default_factory=dict)
    notifications_created: int = 0
    emails_sent: int = 0


def bypass_state(bypass: Bypass, at: dt.datetime) -> str:
    if bypass.ended_at is not None and bypass.ended_at <= at:
        return choices.BypassState.CLOSED
    hours = bypass.duration_hours(at)
    if hours > bypass.authorised_hours * BYPASS_ESCALATION_FACTOR:
        return choices.BypassState.ESCALATED
    if hours > bypass.authorised_hours:
        return choices.BypassState.OVERDUE
    return choices.BypassState.OPEN


def scan(as_of: dt.date | None = None, *, notify: bool = True) -> ScanResult:
    """Compute every plan's and open bypass's state as of a date; on today's scan, update
    the caches and create one notification per state change.

    A scan for a past date (``notify=False``) only reports: it writes nothing.
    """
    as_of = as_of or timezone.localdate()
    result = ScanResult(as_of=as_of)
    plans = active_plans()
    if notify:
        result.plans = refresh_plans(plans, as_of)
    else:
        from register.schedule.due import compute_statuses

        result.plans = compute_statuses(plans, as_of)
    result.counts = Counter(s.state for s in result.plans.values())

    at = end_of_day(as_of)
    if as_of == timezone.localdate():
        at = timezone.now()
    bypasses = list(Bypass.objects.filter(started_at__lte=at).exclude(ended_at__lt=at)
                    .select_related("sif__unit__site", "sif__owner", "authorised_by"))
    for b in bypasses:
        result.bypass_states[b.pk] = bypass_state(b, at)
    if not notify:
        return result

    changed = [b for b in bypasses if b.cached_state != result.bypass_states[b.pk]]
    for b in changed:
        b.cached_state = result.bypass_states[b.pk]
    if changed:
        Bypass.objects.bulk_update(changed, ["cached_state"])

    notes = _plan_notifications(result.plans) + _bypass_notifications(bypasses, result)
    with transaction.atomic():
        before = Notification.objects.count()
        Notification.objects.bulk_create(notes, ignore_conflicts=True, batch_size=1000)
        result.notifications_created = Notification.objects.count() - before
    result.emails_sent = send_pending_emails()
    return result


def _leads_by_site() -> dict[int, list]:
    out: dict[int, list] = {}
    for m in Membership.objects.filter(role=choices.Role.LEAD).select_related("user"):
        out.setdefault(m.site_id, []).append(m.user)
    return out


def _plan_notifications(statuses: dict[int, PlanStatus]) -> list[Notification]:
    wanted = {pid: s for pid, s in statuses.items() if s.state in NOTIFY_STATES}
    if not wanted:
        return []
    leads = _leads_by_site()
    notes = []
    for plan in TestPlan.objects.filter(pk__in=wanted).select_related(
            "sif__unit__site", "sif__owner", "assignee"):
        s = wanted[plan.pk]
        site = plan.sif.unit.site
        recipients = {u.pk: u for u in (plan.sif.owner, plan.assignee) if u}
        if s.state in ESCALATIONS:
            recipients.update({u.pk: u for u in leads.get(site.pk, [])})
        label = PlanState(s.state).label.lower()
        late = f", {s.days_overdue} days overdue" if s.days_overdue else ""
        message = (f"{plan.sif.tag} {plan.name}: {label} (due {s.due_on:%d %b %Y}{late}).")
        key = f"plan:{plan.pk}:{s.state}:{s.due_on.isoformat()}"
        link = reverse("register:sif_detail", args=[plan.sif_id])
        for user in recipients.values():
            notes.append(Notification(recipient=user, site=site,
                                      kind=choices.NotificationKind.PLAN_STATE,
                                      subject_key=key, message=message, link=link))
    return notes


def _bypass_notifications(bypasses, result: ScanResult) -> list[Notification]:
    leads = _leads_by_site()
    notes = []
    for b in bypasses:
        state = result.bypass_states[b.pk]
        if state not in (choices.BypassState.OVERDUE, choices.BypassState.ESCALATED):
            continue
        site = b.sif.unit.site
        recipients = {u.pk: u for u in (b.authorised_by, b.sif.owner) if u}
        if state == choices.BypassState.ESCALATED:
            recipients.update({u.pk: u for u in leads.get(site.pk, [])})
        hours = b.duration_hours(timezone.now())
        message = (f"{b.sif.tag} bypass open {hours:.0f} h, authorised for "
                   f"{b.authorised_hours:g} h: {choices.BypassState(state).label.lower()}.")
        key = f"bypass:{b.pk}:{state}"
        link = reverse("register:sif_detail", args=[b.sif_id])
        for user in recipients.values():
            notes.append(Notification(recipient=user, site=site,
                                      kind=choices.NotificationKind.BYPASS_STATE,
                                      subject_key=key, message=message, link=link))
    return notes
