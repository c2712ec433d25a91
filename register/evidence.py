"""Evidence packs: everything an auditor asks for about one SIF, a unit or a site over a
period, in one zip.

The zip holds ``report.pdf`` (readable on paper, fonts embedded), the same facts as CSV
tables and as ``pack.json``, one PNG chart per SIF under ``charts/``, and
``manifest.json`` listing every other file with its SHA-256 and size.

Data are loaded in bulk for the whole scope (a fixed number of queries, plus a few per
month-end for the overdue history); the per-SIF cost is the chart and the PDF pages.
"""

from __future__ import annotations

import csv
import datetime as dt
import hashlib
import io
import json
import zipfile
from collections import defaultdict
from dataclasses import dataclass, field
from pathlib import Path

from django.conf import settings
from django.db.models import Q
from django.utils import timezone

from calcs import adapter
from calcs.engine.errors import EngineError

from . import choices, presenters
from .audit import verify_chain
from .changes import field_changes, row_of
from .days import end_of_day, start_of_day
from .models import (
    Attachment,
    Bypass,
    Component,
    ComponentResult,
    ConditionalModifier,
    Deferral,
    Demand,
    EvidencePack,
    HazardScenario,
    InitiatingCause,
    ProtectionLayer,
    SafetyFunction,
    Subsystem,
    TestPlan,
    TestRecord,
    TestStep,
)
from .people import person_name
from .scheduling import compute_statuses

CAUTION = ("Results support, and do not replace, a functional safety assessment by "
           "competent persons under IEC 61511 and local regulations.")
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
CHART_DPI = 72
CHART_POINTS = 240
OVERDUE_STATES = {choices.PlanState.OVERDUE, choices.PlanState.ESCALATED,
                  choices.PlanState.ESCALATED_2}

CSV_FILES = ("sifs", "criteria", "tests", "failures", "demands", "bypasses", "deferrals",
             "overdue", "changes")


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
    loaded: dict[int, adapter.SifData] = field(default_factory=dict)


def _month_ends(start: dt.date, end: dt.date) -> list[dt.date]:
    out = []
    y, m = start.year, start.month
    while True:
        nxt = dt.date(y + (m == 12), m % 12 + 1, 1)
        last = nxt - dt.timedelta(days=1)
        if last >= end:
            break
        if last >= start:
            out.append(last)
        y, m = nxt.year, nxt.month
    out.append(end)
    return out


def collect(pack: EvidencePack, progress=None) -> Collected:
    start, end = pack.period_start, pack.period_end
    t0, t1 = _utc(start), _utc(end, end=True)
    qs = scope_queryset(pack)
    out = Collected()
    loaded = adapter.load(qs)
    out.loaded = {d.sif.pk: d for d in loaded}
    ids = list(out.loaded)
    assessments = adapter.latest_assessments(ids)
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
            "overdue": [], "changes": [],
        }
        if d.scenarios:
            try:
                res = adapter.lopa_for_scenarios(d.scenarios)
                for i, sc in enumerate(res.scenarios):
                    entry["lopa"].append({
                        "scenario": sc.name, "governing": i == res.governing,
                        "required_pfd_avg": sc.required_pfd_avg,
                        "required_rrf": sc.required_rrf, "required_sil": sc.required_sil,
                        "outcome": sc.outcome_text,
                        "steps": [{"step": text, "value": value} for text, value in sc.steps],
                    })
            except EngineError as exc:
                entry["lopa_error"] = str(exc)
        try:
            entry["target_pfd_avg"] = adapter.target_pfd(d)
        except EngineError:
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
    now = timezone.now()
    for b in Bypass.objects.filter(sif_id__in=ids, started_at__lte=t1).filter(
            Q(ended_at__isnull=True) | Q(ended_at__gte=t0)).select_related(
            "authorised_by").order_by("started_at"):
        hours = b.duration_hours(min(now, t1) if b.ended_at is None else now)
        per_sif[b.sif_id]["bypasses"].append({
            "started_at": _iso(b.started_at), "ended_at": _iso(b.ended_at),
            "open": b.ended_at is None, "duration_hours": round(hours, 2),
            "authorised_hours": b.authorised_hours,
            "over_authorised": hours > b.authorised_hours,
            "component": comp_by_id[b.component_id].tag if b.component_id in comp_by_id
            else ("whole SIF" if b.component_id is None else str(b.component_id)),
            "reason": b.reason, "authorised_by": person_name(b.authorised_by),
            "compensating_measures": b.compensating_measures,
            "measures_effective": b.measures_effective})

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
        progress(18, "Tests, demands, bypasses and deferrals loaded")

    _overdue(out, per_sif, ids, plan_sif, start, end)
    _changes(per_sif, loaded, ids, sub_by_id, t0, t1)
    if progress:
        progress(25, "Overdue periods and design changes loaded")

    for entry in out.sifs:
        for key in ("tests", "failures", "demands", "bypasses", "deferrals", "overdue",
                    "changes"):
            for row in entry[key]:
                out.tables[key].append({"sif": entry["tag"], **row})
    return out


