"""Due dates, states, on-time rates and overdue periods of test plans: the one rule,
computed from the records for any date or date range.

Rules, in one place:

1. A plan's components are the ones it names, or every component of the SIF.
2. Each component's credit events are its *counting* events: a test record in force
   (``register.models.in_force``: signed, and not replaced by a correction that has taken
   effect) of a kind that counts for the plan and that has a result for
   the component; or, where the plan allows it, a successful real demand that exercised
   the component. Full-plan credit: full proof tests and validation tests. Partial-plan
   credit: partial tests and full proof tests (a full test reveals what a partial one
   does). With no credit yet, the component's in-service date counts. An event counts on
   the site's calendar date (``Site.time_zone``).
3. Due date = the earliest last credit among the plan's components + the interval in
   calendar months of the plan version in force at that credit. A later version of the
   plan (``TestPlan.effective_from``) applies only to a due date that had not yet fallen
   when the version took effect: a due date that fell before stays, so a later edit
   cannot clear an overdue. An approved deferral of exactly that due date, decided by
   then, moves it to the approved date, once.
4. State as of a date: not yet due before the site's lead time; due soon from then to
   the due date inclusive (due today is not overdue); overdue the day after; escalated
   when overdue by MORE than ``escalate_share`` x interval or ``escalate_days``,
   whichever is reached first; second-level escalation when overdue by more than
   ``second_escalation_days`` (never earlier than the first level).
5. Over a date range, the due date is constant between change points (a credit event, a
   deferral decision, a plan version taking effect), so the states of every day, the
   overdue periods and the on-time rate follow from the due date at each change point.
   A due date *counts* in a range when it lies in it and before its last day; it is met
   *on time* when a credit event on or before it replaced it.

``refresh_plans`` writes the current due date and the dates on which the state next turns
into ``TestPlan`` (the one writer of those columns); lists and the API derive the state
for the reader's day from them in SQL (``with_state``). Past dates always come from the
records (``compute_statuses``, ``plan_timelines``).
"""

from __future__ import annotations

import bisect
import calendar
import datetime as dt
import math
from collections import defaultdict
from dataclasses import dataclass, field

from django.core.exceptions import EmptyResultSet
from django.db import connection, transaction
from django.db.models import Case, CharField, Max, Q, Value, When
from django.utils import timezone

from register import choices
from register.days import end_of_day, local_date, today
from register.models import (
    Component,
    ComponentResult,
    Deferral,
    Demand,
    Site,
    TestPlan,
    TestRecord,
    in_force,
)

PlanState = choices.PlanState

FULL_CREDIT = (choices.TestKind.FULL, choices.TestKind.VALIDATION)
PARTIAL_CREDIT = (choices.TestKind.PARTIAL, choices.TestKind.FULL, choices.TestKind.VALIDATION)
LATE_STATES = (PlanState.OVERDUE, PlanState.ESCALATED, PlanState.ESCALATED_2)
#: Pseudo-kind of a credit event that is a successful real demand (Demand rows).
REAL_DEMAND = "real_demand"


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
    interval_months: int | None = None


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


@dataclass(frozen=True)
class StateDates:
    """The first day of each state after a due date (due soon, overdue, escalated, second
    escalation); before ``due_soon_on`` the plan is on track."""

    due_on: dt.date
    due_soon_on: dt.date
    overdue_on: dt.date
    escalated_on: dt.date
    escalated_2_on: dt.date


def state_dates(due_on: dt.date, interval_months: int, th: Thresholds) -> StateDates:
    """Rule 4 as dates. Overdue by MORE than a threshold of ``x`` days means from day
    ``floor(x) + 1`` after the due date."""
    interval_days = (add_months(due_on, interval_months) - due_on).days
    first = min(th.escalate_share * interval_days, th.escalate_days)
    second = max(th.second_escalation_days, first)
    return StateDates(
        due_on=due_on,
        due_soon_on=due_on - dt.timedelta(days=th.due_soon_days),
        overdue_on=due_on + dt.timedelta(days=1),
        escalated_on=due_on + dt.timedelta(days=math.floor(first) + 1),
        escalated_2_on=due_on + dt.timedelta(days=math.floor(second) + 1),
    )


def state_for(due_on: dt.date | None, as_of: dt.date, interval_months: int,
              th: Thresholds) -> tuple[str, int]:
    """Return (state, days overdue) for a due date seen on ``as_of``."""
    if due_on is None:
        return PlanState.NO_PLAN, 0
    d = state_dates(due_on, interval_months, th)
    late = max((as_of - due_on).days, 0)
    if as_of >= d.escalated_2_on:
        return PlanState.ESCALATED_2, late
    if as_of >= d.escalated_on:
        return PlanState.ESCALATED, late
    if as_of >= d.overdue_on:
        return PlanState.OVERDUE, late
    if as_of >= d.due_soon_on:
        return PlanState.DUE_SOON, 0
    return PlanState.ON_TRACK, 0


# ---------------------------------------------------------------------------------------
# The facts of each plan, loaded in bulk (a fixed number of queries per time zone)
# ---------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Version:
    """One version of a plan: what it asks, and from when (None: from the start).
    ``components``: the components it names (empty: every component of the SIF);
    ``coverage``: the share of dangerous undetected failures its procedure reveals."""

    effective_from: dt.date | None
    interval_months: int
    components: frozenset[int] = frozenset()
    coverage: float = 1.0


def version_on(versions: list[Version], day: dt.date) -> Version | None:
    """The version of a plan in force on ``day`` (None: none yet)."""
    applicable = [v for v in versions if v.effective_from is None or v.effective_from <= day]
    return applicable[-1] if applicable else None


