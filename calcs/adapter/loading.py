"""Loading what N safety functions need in a fixed number of queries (the count does not
grow with N)."""

from __future__ import annotations

import datetime as dt
import logging
from collections import defaultdict
from dataclasses import dataclass, field

from django.db import connections
from django.db.models import OuterRef, Q

from calcs.engine import history as eng_hist
from register import choices
from register.days import local_date
from register.models import (
    Bypass,
    Component,
    ComponentResult,
    ConditionalModifier,
    Demand,
    HazardScenario,
    InitiatingCause,
    ProtectionLayer,
    SafetyFunction,
    Subsystem,
    TestPlan,
    TestRecord,
    in_force,
)
from register.schedule.due import Version, plan_versions, version_on

log = logging.getLogger(__name__)

#: Tolerance of the self-check (history model on a perfect schedule vs design equations).
SCHEDULE_TOLERANCE = eng_hist.DEFAULT_SCHEDULE_TOLERANCE
#: Significance level for "more failures / demands than assumed" flags.
SIGNIFICANCE = 0.05


# ---------------------------------------------------------------------------------------
# Loading: a fixed number of queries for any number of SIFs
# ---------------------------------------------------------------------------------------


@dataclass(slots=True)
class TestRow:
    at: dt.datetime
    kind: str  # engine kind: full / partial / demand
    failed: bool
    record_id: int | None = None
    credited: bool = True  # a demand reveals failures only where a plan credits demands
    plan_id: int | None = None
    #: the coverage of the plan version in force on the day of the test (None: no plan)
    plan_coverage: float | None = None


@dataclass
class ComponentData:
    obj: Component
    events: list[TestRow] = field(default_factory=list)


@dataclass
class SifData:
    sif: SafetyFunction
    subsystems: list[Subsystem] = field(default_factory=list)
    components: dict[int, list[ComponentData]] = field(default_factory=dict)  # by subsystem
    plans: list[TestPlan] = field(default_factory=list)
    plan_components: dict[int, set[int]] = field(default_factory=dict)
    scenarios: list[HazardScenario] = field(default_factory=list)
    bypasses: list[Bypass] = field(default_factory=list)
    demands: list[Demand] = field(default_factory=list)

    def all_components(self) -> list[ComponentData]:
        return [c for subs in self.components.values() for c in subs]


