"""Assessments: run the engine on loaded SIFs, store the result and its verdict, and the
figures pages ask for (PFD(t) series, deferral projections)."""

from __future__ import annotations

import datetime as dt
import functools
import hashlib
import json
from collections import defaultdict

from django.db import transaction
from django.utils import timezone

from calcs.adapter.field_stats import (
    device_type_stats,
    rate_table,
)
from calcs.adapter.inputs import (
    RateTable,
    _aware,
    assumed_demand_rate,
    design_input,
    history_input,
    planned_groups,
    target_pfd,
)
from calcs.adapter.loading import (
    SCHEDULE_TOLERANCE,
    SIGNIFICANCE,
    SifData,
    load,
    log,
)
from calcs.engine import design as eng_design
from calcs.engine import field_data as eng_field
from calcs.engine import history as eng_hist
from calcs.engine import observed as eng_obs
from calcs.engine import sil as eng_sil
from calcs.engine import verdict as eng_verdict
from calcs.engine.errors import EngineError
from calcs.engine.units import HOURS_PER_MONTH
from calcs.models import Assessment
from register import choices
from register.models import (
    SafetyFunction,
    TestPlan,
)

# ---------------------------------------------------------------------------------------
# Assessment
# ---------------------------------------------------------------------------------------


def _digest(payload) -> str:
    return hashlib.sha256(json.dumps(payload, sort_keys=True, default=str).encode()).hexdigest()


#: A recompute with unchanged inputs and verdict replaces the newest snapshot until that
#: snapshot is this old; then a new one is stored (a point of the trend).
HEARTBEAT = dt.timedelta(days=7)

#: SIFs a recompute evaluates in one batch of the engine (memory grows with it; the
#: results do not depend on it).
CHUNK = 250


@functools.cache
def _attnames(model, skip: frozenset) -> tuple[str, ...]:
    return tuple(f.attname for f in model._meta.concrete_fields if f.attname not in skip)


def _row(obj, skip: frozenset = frozenset()) -> tuple:
    return tuple(map(obj.__dict__.get, _attnames(type(obj), skip)))


@functools.lru_cache(maxsize=4096)
def _schedule_check(groups: tuple, design_pfd_avg: float):
    """The self-check depends on the design inputs only: SIFs built alike share it."""
    return eng_hist.planned_schedule_check(list(groups), design_pfd_avg,
                                           tolerance=SCHEDULE_TOLERANCE)


def inputs_digest(d: SifData, rates: RateTable, type_stats, due_on: dt.date | None) -> str:
    """SHA-256 of everything an assessment is computed from except the evaluation date:
    the SIF's rows (design, plans, scenarios, bypasses, demands, site settings), its test
    events, the failure counts behind the field statistics of its device types, and the
    next full test. Hours in service (and so field rates) follow from these and the date,
    so the digest stays the same from one day to the next while nothing is recorded."""
    plan_skip = frozenset(TestPlan.DERIVED_FIELDS)
    comps = d.all_components()
    payload = {
        "sif": _row(d.sif), "site": _row(d.sif.unit.site),
        "subsystems": [_row(s) for s in d.subsystems],
        "components": [(_row(c.obj), _row(c.obj.device_type) if c.obj.device_type_id else None,
                        [(e.at, e.kind, e.failed, e.record_id, e.credited) for e in c.events])
                       for c in comps],
        "plans": [(_row(p, plan_skip), sorted(d.plan_components.get(p.pk, ())))
                  for p in d.plans],
        "scenarios": [(_row(sc), [_row(x) for x in sc.loaded_causes],
                       [_row(x) for x in sc.loaded_layers],
                       [_row(x) for x in sc.loaded_modifiers]) for sc in d.scenarios],
        "bypasses": [_row(b) for b in d.bypasses], "demands": [_row(x) for x in d.demands],
        "stats": sorted((k, v.stats.components, v.stats.failures, v.stats.assumed_rate,
                         v.stats.confidence, v.stats.exceeds_assumed)
                        for k, v in type_stats.items()
                        if k in {c.obj.device_type_id for c in comps}),
        "rates": rates.basis, "due_on": due_on,
    }
    return _digest(payload)


def assess(d: SifData, as_of: dt.datetime, rates: RateTable, type_stats, *,
           due_on: dt.date | None = None, trigger: str = "",
           digest: str | None = None) -> Assessment:
    """Run design, achieved and projected calculations for one SIF. Never raises for bad
    records: problems become flags, and an engine error is kept on the assessment."""
    return assess_many([(d, rates, type_stats, due_on, digest)], as_of, trigger=trigger)[0]


