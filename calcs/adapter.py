"""The one bridge between the register's rows and the pure calculation engine.

It loads what N safety functions need in a fixed number of queries (the count does
not grow with N), builds the engine's dataclasses, runs the engine and turns results
back into ``Assessment`` rows or plain data for views. Views, tasks, commands and the
API call this module; nothing else imports ``calcs.engine`` from the Django side except
for small pure helpers (SIL bands, voting parsing).
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import logging
from collections import defaultdict
from dataclasses import dataclass, field

from django.db.models import Q
from django.utils import timezone

from calcs.engine import design as eng_design
from calcs.engine import field_data as eng_field
from calcs.engine import history as eng_hist
from calcs.engine import lopa as eng_lopa
from calcs.engine import observed as eng_obs
from calcs.engine import sil as eng_sil
from calcs.engine import verdict as eng_verdict
from calcs.engine.errors import EngineError
from calcs.models import Assessment
from register import choices
from register.models import (
    HOURS_PER_MONTH,
    HOURS_PER_YEAR,
    Bypass,
    Component,
    ComponentResult,
    ConditionalModifier,
    Demand,
    DeviceType,
    HazardScenario,
    InitiatingCause,
    ProtectionLayer,
    SafetyFunction,
    Subsystem,
    TestPlan,
)

log = logging.getLogger(__name__)

#: Tolerance of the self-check (history model on a perfect schedule vs design equations).
SCHEDULE_TOLERANCE = eng_hist.DEFAULT_SCHEDULE_TOLERANCE
#: Significance level for "more failures / demands than assumed" flags.
SIGNIFICANCE = 0.05


# ---------------------------------------------------------------------------------------
# Loading: a fixed number of queries for any number of SIFs
# ---------------------------------------------------------------------------------------


@dataclass
class TestRow:
    at: dt.datetime
    kind: str  # engine kind: full / partial / demand
    failed: bool
    record_id: int | None = None
    credited: bool = True  # a demand reveals failures only where a plan credits demands


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


def load(sif_queryset) -> list[SifData]:
    """Load everything the engine needs for these SIFs in a fixed number of queries."""
    sifs = list(sif_queryset.select_related("unit__site"))
    data = {s.pk: SifData(sif=s) for s in sifs}
    if not data:
        return []
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
    for plan in TestPlan.objects.filter(scope):
        data[plan.sif_id].plans.append(plan)
        data[plan.sif_id].plan_components[plan.pk] = set()
    plan_sif = {p.pk: p.sif_id for d in data.values() for p in d.plans}
    for plan_id, comp_id in TestPlan.components.through.objects.filter(
            testplan_id__in=plan_sif).values_list("testplan_id", "component_id"):
        data[plan_sif[plan_id]].plan_components[plan_id].add(comp_id)
    _load_scenarios(data, sif_queryset)
    for bp in Bypass.objects.filter(scope).order_by("started_at"):
        data[bp.sif_id].bypasses.append(bp)
    demand_failed = defaultdict(set)
    for demand_id, comp_id in Demand.failed_components.through.objects.filter(
            demand__sif__in=sif_queryset.values("pk")).values_list("demand_id", "component_id"):
        demand_failed[demand_id].add(comp_id)
    demand_ok = defaultdict(set)
    for demand_id, comp_id in Demand.components_exercised.through.objects.filter(
            demand__sif__in=sif_queryset.values("pk")).values_list("demand_id", "component_id"):
        demand_ok[demand_id].add(comp_id)
    for demand in Demand.objects.filter(scope).order_by("occurred_at"):
        data[demand.sif_id].demands.append(demand)
        plan_allows = any(p.demand_counts_as_test for p in data[demand.sif_id].plans)
        for comp_id in demand_failed[demand.pk]:
            if comp_id in comp_of:
                comp_of[comp_id].events.append(TestRow(demand.occurred_at, "demand", True))
        if demand.successful and plan_allows:
            for comp_id in demand_ok[demand.pk] - demand_failed[demand.pk]:
                if comp_id in comp_of:
                    comp_of[comp_id].events.append(TestRow(demand.occurred_at, "demand", False))
    # Test results: one streamed query, the largest table.
    rows = (
        ComponentResult.objects.filter(record__sif__in=sif_queryset.values("pk"),
                                       record__superseded_by__isnull=True)
        .exclude(record__status=choices.RecordStatus.DRAFT)
        .exclude(record__kind=choices.TestKind.SIGN_OFF)
        .values_list("component_id", "record__performed_at", "record__kind", "failure_mode",
                     "as_found", "record_id")
        .order_by("record__performed_at")
    )
    kind_map = {choices.TestKind.FULL: "full", choices.TestKind.VALIDATION: "full",
                choices.TestKind.PARTIAL: "partial", choices.TestKind.DEMAND: "demand"}
    credits_demands = {sif_id: any(p.demand_counts_as_test for p in d.plans)
                       for sif_id, d in data.items()}
    for comp_id, at, kind, mode, as_found, record_id in rows.iterator(chunk_size=5000):
        cd = comp_of.get(comp_id)
        if cd is None:
            continue
        failed = as_found == choices.Verdict.FAIL and mode == choices.FailureMode.DANGEROUS_UNDETECTED
        credited = kind != choices.TestKind.DEMAND or credits_demands[
            sub_sif[cd.obj.subsystem_id]]
        cd.events.append(TestRow(at, kind_map[kind], failed, record_id, credited))
    for cd in comp_of.values():
        cd.events.sort(key=lambda e: e.at)
    return [data[s.pk] for s in sifs]


def _load_scenarios(data: dict[int, SifData], sif_queryset) -> None:
    link = SafetyFunction.scenarios.through.objects.filter(
        safetyfunction_id__in=sif_queryset.values("pk"))
    pairs = list(link.values_list("safetyfunction_id", "hazardscenario_id"))
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


# ---------------------------------------------------------------------------------------
# LOPA
# ---------------------------------------------------------------------------------------


def scenario_input(sc: HazardScenario) -> eng_lopa.Scenario:
    causes = getattr(sc, "loaded_causes", None)
    if causes is None:
        causes = list(sc.causes.all())
        layers, mods = list(sc.layers.all()), list(sc.modifiers.all())
    else:
        layers, mods = sc.loaded_layers, sc.loaded_modifiers
    return eng_lopa.Scenario(
        name=f"{sc.reference} {sc.title}",
        tolerable_frequency_per_year=sc.tolerable_frequency_per_year,
        causes=tuple(eng_lopa.InitiatingCause(c.description, c.frequency_per_year)
                     for c in causes),
        layers=tuple(eng_lopa.ProtectionLayer(p.description, p.pfd) for p in layers),
        modifiers=tuple(eng_lopa.ConditionalModifier(m.get_kind_display(), m.probability)
                        for m in mods),
    )


def lopa_for_scenarios(scenarios) -> eng_lopa.LopaResult:
    """LOPA target of a SIF protecting these scenarios (the strictest governs)."""
    return eng_lopa.evaluate_scenarios([scenario_input(s) for s in scenarios])


def assumed_demand_rate(scenarios) -> float:
    """Demand rate on the SIF that LOPA assumed: initiating frequency x other IPLs' PFDs,
    summed over the scenarios it protects (per year)."""
    total = 0.0
    for sc in lopa_for_scenarios(scenarios).scenarios:
        total += sc.initiating_frequency_per_year * sc.layers_pfd_product
    return total


# ---------------------------------------------------------------------------------------
# Design inputs
# ---------------------------------------------------------------------------------------


def plan_intervals(d: SifData, sub: Subsystem) -> tuple[float | None, float | None]:
    """(full, partial) test interval in hours covering this subsystem's components."""
    comp_ids = {c.obj.pk for c in d.components.get(sub.pk, [])}
    full, partial = [], []
    for plan in d.plans:
        covered = d.plan_components.get(plan.pk) or None
        if covered is not None and not (covered & comp_ids):
            continue
        hours = plan.interval_months * HOURS_PER_MONTH
        (partial if plan.kind == choices.TestKind.PARTIAL else full).append(hours)
    return (min(full) if full else None), (min(partial) if partial else None)