def load(sif_queryset, *, link_arrays: bool | None = None) -> list[SifData]:
    """Load everything the engine needs for these SIFs in a fixed number of queries.

    With ``link_arrays`` (the default on PostgreSQL) the many-to-many links (a SIF's
    scenarios, a plan's devices, a demand's failed and exercised devices) come with their
    rows, an ARRAY subquery each; without, one more query per link table."""
    merged = (connections[sif_queryset.db].vendor == "postgresql"
              if link_arrays is None else link_arrays) and not sif_queryset.query.is_sliced
    sifs = sif_queryset.select_related("unit__site")
    if merged:
        sifs = sifs.annotate(_scenario_ids=_ids_of(SafetyFunction.scenarios.through,
                                                   "safetyfunction_id", "hazardscenario_id"))
    sifs = list(sifs)
    data = {s.pk: SifData(sif=s) for s in sifs}
    if not data:
        return []
    pairs = [(s.pk, sc) for s in sifs for sc in s.__dict__.pop("_scenario_ids")
             ] if merged else None
    scope = Q(sif__in=sif_queryset.values("pk"))
    comp_of: dict[int, ComponentData] = {}
    for sub in Subsystem.objects.filter(scope).order_by("sif_id", "position", "id"):
        data[sub.sif_id].subsystems.append(sub)
        data[sub.sif_id].components[sub.pk] = []
    sub_sif = {sub.pk: sub.sif_id for d in data.values() for sub in d.subsystems}
    for comp in Component.objects.filter(
            subsystem__sif__in=sif_queryset.values("pk")).select_related("device_type"
                                                                         ).order_by("tag", "id"):
        cd = ComponentData(comp)
        comp_of[comp.pk] = cd
        data[sub_sif[comp.subsystem_id]].components[comp.subsystem_id].append(cd)
    plans = TestPlan.objects.filter(scope)
    if merged:
        plans = plans.annotate(_component_ids=_ids_of(TestPlan.components.through,
                                                       "testplan_id", "component_id"))
    for plan in plans:
        data[plan.sif_id].plans.append(plan)
        data[plan.sif_id].plan_components[plan.pk] = set(
            plan.__dict__.pop("_component_ids", ()))
    if not merged:
        plan_sif = {p.pk: p.sif_id for d in data.values() for p in d.plans}
        for plan_id, comp_id in TestPlan.components.through.objects.filter(
                testplan_id__in=plan_sif).values_list("testplan_id", "component_id"):
            data[plan_sif[plan_id]].plan_components[plan_id].add(comp_id)
    _load_scenarios(data, sif_queryset, pairs)
    for bp in Bypass.objects.filter(scope).order_by("started_at"):
        data[bp.sif_id].bypasses.append(bp)
    demand_failed = defaultdict(set)
    demand_ok = defaultdict(set)
    demands = Demand.objects.filter(scope).order_by("occurred_at")
    if merged:
        demands = demands.annotate(
            _failed_ids=_ids_of(Demand.failed_components.through, "demand_id", "component_id"),
            _exercised_ids=_ids_of(Demand.components_exercised.through, "demand_id",
                                   "component_id"))
    else:
        for demand_id, comp_id in Demand.failed_components.through.objects.filter(
                demand__sif__in=sif_queryset.values("pk")).values_list("demand_id",
                                                                       "component_id"):
            demand_failed[demand_id].add(comp_id)
        for demand_id, comp_id in Demand.components_exercised.through.objects.filter(
                demand__sif__in=sif_queryset.values("pk")).values_list("demand_id",
                                                                       "component_id"):
            demand_ok[demand_id].add(comp_id)
    for demand in demands:
        if merged:
            demand_failed[demand.pk] = set(demand.__dict__.pop("_failed_ids"))
            demand_ok[demand.pk] = set(demand.__dict__.pop("_exercised_ids"))
        data[demand.sif_id].demands.append(demand)
        plan_allows = any(p.demand_counts_as_test for p in data[demand.sif_id].plans)
        for comp_id in demand_failed[demand.pk]:
            if comp_id in comp_of:
                comp_of[comp_id].events.append(TestRow(demand.occurred_at, "demand", True))
        if demand.successful and plan_allows:
            for comp_id in demand_ok[demand.pk] - demand_failed[demand.pk]:
                if comp_id in comp_of:
                    comp_of[comp_id].events.append(TestRow(demand.occurred_at, "demand", False))
    # Test records (their time, kind and plan read once each), then their results: one
    # streamed query over the largest table, plain values.
    signed = (TestRecord.objects.filter(in_force(), sif__in=sif_queryset.values("pk"))
              .exclude(kind=choices.TestKind.SIGN_OFF))
    # a few SIFs (a recompute after a record was signed): one round trip each, no cursor
    stream = len(data) > 50
    records = {pk: (at, kind, plan_id) for pk, at, kind, plan_id in
               _rows(signed.values_list("pk", "performed_at", "kind", "plan_id"), stream)}
    if stream:
        rows = _rows(
            ComponentResult.objects.filter(in_force("record__"),
                                           record__sif__in=sif_queryset.values("pk"))
            .exclude(record__kind=choices.TestKind.SIGN_OFF)
            .values_list("component_id", "record_id", "failure_mode", "as_found")
            .order_by("record__performed_at"), stream)
    else:
        # the results of the records just read, by their ids (an index scan of a few rows,
        # whatever the planner's estimates), in the order of the records' times
        rows = sorted(ComponentResult.objects.filter(record_id__in=list(records))
                      .values_list("component_id", "record_id", "failure_mode", "as_found"),
                      key=lambda r: records[r[1]][0])
    kind_map = {choices.TestKind.FULL: "full", choices.TestKind.VALIDATION: "full",
                choices.TestKind.PARTIAL: "partial", choices.TestKind.DEMAND: "demand"}
    credits_demands = {sif_id: any(p.demand_counts_as_test for p in d.plans)
                       for sif_id, d in data.items()}
    failing = (choices.Verdict.FAIL, choices.FailureMode.DANGEROUS_UNDETECTED)
    for comp_id, record_id, mode, as_found in rows:
        cd = comp_of.get(comp_id)
        if cd is None or record_id not in records:
            continue
        at, kind, plan_id = records[record_id]
        credited = kind != choices.TestKind.DEMAND or credits_demands[
            sub_sif[cd.obj.subsystem_id]]
        cd.events.append(TestRow(at, kind_map[kind], (as_found, mode) == failing, record_id,
                                 credited, plan_id))
    _plan_coverage(data, comp_of, sub_sif)
    for cd in comp_of.values():
        cd.events.sort(key=lambda e: e.at)
    return [data[s.pk] for s in sifs]


