"""The periodic follow-up scan: test plans and bypasses, their state changes, notifications.

``scan(as_of)`` is the one entry point, used by the Celery beat task and the
``scan_plans`` command. It looks only at the plans whose state may have turned: those
whose ``next_change_on`` has come on their site's calendar, and those never refreshed
since the state-date columns were added (``next_due_on`` set, ``due_soon_on`` empty).
It refreshes them (``register.schedule.due.refresh_plans``) and writes one append-only
``PlanStateChange`` row per transition (``record_transitions``), from which the
notifications are created, all in one transaction: a scan killed mid-way leaves nothing
half done, and the next one does the whole work. Rows are unique per (plan, due date,
new state) and notifications per (recipient, subject key), so a second run creates
nothing twice. Each new notification is e-mailed by its own task after the commit
(``register.inbox.delivery``); the scan also sweeps up any whose task was lost.

The query count of a scan does not depend on the size of the plant: the plans' statuses
come from one query of values (``register.schedule.due.current_statuses``; the few plans
with several versions or an approved deferral from the whole rule, a fixed number more),
plus one write per two thousand plans refreshed.
"""

from __future__ import annotations

import datetime as dt
from collections import Counter, defaultdict
from dataclasses import dataclass, field

from django.db import transaction
from django.db.models import Case, CharField, Count, F, Max, Q, Value, When
from django.utils import timezone

from register import choices
from register.days import end_of_day, today
from register.inbox import notices
from register.inbox.delivery import send_pending_emails
from register.models import Bypass, Site
from register.models.notifications import PlanStateChange
from register.schedule.due import (
    PlanStatus,
    active_plans,
    current_statuses,
    refresh_plans,
    with_state,
)

PlanState = choices.PlanState
#: From this many plans on, the scan reads the records of the plans it looks at as whole
#: tables (``register.schedule.due.current_statuses``, ``many``).
MANY_PLANS = 200


@dataclass
class ScanResult:
    as_of: dt.date | None
    plans: dict[int, PlanStatus] = field(default_factory=dict)  # the plans looked at
    counts: Counter = field(default_factory=Counter)  # every followed plan, by state
    bypass_states: dict[int, str] = field(default_factory=dict)
    transitions: int = 0
    notifications_created: int = 0
    emails_sent: int = 0


# ---------------------------------------------------------------------------------------
# Bypasses: the state derived from the times the bypass keeps
# ---------------------------------------------------------------------------------------


def bypass_state_expression(at: dt.datetime):
    """``bypass_state`` as a SQL expression over the columns the bypass keeps
    (``authorised_until``, ``escalates_at``), for lists and filters."""
    return Case(
        When(Q(ended_at__lte=at), then=Value(choices.BypassState.CLOSED)),
        When(Q(escalates_at__lt=at), then=Value(choices.BypassState.ESCALATED)),
        When(Q(authorised_until__lt=at), then=Value(choices.BypassState.OVERDUE)),
        default=Value(choices.BypassState.OPEN), output_field=CharField())


def bypass_state(bypass: Bypass, at: dt.datetime) -> str:
    if bypass.ended_at is not None and bypass.ended_at <= at:
        return choices.BypassState.CLOSED
    hours = bypass.duration_hours(at)
    if hours > bypass.authorised_hours * bypass.ESCALATION_FACTOR:
        return choices.BypassState.ESCALATED
    if hours > bypass.authorised_hours:
        return choices.BypassState.OVERDUE
    return choices.BypassState.OPEN


def _open_bypasses(at: dt.datetime):
    return Bypass.objects.filter(started_at__lte=at).filter(
        Q(ended_at__isnull=True) | Q(ended_at__gt=at))


# ---------------------------------------------------------------------------------------
# State changes as rows
# ---------------------------------------------------------------------------------------


def last_changes(plan_ids) -> dict[int, PlanStateChange]:
    """Each plan's newest state-change row (one query)."""
    newest = (PlanStateChange.objects.filter(plan_id__in=plan_ids).values("plan_id")
              .annotate(last=Max("id")).values("last"))
    return {c.plan_id: c for c in PlanStateChange.objects.filter(id__in=newest)}