@dataclass(frozen=True)
class RateTable:
    """The λDU the achieved model and the projections use (site rate basis applied).

    ``design``: the component's own entered rate. ``bayes`` / ``upper``: its device
    type's plant-wide estimate. ``field`` (the default for new sites): empirical Bayes,
    the type's plant-wide estimate as a gamma prior updated by the component's own DU
    failures and hours (:func:`calcs.engine.field_data.device_rate`).
    """

    basis: str
    by_type: dict[int, float]
    as_of: dt.date | None = None
    _devices: dict = field(default_factory=dict, compare=False, repr=False)

    def lambda_du(self, comp: Component, events: list | None = None) -> float:
        if self.basis == choices.RateBasis.FIELD:
            return self.device(comp, events or []).rate
        if self.basis == choices.RateBasis.DESIGN or comp.device_type_id not in self.by_type:
            return comp.lambda_du
        return self.by_type[comp.device_type_id]

    def type_rate(self, comp: Component) -> float:
        """The type's plant-wide estimate (the design rate where there is none)."""
        rate = self.by_type.get(comp.device_type_id)
        return rate if rate and rate > 0 else comp.lambda_du

    def device(self, comp: Component, events: list) -> eng_field.DeviceRate:
        """The component's own rate (computed once per component, history and figures)."""
        failures = sum(1 for e in events if e.failed)
        key = (comp.pk, failures)
        if key not in self._devices:
            self._devices[key] = self._device(comp, failures)
        return self._devices[key]

    def _device(self, comp: Component, failures: int) -> eng_field.DeviceRate:
        hours = 0.0
        if self.as_of is not None and comp.in_service_on:
            hours = max(0.0, (self.as_of - comp.in_service_on).days * 24.0)
        base = self.type_rate(comp)
        if base <= 0:
            base = 1e-12  # a rate of zero cannot serve as a prior; effectively zero
        return eng_field.device_rate(base, failures, hours)


