"""Collecting the facts of an evidence pack in bulk: a fixed number of queries for the
whole scope, plus a few for the overdue periods."""

from __future__ import annotations

import datetime as dt
from collections import defaultdict
from dataclasses import dataclass, field
from pathlib import Path

from django.conf import settings
from django.db.models import Q
from django.utils import timezone

from register import choices, presenters
from register.calculations import calculations
from register.changes import field_changes, row_of
from register.days import end_of_day, start_of_day
from register.models import (
    Attachment,
    Bypass,
    Component,
    ComponentResult,
    ConditionalModifier,
    Deferral,
    Demand,
    EvidencePack,
    Finding,
    HazardScenario,
    InitiatingCause,
    ProtectionLayer,
    SafetyFunction,
    Subsystem,
    TestPlan,
    TestRecord,
    TestStep,
)
from register.operations import services as findings_rules
from register.people import person_name
from register.schedule.due import plan_timelines

DESIGN_FORMULA = ("IEC 61508-6 Annex B simplified equations (PFDavg per subsystem by voting, "
                  "with common cause β/βD, MTTR, MRT, proof-test interval T1 and coverage; "
                  "subsystems in series add)")
ACHIEVED_FORMULA = ("Time-dependent model: PFD(t) rebuilt from the recorded tests, demands, "
                    "failures found and bypasses of each channel, averaged over the window "
                    "(site rate basis applied)")
OBSERVED_METHOD = ("Observed unavailability: share of the time the function could not act, "
                   "estimated from the failures actually found (each with an unknown onset "
                   "after the last test that would have revealed it, counted as failed from "
                   "that onset, weighted by probability, until restored) and from bypass "
                   "time")
CHART_POINTS = 240
OVERDUE_STATES = {choices.PlanState.OVERDUE, choices.PlanState.ESCALATED,
                  choices.PlanState.ESCALATED_2}

CSV_FILES = ("sifs", "criteria", "tests", "failures", "demands", "bypasses", "deferrals",
             "overdue", "changes", "findings")


def packs_dir() -> Path:
    path = Path(settings.VAR_DIR) / "evidence"
    path.mkdir(parents=True, exist_ok=True)
    return path


def _utc(day: dt.date, end=False) -> dt.datetime:
    return end_of_day(day) if end else start_of_day(day)


