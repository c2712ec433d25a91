"""Stored assessments shaped for reading: the verdict with every criterion, the figures per
subsystem and what drives them, components failing more often than their type, and the
periods the function could not act.

Plain functions over one ``calcs.models.Assessment`` (or its ``detail``); no queries except
``sif_ids_with_repeat_offenders``. The SIF page, the plant overview, the register filter,
the charts, the evidence pack and the notifications read these, so the words and badge
styles of a verdict are written once, here. Nothing here decides whether a SIF meets its
target: that is ``Assessment.meets_target`` (= ``verdict["meets"]``, calcs.engine.verdict).
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

from register import choices

#: The caution every report, export and e-mail carries (pages: ``templates/_caution.html``).
CAUTION = ("Results support, and do not replace, a functional safety assessment by "
           "competent persons under IEC 61511 and local regulations.")


@dataclass(frozen=True)
class Badge:
    label: str
    style: str  # a CSS class of static/css/ledger.css


#: The overall verdict, keyed by the stored ``meets_target`` (True / False / None).
VERDICT_BADGE = {
    True: Badge("meets target", "badge-ok"),
    False: Badge("does not meet target", "badge-fail"),
    None: Badge("not shown to meet its target", "badge-neutral"),
}

#: One criterion of the verdict, keyed by its stored status.
LINE_BADGE = {
    "pass": Badge("pass", "badge-pass"),
    "fail": Badge("fail", "badge-fail"),
    "unknown": Badge("not calculable", "badge-neutral"),
}

#: A component whose own record puts it far above its device type; a common-cause episode.
OFFENDER_BADGE = Badge("repeat offender", "badge-late")
COMMON_CAUSE_BADGE = Badge("common cause", "badge-late")

#: Figures of the SIF page tied to a criterion of the verdict (criterion key -> field).
CRITERION_FIGURE = {
    "design": "design_pfd_avg",
    "achieved_12m": "achieved_pfd_avg",
    "observed_12m": "observed_unavailability",
    "projected": "projected_pfd_avg",
}

LEGACY_NOTE = ("This calculation was stored before each criterion was recorded with it; "
               "the next recalculation lists them.")


def verdict_badge(meets: bool | None) -> Badge:
    return VERDICT_BADGE[meets]


def verdict_lines_from(verdict: dict | None) -> list[dict]:
    """The criteria of a stored verdict (``Verdict.as_dict()``), each with its badge:
    ``key``, ``label``, ``status``, ``badge``, ``reason``, ``value``, ``limit``."""
    out = []
    for line in (verdict or {}).get("lines", []) or []:
        status = line.get("status") if line.get("status") in LINE_BADGE else "unknown"
        out.append({**line, "status": status, "badge": LINE_BADGE[status]})
    return out


def verdict_lines(assessment) -> list[dict]:
    """The criteria stored with an assessment; empty for one stored without a verdict."""
    return verdict_lines_from(assessment.verdict if assessment else None)


def verdict_summary(assessment) -> str:
    """The stored one-sentence summary, or one built from the failed and unknown lines."""
    if assessment is None:
        return ""
    summary = (assessment.verdict or {}).get("summary")
    if summary:
        return summary
    lines = verdict_lines(assessment)
    failed = [x["reason"] for x in lines if x["status"] == "fail"]
    unknown = [x["reason"] for x in lines if x["status"] == "unknown"]
    if assessment.meets_target is False:
        return "Does not meet its target" + (": " + "; ".join(failed) if failed else "") + "."
    if assessment.meets_target is None:
        return "Not shown to meet its target" + (": " + "; ".join(unknown) if unknown else "") + "."
    return "Meets its target."


def rate_basis_label(code: str | None) -> str:
    if not code:
        return "not recorded"
    try:
        return str(choices.RateBasis(code).label)
    except ValueError:
        return code


def _when(value) -> dt.datetime | None:
    if value is None or isinstance(value, dt.datetime):
        return value
    try:
        parsed = dt.datetime.fromisoformat(str(value))
    except ValueError:
        return None
    return parsed if parsed.tzinfo else parsed.replace(tzinfo=dt.UTC)


def observed_episodes(detail: dict | None) -> list[dict]:
    """``detail["observed_episodes"]`` with datetimes, oldest first; an episode without a
    readable onset or restoration is left out."""
    out = []
    for ep in (detail or {}).get("observed_episodes", []) or []:
        start, found, end = (_when(ep.get(k)) for k in ("onset_from", "onset_to", "restored_at"))
        if start is None or end is None:
            continue
        out.append({**ep, "onset_from": start, "onset_to": found or end, "restored_at": end,
                    "components": list(ep.get("components") or [])})
    out.sort(key=lambda e: e["onset_from"])
    return out


def repeat_offenders(detail: dict | None) -> list[dict]:
    """Components whose own failure record puts them well above their device type: the
    rows of ``detail["rates"]`` flagged ``repeat_offender``, each with ``own_per_hour`` (its
    own rate; the rate used when no separate own rate is stored)."""
    return [{**r, "own_per_hour": r.get("own_per_hour", r.get("used_per_hour"))}
            for r in (detail or {}).get("rates", []) or [] if r.get("repeat_offender")]


def sif_drivers(detail: dict | None) -> list[str]:
    """The SIF-level drivers, without the copies of subsystem drivers (``"<name>: ..."``)
    that are shown under their subsystem."""
    detail = detail or {}
    copies = {f"{s.get('name')}: {x}" for s in detail.get("subsystems", []) or []
              for x in s.get("drivers") or []}
    return [x for x in detail.get("drivers") or [] if x not in copies]


def subsystem_figures(assessment) -> list[dict]:
    """Per subsystem: design, achieved and observed (12 months) side by side, the method of
    the design figure and what drives the difference."""
    rows = []
    for s in ((assessment.detail or {}).get("subsystems", []) if assessment else []):
        rows.append({"name": s.get("name"), "voting": s.get("voting"),
                     "design": s.get("design_pfd_avg"), "achieved": s.get("achieved_pfd_avg"),
                     "observed": s.get("observed_unavailability"),
                     "method": s.get("pfd_method") or "", "drivers": s.get("drivers") or []})
    return rows


def figure_rows(assessment) -> list[dict]:
    """Rows of the SIF page's figures table; a row tied to a criterion carries that line."""
    lines = {x["key"]: x for x in verdict_lines(assessment)}
    rows = [
        ("Design", "design_pfd_avg", "design"),
        ("Achieved, last 12 months", "achieved_pfd_avg", "achieved_12m"),
        ("Observed unavailability, last 12 months", "observed_unavailability", "observed_12m"),
        ("Achieved since in service", "achieved_since_service_pfd_avg", None),
        ("Observed unavailability since in service", "observed_since_service", None),
        ("Projected to the next test cycle", "projected_pfd_avg", "projected"),
    ]
    return [{"label": label, "field": name, "value": getattr(assessment, name, None),
             "line": lines.get(key) if key else None} for label, name, key in rows]