def _mean(values):
    values = list(values)
    return sum(values) / len(values) if values else 0.0


def design_input(d: SifData) -> eng_design.SifDesign:
    """The register's SIF as the design engine sees it (channels averaged per subsystem)."""
    subs = []
    for sub in d.subsystems:
        comps = [c.obj for c in d.components.get(sub.pk, [])]
        if not comps:
            raise EngineError(f"subsystem '{sub.name}' has no components")
        full, partial = plan_intervals(d, sub)
        if full is None:
            raise EngineError(f"no full proof-test plan covers subsystem '{sub.name}'")
        ptc = min(c.proof_test_coverage for c in comps)
        theta = min(c.partial_test_coverage for c in comps)
        types = {c.effective_class for c in comps}
        scs = [c.effective_sc for c in comps if c.effective_sc]
        subs.append(eng_design.Subsystem(
            name=sub.name, voting=sub.voting,
            lambda_du_per_hour=_mean(c.lambda_du for c in comps),
            lambda_dd_per_hour=_mean(c.lambda_dd for c in comps),
            lambda_s_per_hour=_mean(c.lambda_s for c in comps),
            beta=sub.beta, beta_d=sub.beta_d, mttr_hours=sub.mttr_hours,
            mrt_hours=sub.mrt_hours, proof_test_interval_hours=full,
            proof_test_coverage=ptc,
            mission_time_hours=max(max(c.mission_time_years for c in comps) * HOURS_PER_YEAR,
                                   full) if ptc < 1 else None,
            partial_test_interval_hours=partial if partial and theta > 0 else None,
            partial_test_coverage=theta if partial and theta > 0 else None,
            hft_type="B" if "B" in types else "A",
            systematic_capability=min(scs) if scs else None,
        ))
    mode = eng_sil.LOW if d.sif.demand_mode == choices.DemandMode.LOW else eng_sil.HIGH
    return eng_design.SifDesign(subsystems=tuple(subs), demand_mode=mode,
                                target_pfd_avg=target_pfd(d),
                                target_pfh_per_hour=d.sif.target_pfh_per_hour)


def evaluate_design(d: SifData) -> eng_design.SifResult:
    """The design result of a loaded SIF (raises EngineError when it cannot be computed)."""
    return eng_design.evaluate_sif(design_input(d))


def period_figures(d: SifData, rates: RateTable, start: dt.datetime, end: dt.datetime,
                   points: int = 600):
    """Achieved PFDavg over [start, end] and PFD(t) samples for a chart of that period
    (records after ``end`` not used): (pfd_avg, times, values)."""
    hist = history_input(d, rates)
    window = eng_hist.achieved_pfd_windows(hist, [(start, end)], as_of=end)[0]
    times, values = eng_hist.pfd_series(hist, start, end, points, as_of=end)
    return window.pfd_avg, times, values


def target_pfd(d: SifData) -> float | None:
    if d.sif.target_pfd_avg is not None:
        return d.sif.target_pfd_avg
    if d.scenarios:
        required = lopa_for_scenarios(d.scenarios).required_pfd_avg
        return required if 0 < required < 1 else None
    return None


# ---------------------------------------------------------------------------------------
# Achieved (history) inputs
# ---------------------------------------------------------------------------------------


def _aware(day_or_dt) -> dt.datetime:
    if isinstance(day_or_dt, dt.datetime):
        return day_or_dt
    return dt.datetime.combine(day_or_dt, dt.time(0, 0), tzinfo=dt.UTC)


def history_input(d: SifData, rates: RateTable, *, assume_closed_after: dt.datetime | None = None
                  ) -> eng_hist.SifHistory:
    """The SIF's recorded life as the history model sees it.

    With ``assume_closed_after`` (for projections), a bypass still open is assumed to end
    at its authorised end, or at that moment if it is already past it.
    """
    groups = []
    for sub in d.subsystems:
        channels = []
        for cd in d.components.get(sub.pk, []):
            c = cd.obj
            channels.append(eng_hist.Channel(
                lambda_du=rates.lambda_du(c, cd.events), lambda_dd=c.lambda_dd,
                mttr_hours=sub.mttr_hours,
                mrt_hours=sub.mrt_hours, proof_test_coverage=c.proof_test_coverage,
                partial_test_coverage=c.partial_test_coverage, in_service=_aware(c.in_service_on),
                tests=tuple(eng_hist.TestEvent(
                    at=e.at, kind=e.kind, failed=e.failed,
                    # A credited demand exercises the device like a full test; otherwise
                    # it reveals only the failure it found.
                    coverage=(c.proof_test_coverage if e.credited else 0.0)
                    if e.kind == "demand" else None)
                    for e in cd.events),
            ))
        groups.append(eng_hist.Group(name=sub.name, voting=sub.voting, beta=sub.beta,
                                     beta_d=sub.beta_d, channels=tuple(channels)))
    bypasses = []
    for b in d.bypasses:
        if b.measures_effective or b.component_id is not None:
            continue
        end = b.ended_at
        if end is None and assume_closed_after is not None:
            end = max(b.started_at + dt.timedelta(hours=b.authorised_hours), assume_closed_after)
        bypasses.append((b.started_at, end))
    bypasses = tuple(bypasses)
    return eng_hist.SifHistory(groups=tuple(groups), bypasses=bypasses, name=d.sif.tag)