def _overdue(out, per_sif, ids, plan_sif, start, end):
    """Plans found overdue at month ends (and at the period end), merged into spans."""
    plans = TestPlan.objects.filter(sif_id__in=ids)
    names = dict(plans.values_list("pk", "name"))
    spans: dict[int, list[dict]] = defaultdict(list)
    for day in _month_ends(start, end):
        for plan_id, st in compute_statuses(plans, day).items():
            if st.state not in OVERDUE_STATES:
                continue
            open_spans = spans[plan_id]
            if open_spans and open_spans[-1]["due_on"] == _iso(st.due_on):
                span = open_spans[-1]
                span["last_seen_overdue"] = day.isoformat()
                span["max_days_overdue"] = max(span["max_days_overdue"], st.days_overdue)
                span["worst_state"] = _worse(span["worst_state"], st.state)
            else:
                open_spans.append({"plan": names[plan_id], "due_on": _iso(st.due_on),
                                   "deferred": st.deferred,
                                   "first_seen_overdue": day.isoformat(),
                                   "last_seen_overdue": day.isoformat(),
                                   "max_days_overdue": st.days_overdue,
                                   "worst_state": st.state})
    for plan_id, rows in spans.items():
        for row in rows:
            row["worst_state"] = str(choices.PlanState(row["worst_state"]).label)
            per_sif[plan_sif[plan_id]]["overdue"].append(row)


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


# ---------------------------------------------------------------------------------------
# Figures: PFD(t) chart and achieved PFDavg over the period
# ---------------------------------------------------------------------------------------


class ChartMaker:
    """One reusable matplotlib figure (no pyplot state) for many small PNG charts."""

    def __init__(self):
        import matplotlib

        matplotlib.use("Agg")
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure

        self.fig = Figure(figsize=(7.2, 2.6), dpi=CHART_DPI)
        FigureCanvasAgg(self.fig)

    def png(self, tag, times, values, target, start, end, episodes=()) -> bytes:
        import matplotlib.dates as mdates
        from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

        from .charts import shade_episodes

        fig = self.fig
        fig.clear()
        ax = fig.add_subplot(1, 1, 1)
        vals = [max(float(v), 1e-9) for v in values]
        shade_episodes(ax, episodes, start, end)
        ax.plot(times, vals, color="black", linewidth=1.1, label="PFD(t)")
        data = [v for v in vals if v > 0] + ([target] if target else [])
        low = max(min(data) / 3, 1e-7) if data else 1e-5
        high = min(max(max(data) * 3, low * 10), 1.0) if data else 1e-1
        if target:
            ax.axhline(target, color="black", linestyle="--", linewidth=1.2,
                       label=f"target {target:.1e}")
        ax.set_yscale("log")
        ax.set_ylim(low, high)
        ax.yaxis.set_major_locator(LogLocator(base=10, numticks=8))
        ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:.0e}"))
        ax.yaxis.set_minor_formatter(NullFormatter())
        ax.set_xlim(start, end)
        ax.xaxis.set_major_formatter(mdates.DateFormatter("%Y-%m"))
        ax.grid(True, color="#999999", linewidth=0.4, linestyle=":")
        ax.set_title(f"{tag}: PFD(t) over the period", fontsize=9, loc="left")
        ax.set_ylabel("PFD(t)", fontsize=8)
        ax.tick_params(labelsize=7)
        ax.legend(loc="upper right", fontsize=7, framealpha=1)
        fig.tight_layout(pad=0.4)
        buf = io.BytesIO()
        fig.savefig(buf, format="png", dpi=CHART_DPI)
        return buf.getvalue()


def figures(pack: EvidencePack, col: Collected, progress=None) -> dict[int, bytes]:
    """PFD(t) chart per SIF (PNG) and the achieved PFDavg over the period itself."""
    if not col.loaded:
        return {}
    site = pack.site
    t0 = _utc(pack.period_start)
    t1 = min(_utc(pack.period_end, end=True), timezone.now())
    types = {c.obj.device_type_id for d in col.loaded.values() for c in d.all_components()}
    rates = adapter.rate_table(site, adapter.device_type_stats(site.pk, t1.date(), types),
                               as_of=t1.date())
    maker = ChartMaker()
    charts = {}
    entries = {e["id"]: e for e in col.sifs}
    n = len(col.sifs)
    for i, entry in enumerate(col.sifs):
        d = col.loaded[entry["id"]]
        start = t0
        first_service = min((c.obj.in_service_on for c in d.all_components()), default=None)
        if first_service:
            start = max(start, _utc(first_service))
        if start >= t1:
            entries[entry["id"]]["chart_note"] = "Not in service during the period."
            continue
        try:
            achieved, times, values = adapter.period_figures(d, rates, start, t1,
                                                             CHART_POINTS)
            entry["period_achieved_pfd_avg"] = achieved
            entry["period_window"] = [_iso(start), _iso(t1)]
            episodes = presenters.observed_episodes(
                (entry.get("assessment") or {}).get("detail"))
            charts[entry["id"]] = maker.png(entry["tag"], times, list(values),
                                            entry.get("target_pfd_avg"), start, t1, episodes)
        except EngineError as exc:
            entry["chart_note"] = f"No chart: {exc}"
        if progress and (i % 10 == 0 or i == n - 1):
            progress(25 + int(40 * (i + 1) / n), f"Charts {i + 1} of {n}")
    return charts


# ---------------------------------------------------------------------------------------
# Files: CSV, JSON, PDF, zip
# ---------------------------------------------------------------------------------------


def _csv(rows: list[dict], columns: list[str]) -> bytes:
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=columns, extrasaction="ignore", lineterminator="\n")
    w.writeheader()
    for row in rows:
        w.writerow({k: (json.dumps(v, ensure_ascii=False) if isinstance(v, (list, dict))
                        else ("" if v is None else v)) for k, v in row.items()})
    return buf.getvalue().encode("utf-8")