@dataclass
class _Facts:
    plan: TestPlan
    kinds: tuple
    sif_comps: list[int]
    in_service: dict[int, dt.date]
    # component -> sorted credit dates (site calendar)
    credits: dict[int, list[dt.date]] = field(default_factory=dict)
    # (due_on -> list of (decided_on, proposed_on)), approved deferrals
    deferrals: dict[dt.date, list[tuple[dt.date, dt.date]]] = field(default_factory=dict)
    versions: list[Version] = field(default_factory=list)
    thresholds: Thresholds | None = None

    def versions_on(self, day: dt.date) -> list[Version]:
        return [v for v in self.versions if v.effective_from is None or v.effective_from <= day]

    def interval_on(self, day: dt.date) -> int:
        version = version_on(self.versions, day)
        return version.interval_months if version else self.plan.interval_months

    def comps(self, version: Version) -> list[int]:
        """Rule 1 for one version: the components it names, or every component."""
        return sorted(version.components) if version.components else self.sif_comps

    def last_credit(self, day: dt.date, comps: list[int]) -> dt.date | None:
        """Rule 2-3: the earliest, over ``comps``, of each one's last credit on or before
        ``day`` (its in-service date when it has none)."""
        lasts = []
        for comp in comps:
            dates = self.credits.get(comp, [])
            i = bisect.bisect_right(dates, day)
            if i:
                lasts.append(dates[i - 1])
            elif self.in_service.get(comp):
                lasts.append(self.in_service[comp])
        if not lasts and self.plan.sif.in_service_on:
            lasts.append(self.plan.sif.in_service_on)
        return min(lasts) if lasts else None

    def due(self, day: dt.date) -> tuple[dt.date | None, bool, dt.date | None]:
        """(due date, deferred, last credit) as known on ``day``.

        Versions apply in turn: each one recomputes the due date from the last credit of
        the components it names, unless the due date under the versions before it had
        already fallen when it took effect and no credit under it has come since (then
        the fallen due date stays)."""
        applicable = self.versions_on(day) or [Version(None, self.plan.interval_months)]
        due = last = None
        for i, v in enumerate(applicable):
            last_v = self.last_credit(day, self.comps(v))
            if last_v is None:
                continue
            if i and due is not None and due < v.effective_from and last_v < v.effective_from:
                continue  # it had fallen due before this version took effect: it stays
            last, due = last_v, add_months(last_v, v.interval_months)
        if due is None:
            return None, False, None
        for decided_on, proposed_on in self.deferrals.get(due, []):
            if decided_on <= day:
                return proposed_on, True, last
        return due, False, last

    def is_credit_day(self, day: dt.date) -> bool:
        """A credit event on ``day`` for a component the version in force then names."""
        version = (self.versions_on(day) or [Version(None, self.plan.interval_months)])[-1]
        return any(day in self.credits.get(c, ()) for c in self.comps(version))

    def change_points(self, start: dt.date, end: dt.date) -> list[dt.date]:
        """Days in (start, end] on which the due date may change."""
        points = set()
        for dates in self.credits.values():
            points.update(d for d in dates if start < d <= end)
        for decisions in self.deferrals.values():
            points.update(d for d, _ in decisions if start < d <= end)
        points.update(v.effective_from for v in self.versions
                      if v.effective_from and start < v.effective_from <= end)
        return sorted(points)


#: History rows of a plan recorded this soon after its creation set it up (``plan_versions``).
SETUP_SECONDS = 60


def _plan_scope_rows():
    """The rows of simple-history's table of each plan version's components."""
    field = TestPlan.history.model._meta.get_field("historicaltestplan_components")
    return field.related_model.objects


def plan_versions(plan_ids) -> dict[int, list[Version]]:
    """Each plan's versions (interval, scope and coverage) from its history, in the order they were
    recorded. A change recorded without ``effective_from`` (before plans had one) took
    effect the day it was recorded; the first version applies from the start. Rows
    recorded within ``SETUP_SECONDS`` of a plan's creation are part of setting it up (a
    plan is saved, then its components named); a version taking effect on the same day as
    the one before it replaces it (a change revised the same day); a dated change (one that
    sets ``effective_from``) is never part of setting up."""
    out: dict[int, list[Version]] = defaultdict(list)
    created: dict[int, dt.datetime] = {}
    first_effective: dict[int, dt.date | None] = {}
    scope: dict[int, set[int]] = defaultdict(set)
    for history_id, comp_id in _plan_scope_rows().filter(
            history__id__in=plan_ids).values_list("history_id", "component_id"):
        scope[history_id].add(comp_id)
    rows = (TestPlan.history.filter(id__in=plan_ids)
            .order_by("id", "history_date", "history_id")
            .values_list("id", "history_id", "history_date", "effective_from",
                         "interval_months", "coverage"))
    for plan_id, history_id, recorded, effective, interval, coverage in rows:
        versions = out[plan_id]
        comps = frozenset(scope.get(history_id, ()))
        if not versions:
            versions.append(Version(None, interval, comps, coverage))
            created[plan_id], first_effective[plan_id] = recorded, effective
            continue
        prev = versions[-1]
        if (prev.interval_months, prev.components, prev.coverage) == (interval, comps, coverage):
            continue
        when = effective or recorded.date()
        # a version never takes effect before one recorded earlier
        if prev.effective_from and when < prev.effective_from:
            when = prev.effective_from
        setting_up = len(versions) == 1 and effective == first_effective[plan_id] and (
            recorded - created[plan_id]).total_seconds() <= SETUP_SECONDS
        if setting_up or when == prev.effective_from:
            versions[-1] = Version(prev.effective_from, interval, comps, coverage)
        else:
            versions.append(Version(when, interval, comps, coverage))
    return out