def planned_groups(design: eng_design.SifDesign) -> list[eng_hist.PlannedGroup]:
    return [
        eng_hist.PlannedGroup(
            name=s.name, voting=str(s.voting), lambda_du=s.lambda_du_per_hour,
            lambda_dd=s.lambda_dd_per_hour, beta=s.beta, beta_d=s.beta_d,
            mttr_hours=s.mttr_hours, mrt_hours=s.mrt_hours,
            proof_test_interval_hours=s.proof_test_interval_hours,
            proof_test_coverage=s.proof_test_coverage,
            mission_time_hours=s.mission_time_hours,
            partial_test_interval_hours=s.partial_test_interval_hours,
            partial_test_coverage=s.partial_test_coverage or 0.0,
        )
        for s in design.subsystems
    ]


# ---------------------------------------------------------------------------------------
# Field data: pooled plant-wide per device type
# ---------------------------------------------------------------------------------------


@dataclass(frozen=True)
class TypeStats:
    device_type: DeviceType
    stats: eng_field.DeviceTypeStats


def _stats_fingerprint() -> tuple:
    """Changes whenever something the field statistics depend on changes: the signed,
    current dangerous-undetected results (count and newest id, read through the partial
    index on those few rows), failed-on-demand links, and the newest history row of
    sites, SIFs and components (settings, life stage, in-service dates, device types).
    A passing test does not change it, so recomputing after one stays cheap. Rows
    bulk-inserted without history (synthetic benchmark data) are not seen by the history
    part, which is why the key also carries the date and entries expire after an hour."""
    from django.db.models import Count, Max

    from register.models import Site

    du = (ComponentResult.objects.filter(failure_mode=choices.FailureMode.DANGEROUS_UNDETECTED,
                                         record__superseded_by__isnull=True)
          .exclude(record__status=choices.RecordStatus.DRAFT)
          .aggregate(n=Count("id"), last=Max("id")))
    failed_on_demand = Demand.failed_components.through.objects.aggregate(
        n=Count("id"), last=Max("id"))
    return (du["n"], du["last"], failed_on_demand["n"], failed_on_demand["last"]) + tuple(
        model.history.aggregate(m=Max("history_id"))["m"]
        for model in (Site, SafetyFunction, Component))


def device_type_stats(site_id: int | None, as_of: dt.date,
                      type_ids: set[int] | None = None) -> dict[int, TypeStats]:
    """As :func:`compute_device_type_stats`, cached until a relevant record changes.

    The pooled statistics cover the whole plant, so computing them dominates the
    recompute of a single SIF; the cache makes that recompute cheap.
    """
    from django.core.cache import cache

    key = "ledger:typestats:" + hashlib.sha256(repr((
        site_id, as_of.isoformat(), sorted(type_ids) if type_ids is not None else None,
        _stats_fingerprint())).encode()).hexdigest()
    found = cache.get(key)
    if found is not None:
        return found
    stats = compute_device_type_stats(site_id, as_of, type_ids)
    cache.set(key, stats, 3600)
    return stats


def compute_device_type_stats(site_id: int | None, as_of: dt.date,
                              type_ids: set[int] | None = None) -> dict[int, TypeStats]:
    """Dangerous undetected failures found by tests and demands over cumulative service
    time, per device type, plant-wide (one site, or all sites when ``site_id`` is None),
    optionally only for ``type_ids``. Aggregated in the database: four queries whose
    result size does not grow with the plant."""
    from django.db.models import Count

    from register.models import Site

    comps = Component.objects.filter(in_service_on__lte=as_of,
                                     subsystem__sif__life_stage=choices.LifeStage.IN_SERVICE)
    if site_id:
        comps = comps.filter(subsystem__sif__unit__site_id=site_id)
    if type_ids is not None:
        comps = comps.filter(device_type_id__in=type_ids)
    failures: dict[int, int] = defaultdict(int)
    for row in (ComponentResult.objects.filter(
            component__in=comps, failure_mode=choices.FailureMode.DANGEROUS_UNDETECTED,
            record__superseded_by__isnull=True).exclude(record__status=choices.RecordStatus.DRAFT)
            .values("component__device_type_id").annotate(n=Count("id"))):
        failures[row["component__device_type_id"]] += row["n"]
    for row in (Demand.failed_components.through.objects.filter(component__in=comps)
                .values("component__device_type_id").annotate(n=Count("id"))):
        failures[row["component__device_type_id"]] += row["n"]
    hours: dict[int, float] = defaultdict(float)
    count: dict[int, int] = defaultdict(int)
    for row in comps.values("device_type_id", "in_service_on").annotate(n=Count("id")):
        hours[row["device_type_id"]] += (as_of - row["in_service_on"]).days * 24.0 * row["n"]
        count[row["device_type_id"]] += row["n"]
    site = Site.objects.filter(pk=site_id).first() if site_id else None
    cl = site.confidence_level if site else eng_field.IEC61511_PRIOR_USE_CL
    strength = site.prior_strength if site else eng_field.DEFAULT_PRIOR_STRENGTH
    out = {}
    for dtype in DeviceType.objects.filter(pk__in=hours.keys()):
        if hours[dtype.pk] <= 0:
            continue
        out[dtype.pk] = TypeStats(dtype, eng_field.pool_device_type(
            [(hours[dtype.pk], failures[dtype.pk])], assumed_rate=dtype.lambda_du_per_hour,
            confidence=cl, prior_strength=strength, alpha=SIGNIFICANCE,
            component_count=count[dtype.pk]))
    return out


