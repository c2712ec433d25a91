"""One SIF as a JSON-like dict in, one result dict out.

Used by ``python -m calcs CASE.json`` and reusable by web code. Input keys::

    {
      "demand_mode": "low" | "high",               (default "low")
      "method": "iec61508-6" | "isa-tr84.00.02",   (default "iec61508-6")
      "architecture_route": "auto" | "61511" | "1H", (default "auto")
      "target_pfd_avg": 0.005,                     (optional, low demand)
      "target_pfh_per_hour": 1e-7,                 (optional, high demand)
      "subsystems": [{
        "name": "...", "voting": "2oo3",
        "lambda_du_per_hour": 1e-7, "lambda_dd_per_hour": 0,
        "lambda_sd_per_hour": 0, "lambda_s_per_hour": (optional),
        "beta": 0, "beta_d": 0, "mttr_hours": 8, "mrt_hours": (= mttr_hours),
        "proof_test_interval_hours": 8760, "proof_test_coverage": 1,
        "mission_time_hours": (required when proof_test_coverage < 1),
        "partial_test_interval_hours" and "partial_test_coverage": (both or neither),
        "sff": (optional), "hft_type": "A" | "B" (optional),
        "systematic_capability": 1..4 (optional)
      }]
    }

JSON ``null`` for an optional key means "not given". Errors are raised as
:class:`InputError` whose field is the path of the bad input, for example
``subsystems[0].beta``.

Each subsystem of the output gives its design ``pfd_avg`` with ``pfd_method`` (which
method set it: the simplified equations, the exact Markov model, or the exact value +
25 %; see :mod:`calcs.engine.design`), ``pfd_avg_simplified`` (the simplified equations'
value before clipping) and ``pfd_avg_exact`` (the exact Markov value; null for groups of
more than four channels).

If the case has a top-level "in_service" key or a subsystem has a "tests"
key, the proof-test history part is evaluated by
``calcs.engine.history_case.evaluate_case_history(data)`` and its keys are merged
into the output (top-level keys, and per-subsystem keys by subsystem name).
"""

from __future__ import annotations

import math
from typing import Any

from calcs.engine import design
from calcs.engine.errors import InputError
from calcs.engine.sil import ROUTE_AUTO

_REQUIRED = ("name", "voting", "lambda_du_per_hour", "proof_test_interval_hours")
_OPTIONAL = (
    "lambda_dd_per_hour", "lambda_sd_per_hour", "lambda_s_per_hour", "beta", "beta_d",
    "mttr_hours", "mrt_hours", "proof_test_coverage", "mission_time_hours",
    "partial_test_interval_hours", "partial_test_coverage", "sff", "hft_type",
    "systematic_capability",
)
_SUBSYSTEM_OTHER = ("tests", "tag", "description", "notes")
_TOP_KEYS = (
    "demand_mode", "method", "architecture_route", "target_pfd_avg", "target_pfh_per_hour",
    "subsystems", "in_service", "name", "tag", "description", "notes",
)


def _finite_or_none(value: float | None) -> float | None:
    if value is None or not math.isfinite(value):
        return None
    return value


def _subsystem(raw: object, i: int) -> design.Subsystem:
    where = f"subsystems[{i}]"
    if not isinstance(raw, dict):
        raise InputError(where, f"must be an object, got {type(raw).__name__}")
    kwargs: dict[str, Any] = {}
    for key in _REQUIRED:
        if raw.get(key) is None:
            raise InputError(f"{where}.{key}", "is required")
        kwargs[key] = raw[key]
    for key in _OPTIONAL:
        if raw.get(key) is not None:
            kwargs[key] = raw[key]
    try:
        return design.Subsystem(**kwargs)
    except InputError as exc:
        raise InputError(f"{where}.{exc.field}", exc.message) from None


def _unknown_keys(data: dict, history: bool) -> list[str]:
    if history:
        return []
    notes = [f"unknown key '{k}' ignored" for k in data if k not in _TOP_KEYS]
    for i, raw in enumerate(data.get("subsystems") or []):
        if isinstance(raw, dict):
            known = _REQUIRED + _OPTIONAL + _SUBSYSTEM_OTHER
            notes += [f"unknown key 'subsystems[{i}].{k}' ignored" for k in raw if k not in known]
    return notes


def build_design(data: dict) -> design.SifDesign:
    """Validate ``data`` and build the :class:`~calcs.engine.design.SifDesign`."""
    if not isinstance(data, dict):
        raise InputError("case", f"must be a JSON object, got {type(data).__name__}")
    subs = data.get("subsystems")
    if subs is None:
        raise InputError("subsystems", "is required")
    if not isinstance(subs, list):
        raise InputError("subsystems", f"must be a list, got {type(subs).__name__}")
    if not subs:
        raise InputError("subsystems", "must list at least one subsystem")
    subsystems = tuple(_subsystem(raw, i) for i, raw in enumerate(subs))
    kwargs: dict[str, Any] = {"subsystems": subsystems}
    for key, arg in (("demand_mode", "demand_mode"), ("method", "method"),
                     ("architecture_route", "route"), ("target_pfd_avg", "target_pfd_avg"),
                     ("target_pfh_per_hour", "target_pfh_per_hour")):
        if data.get(key) is not None:
            kwargs[arg] = data[key]
    try:
        return design.SifDesign(**kwargs)
    except InputError as exc:
        field = "architecture_route" if exc.field == "route" else exc.field
        raise InputError(field, exc.message) from None