def _load(plans: list[TestPlan], until: dt.date, since: dt.date | None = None
          ) -> dict[int, _Facts]:
    """Everything rule 1-3 needs for ``plans``, events up to the end of ``until`` on each
    site's calendar. With ``since``, every credit event after ``since`` is loaded too (for
    timelines); otherwise only each component's last one."""
    facts: dict[int, _Facts] = {}
    if not plans:
        return facts
    plan_ids = [p.pk for p in plans]
    sif_ids = {p.sif_id for p in plans}
    named: dict[int, list[int]] = defaultdict(list)
    for plan_id, comp_id in TestPlan.components.through.objects.filter(
            testplan_id__in=plan_ids).values_list("testplan_id", "component_id"):
        named[plan_id].append(comp_id)
    comps_of_sif: dict[int, list[int]] = defaultdict(list)
    in_service: dict[int, dt.date] = {}
    for comp_id, sif_id, started in Component.objects.filter(
            subsystem__sif_id__in=sif_ids).values_list("id", "subsystem__sif_id",
                                                       "in_service_on"):
        comps_of_sif[sif_id].append(comp_id)
        in_service[comp_id] = started
    versions = plan_versions(plan_ids)
    by_zone: dict[str, list[TestPlan]] = defaultdict(list)
    for p in plans:
        by_zone[p.sif.unit.site.time_zone].append(p)
    # per zone: component -> kind -> dates
    events: dict[int, dict[str, set[dt.date]]] = defaultdict(lambda: defaultdict(set))
    for zone, zone_plans in by_zone.items():
        zone_sifs = {p.sif_id for p in zone_plans}
        cutoff = end_of_day(until, zone)
        lower = end_of_day(since, zone) if since else cutoff
        base = ComponentResult.objects.filter(
            in_force("record__"), component__subsystem__sif_id__in=zone_sifs)
        for comp, kind, last in (base.filter(record__performed_at__lte=lower)
                                 .values("component_id", "record__kind")
                                 .annotate(last=Max("record__performed_at"))
                                 .values_list("component_id", "record__kind", "last")):
            events[comp][kind].add(local_date(last, zone))
        if since:
            for comp, kind, at in base.filter(
                    record__performed_at__gt=lower, record__performed_at__lte=cutoff
            ).values_list("component_id", "record__kind", "record__performed_at"):
                events[comp][kind].add(local_date(at, zone))
        demands = Demand.components_exercised.through.objects.filter(
            demand__sif_id__in=zone_sifs, demand__successful=True)
        for comp, last in (demands.filter(demand__occurred_at__lte=lower)
                           .values("component_id").annotate(last=Max("demand__occurred_at"))
                           .values_list("component_id", "last")):
            events[comp][REAL_DEMAND].add(local_date(last, zone))
        if since:
            for comp, at in demands.filter(
                    demand__occurred_at__gt=lower, demand__occurred_at__lte=cutoff
            ).values_list("component_id", "demand__occurred_at"):
                events[comp][REAL_DEMAND].add(local_date(at, zone))
    approved: dict[int, dict[dt.date, list]] = defaultdict(lambda: defaultdict(list))
    for plan_id, due_on, proposed_on, decided_at, zone in Deferral.objects.filter(
            plan_id__in=plan_ids, status=choices.DeferralStatus.APPROVED,
            decided_at__isnull=False).values_list(
            "plan_id", "due_on", "proposed_on", "decided_at", "plan__sif__unit__site__time_zone"):
        decided_on = local_date(decided_at, zone)
        if decided_on <= until:
            approved[plan_id][due_on].append((decided_on, proposed_on))
    for plan in plans:
        kinds = PARTIAL_CREDIT if plan.kind == choices.TestKind.PARTIAL else FULL_CREDIT
        if plan.demand_counts_as_test:
            kinds = (*kinds, choices.TestKind.DEMAND, REAL_DEMAND)
        sif_comps = comps_of_sif.get(plan.sif_id, [])
        live_scope = frozenset(named.get(plan.pk, ()))
        in_effect = versions.get(plan.pk) or [Version(None, plan.interval_months,
                                                      live_scope, plan.coverage)]
        if in_effect[-1].components != live_scope:
            # rows linked without history (bulk-loaded data): the live scope is today's
            last = in_effect[-1]
            in_effect[-1] = Version(last.effective_from, last.interval_months, live_scope,
                                   last.coverage)
        f = _Facts(plan=plan, kinds=kinds, sif_comps=sif_comps, in_service=in_service,
                   deferrals={d: sorted(v) for d, v in approved.get(plan.pk, {}).items()},
                   versions=in_effect, thresholds=Thresholds.of(plan.sif.unit.site))
        for comp in sif_comps:
            dates = set()
            for kind in kinds:
                dates |= events.get(comp, {}).get(kind, set())
            f.credits[comp] = sorted(dates)
        facts[plan.pk] = f
    return facts


def _plans(plans) -> list[TestPlan]:
    if isinstance(plans, list):
        return plans
    return list(plans.select_related("sif__unit__site"))


def _status(f: _Facts, as_of: dt.date) -> PlanStatus:
    due, deferred, last = f.due(as_of)
    interval = f.interval_on(as_of)
    state, late = state_for(due, as_of, interval, f.thresholds)
    return PlanStatus(f.plan.pk, due, state, late, deferred, last, interval)


def compute_statuses(plans, as_of: dt.date) -> dict[int, PlanStatus]:
    """Status of every plan in ``plans`` (a queryset) on a date of the site's calendar.

    Only events on or before ``as_of``, and plan versions in force by then, count, so a
    past date shows the plant as it was.
    """
    return {pk: _status(f, as_of) for pk, f in _load(_plans(plans), as_of).items()}


def status_with_change(plan: TestPlan, interval_months: int, effective_from: dt.date,
                       as_of: dt.date, components=None) -> PlanStatus:
    """The plan's status on ``as_of`` if a new version with ``interval_months`` (and the
    components it names, ``None``: unchanged) took effect on ``effective_from`` (nothing
    is saved): the change preview."""
    plans = _plans(TestPlan.objects.filter(pk=plan.pk))
    f = _load(plans, as_of)[plan.pk]
    scope = f.versions[-1].components if components is None else frozenset(components)
    f.versions = [*f.versions, Version(effective_from, interval_months, scope)]
    return _status(f, max(as_of, effective_from))


def status_of(plan: TestPlan, as_of: dt.date) -> PlanStatus:
    return compute_statuses(TestPlan.objects.filter(pk=plan.pk), as_of)[plan.pk]


def due_date(plan: TestPlan, as_of: dt.date | None = None) -> dt.date | None:
    if as_of is None:
        as_of = today(TestPlan.objects.select_related("sif__unit__site").get(pk=plan.pk)
                      .sif.unit.site)
    return status_of(plan, as_of).due_on