def rate_table(site, stats: dict[int, TypeStats], as_of: dt.date) -> RateTable:
    """The site's rate basis applied; ``as_of`` fixes each device's hours in service."""
    basis = site.rate_basis
    by_type = {}
    for type_id, ts in stats.items():
        if basis in (choices.RateBasis.BAYES, choices.RateBasis.FIELD):
            by_type[type_id] = ts.stats.bayes_mean
        elif basis == choices.RateBasis.UPPER:
            by_type[type_id] = ts.stats.upper
    return RateTable(basis=basis, by_type=by_type, as_of=as_of)


# ---------------------------------------------------------------------------------------
# Assessment
# ---------------------------------------------------------------------------------------


def _digest(payload) -> str:
    return hashlib.sha256(json.dumps(payload, sort_keys=True, default=str).encode()).hexdigest()


def assess(d: SifData, as_of: dt.datetime, rates: RateTable, type_stats, *,
           due_on: dt.date | None = None, trigger: str = "") -> Assessment:
    """Run design, achieved and projected calculations for one SIF. Never raises for bad
    records: problems become flags, and an engine error is kept on the assessment."""
    sif = d.sif
    a = Assessment(sif=sif, computed_at=timezone.now(), as_of=as_of, trigger=trigger[:40],
                   rate_basis=rates.basis, target_sil=sif.target_sil)
    flags: list[str] = []
    detail: dict = {"subsystems": []}
    try:
        design = design_input(d)
        result = eng_design.evaluate_sif(design)
        a.target_pfd_avg = design.target_pfd_avg
        a.design_pfd_avg = result.pfd_avg
        a.design_pfh_per_hour = result.pfh_per_hour
        a.architectural_sil = result.architectural_sil
        a.systematic_sil = result.systematic_capability
        detail["design"] = {"method": result.method, "rrf": result.rrf, "sil": result.sil,
                            "rate_basis": rates.basis,
                            "claimable_sil": result.claimable_sil,
                            "sil_limited_by": result.sil_limited_by}
        for sres, sin in zip(result.subsystems, design.subsystems):
            detail["subsystems"].append({
                "name": sres.name, "voting": sres.voting, "hft": sres.hft,
                "design_pfd_avg": sres.pfd_avg, "architectural_sil": sres.architectural_sil,
                "pfd_method": getattr(sres, "pfd_method", None) or (
                    "simplified equations (IEC 61508-6 Annex B)"
                    if result.method == eng_design.METHOD_IEC else "ISA-TR84.00.02 equations"),
                "sff": sres.sff, "systematic_capability": sres.systematic_capability,
                "lambda_du_per_hour": sin.lambda_du_per_hour,
                "lambda_dd_per_hour": sin.lambda_dd_per_hour, "beta": sin.beta,
                "beta_d": sin.beta_d, "mttr_hours": sin.mttr_hours, "mrt_hours": sin.mrt_hours,
                "proof_test_interval_hours": sin.proof_test_interval_hours,
                "proof_test_coverage": sin.proof_test_coverage,
                "partial_test_interval_hours": sin.partial_test_interval_hours,
                "partial_test_coverage": sin.partial_test_coverage,
                "mission_time_hours": sin.mission_time_hours,
            })
        flags.extend(result.caution)
        if result.architectural_sil < sif.target_sil:
            flags.append(f"The architecture allows SIL {result.architectural_sil} "
                         f"({result.sil_limited_by}); the target is SIL {sif.target_sil}.")
        if result.systematic_capability and result.systematic_capability < sif.target_sil:
            flags.append(f"The lowest systematic capability is SC {result.systematic_capability}"
                         f", below the target SIL {sif.target_sil}.")
        if design.target_pfd_avg and result.pfd_avg > design.target_pfd_avg:
            flags.append(f"The design PFDavg {result.pfd_avg:.2e} does not meet the required "
                         f"{design.target_pfd_avg:.2e}.")
        check = eng_hist.planned_schedule_check(planned_groups(design), result.pfd_avg,
                                                tolerance=SCHEDULE_TOLERANCE)
        detail["schedule_check"] = {"model_pfd_avg": check.model_pfd_avg,
                                    "relative_difference": check.relative_difference,
                                    "tolerance": check.tolerance,
                                    "within_tolerance": check.within_tolerance}
        if not check.within_tolerance:
            flags.append("Self-check: " + check.message)

        hist = history_input(d, rates)
        end = as_of
        start_12 = end - dt.timedelta(days=365)
        in_service = min((c.obj.in_service_on for c in d.all_components()),
                         default=sif.in_service_on)
        windows = [(start_12, end)]
        if in_service and _aware(in_service) < end:
            windows.append((_aware(in_service), end))
        results = eng_hist.achieved_pfd_windows(hist, windows, as_of=end)
        observed = eng_obs.observed_windows(hist, windows, as_of=end)
        last12, obs12 = results[0], observed[0]
        a.achieved_pfd_avg = last12.pfd_avg
        a.observed_unavailability = obs12.unavailability
        if len(results) > 1:
            a.achieved_since_service_pfd_avg = results[1].pfd_avg
            a.observed_since_service = observed[1].unavailability
        for entry in detail["subsystems"]:
            entry["achieved_pfd_avg"] = last12.groups.get(entry["name"])
            entry["observed_unavailability"] = obs12.groups.get(entry["name"])
        detail["bypass_hours_12m"] = last12.bypass_hours
        detail["pfd_now"] = last12.pfd_at_end
        detail["observed_unavailable_hours_12m"] = obs12.unavailable_hours
        detail["observed_episodes"] = _episodes_detail(d, observed[-1], obs12)
        detail["rates"] = _rates_detail(d, rates)
        flags.extend(last12.flags)
        projection_missing = None
        if due_on:
            due_at = max(_aware(due_on), end)
            full_t1 = min(s.proof_test_interval_hours for s in design.subsystems)
            proj = eng_hist.projection(history_input(d, rates, assume_closed_after=end), end,
                                       due_at, interval_hours=full_t1)
            a.projected_pfd_avg = proj.pfd_avg
            detail["projection"] = {"next_test_on": due_on.isoformat(),
                                    "horizon_end": proj.window_end.isoformat()}
        else:
            projection_missing = "no full proof test is planned, so nothing is due"
        target = design.target_pfd_avg
        low = sif.demand_mode == choices.DemandMode.LOW
        if low and a.achieved_pfd_avg is not None:
            a.achieved_sil = eng_sil.sil_from_pfd(a.achieved_pfd_avg)
        if low and target and a.achieved_pfd_avg > target:
            flags.append(f"Achieved PFDavg over the last 12 months {a.achieved_pfd_avg:.2e} "
                         f"exceeds the required {target:.2e}" + _reasons(d, last12, start_12))
        if low and target and obs12.unavailability > target:
            flags.append(f"Observed unavailability over the last 12 months "
                         f"{obs12.unavailability:.2e} ({obs12.unavailable_hours:.0f} h) exceeds "
                         f"the required {target:.2e}: failures found show the function could "
                         "not act for part of the time.")
        drivers = _drivers(d, design, result, last12, obs12, rates, start_12)
        for entry in detail["subsystems"]:
            entry["drivers"] = drivers.get(entry["name"], [])
        detail["drivers"] = drivers.get(None, [])
        flags.extend(_field_flags(d, type_stats, as_of))
        verdict = eng_verdict.judge(
            target_sil=sif.target_sil, low_demand=low, target_pfd_avg=target,
            target_pfh_per_hour=design.target_pfh_per_hour, design_pfd_avg=result.pfd_avg,
            design_pfh_per_hour=result.pfh_per_hour, achieved_pfd_avg_12m=a.achieved_pfd_avg,
            observed_unavailability_12m=a.observed_unavailability,
            projected_pfd_avg=a.projected_pfd_avg, projection_missing=projection_missing,
            architectural_sil=result.architectural_sil,
            systematic_capability=result.systematic_capability)
        a.verdict = verdict.as_dict()
        a.meets_target = verdict.meets
        payload = {"design": [vars(s) | {"voting": str(s.voting)} for s in design.subsystems],
                   "events": [(c.obj.pk, [(e.at.isoformat(), e.kind, e.failed)
                                          for e in c.events]) for c in d.all_components()],
                   "bypasses": [(b.started_at, b.ended_at) for b in d.bypasses],
                   "rates": rates.basis, "as_of": as_of}
        a.inputs_digest = _digest(payload)
    except EngineError as exc:
        a.error = str(exc)
        a.verdict = eng_verdict.judge(target_sil=sif.target_sil, error=str(exc)).as_dict()
        a.meets_target = None
        flags.append(f"Could not be calculated: {exc}")
        a.inputs_digest = _digest({"error": str(exc), "sif": sif.pk})
    a.flags = flags
    a.detail = detail
    return a


