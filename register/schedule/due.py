"""Due dates and states of test plans, computed from the records for any moment.

Rules, in one place:

1. A plan's components are the ones it names, or every component of the SIF.
2. Each component's last credit is its latest *counting* event: a signed, current (not
   superseded) test record of a kind that counts for the plan and that has a result for
   the component; or, where the plan allows it, a successful real demand that exercised
   the component. Full-plan credit: full proof tests and validation tests. Partial-plan
   credit: partial tests and full proof tests (a full test reveals what a partial one
   does). With no credit yet, the component's in-service date counts.
3. Due date = the earliest last credit among the plan's components + the interval in
   calendar months. An approved deferral of exactly that due date moves it to the
   approved date, once.
4. State as of a date: not yet due before the site's lead time; due soon from then to
   the due date inclusive (due today is not overdue); overdue the day after; escalated
   when overdue by MORE than ``escalate_share`` x interval or ``escalate_days``,
   whichever is reached first; second-level escalation when overdue by more than
   ``second_escalation_days`` (never earlier than the first level).

Stored ``TestPlan.next_due_on`` and ``cached_state`` are caches for lists and
notifications; :func:`refresh_plans` is the one function that writes them.
"""

from __future__ import annotations

import calendar
import datetime as dt
from collections import defaultdict
from dataclasses import dataclass

from django.db.models import Max

from register import choices
from register.days import end_of_day
from register.models import (
    Component,
    ComponentResult,
    Deferral,
    Demand,
    Site,
    TestPlan,
)

PlanState = choices.PlanState

FULL_CREDIT = (choices.TestKind.FULL, choices.TestKind.VALIDATION)
PARTIAL_CREDIT = (choices.TestKind.PARTIAL, choices.TestKind.FULL, choices.TestKind.VALIDATION)


def add_months(day: dt.date, months: int) -> dt.date:
    """Calendar-month addition; the 31st becomes the last day of a shorter month."""
    month_index = day.month - 1 + months
    year = day.year + month_index // 12
    month = month_index % 12 + 1
    last = calendar.monthrange(year, month)[1]
    return dt.date(year, month, min(day.day, last))


@dataclass(frozen=True)
class PlanStatus:
    plan_id: int
    due_on: dt.date | None
    state: str
    days_overdue: int
    deferred: bool
    last_credit_on: dt.date | None


@dataclass(frozen=True)
class Thresholds:
    due_soon_days: int
    escalate_share: float
    escalate_days: int
    second_escalation_days: int

    @classmethod
    def of(cls, site: Site) -> Thresholds:
        return cls(site.due_soon_days, site.escalate_share, site.escalate_days,
                   site.second_escalation_days)


def state_for(due_on: dt.date | None, as_of: dt.date, interval_months: int,
              th: Thresholds) -> tuple[str, int]:
    """Return (state, days overdue) for a due date seen on ``as_of``."""
    if due_on is None:
        return PlanState.NO_PLAN, 0
    if as_of <= due_on:
        if (due_on - as_of).days <= th.due_soon_days:
            return PlanState.DUE_SOON, 0
        return PlanState.ON_TRACK, 0
    late = (as_of - due_on).days
    interval_days = (add_months(due_on, interval_months) - due_on).days
    first = min(th.escalate_share * interval_days, th.escalate_days)
    second = max(th.second_escalation_days, first)
    if late > second:
        return PlanState.ESCALATED_2, late
    if late > first:
        return PlanState.ESCALATED, late
    return PlanState.OVERDUE, late


# ---------------------------------------------------------------------------------------
# Bulk computation: a fixed number of queries for any number of plans.
# ---------------------------------------------------------------------------------------