# ---------------------------------------------------------------------------------------
# Date ranges: states day by day, overdue periods, on-time rate
# ---------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Segment:
    """From ``start`` to ``end`` (inclusive) the due date was ``due_on``."""

    start: dt.date
    end: dt.date
    due_on: dt.date | None
    interval_months: int
    ended_by_credit: bool  # the next segment starts because a credit event changed it
    deferred: bool = False  # the due date is an approved deferral's date


@dataclass
class PlanTimeline:
    plan_id: int
    segments: list[Segment]
    thresholds: Thresholds

    def state_on(self, day: dt.date) -> str:
        for s in self.segments:
            if s.start <= day <= s.end:
                return state_for(s.due_on, day, s.interval_months, self.thresholds)[0]
        raise ValueError(f"{day} is outside the timeline")

    def overdue_periods(self) -> list[tuple[dt.date, dt.date]]:
        """Maximal runs of days on which the plan was overdue (any level), inclusive."""
        runs: list[list[dt.date]] = []
        for s in self.segments:
            if s.due_on is None:
                continue
            first = max(s.start, s.due_on + dt.timedelta(days=1))
            if first > s.end:
                continue
            if runs and runs[-1][1] + dt.timedelta(days=1) >= first:
                runs[-1][1] = max(runs[-1][1], s.end)
            else:
                runs.append([first, s.end])
        return [(a, b) for a, b in runs]

    def due_dates(self) -> list[tuple[dt.date, bool]]:
        """Each due date that counts in the range (rule 5) and whether it was met on time."""
        out = []
        first_day, last_day = self.segments[0].start, self.segments[-1].end
        i = 0
        while i < len(self.segments):
            s = self.segments[i]
            j = i
            while j + 1 < len(self.segments) and self.segments[j + 1].due_on == s.due_on:
                j += 1
            run_end = self.segments[j]
            d = s.due_on
            if d is not None and first_day <= d < last_day:
                if j + 1 < len(self.segments):
                    replaced_on = self.segments[j + 1].start
                    if run_end.ended_by_credit:
                        out.append((d, replaced_on <= d))
                    elif replaced_on > d:  # deferred or re-planned after it had fallen due
                        out.append((d, False))
                else:
                    out.append((d, False))  # still open and past
            i = j + 1
        return out


def plan_timelines(plans, start: dt.date, end: dt.date) -> dict[int, PlanTimeline]:
    """The due date of each plan on every day from ``start`` to ``end`` (inclusive), as
    segments, computed by the same rule and from the same events as ``compute_statuses``
    (one evaluation per change point)."""
    plans = _plans(plans)
    out = {}
    for pk, f in _load(plans, end, since=start).items():
        points = [start, *f.change_points(start, end)]
        segments = []
        for i, p in enumerate(points):
            seg_end = points[i + 1] - dt.timedelta(days=1) if i + 1 < len(points) else end
            due, deferred, _ = f.due(p)
            next_is_credit = i + 1 < len(points) and f.is_credit_day(points[i + 1])
            segments.append(Segment(p, seg_end, due, f.interval_on(p), next_is_credit,
                                    deferred))
        out[pk] = PlanTimeline(pk, segments, f.thresholds)
    return out


@dataclass
class OnTime:
    due: int = 0
    on_time: int = 0
    late_sif_ids: set = field(default_factory=set)
    per_plan: dict = field(default_factory=dict)  # plan id -> (due, on time)

    @property
    def rate(self) -> float | None:
        return self.on_time / self.due if self.due else None


def on_time_rate(plans, as_of: dt.date, days: int = 365) -> OnTime:
    """Proof-test on-time rate over the ``days`` days up to ``as_of``: due dates that fell
    in the period (before ``as_of`` itself) and how many were met on time (rule 5).

    On PostgreSQL the plans with one version and no approved deferral (the due date then
    changes only on a credit day of the plan's components) are counted in one query
    (``_on_time_sql``); the others, and every plan elsewhere, from their timelines."""
    if connection.vendor != "postgresql":
        return on_time_by_timelines(plans, as_of, days)
    start = as_of - dt.timedelta(days=days)
    if isinstance(plans, list):
        ids = [p.pk for p in plans]
        longest = max((p.interval_months for p in plans), default=0)
        chosen = ids
    else:
        pairs = list(plans.values_list("pk", "interval_months"))
        ids = [pk for pk, _ in pairs]
        longest = max((months for _, months in pairs), default=0)
        # the plans named by their query, not by a list of thousands of ids (which the
        # database reads slower than it runs the query again)
        chosen = plans.order_by().values("pk")
    out = OnTime()
    general: set[int] = set(Deferral.objects.filter(
        plan_id__in=chosen, status=choices.DeferralStatus.APPROVED,
        decided_at__isnull=False).values_list("plan_id", flat=True))
    versions = plan_versions(chosen)
    sif_of = {}
    for plan_id, sif_id, interval, due_n, ok_n in _on_time_sql(ids, longest, start, as_of):
        vs = versions.get(plan_id)
        if vs and (len(vs) > 1 or vs[0].interval_months != interval):
            general.add(plan_id)
        sif_of[plan_id] = sif_id
        if plan_id not in general:
            _count(out, plan_id, sif_id, due_n, ok_n)
    if general:
        rest = on_time_by_timelines(TestPlan.objects.filter(pk__in=general), as_of, days)
        for plan_id, (due_n, ok_n) in rest.per_plan.items():
            _count(out, plan_id, sif_of[plan_id], due_n, ok_n)
    return out


def _count(out: OnTime, plan_id: int, sif_id: int, due_n: int, ok_n: int) -> None:
    out.per_plan[plan_id] = (due_n, ok_n)
    out.due += due_n
    out.on_time += ok_n
    if ok_n < due_n:
        out.late_sif_ids.add(sif_id)