def record_transitions(statuses: dict[int, PlanStatus], *, at: dt.datetime,
                       cause: str) -> list[PlanStateChange]:
    """Write one state-change row for each plan whose state or due date differs from its
    last row (a plan without a row gets its first), and notify from the new rows.

    ``statuses``: the plans' statuses just computed (``refresh_plans``,
    ``compute_statuses``); ``at``: when; ``cause``: a ``choices.ChangeCause``. Call it in
    the transaction that refreshed the plans. Rows are unique per (plan, due date, new
    state): a change already written (another run, a concurrent refresh) is not written
    again, nor notified again. Returns the new rows; three queries, plus those of the
    notifications, whatever the number of plans.
    """
    return _record(statuses, at, cause)[0]


def _record(statuses, at, cause) -> tuple[list[PlanStateChange], int]:
    """``record_transitions``, also returning the number of notifications created."""
    if not statuses:
        return [], 0
    last = last_changes(list(statuses))
    wanted = []
    for plan_id, s in statuses.items():
        before = last.get(plan_id)
        if before is not None and (before.to_state, before.due_on) == (s.state, s.due_on):
            continue
        wanted.append(PlanStateChange(
            plan_id=plan_id, from_state=before.to_state if before else "", to_state=s.state,
            due_on=s.due_on, from_due_on=before.due_on if before else None, at=at,
            cause=cause))
    if not wanted:
        return [], 0
    existing = set(PlanStateChange.objects.filter(
        plan_id__in={c.plan_id for c in wanted}, to_state__in={c.to_state for c in wanted}
    ).values_list("plan_id", "due_on", "to_state"))
    new = [c for c in wanted if (c.plan_id, c.due_on, c.to_state) not in existing]
    if not new:
        return [], 0
    PlanStateChange.objects.bulk_create(new, ignore_conflicts=True)
    return new, notices.notify_plan_changes(new)


# ---------------------------------------------------------------------------------------
# The scan
# ---------------------------------------------------------------------------------------


def plans_to_look_at(as_of: dt.date | None = None):
    """Followed plans whose state may have turned by ``as_of`` (default: today on each
    site's calendar), or that were never refreshed."""
    never_refreshed = Q(next_due_on__isnull=False, due_soon_on__isnull=True)
    if as_of is not None:
        return active_plans().filter(Q(next_change_on__lte=as_of) | never_refreshed)
    zones: dict[dt.date, list[str]] = defaultdict(list)
    for zone in Site.objects.values_list("time_zone", flat=True).distinct():
        zones[today(zone)].append(zone)
    come = Q(pk__in=[])
    for day, names in zones.items():
        come |= Q(sif__unit__site__time_zone__in=names, next_change_on__lte=day)
    return active_plans().filter(come | never_refreshed)


def scan(as_of: dt.date | None = None, *, notify: bool = True) -> ScanResult:
    """Refresh the plans whose state may have turned, write their state changes and
    notify from them; announce bypasses past their authorised time. ``as_of`` (default:
    today on each site's calendar) is for tests and the command.

    ``notify=False`` only reports the state of every followed plan and open bypass on
    ``as_of`` (a past or future date), from the records: it writes nothing.
    """
    result = ScanResult(as_of=as_of)
    at = timezone.now() if as_of is None or as_of == timezone.localdate() else \
        end_of_day(as_of)
    if not notify:
        result.plans = current_statuses(active_plans(), as_of or timezone.localdate(),
                                        many=True)
        result.counts = Counter(s.state for s in result.plans.values())
        result.bypass_states = {b.pk: bypass_state(b, at) for b in _open_bypasses(at)}
        return result

    with transaction.atomic():
        plans = plans_to_look_at(as_of)
        result.plans = refresh_plans(plans, as_of, many=plans.count() > MANY_PLANS)
        rows, result.notifications_created = _record(result.plans, at,
                                                     choices.ChangeCause.SCAN)
        result.transitions = len(rows)

        bypasses = (_open_bypasses(at).annotate(state=bypass_state_expression(at))
                    .select_related("sif__unit__site", "sif__owner", "authorised_by",
                                    "requested_by"))
        result.bypass_states = dict(bypasses.values_list("pk", "state"))
        changed = list(bypasses.exclude(state=F("announced_state")))
        for b in changed:
            b.announced_state = b.state
        if changed:
            Bypass.objects.bulk_update(changed, ["announced_state"])
            result.notifications_created += notices.notify_bypasses(
                changed, {b.pk: b.state for b in changed}, at)
    result.counts = Counter(dict(with_state(active_plans(), as_of).values("state")
                                 .annotate(n=Count("id")).values_list("state", "n")))
    result.emails_sent = send_pending_emails()
    return result