def compute_statuses(plans, as_of: dt.date) -> dict[int, PlanStatus]:
    """Status of every plan in ``plans`` (a queryset) as of a date, in six queries.

    Only events on or before ``as_of`` count, so a past date shows the plant as it was.
    """
    plans = list(plans.select_related("sif__unit__site"))
    if not plans:
        return {}
    plan_ids = [p.pk for p in plans]
    sif_ids = {p.sif_id for p in plans}
    cutoff = end_of_day(as_of)

    # 1. Plan -> named components.
    named: dict[int, list[int]] = defaultdict(list)
    for plan_id, comp_id in TestPlan.components.through.objects.filter(
            testplan_id__in=plan_ids).values_list("testplan_id", "component_id"):
        named[plan_id].append(comp_id)
    # 2. Components of these SIFs with their in-service dates.
    comps_of_sif: dict[int, list[int]] = defaultdict(list)
    in_service: dict[int, dt.date] = {}
    for comp_id, sif_id, started in Component.objects.filter(
            subsystem__sif_id__in=sif_ids).values_list("id", "subsystem__sif_id",
                                                       "in_service_on"):
        comps_of_sif[sif_id].append(comp_id)
        in_service[comp_id] = started
    # 3. Last counting test per (component, kind).
    last_test: dict[tuple[int, str], dt.datetime] = {}
    rows = (
        ComponentResult.objects.filter(
            component__subsystem__sif_id__in=sif_ids,
            record__performed_at__lte=cutoff,
            record__superseded_by__isnull=True,
        )
        .exclude(record__status=choices.RecordStatus.DRAFT)
        .values("component_id", "record__kind")
        .annotate(last=Max("record__performed_at"))
    )
    for row in rows:
        last_test[(row["component_id"], row["record__kind"])] = row["last"]
    # 4. Last successful real demand per exercised component.
    last_demand: dict[int, dt.datetime] = {}
    for row in (
        Demand.components_exercised.through.objects.filter(
            demand__sif_id__in=sif_ids, demand__successful=True,
            demand__occurred_at__lte=cutoff,
        ).values("component_id").annotate(last=Max("demand__occurred_at"))
    ):
        last_demand[row["component_id"]] = row["last"]
    # 5. Approved deferrals, decided by then.
    approved: dict[tuple[int, dt.date], dt.date] = {}
    for plan_id, due_on, proposed_on in Deferral.objects.filter(
            plan_id__in=plan_ids, status=choices.DeferralStatus.APPROVED,
            decided_at__lte=cutoff).values_list("plan_id", "due_on", "proposed_on"):
        approved[(plan_id, due_on)] = proposed_on

    result = {}
    for plan in plans:
        kinds = PARTIAL_CREDIT if plan.kind == choices.TestKind.PARTIAL else FULL_CREDIT
        if plan.demand_counts_as_test:
            kinds = (*kinds, choices.TestKind.DEMAND)  # a demand logged as a test record
        comps = named.get(plan.pk) or comps_of_sif.get(plan.sif_id, [])
        credits = []
        for comp_id in comps:
            dates = [last_test[(comp_id, k)].date() for k in kinds if (comp_id, k) in last_test]
            if plan.demand_counts_as_test and comp_id in last_demand:
                dates.append(last_demand[comp_id].date())
            if not dates and in_service.get(comp_id):
                dates.append(in_service[comp_id])
            if dates:
                credits.append(max(dates))
        if not credits and plan.sif.in_service_on:
            credits.append(plan.sif.in_service_on)
        last_credit = min(credits) if credits else None
        due = add_months(last_credit, plan.interval_months) if last_credit else None
        deferred = False
        if due is not None and (plan.pk, due) in approved:
            due, deferred = approved[(plan.pk, due)], True
        state, late = state_for(due, as_of, plan.interval_months,
                                Thresholds.of(plan.sif.unit.site))
        result[plan.pk] = PlanStatus(plan.pk, due, state, late, deferred, last_credit)
    return result


def status_of(plan: TestPlan, as_of: dt.date) -> PlanStatus:
    return compute_statuses(TestPlan.objects.filter(pk=plan.pk), as_of)[plan.pk]


def due_date(plan: TestPlan, as_of: dt.date | None = None) -> dt.date | None:
    from django.utils import timezone

    return status_of(plan, as_of or timezone.localdate()).due_on


def active_plans():
    """Plans of SIFs in service: the ones the scan follows."""
    return TestPlan.objects.filter(sif__life_stage=choices.LifeStage.IN_SERVICE)


def refresh_plans(plan_queryset, as_of: dt.date) -> dict[int, PlanStatus]:
    """Write the cache columns of the given plans. Returns the computed statuses."""
    statuses = compute_statuses(plan_queryset, as_of)
    if not statuses:
        return statuses
    stale = list(
        TestPlan.objects.filter(pk__in=statuses.keys()).only("id", "next_due_on",
                                                             "cached_state")
    )
    changed = []
    for plan in stale:
        s = statuses[plan.pk]
        if plan.next_due_on != s.due_on or plan.cached_state != s.state:
            plan.next_due_on, plan.cached_state = s.due_on, s.state
            changed.append(plan)
    if changed:
        TestPlan.objects.bulk_update(changed, ["next_due_on", "cached_state"])
    return statuses