def on_time_by_timelines(plans, as_of: dt.date, days: int = 365) -> OnTime:
    """``on_time_rate`` from each plan's timeline (``plan_timelines``): the general rule,
    for any plan."""
    out = OnTime()
    plans = _plans(plans)
    timelines = plan_timelines(plans, as_of - dt.timedelta(days=days), as_of)
    sif_of = {p.pk: p.sif_id for p in plans}
    for pk, tl in timelines.items():
        dues = tl.due_dates()
        _count(out, pk, sif_of[pk], len(dues), sum(1 for _, met in dues if met))
    return out


def _scope_sql() -> str:
    """Rule 1 in SQL, over a CTE ``pl`` (id, sif_id, kind, dem, tz of each plan): each
    plan's components (plan_id, comp_id, started: its in-service date, tz) with the kinds
    rule 2 credits for the plan (kinds); parameters: ``_scope_params()``."""
    t = {m: connection.ops.quote_name(m._meta.db_table) for m in (
        Component, TestPlan.components.through)}
    return f"""  -- rule 1, with the kinds rule 2 credits for the plan
        SELECT pl.id AS plan_id, c.id AS comp_id, c.in_service_on AS started, pl.tz,
               CASE WHEN pl.kind = %s THEN %s::text[] ELSE %s::text[] END
               || CASE WHEN pl.dem THEN %s::text[] ELSE '{{}}'::text[] END AS kinds
        FROM pl JOIN register_subsystem b ON b.sif_id = pl.sif_id
        JOIN {t[Component]} c ON c.subsystem_id = b.id
        WHERE NOT EXISTS (SELECT 1 FROM {t[TestPlan.components.through]} n
                          WHERE n.testplan_id = pl.id)
           OR EXISTS (SELECT 1 FROM {t[TestPlan.components.through]} n
                      WHERE n.testplan_id = pl.id AND n.component_id = c.id)"""


def _scope_params() -> list:
    return [choices.TestKind.PARTIAL.value, [k.value for k in PARTIAL_CREDIT],
            [k.value for k in FULL_CREDIT], [choices.TestKind.DEMAND.value, REAL_DEMAND]]


def _on_time_sql(ids: list[int], longest: int, start: dt.date, end: dt.date):
    """Rows (plan, SIF, interval, due dates counted, met on time) of every plan in ``ids``
    (``longest``: the longest of their intervals, months), computed as if it had one version and no deferral.

    Rule 1-3 and 5 for such a plan: its due date on a day is the earliest, over its
    components, of each one's last credit event (its in-service date without one; the
    SIF's when none has either) plus the interval; it changes only on a credit day of one
    of them, so each run of one due date ends by a credit event. A due date counts when it
    lies in [start, end); it is met on time when the run after it began on or before it."""
    upper = end_of_day(end + dt.timedelta(days=2))  # every zone's end of ``end`` is before
    # A component's last credit before ``lower`` gives a due date before ``start`` for
    # every plan (the longest interval and a month back), one that does not count: any
    # date before ``lower`` gives the same counts. So older events are read only for
    # components whose in-service date would otherwise stand in for them.
    lower = add_months(start, -(longest + 1))
    since = end_of_day(lower - dt.timedelta(days=2))
    started_late = Q(component__in_service_on__isnull=True) | Q(
        component__in_service_on__gte=lower)
    results = ComponentResult.objects.filter(in_force("record__"),
                                             record__performed_at__lte=upper)
    columns = ("component_id", "record__kind", "record__performed_at")
    records = results.filter(record__performed_at__gte=since).values_list(*columns).union(
        results.filter(started_late, record__performed_at__lt=since).values_list(*columns), all=True)
    exercised = Demand.components_exercised.through.objects.filter(
        demand__successful=True, demand__occurred_at__lte=upper)
    demands = exercised.filter(demand__occurred_at__gte=since).values_list(
        "component_id", "demand__occurred_at").union(exercised.filter(
            started_late, demand__occurred_at__lt=since).values_list(
            "component_id", "demand__occurred_at"), all=True)
    rec_sql, rec_params = records.query.sql_with_params()
    dem_sql, dem_params = demands.query.sql_with_params()
    t = {m: connection.ops.quote_name(m._meta.db_table) for m in (
        TestPlan, TestPlan.components.through, Component, Site)}
    scope_sql = _scope_sql()
    sql = f"""
    WITH pl AS (
        SELECT p.id, p.sif_id, p.kind, p.demand_counts_as_test AS dem, p.interval_months AS iv,
               st.time_zone AS tz, s.in_service_on AS sif_start
        FROM {t[TestPlan]} p
        JOIN register_safetyfunction s ON s.id = p.sif_id
        JOIN register_plantunit u ON u.id = s.unit_id
        JOIN {t[Site]} st ON st.id = u.site_id
        WHERE p.id = ANY(%s)
    ), scope AS ({scope_sql}
    ), rec (component_id, kind, at) AS ({rec_sql}
    ), dem (component_id, at) AS ({dem_sql}
    ), ev AS (  -- rule 2: each credit event on the site's calendar, up to ``end``
        SELECT sc.plan_id, sc.comp_id, (r.at AT TIME ZONE sc.tz)::date AS day
        FROM scope sc JOIN rec r ON r.component_id = sc.comp_id
        WHERE r.kind = ANY(sc.kinds)
        UNION ALL
        SELECT sc.plan_id, sc.comp_id, (d.at AT TIME ZONE sc.tz)::date
        FROM scope sc JOIN dem d ON d.component_id = sc.comp_id
        WHERE %s = ANY(sc.kinds)
    ), ev2 AS (  -- before the range only each component's last event matters
        SELECT plan_id, comp_id, day FROM ev WHERE day > %s AND day <= %s
        UNION
        SELECT plan_id, comp_id, max(day) FROM ev WHERE day <= %s GROUP BY plan_id, comp_id
    ), pts AS (  -- the days on which the due date may change
        SELECT id AS plan_id, %s::date AS day FROM pl
        UNION SELECT plan_id, day FROM ev2 WHERE day > %s
    ), lasts AS (
        SELECT p.plan_id, p.day, coalesce(max(e.day), sc.started) AS last
        FROM pts p JOIN scope sc ON sc.plan_id = p.plan_id
        LEFT JOIN ev2 e ON e.plan_id = p.plan_id AND e.comp_id = sc.comp_id AND e.day <= p.day
        GROUP BY p.plan_id, p.day, sc.comp_id, sc.started
    ), due AS (  -- rule 3: calendar months (PostgreSQL keeps the day, or the month's last)
        SELECT p.plan_id, p.day,
               (coalesce(min(l.last), pl.sif_start) + make_interval(months => pl.iv))::date
               AS due_on
        FROM pts p JOIN pl ON pl.id = p.plan_id
        LEFT JOIN lasts l ON l.plan_id = p.plan_id AND l.day = p.day
        GROUP BY p.plan_id, p.day, pl.sif_start, pl.iv
    ), runs AS (
        SELECT plan_id, day, due_on,
               lag(due_on) OVER (PARTITION BY plan_id ORDER BY day) AS before,
               row_number() OVER (PARTITION BY plan_id ORDER BY day) AS n
        FROM due
    ), starts AS (  -- the first day of each run of one due date, and the next run's
        SELECT plan_id, due_on,
               lead(day) OVER (PARTITION BY plan_id ORDER BY day) AS replaced_on
        FROM runs WHERE n = 1 OR before IS DISTINCT FROM due_on
    )
    SELECT pl.id, pl.sif_id, pl.iv,
           count(s.due_on) FILTER (WHERE s.due_on >= %s AND s.due_on < %s),
           count(s.due_on) FILTER (WHERE s.due_on >= %s AND s.due_on < %s
                                   AND s.replaced_on <= s.due_on)
    FROM pl LEFT JOIN starts s ON s.plan_id = pl.id
    GROUP BY pl.id, pl.sif_id, pl.iv
    """
    kinds = _scope_params()
    params = [ids, *kinds, *rec_params, *dem_params, REAL_DEMAND, start, end, start, start, start,
              start, end, start, end]
    # Its cost estimate is high enough for PostgreSQL to compile it first (JIT), which
    # takes several times as long as running it: not for this query.
    with transaction.atomic(), connection.cursor() as cursor:
        cursor.execute("SET LOCAL jit = off")
        cursor.execute(sql, params)
        return cursor.fetchall()