def assess_many(jobs, as_of: dt.datetime, *, trigger: str = "") -> list[Assessment]:
    """:func:`assess` for each (SifData, rates, type_stats, due_on, digest) job, the
    history model of all of them evaluated together (one batch of the engine). A job that
    raises something other than an engine error raises here (after none is stored)."""
    started = [_begin(d, as_of, rates, stats, due_on, trigger, digest)
               for d, rates, stats, due_on, digest in jobs]
    return [st.finish(res) for st, res in zip(started, _evaluate(started))]


def _evaluate(started: list[_Started]) -> list:
    """The results of each started assessment's requests, all evaluated in one batch."""
    requests = [r for st in started if st.requests for r in st.requests]
    results = iter(eng_hist.evaluate_requests(requests))
    return [[next(results) for _ in st.requests] if st.requests else None for st in started]


class _Started:
    """One SIF's assessment up to the history model's averages (:func:`_begin`); ``finish``
    completes it with the results of its requests (windows, then the projection)."""

    def __init__(self, a, flags, detail, requests=None, finish=None, digest=None):
        self.a, self.flags, self.detail, self.requests = a, flags, detail, requests
        self._finish, self._digest = finish, digest

    def finish(self, results) -> Assessment:
        if self._finish is not None:
            try:
                self._finish(results)
            except EngineError as exc:
                _failed(self.a, self.flags, exc, self._digest)
        self.a.flags = self.flags
        self.a.detail = self.detail
        return self.a


def _failed(a: Assessment, flags: list[str], exc: EngineError, digest: str | None) -> None:
    a.error = str(exc)
    a.verdict = eng_verdict.judge(target_sil=a.sif.target_sil, error=str(exc)).as_dict()
    a.meets_target = None
    flags.append(f"Could not be calculated: {exc}")
    a.inputs_digest = digest or _digest({"error": str(exc), "sif": a.sif.pk})


def _begin(d: SifData, as_of: dt.datetime, rates: RateTable, type_stats,
           due_on: dt.date | None, trigger: str, digest: str | None) -> _Started:
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
        check = _schedule_check(tuple(planned_groups(design)), result.pfd_avg)
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
        prepared = eng_hist.prepare(hist, end)  # once: every window and the projection
        requests = [prepared.windows_request(windows)]
        observed = eng_obs.observed_windows(hist, windows, as_of=end, prepared=prepared)
        projection_error = None
        if due_on:
            try:
                due_at = max(_aware(due_on), end)
                full_t1 = min(s.proof_test_interval_hours for s in design.subsystems)
                if any(b.ended_at is None for b in d.bypasses):
                    prepared = eng_hist.prepare(
                        history_input(d, rates, assume_closed_after=end), end)
                requests.append(prepared.projection_request(due_at, interval_hours=full_t1))
            except EngineError as exc:  # raised where the projection's figures are used
                projection_error = exc
    except EngineError as exc:
        _failed(a, flags, exc, digest)
        return _Started(a, flags, detail)

    def finish(evaluated):
        results = evaluated[0]
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
            if projection_error is not None:
                raise projection_error
            proj = evaluated[1][0]
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
        a.inputs_digest = digest or inputs_digest(d, rates, type_stats, due_on)

    return _Started(a, flags, detail, requests, finish, digest)


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