def _iso(value) -> str | None:
    if value is None:
        return None
    if isinstance(value, dt.datetime):
        return value.astimezone(dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
    return value.isoformat()


def _g(value, fmt=".2e") -> str:
    if value is None or value == "":
        return "-"
    if isinstance(value, float):
        return format(value, fmt)
    return str(value)


def as_of(pack: EvidencePack) -> dt.datetime:
    """The moment a pack's facts are taken at: when its build started (every section of
    it, whenever it runs, reads the same moment)."""
    return pack.started_at or timezone.now()


def scope_queryset(pack: EvidencePack):
    qs = SafetyFunction.objects.filter(unit__site_id=pack.site_id)
    if pack.scope == EvidencePack.Scope.UNIT:
        qs = qs.filter(unit_id=pack.unit_id)
    elif pack.scope == EvidencePack.Scope.SIF:
        qs = qs.filter(pk=pack.sif_id)
    return qs.order_by("tag")


# ---------------------------------------------------------------------------------------
# Collecting the facts (bulk)
# ---------------------------------------------------------------------------------------


@dataclass
class Collected:
    sifs: list[dict] = field(default_factory=list)
    tables: dict[str, list[dict]] = field(default_factory=lambda: defaultdict(list))
    loaded: dict[int, calculations().SifData] = field(default_factory=dict)


def collect(pack: EvidencePack, progress=None, sif_ids=None) -> Collected:
    """The facts of ``pack`` (of its SIFs ``sif_ids`` only, when given: one section)."""
    start, end = pack.period_start, pack.period_end
    t0, t1 = _utc(start), _utc(end, end=True)
    qs = scope_queryset(pack)
    if sif_ids is not None:
        qs = qs.filter(pk__in=list(sif_ids))
    out = Collected()
    loaded = calculations().load(qs)
    out.loaded = {d.sif.pk: d for d in loaded}
    ids = list(out.loaded)
    assessments = calculations().latest_assessments(ids)
    comp_by_id = {c.obj.pk: c.obj for d in loaded for c in d.all_components()}
    sub_by_id = {s.pk: s for d in loaded for s in d.subsystems}

    per_sif: dict[int, dict] = {}
    for d in loaded:
        s = d.sif
        entry = {
            "id": s.pk, "tag": s.tag, "name": s.name, "unit": f"{s.unit.code} {s.unit.name}",
            "safe_state": s.safe_state, "demand_mode": s.get_demand_mode_display(),
            "life_stage": s.get_life_stage_display(), "in_service_on": _iso(s.in_service_on),
            "target_sil": s.target_sil, "target_pfd_avg_set": s.target_pfd_avg,
            "target_pfh_per_hour": s.target_pfh_per_hour,
            "lopa": [], "subsystems": [], "components": [], "plans": [],
            "assessment": None, "period_achieved_pfd_avg": None,
            "tests": [], "failures": [], "demands": [], "bypasses": [], "deferrals": [],
            "overdue": [], "changes": [], "findings": [],
        }
        if d.scenarios:
            try:
                res = calculations().lopa_for_scenarios(d.scenarios)
                for i, sc in enumerate(res.scenarios):
                    entry["lopa"].append({
                        "scenario": sc.name, "governing": i == res.governing,
                        "required_pfd_avg": sc.required_pfd_avg,
                        "required_rrf": sc.required_rrf, "required_sil": sc.required_sil,
                        "outcome": sc.outcome_text,
                        "steps": [{"step": text, "value": value} for text, value in sc.steps],
                    })
            except calculations().EngineError as exc:
                entry["lopa_error"] = str(exc)
        try:
            entry["target_pfd_avg"] = calculations().target_pfd(d)
        except calculations().EngineError:
            entry["target_pfd_avg"] = s.target_pfd_avg
        for sub in d.subsystems:
            entry["subsystems"].append({
                "id": sub.pk, "role": sub.get_role_display(), "name": sub.name,
                "voting": sub.voting, "beta": sub.beta, "beta_d": sub.beta_d,
                "mttr_hours": sub.mttr_hours, "mrt_hours": sub.mrt_hours})
            for cd in d.components.get(sub.pk, []):
                c = cd.obj
                entry["components"].append({
                    "id": c.pk, "tag": c.tag, "subsystem": sub.name,
                    "device_type": c.device_type.name, "lambda_du_per_hour": c.lambda_du,
                    "lambda_dd_per_hour": c.lambda_dd, "lambda_s_per_hour": c.lambda_s,
                    "rates_from": "component" if c.lambda_du_per_hour is not None
                    else "device type",
                    "data_basis": c.get_data_basis_display(), "source": c.device_type.source,
                    "type": c.effective_class, "sc": c.effective_sc,
                    "proof_test_coverage": c.proof_test_coverage,
                    "in_service_on": _iso(c.in_service_on)})
        for plan in d.plans:
            entry["plans"].append({"id": plan.pk, "name": plan.name, "kind": plan.kind,
                                   "interval_months": plan.interval_months,
                                   "coverage": plan.coverage})
        a = assessments.get(s.pk)
        if a is not None:
            entry["assessment"] = {
                "computed_at": _iso(a.computed_at), "as_of": _iso(a.as_of),
                "trigger": a.trigger, "target_pfd_avg": a.target_pfd_avg,
                "design_pfd_avg": a.design_pfd_avg, "design_pfh_per_hour": a.design_pfh_per_hour,
                "achieved_pfd_avg_12m": a.achieved_pfd_avg,
                "achieved_since_service_pfd_avg": a.achieved_since_service_pfd_avg,
                "projected_pfd_avg": a.projected_pfd_avg, "achieved_sil": a.achieved_sil,
                "architectural_sil": a.architectural_sil, "systematic_sil": a.systematic_sil,
                "observed_unavailability_12m": a.observed_unavailability,
                "observed_since_service": a.observed_since_service,
                "meets_target": a.meets_target,
                "verdict_label": presenters.verdict_badge(a.meets_target).label,
                "verdict_summary": presenters.verdict_summary(a),
                "verdict": a.verdict or {},
                "rate_basis": a.rate_basis,
                "rate_basis_label": presenters.rate_basis_label(a.rate_basis),
                "flags": a.flags, "detail": a.detail, "inputs_digest": a.inputs_digest,
                "error": a.error, "design_formula": DESIGN_FORMULA,
                "achieved_formula": ACHIEVED_FORMULA, "observed_method": OBSERVED_METHOD}
        per_sif[s.pk] = entry
        out.sifs.append(entry)
    if progress:
        progress(12, "Register data loaded")

    # Tests in the period, with their component results.
    records = list(TestRecord.objects.filter(sif_id__in=ids, performed_at__range=(t0, t1))
                   .exclude(status=choices.RecordStatus.DRAFT)
                   .select_related("performed_by", "verified_by", "superseded_by")
                   .order_by("performed_at", "id"))
    results = defaultdict(list)
    for r in ComponentResult.objects.filter(record__in=[x.pk for x in records]).order_by(
            "record_id", "component__tag"):
        results[r.record_id].append(r)
    files = defaultdict(list)
    for att in Attachment.objects.filter(record__in=[x.pk for x in records]).select_related(
            "uploaded_by").order_by("record_id", "id"):
        files[att.record_id].append({
            "name": att.original_name, "content_type": att.content_type,
            "size_bytes": att.size_bytes, "sha256": att.sha256,
            "uploaded_by": person_name(att.uploaded_by), "uploaded_at": _iso(att.uploaded_at)})
    for rec in records:
        entry = per_sif[rec.sif_id]
        res = results.get(rec.pk, [])
        superseded = getattr(rec, "superseded_by", None)
        entry["tests"].append({
            "id": rec.pk, "performed_at": _iso(rec.performed_at), "kind": rec.get_kind_display(),
            "performer": rec.performed_by_name or person_name(rec.performed_by),
            "verifier": rec.verified_by_name or person_name(rec.verified_by),
            "status": rec.get_status_display(), "signed_at": _iso(rec.signed_at),
            "verified_at": _iso(rec.verified_at),
            "supersedes": rec.supersedes_id, "superseded_by": superseded.pk if superseded else None,
            "correction_reason": rec.correction_reason, "remarks": rec.remarks,
            "results": [{"component": comp_by_id[r.component_id].tag
                         if r.component_id in comp_by_id else str(r.component_id),
                         "as_found": r.as_found, "as_left": r.as_left} for r in res],
            "attachments": files.get(rec.pk, []),
        })
        for r in res:
            if r.as_found == choices.Verdict.FAIL or r.failure_mode:
                entry["failures"].append({
                    "found_on": _iso(rec.performed_at), "source": f"test #{rec.pk} "
                    f"({rec.get_kind_display()})",
                    "component": comp_by_id[r.component_id].tag
                    if r.component_id in comp_by_id else str(r.component_id),
                    "failure_mode": r.get_failure_mode_display() or "-",
                    "description": r.failure_description, "as_found": r.as_found,
                    "as_left": r.as_left, "work_done": r.work_done,
                    "closed": r.as_left == choices.Verdict.PASS})

    # Demands.
    failed_on = defaultdict(list)
    for demand_id, comp_id in Demand.failed_components.through.objects.filter(
            demand__sif_id__in=ids, demand__occurred_at__range=(t0, t1)).values_list(
            "demand_id", "component_id"):
        failed_on[demand_id].append(comp_id)
    for dm in Demand.objects.filter(sif_id__in=ids, occurred_at__range=(t0, t1)).select_related(
            "recorded_by").order_by("occurred_at"):
        entry = per_sif[dm.sif_id]
        failed = [comp_by_id[c].tag if c in comp_by_id else str(c) for c in failed_on[dm.pk]]
        entry["demands"].append({
            "occurred_at": _iso(dm.occurred_at), "successful": dm.successful,
            "spurious": dm.spurious, "description": dm.description,
            "failed_components": failed, "recorded_by": person_name(dm.recorded_by)})
        for tag in failed:
            entry["failures"].append({
                "found_on": _iso(dm.occurred_at), "source": "real demand", "component": tag,
                "failure_mode": "Failed on demand", "description": dm.description,
                "as_found": "fail", "as_left": "", "work_done": "", "closed": None})

    # Bypasses overlapping the period.
    now = as_of(pack)
    for b in Bypass.objects.filter(sif_id__in=ids, started_at__lte=t1).filter(
            Q(ended_at__isnull=True) | Q(ended_at__gte=t0)).select_related(
            "authorised_by", "requested_by", "closed_by").order_by("started_at"):
        hours = b.duration_hours(min(now, t1) if b.ended_at is None else now)
        per_sif[b.sif_id]["bypasses"].append({
            "started_at": _iso(b.started_at), "ended_at": _iso(b.ended_at),
            "open": b.ended_at is None, "duration_hours": round(hours, 2),
            "authorised_hours": b.authorised_hours,
            "over_authorised": b.ran_over(min(now, t1) if b.ended_at is None else now),
            "component": comp_by_id[b.component_id].tag if b.component_id in comp_by_id
            else ("whole SIF" if b.component_id is None else str(b.component_id)),
            "reason": b.reason, "authorised_by": person_name(b.authorised_by),
            "compensating_measures": b.compensating_measures,
            "measures_effective": b.measures_effective,
            "requested_by": person_name(b.requested_by),
            "authorised_at": _iso(b.authorised_at),
            "authorisation": str(choices.BypassAuthorisation(b.authorisation).label),
            "closed_by": person_name(b.closed_by)})

    # Findings found in the period or still open in it, with their follow-up.
    for fd in Finding.objects.filter(sif_id__in=ids, found_at__lte=t1).filter(
            Q(closed_at__isnull=True) | Q(closed_at__gte=t0)).select_related(
            "component", "owner", "closed_by", "retest", "result__record", "demand",
            "sif__unit__site").order_by("found_at", "id"):
        source = (f"test #{fd.result.record_id} ({fd.result.record.get_kind_display()})"
                  if fd.result_id else ("spurious trip" if fd.demand.spurious
                                        else "real demand"))
        per_sif[fd.sif_id]["findings"].append({
            "id": fd.pk, "component": fd.component.tag, "found_at": _iso(fd.found_at),
            "found_by": source, "failure_mode": findings_rules.failure_text(fd),
            "description": fd.description, "owner": person_name(fd.owner),
            "corrective_action": fd.corrective_action,
            "retest_due_on": _iso(fd.retest_due_on), "status": fd.get_status_display(),
            "retest": (f"#{fd.retest_id} {fd.retest.get_kind_display()} "
                       f"{_iso(fd.retest.performed_at)}" if fd.retest_id else ""),
            "closed_at": _iso(fd.closed_at), "closed_by": person_name(fd.closed_by),
            "closure_note": fd.closure_note,
            "age_days": findings_rules.age_days(fd, min(end, timezone.localdate(now)))})

    # Deferrals requested, decided or due in the period.
    plan_sif = {p.pk: d.sif.pk for d in loaded for p in d.plans}
    for df in Deferral.objects.filter(plan_id__in=list(plan_sif)).filter(
            Q(requested_at__range=(t0, t1)) | Q(decided_at__range=(t0, t1))
            | Q(due_on__range=(start, end))).select_related(
            "plan", "requested_by", "decided_by").order_by("requested_at"):
        per_sif[plan_sif[df.plan_id]]["deferrals"].append({
            "plan": df.plan.name, "due_on": _iso(df.due_on), "proposed_on": _iso(df.proposed_on),
            "reason": df.reason, "requested_by": person_name(df.requested_by),
            "requested_at": _iso(df.requested_at), "status": df.get_status_display(),
            "decided_by": person_name(df.decided_by), "decided_at": _iso(df.decided_at),
            "decision_note": df.decision_note, "projected_pfd_avg": df.projected_pfd_avg})
    if progress:
        progress(18, "Tests, demands, bypasses, findings and deferrals loaded")

    _overdue(out, per_sif, ids, plan_sif, start, end)
    _changes(per_sif, loaded, ids, sub_by_id, t0, t1)
    if progress:
        progress(25, "Overdue periods and design changes loaded")

    out.tables = tables_of(out.sifs)
    return out


def tables_of(sifs: list[dict]) -> dict[str, list[dict]]:
    """The rows of the CSV tables, SIF by SIF in the order of ``sifs``."""
    tables: dict[str, list[dict]] = defaultdict(list)
    for entry in sifs:
        for key in ("tests", "failures", "demands", "bypasses", "deferrals", "overdue",
                    "changes", "findings"):
            for row in entry[key]:
                tables[key].append({"sif": entry["tag"], **row})
    return tables


def _overdue(out, per_sif, ids, plan_sif, start, end):
    """Every day of the period on which a plan was overdue, as exact periods, by the one
    rule (``schedule.due.plan_timelines``): the due date, the first and last overdue day,
    the days overdue at the end of the period and the worst state reached."""
    plans = TestPlan.objects.filter(sif_id__in=ids).select_related("sif__unit__site")
    names = dict(plans.values_list("pk", "name"))
    for plan_id, timeline in plan_timelines(plans, start, end).items():
        for first, last in timeline.overdue_periods():
            seg = next(s for s in timeline.segments if s.start <= first <= s.end)
            due, deferred = seg.due_on, seg.deferred
            worst = max((timeline.state_on(day) for day in (first, last)),
                        key=lambda s: choices.PLAN_STATE_RANK.get(s, 0))
            per_sif[plan_sif[plan_id]]["overdue"].append({
                "plan": names[plan_id], "due_on": _iso(due), "deferred": deferred,
                "overdue_from": first.isoformat(), "overdue_to": last.isoformat(),
                "days_overdue": (last - due).days,
                "worst_state": str(choices.PlanState(worst).label)})


def _worse(a: str, b: str) -> str:
    return a if choices.PLAN_STATE_RANK[a] >= choices.PLAN_STATE_RANK[b] else b


def _changes(per_sif, loaded, ids, sub_by_id, t0, t1):
    """History rows with a change reason in the period, with what changed."""
    sub_sif = dict(Subsystem.history.filter(sif_id__in=ids).values_list("id", "sif_id"))
    sub_sif.update({k: v.sif_id for k, v in sub_by_id.items()})
    plan_sif = dict(TestPlan.history.filter(sif_id__in=ids).values_list("id", "sif_id"))
    sc_sifs: dict[int, list[int]] = defaultdict(list)
    for sif_id, sc_id in SafetyFunction.scenarios.through.objects.filter(
            safetyfunction_id__in=ids).values_list("safetyfunction_id", "hazardscenario_id"):
        sc_sifs[sc_id].append(sif_id)
    sources = [
        (SafetyFunction, Q(id__in=ids), lambda r: [r["id"]]),
        (Subsystem, Q(sif_id__in=ids), lambda r: [r["sif_id"]]),
        (Component, Q(subsystem_id__in=list(sub_sif)),
         lambda r: [sub_sif.get(r["subsystem_id"])]),
        (TestPlan, Q(sif_id__in=ids), lambda r: [r["sif_id"]]),
        (TestStep, Q(plan_id__in=list(plan_sif)), lambda r: [plan_sif.get(r["plan_id"])]),
        (HazardScenario, Q(id__in=list(sc_sifs)), lambda r: sc_sifs.get(r["id"], [])),
        (InitiatingCause, Q(scenario_id__in=list(sc_sifs)),
         lambda r: sc_sifs.get(r["scenario_id"], [])),
        (ProtectionLayer, Q(scenario_id__in=list(sc_sifs)),
         lambda r: sc_sifs.get(r["scenario_id"], [])),
        (ConditionalModifier, Q(scenario_id__in=list(sc_sifs)),
         lambda r: sc_sifs.get(r["scenario_id"], [])),
    ]
    for model, cond, sifs_of in sources:
        hist = model.history.model
        rows = hist.objects.filter(cond, history_date__lte=t1).select_related(
            "history_user").order_by("id", "history_date", "history_id")
        previous: dict[int, dict] = {}
        for h in rows.iterator(chunk_size=2000):
            row = row_of(h)
            before = previous.get(row["id"])
            previous[row["id"]] = row
            if not (h.history_change_reason and h.history_date >= t0):
                continue
            what = "; ".join(field_changes(before, row)) or "no field change"
            for sif_id in sifs_of(row):
                if sif_id in per_sif:
                    per_sif[sif_id]["changes"].append({
                        "at": _iso(h.history_date),
                        "record": f"{model._meta.verbose_name} #{row['id']}",
                        "action": {"+": "created", "~": "changed", "-": "deleted"}[
                            h.history_type],
                        "by": person_name(h.history_user), "reason": h.history_change_reason,
                        "what_changed": what, "history_id": h.history_id})
    for entry in per_sif.values():
        entry["changes"].sort(key=lambda c: c["at"])