def csv_files(col: Collected) -> dict[str, bytes]:
    sif_rows = []
    for e in col.sifs:
        a = e["assessment"] or {}
        sif_rows.append({
            "sif": e["tag"], "name": e["name"], "unit": e["unit"], "target_sil": e["target_sil"],
            "target_pfd_avg": e.get("target_pfd_avg"), "design_pfd_avg": a.get("design_pfd_avg"),
            "achieved_pfd_avg_12m": a.get("achieved_pfd_avg_12m"),
            "achieved_pfd_avg_period": e.get("period_achieved_pfd_avg"),
            "observed_unavailability_12m": a.get("observed_unavailability_12m"),
            "meets_target": a.get("meets_target"),
            "verdict": a.get("verdict_label") if a else "no assessment",
            "verdict_summary": a.get("verdict_summary"),
            "rate_basis": a.get("rate_basis"), "assessed_at": a.get("computed_at"),
            "tests": len(e["tests"]), "failures": len(e["failures"]),
            "demands": len(e["demands"]), "bypasses": len(e["bypasses"]),
            "deferrals": len(e["deferrals"]), "overdue_spans": len(e["overdue"]),
            "changes": len(e["changes"])})
    criteria = [{"sif": e["tag"], "criterion": line.get("key"), "label": line.get("label"),
                 "status": line.get("status"), "reason": line.get("reason"),
                 "value": line.get("value"), "limit": line.get("limit")}
                for e in col.sifs
                for line in ((e["assessment"] or {}).get("verdict") or {}).get("lines", [])]
    t = col.tables
    return {
        "sifs.csv": _csv(sif_rows, list(sif_rows[0]) if sif_rows else ["sif"]),
        "criteria.csv": _csv(criteria, ["sif", "criterion", "label", "status", "reason",
                                        "value", "limit"]),
        "tests.csv": _csv(t["tests"], ["sif", "id", "performed_at", "kind", "performer",
                                       "verifier", "status", "signed_at", "verified_at",
                                       "supersedes", "superseded_by", "correction_reason",
                                       "remarks", "results"]),
        "failures.csv": _csv(t["failures"], ["sif", "found_on", "source", "component",
                                             "failure_mode", "description", "as_found",
                                             "as_left", "work_done", "closed"]),
        "demands.csv": _csv(t["demands"], ["sif", "occurred_at", "successful", "spurious",
                                           "description", "failed_components", "recorded_by"]),
        "bypasses.csv": _csv(t["bypasses"], ["sif", "started_at", "ended_at", "open",
                                             "duration_hours", "authorised_hours",
                                             "over_authorised", "component", "reason",
                                             "authorised_by", "compensating_measures",
                                             "measures_effective"]),
        "deferrals.csv": _csv(t["deferrals"], ["sif", "plan", "due_on", "proposed_on", "reason",
                                               "requested_by", "requested_at", "status",
                                               "decided_by", "decided_at", "decision_note",
                                               "projected_pfd_avg"]),
        "overdue.csv": _csv(t["overdue"], ["sif", "plan", "due_on", "deferred",
                                           "first_seen_overdue", "last_seen_overdue",
                                           "max_days_overdue", "worst_state"]),
        "changes.csv": _csv(t["changes"], ["sif", "at", "record", "action", "by", "reason",
                                           "what_changed", "history_id"]),
    }


def cover_facts(pack: EvidencePack, chain) -> dict:
    return {
        "pack_id": pack.pk, "site": pack.site.name, "site_code": pack.site.code,
        "scope": pack.scope, "scope_label": pack.scope_label,
        "period_start": pack.period_start.isoformat(), "period_end": pack.period_end.isoformat(),
        "generated_by": person_name(pack.requested_by),
        "generated_at": _iso(pack.started_at or timezone.now()),
        "chain": {"head_seq": chain.head_seq, "head_hash": chain.head_hash,
                  "verified_ok": chain.ok, "entries": chain.entries,
                  "first_break": str(chain.first_break) if chain.first_break else None},
        "caution": CAUTION,
        "methods": {"design": DESIGN_FORMULA, "achieved": ACHIEVED_FORMULA,
                    "observed": OBSERVED_METHOD},
    }


def build(pack: EvidencePack, progress=None) -> Path:
    """Build the zip for ``pack``; return its path. ``progress(percent, text)`` is called
    along the way."""
    progress = progress or (lambda p, s: None)
    chain = verify_chain()
    progress(5, "Change chain verified")
    col = collect(pack, progress)
    charts = figures(pack, col, progress)
    cover = cover_facts(pack, chain)
    files: dict[str, bytes] = {}
    files.update(csv_files(col))
    files["pack.json"] = json.dumps({**cover, "sifs": col.sifs}, indent=1, ensure_ascii=False,
                                    default=str).encode("utf-8")
    for sif_id, png in charts.items():
        tag = next(e["tag"] for e in col.sifs if e["id"] == sif_id)
        files[f"charts/{_safe(tag)}-pfd.png"] = png
    progress(70, "Writing the report")
    files["report.pdf"] = render_pdf(cover, col.sifs, charts,
                                     lambda f: progress(70 + int(25 * f), "Writing the report"))
    manifest = {"pack_id": pack.pk, "generated_at": cover["generated_at"],
                "chain_head_hash": chain.head_hash,
                "files": [{"name": name, "sha256": hashlib.sha256(data).hexdigest(),
                           "size": len(data)} for name, data in sorted(files.items())]}
    files["manifest.json"] = json.dumps(manifest, indent=1).encode("utf-8")
    path = packs_dir() / f"evidence-pack-{pack.pk}.zip"
    tmp = path.with_suffix(".part")
    with zipfile.ZipFile(tmp, "w", compression=zipfile.ZIP_DEFLATED) as zf:
        for name in ["manifest.json"] + sorted(n for n in files if n != "manifest.json"):
            zf.writestr(name, files[name])
    tmp.replace(path)
    pack.chain_head_hash, pack.chain_head_seq, pack.chain_ok = (chain.head_hash,
                                                                chain.head_seq, chain.ok)
    return path