def _episodes_detail(d: SifData, since: eng_obs.ObservedResult,
                     last12: eng_obs.ObservedResult) -> list[dict]:
    """Observed episodes since in service, with the hours inside the last 12 months."""
    in12 = {(e.group, e.channels, e.found_at): e.hours_in_window for e in last12.episodes}
    out = []
    for e in since.episodes:
        sub = next((s for s in d.subsystems if s.name == e.group), None)
        comps = d.components.get(sub.pk, []) if sub else []
        out.append({
            "subsystem": e.group,
            "components": [comps[i].obj.tag for i in e.channels if i < len(comps)],
            "onset_from": e.onset_from.isoformat(), "onset_to": e.found_at.isoformat(),
            "restored_at": e.restored_at.isoformat(),
            "hours_in_window": in12.get((e.group, e.channels, e.found_at), 0.0),
            "hours": e.hours_in_window, "common_cause": e.common_cause,
            "found_by": {"full": "full test", "partial": "partial test"}.get(e.found_by,
                                                                             e.found_by),
        })
    return out


def _rates_detail(d: SifData, rates: RateTable) -> list[dict]:
    """Each component's design, type and own rate, and whether it is a repeat offender."""
    out = []
    for cd in d.all_components():
        c = cd.obj
        dev = rates.device(c, cd.events)
        out.append({
            "component": c.tag, "component_id": c.pk,
            "device_type": c.device_type.name if c.device_type_id else "",
            "design_per_hour": c.lambda_du, "type_per_hour": rates.type_rate(c),
            "own_per_hour": dev.rate, "used_per_hour": rates.lambda_du(c, cd.events),
            "failures": dev.failures, "hours": dev.hours,
            "repeat_offender": dev.repeat_offender,
            "reason": ("fails significantly more often than its device type: "
                       + dev.excess.reason.replace("the assumed rate is too low",
                                                   "the type's rate does not fit this device")
                       ) if dev.repeat_offender else dev.excess.reason,
        })
    return out