def recompute_many(sif_queryset, *, trigger: str, as_of: dt.datetime | None = None,
                   chunk: int = CHUNK) -> list[Assessment]:
    """Recompute every SIF in the queryset and store what changed; return the newest
    assessment of each.

    A SIF whose inputs digest and evaluation day equal its newest assessment's is not
    recomputed (that assessment is returned). Otherwise a new snapshot is stored when the
    inputs or the verdict changed or the newest is older than ``HEARTBEAT``; else the
    newest is replaced (see ``_store``). One bad SIF never stops the others: its assessment
    carries the error instead. The engine evaluates ``chunk`` SIFs at a time in one batch.
    """
    as_of = as_of or timezone.now()
    chunk = max(1, int(chunk))
    loaded = load(sif_queryset)
    if not loaded:
        return []
    site_ids = {d.sif.unit.site_id for d in loaded}
    types = {c.obj.device_type_id for d in loaded for c in d.all_components()}
    stats_by_site = {sid: device_type_stats(sid, as_of.date(), types) for sid in site_ids}
    sites = {d.sif.unit.site_id: d.sif.unit.site for d in loaded}
    rates = {sid: rate_table(sites[sid], stats_by_site[sid], as_of.date()) for sid in site_ids}
    dues = _full_due_dates(sif_queryset, as_of.date(),
                           {p.pk: d.sif.pk for d in loaded for p in d.plans})
    previous = latest_assessments([d.sif.pk for d in loaded])
    out: list = []
    fresh: list[Assessment] = []
    for lo in range(0, len(loaded), chunk):
        started: list[tuple[int, SifData, _Started | Exception]] = []
        for d in loaded[lo:lo + chunk]:
            sid, prev = d.sif.unit.site_id, previous.get(d.sif.pk)
            try:
                digest = inputs_digest(d, rates[sid], stats_by_site[sid], dues.get(d.sif.pk))
            except Exception:
                digest = None
            if prev is not None and digest and prev.inputs_digest == digest and (
                    prev.as_of.date() == as_of.date()):
                out.append(prev)
                continue
            try:
                st = _begin(d, as_of, rates[sid], stats_by_site[sid], dues.get(d.sif.pk),
                            trigger, digest)
            except Exception as exc:
                st = exc
            started.append((len(out), d, st))
            out.append(None)
        ok = [st for _, _, st in started if isinstance(st, _Started)]
        try:
            evaluated = dict(zip(map(id, ok), _evaluate(ok)))
        except Exception:  # one SIF fails the batch: each on its own, to find it
            evaluated = {}
            for st in ok:
                try:
                    evaluated[id(st)] = _evaluate([st])[0]
                except Exception as exc:
                    evaluated[id(st)] = exc
        for k, d, st in started:
            try:
                res = evaluated.get(id(st)) if isinstance(st, _Started) else st
                if isinstance(res, Exception):
                    raise res
                a = st.finish(res)
            except Exception as exc:
                log.exception("assessment of %s failed", d.sif.tag)
                a = Assessment(sif=d.sif, computed_at=timezone.now(), as_of=as_of,
                               trigger=trigger[:40], error=f"{type(exc).__name__}: {exc}",
                               flags=[f"Could not be calculated: {exc}"],
                               inputs_digest=_digest({"error": str(exc)}))
            out[k] = a
            fresh.append(a)
    _store(fresh, previous)
    from register.inbox.notices import notify_verdict_changes

    notify_verdict_changes([(previous.get(a.sif_id), a) for a in fresh])
    return out


def _outcome(a: Assessment) -> tuple:
    lines = (a.verdict or {}).get("lines", [])
    return (a.meets_target, bool(a.error),
            tuple((x.get("key"), x.get("status")) for x in lines if isinstance(x, dict)))


def _store(fresh: list[Assessment], previous: dict[int, Assessment]) -> None:
    """One transaction: each fresh result becomes its SIF's newest snapshot. Where only
    the date moved (same inputs, same verdict, newest younger than ``HEARTBEAT``) it
    replaces the newest and keeps its ``computed_at`` (when that snapshot was first
    stored, the heartbeat's clock); otherwise the newest steps back into the history. The
    SIF rows are locked so two recomputes of one SIF queue up."""
    if not fresh:
        return
    replaced = []
    for a in fresh:
        prev = previous.get(a.sif_id)
        if (prev is not None and prev.inputs_digest == a.inputs_digest
                and _outcome(prev) == _outcome(a) and a.as_of - prev.computed_at < HEARTBEAT
                and a.as_of >= prev.as_of):
            a.computed_at = prev.computed_at
            replaced.append(prev.pk)
        a.latest = True
    with transaction.atomic():
        ids = sorted({a.sif_id for a in fresh})
        list(SafetyFunction.objects.filter(pk__in=ids).order_by("pk")
             .select_for_update(of=("self",)).values_list("pk", flat=True))
        if replaced:
            Assessment.objects.filter(pk__in=replaced).delete()
        Assessment.objects.filter(sif_id__in=ids, latest=True).update(latest=False)
        _insert(fresh)


def _insert(fresh: list[Assessment]) -> None:
    """Write the fresh snapshots: one COPY on PostgreSQL (each value adapted by its field,
    as an INSERT would), then one read of their ids; a bulk insert elsewhere."""
    conn = transaction.get_connection()
    if conn.vendor != "postgresql":
        Assessment.objects.bulk_create(fresh, batch_size=500)
        return
    fields = [f for f in Assessment._meta.concrete_fields if not f.primary_key]
    table = conn.ops.quote_name(Assessment._meta.db_table)
    columns = ", ".join(conn.ops.quote_name(f.column) for f in fields)
    with conn.cursor() as cur:
        with cur.cursor.copy(f"COPY {table} ({columns}) FROM STDIN") as copy:
            for a in fresh:
                copy.write_row([f.get_db_prep_save(f.pre_save(a, True), conn) for f in fields])
        cur.execute(f"SELECT id, sif_id FROM {table} WHERE latest AND sif_id = ANY(%s)",
                    [[a.sif_id for a in fresh]])
        ids = {sif_id: pk for pk, sif_id in cur.fetchall()}
    for a in fresh:
        a.pk = ids[a.sif_id]
        a._state.adding, a._state.db = False, conn.alias