def _safe(text: str) -> str:
    return "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in text)


def run(pack_id: int) -> EvidencePack:
    """Build one pack, recording status and progress on the row as it goes."""
    pack = EvidencePack.objects.select_related("site", "unit", "sif", "requested_by").get(
        pk=pack_id)
    if pack.status == EvidencePack.Status.DONE:
        return pack
    pack.status, pack.started_at, pack.progress, pack.error = (
        EvidencePack.Status.RUNNING, timezone.now(), 1, "")
    EvidencePack.objects.filter(pk=pack.pk).update(status=pack.status, started_at=pack.started_at,
                                                   progress=1, error="", stage="Started")

    def progress(percent: int, text: str):
        EvidencePack.objects.filter(pk=pack.pk).update(progress=min(99, percent),
                                                       stage=text[:200])

    try:
        path = build(pack, progress)
    except Exception as exc:
        EvidencePack.objects.filter(pk=pack.pk).update(
            status=EvidencePack.Status.FAILED, error=f"{type(exc).__name__}: {exc}",
            finished_at=timezone.now(), stage="Failed")
        raise
    data = path.read_bytes()
    EvidencePack.objects.filter(pk=pack.pk).update(
        status=EvidencePack.Status.DONE, progress=100, stage="Ready",
        result_path=str(path.relative_to(Path(settings.VAR_DIR))),
        result_sha256=hashlib.sha256(data).hexdigest(), result_size=len(data),
        chain_head_hash=pack.chain_head_hash, chain_head_seq=pack.chain_head_seq,
        chain_ok=pack.chain_ok, finished_at=timezone.now())
    pack.refresh_from_db()
    return pack


# ---------------------------------------------------------------------------------------
# The PDF report (reportlab, DejaVu Sans embedded)
# ---------------------------------------------------------------------------------------

FONT_DIR = Path("/usr/share/fonts/truetype/dejavu")
_fonts_ready = False


def _fonts():
    global _fonts_ready
    if _fonts_ready:
        return
    from reportlab.lib.fonts import addMapping
    from reportlab.pdfbase import pdfmetrics
    from reportlab.pdfbase.ttfonts import TTFont

    pdfmetrics.registerFont(TTFont("DejaVu", str(FONT_DIR / "DejaVuSans.ttf")))
    pdfmetrics.registerFont(TTFont("DejaVu-Bold", str(FONT_DIR / "DejaVuSans-Bold.ttf")))
    addMapping("DejaVu", 0, 0, "DejaVu")
    addMapping("DejaVu", 1, 0, "DejaVu-Bold")
    addMapping("DejaVu", 0, 1, "DejaVu")
    addMapping("DejaVu", 1, 1, "DejaVu-Bold")
    _fonts_ready = True


def _esc(text) -> str:
    from xml.sax.saxutils import escape

    return escape("" if text is None else str(text))