def _ids_of(through, owner: str, target: str):
    """PostgreSQL: the ``target`` ids linked to the outer row in the ``through`` table, as
    one array column."""
    from django.contrib.postgres.expressions import ArraySubquery

    return ArraySubquery(through.objects.filter(**{owner: OuterRef("pk")}).order_by("id")
                         .values(target))


def _rows(queryset, stream: bool):
    """The rows of ``queryset``: streamed in chunks through a server-side cursor, or
    fetched at once."""
    return queryset.iterator(chunk_size=5000) if stream else queryset


def _plan_coverage(data: dict[int, SifData], comp_of: dict[int, ComponentData],
                   sub_sif: dict[int, int]) -> None:
    """Give each test the coverage of the plan version in force on the site's calendar day
    of the test, so a later change of a plan's coverage leaves past tests as they were
    (``register.schedule.due.plan_versions``, one query for all plans). A record made
    under a plan takes that plan's; one made without takes the least of the plans of its
    kind that named the device then."""
    live = {p.pk: p for d in data.values() for p in d.plans}
    versions = plan_versions(list(live))
    for plan_id, plan in live.items():
        versions.setdefault(plan_id, [Version(None, plan.interval_months, frozenset(
            data[plan.sif_id].plan_components.get(plan_id, ())), plan.coverage)])
    days: dict[tuple, dt.date] = {}  # (time, site): the site's calendar day
    by_plan: dict[tuple, float | None] = {}  # (plan, day): coverage of its version then
    for cd in comp_of.values():
        d = data[sub_sif[cd.obj.subsystem_id]]
        site, site_id, comp_id = d.sif.unit.site, d.sif.unit.site_id, cd.obj.pk
        for e in cd.events:
            if e.kind == "demand":
                continue
            day = days.get((e.at, site_id))
            if day is None:
                day = days[e.at, site_id] = local_date(e.at, site)
            if e.plan_id in live:
                key = (e.plan_id, day)
                if key not in by_plan:
                    v = version_on(versions[e.plan_id], day)
                    by_plan[key] = v.coverage if v else None
                e.plan_coverage = by_plan[key]
                continue
            kind = choices.TestKind.PARTIAL if e.kind == "partial" else choices.TestKind.FULL
            covs = []
            for plan in d.plans:
                v = version_on(versions[plan.pk], day) if plan.kind == kind else None
                if v and (not v.components or comp_id in v.components):
                    covs.append(v.coverage)
            e.plan_coverage = min(covs) if covs else None


def _load_scenarios(data: dict[int, SifData], sif_queryset,
                    pairs: list[tuple[int, int]] | None = None) -> None:
    """Each SIF's hazard scenarios (in the order of their links) with their causes,
    layers and modifiers; ``pairs`` (SIF id, scenario id), when already read, saves
    reading the links."""
    if pairs is None:
        link = SafetyFunction.scenarios.through.objects.filter(
            safetyfunction_id__in=sif_queryset.values("pk"))
        pairs = list(link.order_by("id").values_list("safetyfunction_id",
                                                      "hazardscenario_id"))
    ids = {sc for _, sc in pairs}
    scenarios = {s.pk: s for s in HazardScenario.objects.filter(pk__in=ids)}
    for s in scenarios.values():
        s.loaded_causes, s.loaded_layers, s.loaded_modifiers = [], [], []
    for c in InitiatingCause.objects.filter(scenario_id__in=ids):
        scenarios[c.scenario_id].loaded_causes.append(c)
    for lay in ProtectionLayer.objects.filter(scenario_id__in=ids):
        scenarios[lay.scenario_id].loaded_layers.append(lay)
    for m in ConditionalModifier.objects.filter(scenario_id__in=ids):
        scenarios[m.scenario_id].loaded_modifiers.append(m)
    for sif_id, sc_id in pairs:
        data[sif_id].scenarios.append(scenarios[sc_id])


