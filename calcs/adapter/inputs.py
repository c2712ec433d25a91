"""Turning loaded rows into the engine's inputs: LOPA scenarios, the design, the history."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field

from calcs.adapter.loading import (
    SifData,
    TestRow,
)
from calcs.engine import design as eng_design
from calcs.engine import field_data as eng_field
from calcs.engine import history as eng_hist
from calcs.engine import lopa as eng_lopa
from calcs.engine import sil as eng_sil
from calcs.engine.errors import EngineError
from calcs.engine.units import HOURS_PER_MONTH, HOURS_PER_YEAR
from register import choices
from register.models import (
    Component,
    HazardScenario,
    Subsystem,
)

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


def plan_coverages(d: SifData, comp_ids: set[int]) -> tuple[float, float]:
    """(full, partial) coverage the plans covering these components claim now: the least
    of each kind (1.0 where no plan of that kind covers them). The design figure and the
    projected tests use the lesser of this and the devices' own coverage, as each recorded
    test does with the plan version in force on its day (:func:`event_coverage`)."""
    full, partial = [1.0], [1.0]
    for plan in d.plans:
        covered = d.plan_components.get(plan.pk) or None
        if covered is not None and not (covered & comp_ids):
            continue
        (partial if plan.kind == choices.TestKind.PARTIAL else full).append(plan.coverage)
    return min(full), min(partial)


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
        """The component's own rate: a function of its type's rate, its failures and its
        hours in service, computed once for each such triple (components installed
        together share it)."""
        failures = sum(1 for e in events if e.failed)
        hours = 0.0
        if self.as_of is not None and comp.in_service_on:
            hours = max(0.0, (self.as_of - comp.in_service_on).days * 24.0)
        base = self.type_rate(comp)
        if base <= 0:
            base = 1e-12  # a rate of zero cannot serve as a prior; effectively zero
        key = (base, failures, hours)
        found = self._devices.get(key)
        if found is None:
            found = self._devices[key] = eng_field.device_rate(base, failures, hours)
        return found


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
        full_cov, partial_cov = plan_coverages(d, {c.pk for c in comps})
        ptc = min(min(c.proof_test_coverage for c in comps), full_cov)
        theta = min(min(c.partial_test_coverage for c in comps), partial_cov, ptc)
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


def event_coverage(c, e: TestRow) -> float | None:
    """The share of a device's dangerous undetected failures one recorded event reveals
    (None: the device's own coverage for that kind of test).

    A test reveals no more than the device allows for that kind of test (its proof-test
    or partial-test coverage) and no more than the procedure of the plan version in force
    on the day claims (common practice, no source): the lesser of the two. A credited
    demand exercises the device like a full test; otherwise it reveals only the failure
    it found."""
    if e.kind == "demand":
        return c.proof_test_coverage if e.credited else 0.0
    if e.plan_coverage is None:
        return None
    own = c.proof_test_coverage if e.kind == "full" else (c.partial_test_coverage or 0.0)
    return min(own, e.plan_coverage)


def history_input(d: SifData, rates: RateTable, *, assume_closed_after: dt.datetime | None = None
                  ) -> eng_hist.SifHistory:
    """The SIF's recorded life as the history model sees it.

    A bypass of the whole SIF makes it unavailable; a bypass of one device makes that
    channel unavailable, so its group runs on the others (a 1oo1 group: the SIF is
    unavailable). A bypass whose compensating measures are recorded as effective adds
    nothing. With ``assume_closed_after`` (for projections), a bypass still open is assumed
    to end at its authorised end, or at that moment if it is already past it.
    """

    def periods(component_id):
        out = []
        for b in d.bypasses:
            if b.measures_effective or b.component_id != component_id:
                continue
            end = b.ended_at
            if end is None and assume_closed_after is not None:
                end = max(b.started_at + dt.timedelta(hours=b.authorised_hours),
                          assume_closed_after)
            out.append((b.started_at, end))
        return tuple(out)

    groups = []
    for sub in d.subsystems:
        channels = []
        for cd in d.components.get(sub.pk, []):
            c = cd.obj
            full_cov, partial_cov = plan_coverages(d, {c.pk})
            ptc = min(c.proof_test_coverage, full_cov)
            channels.append(eng_hist.Channel(
                lambda_du=rates.lambda_du(c, cd.events), lambda_dd=c.lambda_dd,
                mttr_hours=sub.mttr_hours, mrt_hours=sub.mrt_hours, proof_test_coverage=ptc,
                partial_test_coverage=min(c.partial_test_coverage, partial_cov, ptc),
                in_service=_aware(c.in_service_on),
                bypasses=periods(c.pk),
                tests=tuple(eng_hist.TestEvent(at=e.at, kind=e.kind, failed=e.failed,
                                               coverage=event_coverage(c, e))
                            for e in cd.events),
            ))
        groups.append(eng_hist.Group(name=sub.name, voting=sub.voting, beta=sub.beta,
                                     beta_d=sub.beta_d, channels=tuple(channels)))
    return eng_hist.SifHistory(groups=tuple(groups), bypasses=periods(None), name=d.sif.tag)


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