def render_pdf(cover: dict, sifs: list[dict], charts: dict[int, bytes], progress=None) -> bytes:
    _fonts()
    from reportlab import rl_config
    from reportlab.lib import colors

    rl_config.canvas_basefontname = "DejaVu"
    from reportlab.lib.enums import TA_LEFT
    from reportlab.lib.pagesizes import A4
    from reportlab.lib.styles import ParagraphStyle
    from reportlab.lib.units import mm
    from reportlab.platypus import (
        CondPageBreak,
        Image,
        KeepTogether,
        PageBreak,
        Paragraph,
        SimpleDocTemplate,
        Spacer,
        Table,
        TableStyle,
    )

    base = ParagraphStyle("body", fontName="DejaVu", fontSize=8.5, leading=10.5,
                          alignment=TA_LEFT)
    small = ParagraphStyle("small", parent=base, fontSize=7.2, leading=8.6)
    h1 = ParagraphStyle("h1", parent=base, fontName="DejaVu-Bold", fontSize=15, leading=19,
                        spaceAfter=6)
    h2 = ParagraphStyle("h2", parent=base, fontName="DejaVu-Bold", fontSize=11.5, leading=14,
                        spaceBefore=4, spaceAfter=4, keepWithNext=1)
    h3 = ParagraphStyle("h3", parent=base, fontName="DejaVu-Bold", fontSize=9.5, leading=12,
                        spaceBefore=6, spaceAfter=2, keepWithNext=1)
    caution = ParagraphStyle("caution", parent=base, fontSize=9.5, leading=12.5,
                             borderColor=colors.black, borderWidth=1, borderPadding=6,
                             spaceBefore=8, spaceAfter=10)
    width = A4[0] - 30 * mm

    def P(text, style=small):
        return Paragraph(_esc(text), style)

    def table(header, rows, widths, empty="None in the period."):
        if not rows:
            return [Paragraph(_esc(empty), base)]
        data = [[Paragraph(f"<b>{_esc(h)}</b>", small) for h in header]]
        data += [[P(c) if isinstance(c, str) or c is None else c for c in r] for r in rows]
        t = Table(data, colWidths=[w * width for w in widths], repeatRows=1)
        t.setStyle(TableStyle([
            ("GRID", (0, 0), (-1, -1), 0.4, colors.black),
            ("BACKGROUND", (0, 0), (-1, 0), colors.Color(0.88, 0.88, 0.88)),
            ("VALIGN", (0, 0), (-1, -1), "TOP"),
            ("LEFTPADDING", (0, 0), (-1, -1), 2.5), ("RIGHTPADDING", (0, 0), (-1, -1), 2.5),
            ("TOPPADDING", (0, 0), (-1, -1), 1.5), ("BOTTOMPADDING", (0, 0), (-1, -1), 1.5),
        ]))
        return [t]

    def kv(rows):
        t = Table([[P(k, base), P(v, base)] for k, v in rows],
                  colWidths=[0.3 * width, 0.7 * width])
        t.setStyle(TableStyle([("VALIGN", (0, 0), (-1, -1), "TOP"),
                               ("LINEBELOW", (0, 0), (-1, -1), 0.25, colors.grey),
                               ("LEFTPADDING", (0, 0), (-1, -1), 2)]))
        return t

    chain = cover["chain"]
    story = [Paragraph("Evidence pack", h1),
             Paragraph(_esc(cover["scope_label"]), h2),
             kv([("Site", f"{cover['site']} ({cover['site_code']})"),
                 ("Scope", cover["scope_label"]),
                 ("Period", f"{cover['period_start']} to {cover['period_end']} (inclusive)"),
                 ("Generated by", cover["generated_by"]),
                 ("Generated at", cover["generated_at"]),
                 ("Pack number", str(cover["pack_id"])),
                 ("Change chain head", (f"entry #{chain['head_seq']}, SHA-256 "
                                       f"{chain['head_hash']}")),
                 ("Change chain verified", "yes, every entry recomputed from the history"
                  if chain["verified_ok"] else f"NO - {chain['first_break']}"),
                 ("Safety functions in the pack", str(len(sifs)))]),
             Paragraph("<b>Caution:</b> " + _esc(CAUTION), caution),
             Paragraph("How to read this pack", h3),
             Paragraph(_esc(
                 "Design PFDavg: " + DESIGN_FORMULA + "; the method of each subsystem's figure "
                 "is named with it. Achieved PFDavg: " + ACHIEVED_FORMULA + ". "
                 + OBSERVED_METHOD + ". A SIF meets its target only when every criterion of "
                 "its verdict passes (design, achieved and observed over the last 12 months, "
                 "projected to the next due test, architecture, systematic capability); one "
                 "failing criterion means it does not meet its target, and a criterion that "
                 "cannot be calculated leaves it not shown to meet its target. "
                 "The compliance summary uses the latest stored assessment of each SIF "
                 "(its date is shown); the achieved PFDavg over the period is recomputed "
                 "for this pack. Names of performers and verifiers are as signed on the "
                 "records. Overdue periods come from the test plan states at each month end "
                 "of the period and at its last day. Design changes are history entries "
                 "with a change reason. The CSV files and pack.json hold the same facts; "
                 "manifest.json lists every file with its SHA-256 and size."), base),
             Spacer(1, 6), Paragraph("Summary of compliance", h2)]
    rows = []
    for e in sifs:
        a = e["assessment"] or {}
        rows.append([e["tag"], e["name"], (f"SIL {e['target_sil']}\n"
                     f"{_g(e.get('target_pfd_avg'))}"),
                     _g(a.get("design_pfd_avg")), _g(a.get("achieved_pfd_avg_12m")),
                     _g(a.get("observed_unavailability_12m")),
                     _g(e.get("period_achieved_pfd_avg")),
                     a["verdict_label"] if a else "no assessment",
                     (a.get("computed_at") or "-")])
    story += table(["SIF", "Name", "Target", "Design PFDavg", "Achieved, 12 months",
                    "Observed, 12 months", "Achieved, period", "Verdict", "Assessed at"], rows,
                   [0.1, 0.19, 0.09, 0.09, 0.1, 0.1, 0.09, 0.11, 0.13],
                   empty="No SIF in scope.")
    n = len(sifs)
    for i, e in enumerate(sifs):
        story += [PageBreak(), Paragraph(_esc(f"{e['tag']}  {e['name']}"), h1)]
        story.append(kv([("Unit", e["unit"]), ("Safe state", e["safe_state"]),
                         ("Mode", e["demand_mode"]), ("Life stage", e["life_stage"]),
                         ("In service since", e["in_service_on"] or "-"),
                         ("Target", f"SIL {e['target_sil']}, required PFDavg "
                                    f"{_g(e.get('target_pfd_avg'))}"
                          + (" (set on the SIF)" if e["target_pfd_avg_set"] is not None
                             else " (from LOPA)"))]))
        story.append(Paragraph("Target: LOPA derivation", h2))
        if not e["lopa"]:
            story.append(Paragraph("No LOPA scenario is linked to this SIF.", base))
        for sc in e["lopa"]:
            story.append(Paragraph(_esc(f"Scenario {sc['scenario']}"
                                        + (" (governing)" if sc["governing"] else "")), h3))
            story += table(["Step", "Value"], [[s["step"], _g(s["value"], ".3g")]
                                               for s in sc["steps"]], [0.8, 0.2])
            story.append(P(f"Outcome: {sc['outcome']}", base))
        story.append(Paragraph("Architecture and data basis", h2))
        story += table(["Subsystem", "Role", "Voting", "β", "βD", "MTTR (h)", "MRT (h)"],
                       [[s["name"], s["role"], s["voting"], _g(s["beta"], "g"),
                         _g(s["beta_d"], "g"), _g(s["mttr_hours"], "g"),
                         _g(s["mrt_hours"], "g")] for s in e["subsystems"]],
                       [0.25, 0.17, 0.1, 0.1, 0.1, 0.14, 0.14])
        story.append(Spacer(1, 4))
        story += table(["Component", "Subsystem", "Device type", "λDU /h", "λDD /h", "λS /h",
                        "Basis and source", "In service"],
                       [[c["tag"], c["subsystem"], c["device_type"],
                         _g(c["lambda_du_per_hour"]), _g(c["lambda_dd_per_hour"]),
                         _g(c["lambda_s_per_hour"]),
                         f"{c['data_basis']}; rates from {c['rates_from']}: {c['source']}",
                         c["in_service_on"]] for c in e["components"]],
                       [0.11, 0.1, 0.15, 0.08, 0.08, 0.08, 0.28, 0.12])
        story.append(Paragraph("PFDavg: design and achieved", h2))
        a = e["assessment"]
        if a is None:
            story.append(Paragraph("No stored assessment.", base))
        else:
            subs = (a.get("detail") or {}).get("subsystems", [])
            methods = "; ".join(f"{s.get('name')}: {s['pfd_method']}" for s in subs
                                if s.get("pfd_method")) or DESIGN_FORMULA
            story.append(kv([
                ("Verdict", f"{a['verdict_label']}. {a['verdict_summary']}"),
                ("Design PFDavg", f"{_g(a['design_pfd_avg'])} - method: {methods}"),
                ("Achieved PFDavg, last 12 months", (f"{_g(a['achieved_pfd_avg_12m'])} - "
                                                    f"{ACHIEVED_FORMULA}")),
                ("Observed unavailability, last 12 months",
                 f"{_g(a['observed_unavailability_12m'])} (beside the achieved PFDavg "
                 f"{_g(a['achieved_pfd_avg_12m'])})"),
                ("Achieved PFDavg since in service", _g(a["achieved_since_service_pfd_avg"])),
                ("Observed unavailability since in service", _g(a["observed_since_service"])),
                ("Achieved PFDavg over the pack period",
                 _g(e.get("period_achieved_pfd_avg"))
                 + (f" (window {e['period_window'][0]} to {e['period_window'][1]})"
                    if e.get("period_window") else "")),
                ("Limits", (f"architecture SIL {a['architectural_sil'] or '-'}, systematic "
                            f"SC {a['systematic_sil'] or '-'}, achieved SIL "
                            f"{a['achieved_sil'] or '-'}")),
                ("Failure-rate basis", a["rate_basis_label"]),
                ("Assessment", (f"computed {a['computed_at']}, as of {a['as_of']}, trigger "
                               f"'{a['trigger']}', rate basis {a['rate_basis'] or '-'}, inputs "
                               f"digest {a['inputs_digest'][:16]}…")),
            ]))
            lines = presenters.verdict_lines_from(a["verdict"])
            story.append(Paragraph("Verdict: every criterion", h3))
            story += table(["Criterion", "Result", "Why"],
                           [[x["label"], x["badge"].label.upper() if x["status"] == "fail"
                             else x["badge"].label, x["reason"]] for x in lines],
                           [0.36, 0.12, 0.52], empty=presenters.LEGACY_NOTE)
            story.append(Paragraph("Design, achieved and observed per subsystem", h3))
            story += table(["Subsystem", "Design PFDavg", "Method of the design figure",
                            "Achieved 12 m", "Observed 12 m", "What drives the difference"],
                           [[f"{s.get('name')} ({s.get('voting')})", _g(s.get("design_pfd_avg")),
                             s.get("pfd_method") or DESIGN_FORMULA,
                             _g(s.get("achieved_pfd_avg")),
                             _g(s.get("observed_unavailability")),
                             Paragraph("<br/>".join("• " + _esc(x) for x in s.get("drivers")
                                                    or []) or "-", small)] for s in subs],
                           [0.13, 0.1, 0.2, 0.1, 0.1, 0.37], empty="No inputs stored.")
            for driver in presenters.sif_drivers(a.get("detail")):
                story.append(P("• " + driver, base))
            offenders = presenters.repeat_offenders(a.get("detail"))
            if offenders:
                story.append(Paragraph("Components failing far more often than their "
                                       "device type", h3))
                story += table(["Component", "Device type", "Own rate /h", "Type rate /h",
                                "Design rate /h", "Rate used /h", "Failures / hours",
                                "Why flagged"],
                               [[r.get("component"), r.get("device_type"),
                                 _g(r.get("own_per_hour")), _g(r.get("type_per_hour")),
                                 _g(r.get("design_per_hour")), _g(r.get("used_per_hour")),
                                 f"{r.get('failures')} / {_g(r.get('hours'), '.0f')}",
                                 r.get("reason") or ""] for r in offenders],
                               [0.11, 0.13, 0.09, 0.09, 0.09, 0.09, 0.1, 0.3])
            episodes = presenters.observed_episodes(a.get("detail"))
            if episodes:
                story.append(Paragraph("Periods the function could not act (observed)", h3))
                story += table(["Subsystem", "Components", "Onset between", "Found by",
                                "Restored", "Hours, last 12 months"],
                               [[ep.get("subsystem"), ", ".join(ep["components"])
                                 + (" (common cause)" if ep.get("common_cause") else ""),
                                 f"{_iso(ep['onset_from'])} and {_iso(ep['onset_to'])}",
                                 ep.get("found_by") or "-", _iso(ep["restored_at"]),
                                 _g(ep.get("hours_in_window"), ".0f")] for ep in episodes],
                               [0.12, 0.18, 0.3, 0.1, 0.17, 0.13])
            story.append(Paragraph("Inputs used per subsystem", h3))
            story += table(["Subsystem", "Voting", "λDU /h", "λDD /h", "β / βD", "T1 (h)",
                            "PTC", "MTTR / MRT (h)", "Design PFDavg", "Achieved 12 m"],
                           [[s.get("name"), s.get("voting"), _g(s.get("lambda_du_per_hour")),
                             _g(s.get("lambda_dd_per_hour")),
                             f"{_g(s.get('beta'), 'g')} / {_g(s.get('beta_d'), 'g')}",
                             _g(s.get("proof_test_interval_hours"), ".0f"),
                             _g(s.get("proof_test_coverage"), "g"),
                             f"{_g(s.get('mttr_hours'), 'g')} / {_g(s.get('mrt_hours'), 'g')}",
                             _g(s.get("design_pfd_avg")), _g(s.get("achieved_pfd_avg"))]
                            for s in subs],
                           [0.14, 0.07, 0.09, 0.09, 0.1, 0.09, 0.06, 0.11, 0.12, 0.13],
                           empty="No inputs stored.")
            if a["flags"]:
                story.append(Paragraph("Findings of the calculation", h3))
                for flag in a["flags"]:
                    story.append(P("• " + flag, base))
        png = charts.get(e["id"])
        if png:
            img = Image(io.BytesIO(png), width=width, height=width * 2.6 / 7.2)
            story += [CondPageBreak(width * 2.6 / 7.2 + 20), Spacer(1, 4), img]
        elif e.get("chart_note"):
            story.append(P(e["chart_note"], base))
        story.append(Paragraph("Tests in the period", h2))
        story += table(["Date", "Kind", "Performed by", "Verified by", "Status",
                        "As found → as left"],
                       [[t["performed_at"], t["kind"]
                         + (f" (corrects #{t['supersedes']}: {t['correction_reason']})"
                            if t["supersedes"] else "")
                         + (f" (superseded by #{t['superseded_by']})" if t["superseded_by"]
                            else ""),
                         t["performer"] or "-", t["verifier"] or "not yet verified",
                         t["status"],
                         ", ".join(f"{r['component']}: {r['as_found']}→{r['as_left']}"
                                   for r in t["results"])]
                        for t in e["tests"]],
                       [0.14, 0.16, 0.13, 0.13, 0.12, 0.32])
        story.append(Paragraph("Failures found and how they were closed", h2))
        story += table(["Found", "Source", "Component", "Failure", "Description",
                        "Work done", "As left"],
                       [[f["found_on"], f["source"], f["component"], f["failure_mode"],
                         f["description"], f["work_done"] or "-", f["as_left"] or "-"]
                        for f in e["failures"]],
                       [0.12, 0.13, 0.12, 0.15, 0.21, 0.19, 0.08])
        section = [Paragraph("Demands", h2)]
        section += table(["Occurred", "Result", "Description", "Failed components",
                          "Recorded by"],
                         [[d["occurred_at"], ("spurious trip" if d["spurious"] else
                                              "acted as required" if d["successful"]
                                              else "FAILED"), d["description"],
                           ", ".join(d["failed_components"]) or "-", d["recorded_by"]]
                          for d in e["demands"]], [0.15, 0.13, 0.4, 0.15, 0.17])
        story.append(KeepTogether(section))
        story.append(Paragraph("Bypasses", h2))
        story += table(["Started", "Ended", "Duration (h)", "Allowed (h)", "Bypassed",
                        "Reason", "Authorised by", "Compensating measures"],
                       [[b["started_at"], b["ended_at"] or "still open",
                         f"{b['duration_hours']:.1f}"
                         + (" - over authorised time" if b["over_authorised"] else ""),
                         _g(b["authorised_hours"], "g"), b["component"], b["reason"],
                         b["authorised_by"],
                         (b["compensating_measures"] or "none")
                         + (" (equivalent)" if b["measures_effective"] else "")]
                        for b in e["bypasses"]],
                       [0.12, 0.12, 0.1, 0.08, 0.09, 0.17, 0.11, 0.21])
        story.append(Paragraph("Deferrals", h2))
        story += table(["Plan", "Due", "Proposed", "Reason", "Requested", "Decision"],
                       [[d["plan"], d["due_on"], d["proposed_on"], d["reason"],
                         f"{d['requested_by']}, {d['requested_at']}",
                         f"{d['status']}"
                         + (f" by {d['decided_by']}, {d['decided_at']}" if d["decided_by"]
                            else "")
                         + (f": {d['decision_note']}" if d["decision_note"] else "")
                         + (f" (projected PFDavg {d['projected_pfd_avg']:.2e})"
                            if d["projected_pfd_avg"] else "")]
                        for d in e["deferrals"]],
                       [0.14, 0.1, 0.1, 0.24, 0.17, 0.25])
        story.append(Paragraph("Overdue periods", h2))
        story += table(["Plan", "Due on", "First seen overdue (month end)", "Last seen overdue",
                        "Max days overdue", "Worst state"],
                       [[o["plan"], o["due_on"] + (" (deferred)" if o["deferred"] else ""),
                         o["first_seen_overdue"], o["last_seen_overdue"],
                         str(o["max_days_overdue"]), o["worst_state"]]
                        for o in e["overdue"]],
                       [0.22, 0.16, 0.16, 0.16, 0.12, 0.18],
                       empty="No test plan was overdue at any month end of the period.")
        story.append(Paragraph("Design changes", h2))
        story += table(["When", "Record", "By", "Reason", "What changed"],
                       [[c["at"], f"{c['record']} ({c['action']})", c["by"] or "-",
                         c["reason"], c["what_changed"]] for c in e["changes"]],
                       [0.13, 0.18, 0.13, 0.22, 0.34])
        if progress and (i % 20 == 0 or i == n - 1):
            progress(0.3 * (i + 1) / max(n, 1))

    buf = io.BytesIO()
    footer = (f"Evidence pack {cover['pack_id']} · {cover['site']} · {cover['period_start']} "
              f"to {cover['period_end']} · chain head {cover['chain']['head_hash'][:16]}…")

    def on_page(canvas, doc):
        canvas.saveState()
        canvas.setFont("DejaVu", 7)
        canvas.drawString(15 * mm, 9 * mm, footer)
        canvas.drawRightString(A4[0] - 15 * mm, 9 * mm, f"page {doc.page}")
        canvas.drawString(15 * mm, 5.5 * mm, "Caution: " + CAUTION)
        canvas.restoreState()

    doc = SimpleDocTemplate(buf, pagesize=A4, leftMargin=15 * mm, rightMargin=15 * mm,
                            topMargin=14 * mm, bottomMargin=16 * mm,
                            title=f"Evidence pack {cover['pack_id']}",
                            author=cover["generated_by"], subject=cover["scope_label"])
    doc.build(story, onFirstPage=on_page, onLaterPages=on_page)
    if progress:
        progress(1.0)
    return buf.getvalue()