def _wants_history(data: dict) -> bool:
    if "in_service" in data:
        return True
    return any(isinstance(s, dict) and "tests" in s for s in data.get("subsystems") or [])


def _history(data: dict, today=None) -> dict:
    try:
        from calcs.engine.history_case import evaluate_case_history
    except ModuleNotFoundError as exc:
        if exc.name not in (f"{__package__}.history", f"{__package__}.history_case"):
            raise
        field = "in_service" if "in_service" in data else "subsystems[].tests"
        raise InputError(field, "proof-test history evaluation is not available in this "
                                "installation (module calcs.engine.history is missing)") from None
    except ImportError:
        field = "in_service" if "in_service" in data else "subsystems[].tests"
        raise InputError(field, "proof-test history evaluation is not available in this "
                                "installation (evaluate_case_history cannot be imported)") from None
    result = evaluate_case_history(data, today=today)
    if not isinstance(result, dict):
        raise InputError("in_service", "history evaluation returned no result")
    return result


def evaluate_case(data: dict, *, today=None) -> dict:
    """Evaluate one SIF case (see module docstring); returns a JSON-ready dict.

    ``today`` (a date, given by the command) refuses a history whose latest record is
    later than today unless the case names its evaluation date.
    """
    sif = build_design(data)
    res = design.evaluate_sif(sif)
    low = res.demand_mode == "low"
    caution = list(res.caution)
    subsystems = []
    for r in res.subsystems:
        a = r.architecture
        subsystems.append({
            "name": r.name,
            "voting": r.voting,
            "hft": r.hft,
            "pfd_avg": r.pfd_avg,
            "pfd_method": r.pfd_method,
            "pfd_avg_simplified": r.pfd_avg_simplified,
            "pfd_avg_exact": r.pfd_avg_exact,
            "pfh_per_hour": r.pfh_per_hour,
            "effective_test_interval_hours": r.effective_test_interval_hours,
            "sff": r.sff,
            "architectural_sil": a.sil,
            "architectural_route": a.route,
            "architectural_sil_61511": a.by_61511,
            "architectural_sil_route_1h": a.by_route_1h,
            "systematic_capability": r.systematic_capability,
        })
    out: dict[str, Any] = {
        "method": res.method,
        "demand_mode": res.demand_mode,
        "pfd_avg": res.pfd_avg,
        "rrf": _finite_or_none(res.rrf),
        "pfh_per_hour": res.pfh_per_hour,
        "sil": res.sil,
        "architectural_sil": res.architectural_sil,
        "systematic_capability": res.systematic_capability,
        "claimable_sil": res.claimable_sil,
        "sil_limited_by": res.sil_limited_by,
        "subsystems": subsystems,
    }
    target = sif.target_pfd_avg if low else sif.target_pfh_per_hour
    if target is not None:
        interval = design.max_proof_test_interval(sif, target)
        if low:
            out["target_pfd_avg"] = target
        else:
            out["target_pfh_per_hour"] = target
        out["meets_target"] = res.meets_target
        out["max_proof_test_interval_hours"] = interval
        out["max_proof_test_interval_capped"] = (
            interval is not None and interval >= design.proof_test_interval_cap(sif))
    if low and sif.target_pfh_per_hour is not None:
        caution.append("target_pfh_per_hour ignored: the SIF is in low demand mode")
    if not low and sif.target_pfd_avg is not None:
        caution.append("target_pfd_avg ignored: the SIF is in high demand mode "
                       "(give target_pfh_per_hour)")
    if sif.route == ROUTE_AUTO:
        for sub in sif.subsystems:
            if sub.hft_type is not None and sub.safe_failure_fraction() is None:
                caution.append(f"{sub.name}: hft_type given without sff; Route 1H not applied")
    wants_history = _wants_history(data)
    caution += _unknown_keys(data, wants_history)
    if wants_history:
        hist = _history(data, today)
        by_name = {s["name"]: s for s in subsystems}
        for key, value in hist.items():
            if key == "subsystems":
                continue
            if key == "caution" and isinstance(value, list):
                caution += [str(v) for v in value]
            else:
                out[key] = value
        per_sub = hist.get("subsystems") or {}
        if isinstance(per_sub, dict):
            for name, extra in per_sub.items():
                if name in by_name and isinstance(extra, dict):
                    by_name[name].update(extra)
    out["caution"] = caution
    return out