def assessment_view(assessment) -> dict | None:
    """Everything the SIF page shows of the latest assessment beyond its raw fields."""
    if assessment is None:
        return None
    detail = assessment.detail or {}
    lines = verdict_lines(assessment)
    subsystems = subsystem_figures(assessment)
    drivers = sif_drivers(detail)
    return {
        "badge": verdict_badge(assessment.meets_target),
        "summary": verdict_summary(assessment),
        "lines": lines,
        "legacy_note": "" if lines else LEGACY_NOTE,
        "figures": figure_rows(assessment),
        "subsystems": subsystems,
        "drivers": drivers,
        "has_drivers": bool(drivers or any(s["drivers"] for s in subsystems)),
        "rate_basis": rate_basis_label(assessment.rate_basis),
        "rates_count": len(detail.get("rates") or []),
        "repeat_offenders": repeat_offenders(detail),
        "episodes": observed_episodes(detail),
        "offender_badge": OFFENDER_BADGE,
        "common_cause_badge": COMMON_CAUSE_BADGE,
    }


def sif_ids_with_repeat_offenders(latest_ids) -> set[int]:
    """SIFs whose assessment among ``latest_ids`` (ids of the latest assessments, a list or
    a subquery) flags a repeat offender. Reads only ``detail["rates"]``."""
    from register.calculations import calculations

    return {sif_id for sif_id, rates in calculations().Assessment.objects.filter(pk__in=latest_ids)
            .values_list("sif_id", "detail__rates")
            if repeat_offenders({"rates": rates})}