# ---------------------------------------------------------------------------------------
# The plan's current due date and state dates, and the state read in SQL
# ---------------------------------------------------------------------------------------


def active_plans():
    """Plans of SIFs in service: the ones the scan follows."""
    return TestPlan.objects.filter(sif__life_stage=choices.LifeStage.IN_SERVICE)


STATE_COLUMNS = list(TestPlan.DERIVED_FIELDS)


def _columns(f: _Facts, s: PlanStatus, as_of: dt.date) -> dict:
    later = [v.effective_from for v in f.versions
             if v.effective_from and v.effective_from > as_of]
    return _state_columns(s.due_on, s.interval_months or f.plan.interval_months,
                          f.thresholds, as_of, later)


def _current_sql(plan_queryset, as_of: dt.date | None, many: bool = False):
    """Rows for the plans of ``plan_queryset`` in one query, values only: (plan, SIF,
    interval in months, time zone, day, the site's four thresholds, the last credit
    (rule 1-3: the earliest over the plan's components of each one's last credit event
    on or before the day, its in-service date without one, the SIF's when none has
    either), general, and the five stored ``STATE_COLUMNS``). ``day`` is ``as_of``, or
    today on the plan's site's calendar (``register.days.today``, in SQL). ``general``: a plan whose history holds more than
    one version, or that has an approved deferral; its due date needs the whole rule
    (``_load``) and the row's last credit is not used. ``many``: a large share of the
    plant (the scan): hash joins over whole tables then beat index lookups row by row,
    which the planner, misjudging the rows of the steps, would otherwise choose."""
    try:
        ids_sql, ids_params = plan_queryset.order_by().values("pk").query.sql_with_params()
    except EmptyResultSet:  # a filter that matches nothing (``pk__in=[]``)
        return []
    records = TestRecord.objects.filter(in_force()).order_by().values_list(
        "id", "sif_id", "kind", "performed_at")
    exercised = Demand.components_exercised.through.objects.filter(
        demand__successful=True).order_by().values_list(
        "component_id", "demand__sif_id", "demand__occurred_at")
    rec_sql, rec_params = records.query.sql_with_params()
    dem_sql, dem_params = exercised.query.sql_with_params()
    hist = TestPlan.history.model
    t = {m: connection.ops.quote_name(m._meta.db_table) for m in (
        TestPlan, TestPlan.components.through, Component, Site, Deferral, hist,
        _plan_scope_rows().model, ComponentResult)}
    scope_sql = _scope_sql()
    # the day: ``as_of``, or today on the site's calendar
    day = ("%s::date" if as_of else
           "(%s::timestamptz AT TIME ZONE st.time_zone)::date")
    sql = f"""
    WITH pl AS (
        SELECT p.id, p.sif_id, p.kind, p.demand_counts_as_test AS dem, p.interval_months AS iv,
               p.coverage AS cov, st.time_zone AS tz, {day} AS day,
               (({day} + 1)::timestamp AT TIME ZONE st.time_zone) AS cutoff,
               s.in_service_on AS sif_start, st.due_soon_days, st.escalate_share,
               st.escalate_days, st.second_escalation_days,
               {", ".join("p." + connection.ops.quote_name(TestPlan._meta.get_field(c).column)
                           for c in STATE_COLUMNS)}
        FROM {t[TestPlan]} p
        JOIN register_safetyfunction s ON s.id = p.sif_id
        JOIN register_plantunit u ON u.id = s.unit_id
        JOIN {t[Site]} st ON st.id = u.site_id
        WHERE p.id IN ({ids_sql})
    ), scope AS ({scope_sql}
    ), sd AS MATERIALIZED (  -- the plans' SIFs, with the end of their site's day
        SELECT DISTINCT sif_id, cutoff FROM pl
    ), rec (id, sif_id, kind, at) AS ({rec_sql}
    ), dem (component_id, sif_id, at) AS ({dem_sql}
    ), ck AS MATERIALIZED (  -- each component's last event of each kind up to then
        SELECT cr.component_id, r.kind, max(r.at) AS at
        FROM rec r JOIN sd ON sd.sif_id = r.sif_id AND r.at < sd.cutoff
        JOIN {t[ComponentResult]} cr ON cr.record_id = r.id
        GROUP BY cr.component_id, r.kind
        UNION ALL
        SELECT d.component_id, %s, max(d.at)
        FROM dem d JOIN sd ON sd.sif_id = d.sif_id AND d.at < sd.cutoff
        GROUP BY d.component_id
    ), lasts AS (  -- rule 2: each component's last credit event, on the site's calendar
        SELECT sc.plan_id, sc.comp_id,
               coalesce((max(k.at) AT TIME ZONE min(sc.tz))::date, min(sc.started)) AS last
        FROM scope sc LEFT JOIN ck k ON k.component_id = sc.comp_id AND k.kind = ANY(sc.kinds)
        GROUP BY sc.plan_id, sc.comp_id
    ), firsts AS (
        SELECT plan_id, min(last) AS last FROM lasts GROUP BY plan_id
    ), versions AS (  -- distinct (interval, coverage, scope) in each plan's history
        SELECT h.id AS plan_id, count(DISTINCT (h.interval_months, h.coverage,
               coalesce((SELECT array_agg(m.component_id ORDER BY m.component_id)
                         FROM {t[_plan_scope_rows().model]} m
                         WHERE m.history_id = h.history_id), '{{}}'))) AS n,
               bool_or(h.interval_months <> pl.iv) AS other_interval
        FROM {t[hist]} h JOIN pl ON pl.id = h.id GROUP BY h.id
    )
    SELECT pl.id, pl.sif_id, pl.iv, pl.tz, pl.day, pl.due_soon_days, pl.escalate_share,
           pl.escalate_days, pl.second_escalation_days,
           coalesce(f.last, pl.sif_start),
           coalesce(v.n > 1 OR v.other_interval, false) OR EXISTS (
               SELECT 1 FROM {t[Deferral]} d WHERE d.plan_id = pl.id AND d.status = %s
               AND d.decided_at IS NOT NULL),
           {", ".join("pl." + connection.ops.quote_name(TestPlan._meta.get_field(c).column)
                      for c in STATE_COLUMNS)}
    FROM pl LEFT JOIN firsts f ON f.plan_id = pl.id LEFT JOIN versions v ON v.plan_id = pl.id
    """
    kinds = _scope_params()
    params = [as_of or timezone.now(), as_of or timezone.now(), *ids_params, *kinds, *rec_params,
              *dem_params, REAL_DEMAND, choices.DeferralStatus.APPROVED.value]
    if not many:  # a few plans: small enough for no compiling (JIT) and index lookups
        with connection.cursor() as cursor:
            cursor.execute(sql, params)
            return cursor.fetchall()
    with transaction.atomic(), connection.cursor() as cursor:
        # compiling it (JIT) costs more than running it
        cursor.execute("SET LOCAL jit = off; SET LOCAL enable_nestloop = off")
        cursor.execute(sql, params)
        return cursor.fetchall()