# ---------------------------------------------------------------------------------------
# Asking for a pack (the web page and the API both call this)
# ---------------------------------------------------------------------------------------


#: The longest period one pack may cover (a pack reads every record of the period).
MAX_PACK_YEARS = 25


def pack_request_errors(*, scope: str, site, period_start: dt.date | None,
                        period_end: dt.date | None, unit=None, sif=None) -> dict[str, str]:
    """The one validation of a pack request (page, API and command): field -> message."""
    errors = {}
    if scope == EvidencePack.Scope.UNIT and (unit is None or site is None
                                             or unit.site_id != site.pk):
        errors["unit"] = "Choose a unit of this site for a unit pack."
    if scope == EvidencePack.Scope.SIF and (sif is None or site is None
                                            or sif.unit.site_id != site.pk):
        errors["sif"] = "Choose a SIF of this site for a one-SIF pack."
    if period_start and period_end:
        if period_end < period_start:
            errors["period_end"] = "The period cannot end before it starts."
        elif period_end > timezone.localdate():
            errors["period_end"] = "The period cannot end in the future."
        elif (period_end - period_start).days > MAX_PACK_YEARS * 366:
            errors["period_start"] = (f"A pack covers at most {MAX_PACK_YEARS} years; "
                                      "ask for several packs.")
    return errors