def _full_due_dates(sif_queryset, as_of: dt.date,
                    sif_of: dict[int, int] | None = None) -> dict[int, dt.date]:
    """The earliest due date of each SIF's full proof test plans; ``sif_of`` (plan id to
    SIF id, from the loaded plans) saves reading it again. The set-based door to the rule
    (``current_statuses``: one query of values for plans with one version and no
    deferral, the whole rule for the others)."""
    from register.schedule.due import current_statuses

    plans = TestPlan.objects.filter(sif__in=sif_queryset.values("pk"),
                                    kind=choices.TestKind.FULL)
    statuses = current_statuses(plans, as_of, many=len(sif_of or ()) > 200)
    if sif_of is None or not statuses.keys() <= sif_of.keys():
        sif_of = dict(plans.values_list("pk", "sif_id"))
    out: dict[int, dt.date] = {}
    for plan_id, st in statuses.items():
        if st.due_on:
            sif_id = sif_of[plan_id]
            out[sif_id] = min(out.get(sif_id, st.due_on), st.due_on)
    return out


def latest_assessments(sif_ids) -> dict[int, Assessment]:
    """Newest assessment per SIF, in one query (the partial unique index on ``latest``)."""
    return {a.sif_id: a for a in Assessment.objects.latest_of(sif_ids)}


def pfd_series_for(sif: SafetyFunction, start: dt.datetime, end: dt.datetime, points=600):
    """PFD(t) of one SIF between two dates, for charts."""
    d = load(SafetyFunction.objects.filter(pk=sif.pk))[0]
    stats = device_type_stats(sif.unit.site_id, end.date())
    hist = history_input(d, rate_table(sif.unit.site, stats, end.date()))
    return eng_hist.pfd_series(hist, start, end, points, as_of=end)


def deferral_projection(plan: TestPlan, proposed_on: dt.date, as_of: dt.datetime | None = None):
    """Projected PFDavg of the SIF with the next full test at the baseline vs on
    ``proposed_on``, both over the same window: from ``as_of`` to one plan interval after
    the proposed date, every later test at the plan interval.

    The baseline is the plan's due date while it is still ahead. Once the test is due or
    overdue the baseline is testing now (``as_of``), never a due date in the past: what is
    left to choose is testing today or on the proposed date. Returns ``(comparison,
    target)``; ``comparison.on_due_date`` is the baseline, ``comparison.deferred`` the test
    on the proposed date. A plan with no due date, a proposed date not after today (the
    site's calendar) or one too far ahead for the calendar raises ``InputError`` (an
    engine error and a ValueError, so every caller's existing handling shows it).
    """
    from calcs.engine.errors import InputError
    from register.days import local_date
    from register.schedule.due import status_of

    as_of = as_of or timezone.now()
    today = local_date(as_of, plan.sif.unit.site)
    due = status_of(plan, today).due_on
    if due is None:
        raise InputError("due_on", "the plan has no due date, so there is nothing to defer")
    if proposed_on <= today:
        raise InputError("proposed_on", f"the proposed date {proposed_on:%Y-%m-%d} is not "
                                        f"after today ({today:%Y-%m-%d})")
    try:
        proposed_at = max(_aware(proposed_on), as_of)
        horizon = proposed_at + dt.timedelta(hours=plan.interval_hours)
    except OverflowError:
        raise InputError("proposed_on", f"the proposed date {proposed_on:%Y-%m-%d} is too "
                                        "far ahead to project") from None
    baseline_at = as_of if due <= today else max(_aware(due), as_of)
    d = load(SafetyFunction.objects.filter(pk=plan.sif_id))[0]
    stats = device_type_stats(plan.sif.unit.site_id, today)
    hist = history_input(d, rate_table(plan.sif.unit.site, stats, today),
                         assume_closed_after=as_of)
    cmp = eng_hist.compare_deferral(hist, as_of, baseline_at, proposed_at, horizon,
                                    interval_hours=plan.interval_hours)
    return cmp, target_pfd(d)