def _drivers(d: SifData, design, result, last12, obs12, rates: RateTable, start_12
             ) -> dict[str | None, list[str]]:
    """What moves the achieved and observed figures away from the design, per subsystem
    (key: its name) and for the whole SIF (key None), in plain words."""
    out: dict[str | None, list[str]] = defaultdict(list)
    end = last12.window_end
    for sub, sin in zip(d.subsystems, design.subsystems):
        lines = out[sub.name]
        comps = d.components.get(sub.pk, [])
        found = [(cd.obj.tag, e) for cd in comps for e in cd.events
                 if e.failed and start_12 <= e.at <= end]
        if found:
            tags = sorted({t for t, _ in found})
            lines.append(f"{len(found)} dangerous undetected failure(s) found in the last 12 "
                         f"months ({', '.join(tags)}): the function was probably failed for "
                         "part of the interval before each finding (observed figure)")
        interval = sin.proof_test_interval_hours
        late = []
        for cd in comps:
            full = [e.at for e in cd.events if e.kind == "full"]
            prev = _aware(cd.obj.in_service_on) if cd.obj.in_service_on else None
            for at in full + [end]:
                if prev is not None and at >= start_12 and (
                        at - prev).total_seconds() / 3600 > interval + 24:
                    late.append(cd.obj.tag)
                    break
                prev = at
        if late:
            lines.append(f"full proof test later than its {interval / HOURS_PER_MONTH:.0f}-month "
                         f"interval in the last 12 months or now overdue ({', '.join(late)}): "
                         "the hidden-failure probability kept growing")
        if sin.proof_test_coverage < 1:
            lines.append(f"{1 - sin.proof_test_coverage:.0%} of λDU is not revealed by the proof "
                         "test and keeps accumulating until replacement or overhaul")
        high = []
        for cd in comps:
            used = rates.lambda_du(cd.obj, cd.events)
            if cd.obj.lambda_du > 0 and used > 1.1 * cd.obj.lambda_du:
                high.append(f"{cd.obj.tag} {used:.2e}/h = {used / cd.obj.lambda_du:.1f}x design")
        if high:
            lines.append("failure rate from field data above the design rate ("
                         + "; ".join(high) + ")")
    if last12.bypass_hours > 0:
        out[None].append(f"{last12.bypass_hours:.0f} h in bypass without equivalent measures "
                         "in the last 12 months (counted as unable to act)")
    for sub in d.subsystems:
        out[None].extend(f"{sub.name}: {x}" for x in out[sub.name])
    return out


def _reasons(d: SifData, res, start) -> str:
    bits = []
    if res.bypass_hours > 0:
        bits.append(f"{res.bypass_hours:.0f} h in bypass without equivalent measures")
    failed = sum(1 for c in d.all_components() for e in c.events if e.failed and e.at >= start)
    if failed:
        bits.append(f"{failed} dangerous failure(s) found in the window")
    return (": " + "; ".join(bits) + ".") if bits else "."


def _field_flags(d: SifData, type_stats, as_of) -> list[str]:
    out = []
    seen = set()
    for c in d.all_components():
        ts = type_stats.get(c.obj.device_type_id)
        if ts and ts.stats.exceeds_assumed and ts.device_type.pk not in seen:
            seen.add(ts.device_type.pk)
            out.append(f"Device type '{ts.device_type.name}': {ts.stats.reason}")
    demand_rate = observed_demand_flag(d, as_of)
    if demand_rate:
        out.append(demand_rate)
    return out


