"""The pack's tables: the CSV files and the facts of the cover page."""

from __future__ import annotations

import csv
import io
import json

from django.utils import timezone

from register.audit.evidence.collect import (
    ACHIEVED_FORMULA,
    DESIGN_FORMULA,
    OBSERVED_METHOD,
    Collected,
    _iso,
)
from register.lead.export import neutralise
from register.models import (
    EvidencePack,
)
from register.people import person_name
from register.presenters import CAUTION

# ---------------------------------------------------------------------------------------
# Files: CSV, JSON, PDF, zip
# ---------------------------------------------------------------------------------------


def _csv(rows: list[dict], columns: list[str]) -> bytes:
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=columns, extrasaction="ignore", lineterminator="\n")
    w.writeheader()
    for row in rows:
        w.writerow({k: neutralise(json.dumps(v, ensure_ascii=False)
                                  if isinstance(v, (list, dict)) else ("" if v is None else v))
                    for k, v in row.items()})
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
            "changes": len(e["changes"]), "findings": len(e["findings"]),
            "open_findings": sum(1 for x in e["findings"] if not x["closed_at"])})
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
                                             "measures_effective", "requested_by",
                                             "authorised_at", "authorisation", "closed_by"]),
        "deferrals.csv": _csv(t["deferrals"], ["sif", "plan", "due_on", "proposed_on", "reason",
                                               "requested_by", "requested_at", "status",
                                               "decided_by", "decided_at", "decision_note",
                                               "projected_pfd_avg"]),
        "overdue.csv": _csv(t["overdue"], ["sif", "plan", "due_on", "deferred",
                                           "overdue_from", "overdue_to", "days_overdue",
                                           "worst_state"]),
        "changes.csv": _csv(t["changes"], ["sif", "at", "record", "action", "by", "reason",
                                           "what_changed", "history_id"]),
        "findings.csv": _csv(t["findings"], ["sif", "id", "component", "found_at", "found_by",
                                             "failure_mode", "description", "owner",
                                             "corrective_action", "retest_due_on", "status",
                                             "retest", "closed_at", "closed_by",
                                             "closure_note", "age_days"]),
    }


def _anchor() -> dict | None:
    from register.audit.anchors import anchor_path, latest_anchor

    a = latest_anchor()
    return None if a is None else {"seq": a["seq"], "hash": a["hash"], "at": a["at"],
                                   "file": str(anchor_path())}


def cover_facts(pack: EvidencePack, chain) -> dict:
    return {
        "pack_id": pack.pk, "site": pack.site.name, "site_code": pack.site.code,
        "scope": pack.scope, "scope_label": pack.scope_label,
        "period_start": pack.period_start.isoformat(), "period_end": pack.period_end.isoformat(),
        "generated_by": person_name(pack.requested_by),
        "generated_at": _iso(pack.started_at or timezone.now()),
        "chain": {"head_seq": chain.head_seq, "head_hash": chain.head_hash,
                  "verified_ok": chain.ok, "entries": chain.entries,
                  "first_break": str(chain.first_break) if chain.first_break else None,
                  # recomputed from this entry on (1: every entry), and the newest anchor
                  # of the head kept outside the database
                  "verified_from_seq": chain.from_seq or 1,
                  "anchor": _anchor()},
        "caution": CAUTION,
        "methods": {"design": DESIGN_FORMULA, "achieved": ACHIEVED_FORMULA,
                    "observed": OBSERVED_METHOD},
    }