def request_pack(user, *, scope: str, site, period_start: dt.date, period_end: dt.date,
                 unit=None, sif=None, build_in_background: bool = True) -> EvidencePack:
    """Record a pack request and start its build once the request is committed
    (``build_in_background=False``: the caller builds it, as the command does).

    Needs the export right at the site (auditors, verifiers, leads). Asking for a pack
    writes only this request, never a register or test record.
    """
    from django.core.exceptions import ValidationError
    from django.db import transaction

    from .permissions import Action, require

    require(user, Action.EXPORT, site.pk)
    errors = pack_request_errors(scope=scope, site=site, period_start=period_start,
                                 period_end=period_end, unit=unit, sif=sif)
    if errors:
        raise ValidationError(errors)
    with transaction.atomic():
        pack = EvidencePack.objects.create(
            scope=scope, site=site,
            unit=unit if scope == EvidencePack.Scope.UNIT else None,
            sif=sif if scope == EvidencePack.Scope.SIF else None,
            period_start=period_start, period_end=period_end, requested_by=user)

        def start():
            from .tasks_evidence import build_evidence_pack

            build_evidence_pack.delay(pack.pk)

        if build_in_background:
            transaction.on_commit(start)
    return pack


def pack_file(pack: EvidencePack) -> Path | None:
    """The finished zip of a pack, or None while it is not ready or if it is missing."""
    if pack.status != EvidencePack.Status.DONE or not pack.result_path:
        return None
    path = (Path(settings.VAR_DIR) / pack.result_path).resolve()
    if Path(settings.VAR_DIR).resolve() not in path.parents or not path.exists():
        return None
    return path