def observed_demand_flag(d: SifData, as_of: dt.datetime) -> str | None:
    """Flag a SIF whose real demands are significantly more frequent than LOPA assumed."""
    if not d.scenarios:
        return None
    assumed = assumed_demand_rate(d.scenarios)
    start = d.sif.in_service_on
    if not start:
        return None
    years = max((as_of.date() - start).days / 365.0, 1 / 365)
    real = [x for x in d.demands if not x.spurious]
    test = eng_field.demand_rate_test(len(real), years, assumed, alpha=SIGNIFICANCE)
    if test.exceeds:
        return (f"Observed demand rate {len(real) / years:.2g}/y ({len(real)} in {years:.1f} y) "
                f"exceeds the LOPA assumption {assumed:.2g}/y ({test.reason}).")
    return None


def recompute_many(sif_queryset, *, trigger: str, as_of: dt.datetime | None = None
                   ) -> list[Assessment]:
    """Recompute and store an assessment for every SIF in the queryset.

    One bad SIF never stops the others: its assessment carries the error instead.
    """
    as_of = as_of or timezone.now()
    loaded = load(sif_queryset)
    if not loaded:
        return []
    site_ids = {d.sif.unit.site_id for d in loaded}
    types = {c.obj.device_type_id for d in loaded for c in d.all_components()}
    stats_by_site = {sid: device_type_stats(sid, as_of.date(), types) for sid in site_ids}
    sites = {d.sif.unit.site_id: d.sif.unit.site for d in loaded}
    rates = {sid: rate_table(sites[sid], stats_by_site[sid], as_of.date()) for sid in site_ids}
    dues = _full_due_dates(sif_queryset, as_of.date())
    out = []
    for d in loaded:
        sid = d.sif.unit.site_id
        try:
            out.append(assess(d, as_of, rates[sid], stats_by_site[sid],
                              due_on=dues.get(d.sif.pk), trigger=trigger))
        except Exception as exc:
            log.exception("assessment of %s failed", d.sif.tag)
            out.append(Assessment(sif=d.sif, computed_at=timezone.now(), as_of=as_of,
                                  trigger=trigger[:40], error=f"{type(exc).__name__}: {exc}",
                                  flags=[f"Could not be calculated: {exc}"],
                                  inputs_digest=_digest({"error": str(exc)})))
    previous = latest_assessments([a.sif_id for a in out])
    Assessment.objects.bulk_create(out, batch_size=500)
    from register.scan import notify_verdict_changes

    notify_verdict_changes([(previous.get(a.sif_id), a) for a in out])
    return out


def _full_due_dates(sif_queryset, as_of: dt.date) -> dict[int, dt.date]:
    from register.scheduling import compute_statuses

    plans = TestPlan.objects.filter(sif__in=sif_queryset.values("pk"),
                                    kind=choices.TestKind.FULL)
    statuses = compute_statuses(plans, as_of)
    sif_of = dict(plans.values_list("pk", "sif_id"))
    out: dict[int, dt.date] = {}
    for plan_id, st in statuses.items():
        if st.due_on:
            sif_id = sif_of[plan_id]
            out[sif_id] = min(out.get(sif_id, st.due_on), st.due_on)
    return out


def latest_assessments(sif_ids) -> dict[int, Assessment]:
    """Newest assessment per SIF, in one query."""
    from django.db.models import OuterRef, Subquery

    newest = Assessment.objects.filter(sif_id=OuterRef("sif_id")).order_by(
        "-computed_at", "-id").values("id")[:1]
    rows = Assessment.objects.filter(sif_id__in=sif_ids, id=Subquery(newest))
    return {a.sif_id: a for a in rows}


def pfd_series_for(sif: SafetyFunction, start: dt.datetime, end: dt.datetime, points=600):
    """PFD(t) of one SIF between two dates, for charts."""
    d = load(SafetyFunction.objects.filter(pk=sif.pk))[0]
    stats = device_type_stats(sif.unit.site_id, end.date())
    hist = history_input(d, rate_table(sif.unit.site, stats, end.date()))
    return eng_hist.pfd_series(hist, start, end, points, as_of=end)


def deferral_projection(plan: TestPlan, proposed_on: dt.date, as_of: dt.datetime | None = None):
    """Projected PFDavg with the next full test on its due date vs on ``proposed_on``."""
    from register.scheduling import status_of

    as_of = as_of or timezone.now()
    d = load(SafetyFunction.objects.filter(pk=plan.sif_id))[0]
    stats = device_type_stats(plan.sif.unit.site_id, as_of.date())
    hist = history_input(d, rate_table(plan.sif.unit.site, stats, as_of.date()),
                         assume_closed_after=as_of)
    due = status_of(plan, as_of.date()).due_on
    due_at = max(_aware(due), as_of)
    proposed_at = max(_aware(proposed_on), as_of)
    horizon = proposed_at + dt.timedelta(hours=plan.interval_hours)
    cmp = eng_hist.compare_deferral(hist, as_of, due_at, proposed_at, horizon,
                                    interval_hours=plan.interval_hours)
    return cmp, target_pfd(d)