def _state_columns(due_on: dt.date | None, interval_months: int, th: Thresholds,
                   as_of: dt.date, later: list[dt.date] = ()) -> dict:
    """``STATE_COLUMNS`` for a due date seen on ``as_of``; ``later``: days after ``as_of``
    on which a plan version takes effect (its state may turn then too)."""
    if due_on is None:
        values = dict.fromkeys(STATE_COLUMNS)
    else:
        d = state_dates(due_on, interval_months, th)
        values = {"next_due_on": due_on, "due_soon_on": d.due_soon_on,
                  "escalated_on": d.escalated_on, "escalated_2_on": d.escalated_2_on}
        turns = [d.due_soon_on, d.overdue_on, d.escalated_on, d.escalated_2_on]
        ahead = [t for t in turns if t > as_of]
        values["next_change_on"] = min(ahead) if ahead else None
    if later and (values["next_change_on"] is None or min(later) < values["next_change_on"]):
        values["next_change_on"] = min(later)
    return values


def current_statuses(plan_queryset, as_of: dt.date | None = None, *, write: bool = False,
                     many: bool = False) -> dict[int, PlanStatus]:
    """Each plan's status as of ``as_of`` (default: today on each site's calendar), from
    the records, set-based: on PostgreSQL one query for every plan with one version and
    no approved deferral (``_current_sql``: values, no model instances), the whole rule
    (``_load``) for the others and on other databases. ``write``: also write the
    ``STATE_COLUMNS`` that changed (``refresh_plans``); ``many``: see ``_current_sql``."""
    if connection.vendor != "postgresql" or isinstance(plan_queryset, list):
        return (_refresh_by_rule if write else _statuses_by_rule)(plan_queryset, as_of)
    statuses: dict[int, PlanStatus] = {}
    changed: list[tuple] = []
    general: list[int] = []
    for (pk, _sif, interval, _tz, day, soon, share, esc, second, last, is_general,
         *stored) in _current_sql(plan_queryset, as_of, many):
        if is_general:
            general.append(pk)
            continue
        th = Thresholds(soon, share, esc, second)
        due = add_months(last, interval) if last else None
        state, late = state_for(due, day, interval, th)
        statuses[pk] = PlanStatus(pk, due, state, late, False, last, interval)
        if write:
            values = _state_columns(due, interval, th, day)
            row = tuple(values[c] for c in STATE_COLUMNS)
            if row != tuple(stored):
                changed.append((pk, *row))
    if write:
        _write_rows(changed)
    if general:
        rest = TestPlan.objects.filter(pk__in=general)
        statuses.update((_refresh_by_rule if write else _statuses_by_rule)(rest, as_of))
    return statuses


def _statuses_by_rule(plans, as_of: dt.date | None) -> dict[int, PlanStatus]:
    plans = _plans(plans)
    out = {}
    by_day: dict[dt.date, list[TestPlan]] = defaultdict(list)
    days = {zone: as_of or today(zone) for zone in {p.sif.unit.site.time_zone for p in plans}}
    for p in plans:
        by_day[days[p.sif.unit.site.time_zone]].append(p)
    for day, day_plans in by_day.items():
        out.update(compute_statuses(day_plans, day))
    return out


def refresh_plans(plan_queryset, as_of: dt.date | None = None, *, many: bool = False
                  ) -> dict[int, PlanStatus]:
    """Write each plan's current due date and state dates (``STATE_COLUMNS``) from the
    records, as of ``as_of`` (default: today on each site's calendar). Returns the
    computed statuses (``current_statuses``)."""
    return current_statuses(plan_queryset, as_of, write=True, many=many)


def _refresh_by_rule(plan_queryset, as_of: dt.date | None = None) -> dict[int, PlanStatus]:
    """``refresh_plans`` by the whole rule (``_load``), plan by plan."""
    plans = _plans(plan_queryset)
    statuses: dict[int, PlanStatus] = {}
    changed = []
    days: dict[str, dt.date] = {}
    facts = {}
    for zone in {p.sif.unit.site.time_zone for p in plans}:
        days[zone] = as_of or today(zone)
    by_day: dict[dt.date, list[TestPlan]] = defaultdict(list)
    for p in plans:
        by_day[days[p.sif.unit.site.time_zone]].append(p)
    for day, day_plans in by_day.items():
        for pk, f in _load(day_plans, day).items():
            s = _status(f, day)
            statuses[pk] = s
            facts[pk] = (f, day)
    for plan in plans:
        f, day = facts[plan.pk]
        values = _columns(f, statuses[plan.pk], day)
        if any(getattr(plan, k) != v for k, v in values.items()):
            for k, v in values.items():
                setattr(plan, k, v)
            changed.append(plan)
    write_columns(changed)
    return statuses


def write_columns(plans: list[TestPlan], batch: int = 2000) -> None:
    """Write ``STATE_COLUMNS`` of ``plans`` (values set on the objects). On PostgreSQL one
    ``UPDATE ... FROM (VALUES ...)`` per batch: Django's ``bulk_update`` builds a CASE per
    column and row, which PostgreSQL plans slowly at thousands of plans."""
    if not plans:
        return
    if connection.vendor != "postgresql":
        TestPlan.objects.bulk_update(plans, STATE_COLUMNS, batch_size=1000)
        return
    _write_rows([(p.pk, *(getattr(p, c) for c in STATE_COLUMNS)) for p in plans], batch)


def _write_rows(rows: list[tuple], batch: int = 2000) -> None:
    """``write_columns`` of rows (plan id, then the ``STATE_COLUMNS`` values), on
    PostgreSQL."""
    if not rows:
        return
    table = connection.ops.quote_name(TestPlan._meta.db_table)
    names = [connection.ops.quote_name(TestPlan._meta.get_field(c).column)
             for c in STATE_COLUMNS]
    sets = ", ".join(f"{n} = v.{n}" for n in names)
    row = "(%s::bigint" + ", %s::date" * len(names) + ")"
    with connection.cursor() as cursor:
        for i in range(0, len(rows), batch):
            chunk = rows[i:i + batch]
            params = [v for r in chunk for v in r]
            cursor.execute(
                f"UPDATE {table} AS t SET {sets} FROM (VALUES {', '.join([row] * len(chunk))}) "
                f"AS v(id, {', '.join(names)}) WHERE t.id = v.id", params)


def _state_case(day: dt.date) -> list[When]:
    return [
        When(Q(next_due_on__isnull=True), then=Value(PlanState.NO_PLAN)),
        When(Q(escalated_2_on__lte=day), then=Value(PlanState.ESCALATED_2)),
        When(Q(escalated_on__lte=day), then=Value(PlanState.ESCALATED)),
        When(Q(next_due_on__lt=day), then=Value(PlanState.OVERDUE)),
        When(Q(due_soon_on__lte=day), then=Value(PlanState.DUE_SOON)),
    ]


def state_expression(prefix: str = "", as_of: dt.date | None = None):
    """The plan's state for today on its site's calendar (or on ``as_of``), as a SQL
    expression over the columns ``refresh_plans`` writes. ``prefix`` is the lookup from
    the queried model to the plan (for example ``"plans__"``)."""
    def q(cond: Q) -> Q:
        return Q(**{f"{prefix}{k}": v for k, v in cond.children})

    whens = []
    if as_of is not None:
        groups = {as_of: None}
    else:
        groups = defaultdict(list)
        for zone in Site.objects.values_list("time_zone", flat=True).distinct():
            groups[today(zone)].append(zone)
    for day, zones in groups.items():
        zone_q = Q(**{f"{prefix}sif__unit__site__time_zone__in": zones}) if zones else Q()
        for w in _state_case(day):
            whens.append(When(zone_q & q(w.condition), then=w.result))
    return Case(*whens, default=Value(PlanState.ON_TRACK), output_field=CharField())


def with_state(plans, as_of: dt.date | None = None):
    """``plans`` annotated with ``state``: the state for the reader's day (read time)."""
    return plans.annotate(state=state_expression(as_of=as_of))


def live_statuses(plans) -> dict[int, PlanStatus]:
    """Each plan's status today on its site's calendar (from the records)."""
    return current_statuses(plans)


__all__ = [
    "FULL_CREDIT", "LATE_STATES", "PARTIAL_CREDIT", "OnTime", "PlanState", "PlanStatus",
    "PlanTimeline", "Segment", "StateDates", "Thresholds", "Version", "active_plans",
    "add_months", "compute_statuses", "current_statuses", "due_date", "live_statuses", "on_time_by_timelines",
    "on_time_rate",
    "plan_timelines", "refresh_plans", "state_dates", "state_expression", "state_for",
    "status_of", "status_with_change", "with_state",
]
