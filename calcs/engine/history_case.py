"""Proof-test history from a JSON case (``python -m calcs`` history mode): parse the case,
evaluate the achieved PFDavg (``history``) and the observed unavailability (``observed``)."""

from __future__ import annotations

import difflib
from datetime import date, datetime, timedelta
from typing import Any

from calcs.engine import observed as _observed
from calcs.engine.errors import InputError
from calcs.engine.history import (
    TEST_KINDS,
    Channel,
    Group,
    SifHistory,
    TestEvent,
    _as_utc_naive,
    _fmt,
    _hours,
    _num,
    achieved_pfd,
    one_year_before,
)
from calcs.engine.units import (
    check_date_window,
    check_not_after,
    check_number,
    check_rate,
)
from calcs.engine.voting import parse_voting

# --------------------------------------------------------------------------
# The keys a case may hold, each with what it is: a quantity of
# calcs.engine.units.BOUNDS (checked there), "date", "text", "bool", "list" of
# objects of the schema given, or "object" of the schema given.

_TEXT, _DATE, _BOOL, _ANY = "text", "date", "bool", "any"
_TEST_KEYS: dict[str, Any] = {
    "date": _DATE, "kind": _TEXT, "coverage": "fraction", "failed": _BOOL,
    "failed_channels": _ANY, "replaced": _BOOL, "restore_hours": "repair_hours",
    "notes": _TEXT, "description": _TEXT,
}
_SUBSYSTEM_KEYS: dict[str, Any] = {
    "name": _TEXT, "voting": _TEXT, "tag": _TEXT, "description": _TEXT, "notes": _TEXT,
    "lambda_du_per_hour": "rate_per_hour", "lambda_dd_per_hour": "rate_per_hour",
    "lambda_sd_per_hour": "safe_rate_per_hour", "lambda_s_per_hour": "safe_rate_per_hour",
    "beta": "fraction", "beta_d": "fraction", "mttr_hours": "repair_hours",
    "mrt_hours": "repair_hours", "proof_test_interval_hours": "interval_hours",
    "proof_test_coverage": "fraction", "mission_time_hours": "interval_hours",
    "partial_test_interval_hours": "interval_hours", "partial_test_coverage": "fraction",
    "sff": "fraction", "hft_type": _TEXT, "systematic_capability": _ANY,
    "overhaul_date": _DATE, "tests": ("list", _TEST_KEYS),
}
_PERIOD_KEYS: dict[str, Any] = {"start": _DATE, "end": _DATE}
CASE_KEYS: dict[str, Any] = {
    "demand_mode": _TEXT, "method": _TEXT, "architecture_route": _TEXT,
    "target_pfd_avg": "target_pfd", "target_pfh_per_hour": "target_pfh_per_hour",
    "subsystems": ("list", _SUBSYSTEM_KEYS), "in_service": _DATE, "as_of": _DATE,
    "bypasses": ("list", {**_PERIOD_KEYS, "reason": _TEXT, "notes": _TEXT}),
    "window": ("object", _PERIOD_KEYS), "name": _TEXT, "tag": _TEXT,
    "description": _TEXT, "notes": _TEXT,
}


def check_case(data: Any, *, today: date | None = None) -> None:
    """Refuse what a case must not hold, before it is evaluated: a key the format does
    not know (naming the nearest known one), a number that is not finite or outside its
    plausible range (``calcs.engine.units.BOUNDS``), a date outside the plausible window,
    a bypass or window that ends before it starts. Raises :class:`InputError`."""
    if not isinstance(data, dict):
        raise InputError("case", f"must be a JSON object, got {type(data).__name__}")
    _check_keys(data, CASE_KEYS, "", today)
    periods = [(f"bypasses[{i}]", b) for i, b in enumerate(data.get("bypasses") or [])]
    periods.append(("window", data.get("window")))
    for where, period in periods:
        if not isinstance(period, dict) or not period.get("start") or not period.get("end"):
            continue
        start = _parse_when(period["start"], f"{where}.start")
        end = _parse_when(period["end"], f"{where}.end")
        if end < start:
            raise InputError(f"{where}.end", f"{end.isoformat()} is before the start "
                                             f"({start.isoformat()})")


def _check_keys(d: dict, schema: dict, path: str, today: date | None) -> None:
    for key, value in d.items():
        where = f"{path}.{key}" if path else str(key)
        if key not in schema:
            near = difflib.get_close_matches(str(key), list(schema), n=1)
            hint = f"; did you mean \"{near[0]}\"?" if near else ""
            raise InputError(where, f"unknown key{hint}")
        kind = schema[key]
        if value is None or kind == _ANY:
            continue
        if isinstance(kind, tuple):
            shape, inner = kind
            items = value if shape == "list" else [value]
            if shape == "list" and not isinstance(value, list):
                raise InputError(where, "must be a list")
            for i, item in enumerate(items):
                at = f"{where}[{i}]" if shape == "list" else where
                if not isinstance(item, dict):
                    raise InputError(at, "must be an object")
                _check_keys(item, inner, at, today)
        elif kind == _DATE:
            if value != "":
                check_date_window(_parse_when(value, where), where, today=today)
        elif kind == _TEXT:
            if not isinstance(value, str):
                raise InputError(where, f"must be a text, got {value!r}")
        elif kind == _BOOL:
            if not isinstance(value, bool):
                raise InputError(where, "must be true or false")
        else:
            check_number(value, kind, where)


# --------------------------------------------------------------------------
# JSON case


def _parse_when(value: Any, field_name: str) -> datetime:
    if isinstance(value, (datetime, date)):
        return _as_utc_naive(value, field_name)
    if not isinstance(value, str):
        raise InputError(field_name, f"must be an ISO date such as 2024-03-31, got {value!r}")
    try:
        dt = datetime.fromisoformat(value.strip())
    except ValueError:
        raise InputError(field_name, f"'{value}' is not an ISO date such as 2024-03-31") from None
    return _as_utc_naive(dt, field_name)


def _get_num(d: dict, key: str, path: str, default: Any = None, lo: float = 0.0,
             hi: float | None = None, required: bool = False) -> float | None:
    if key not in d or d[key] is None:
        if required:
            raise InputError(f"{path}.{key}" if path else key, "is required")
        return default
    return _num(d[key], f"{path}.{key}" if path else key, lo, hi)


def evaluate_case_history(data: dict, *, today: date | None = None) -> dict:
    """Achieved PFDavg of a JSON case (the design-case format plus dates).

    Each subsystem gets N identical channels (N from its voting); its "tests"
    apply to every channel. "in_service" (ISO date) is required. Window: the
    given "window" {"start","end"}; the end defaults to "as_of", else to the
    latest date in the case (tests, bypasses, in service); the start defaults
    to 12 calendar months before the end (clipped to in service, flagged).
    Flags also list full tests that came more than one day later than the
    subsystem's proof-test interval allows, and a full test overdue at the
    window end. Besides the design fields, a subsystem may give
    "overhaul_date", and a test "restore_hours" (default: mrt_hours) and
    "coverage" (default by kind: proof_test_coverage for "full",
    partial_test_coverage for "partial", 0 for "demand"). A bypass without
    "end" runs to the window end (flagged). Demand mode other than "low" is
    computed but flagged. mission_time_hours is not applied as an overhaul
    (only a recorded "overhaul_date" renews the untested share); it is flagged
    when exceeded with proof_test_coverage < 1.
    """
    if not isinstance(data, dict):
        raise InputError("case", "must be a JSON object")
    flags: list[str] = []
    if "in_service" not in data or data["in_service"] in (None, ""):
        raise InputError("in_service", "the date the SIF went into service is required")
    ins = _parse_when(data["in_service"], "in_service")
    mode = data.get("demand_mode", "low")
    if mode not in (None, "low"):
        flags.append("achieved PFDavg is a low-demand measure; for a high-demand or continuous "
                     "function use the PFH of the design calculation")
    subs = data.get("subsystems")
    if not isinstance(subs, list) or not subs:
        raise InputError("subsystems", "must be a non-empty list")
    latest = ins
    dated: list[tuple[str, datetime]] = []
    groups: list[Group] = []
    schedule: list[tuple[str, float, list[datetime]]] = []
    for i, s in enumerate(subs):
        p = f"subsystems[{i}]"
        if not isinstance(s, dict):
            raise InputError(p, "must be an object")
        name = s.get("name", f"subsystem {i + 1}")
        if not isinstance(name, str) or not name.strip():
            raise InputError(f"{p}.name", "must be a non-empty text")
        v = parse_voting(s.get("voting", "1oo1"), f"{p}.voting")
        if s.get("lambda_du_per_hour") is None:
            raise InputError(f"{p}.lambda_du_per_hour", "is required")
        ldu = check_rate(s["lambda_du_per_hour"], f"{p}.lambda_du_per_hour")
        ldd = (0.0 if s.get("lambda_dd_per_hour") is None
               else check_rate(s["lambda_dd_per_hour"], f"{p}.lambda_dd_per_hour"))
        beta = _get_num(s, "beta", p, 0.0, hi=1.0)
        beta_d = _get_num(s, "beta_d", p, 0.0, hi=1.0)
        mttr = _get_num(s, "mttr_hours", p, 8.0)
        mrt = _get_num(s, "mrt_hours", p, mttr)
        t1 = _get_num(s, "proof_test_interval_hours", p, None)
        ptc = _get_num(s, "proof_test_coverage", p, 1.0, hi=1.0)
        theta = _get_num(s, "partial_test_coverage", p, 0.0, hi=1.0)
        mt = _get_num(s, "mission_time_hours", p, None)
        if theta > ptc:
            raise InputError(f"{p}.partial_test_coverage",
                             f"{theta:g} exceeds the proof-test coverage {ptc:g}")
        raw_tests = s.get("tests", [])
        if raw_tests is None:
            raw_tests = []
        if not isinstance(raw_tests, list):
            raise InputError(f"{p}.tests", "must be a list")
        events = []
        per_channel: list[list[TestEvent]] = [[] for _ in range(v.n)]
        full_dates = []
        for j, t in enumerate(raw_tests):
            tp = f"{p}.tests[{j}]"
            if not isinstance(t, dict):
                raise InputError(tp, "must be an object")
            if "date" not in t:
                raise InputError(f"{tp}.date", "is required")
            when = _parse_when(t["date"], f"{tp}.date")
            kind = t.get("kind", "full")
            if kind not in TEST_KINDS:
                raise InputError(f"{tp}.kind", f"must be one of {', '.join(TEST_KINDS)}")
            cov = _get_num(t, "coverage", tp, None, hi=1.0)
            failed = t.get("failed", False)
            if not isinstance(failed, bool):
                raise InputError(f"{tp}.failed", "must be true or false")
            rest = _get_num(t, "restore_hours", tp, None)
            replaced = t.get("replaced", False)
            if not isinstance(replaced, bool):
                raise InputError(f"{tp}.replaced", "must be true or false")
            chosen = _failed_channels(t, tp, v.n, failed)
            for ci in range(v.n):
                per_channel[ci].append(TestEvent(
                    at=when, kind=kind, coverage=cov, failed=ci in chosen,
                    restore_hours=rest, replaced=replaced and ci in chosen))
            events.append((f"{tp}.date", when))
            latest = max(latest, when)
            if kind == "full" and when >= ins:
                full_dates.append(when)
        overhaul = None
        if s.get("overhaul_date") is not None:
            overhaul = _parse_when(s["overhaul_date"], f"{p}.overhaul_date")
        try:
            chans = [Channel(lambda_du=ldu, lambda_dd=ldd, mttr_hours=mttr, mrt_hours=mrt,
                             proof_test_coverage=ptc, partial_test_coverage=theta,
                             in_service=ins, overhaul_at=overhaul, tests=tuple(tests))
                     for tests in per_channel]
            if all(x == per_channel[0] for x in per_channel):
                chans = [chans[0]] * v.n  # identical channels (one object)
            groups.append(Group(name=name, voting=str(v), beta=beta, beta_d=beta_d,
                                channels=tuple(chans)))
        except InputError as e:
            raise InputError(f"{p}.{e.field}", e.message) from None
        dated.extend(events)
        if overhaul is not None:
            dated.append((f"{p}.overhaul_date", overhaul))
        if t1:
            schedule.append((name, t1, sorted(full_dates)))
        if mt and ptc < 1.0:
            schedule.append((name, -mt, []))  # marker for the mission-time check
    bypasses = []
    for i, b in enumerate(data.get("bypasses") or []):
        bp = f"bypasses[{i}]"
        if not isinstance(b, dict) or "start" not in b:
            raise InputError(f"{bp}.start", "is required")
        bs = _parse_when(b["start"], f"{bp}.start")
        be = None if b.get("end") in (None, "") else _parse_when(b["end"], f"{bp}.end")
        if be is not None and be < bs:
            raise InputError(f"{bp}.end", f"{be.isoformat()} is before the start "
                                          f"({bs.isoformat()})")
        bypasses.append((bs, be))
        dated.append((f"{bp}.start", bs))
        if be is not None:
            dated.append((f"{bp}.end", be))
        latest = max([latest, bs] + ([be] if be else []))
    as_of = None if data.get("as_of") in (None, "") else _parse_when(data["as_of"], "as_of")
    win = data.get("window") or {}
    if not isinstance(win, dict):
        raise InputError("window", "must be an object with start and end")
    if win.get("end"):
        end = _parse_when(win["end"], "window.end")
    else:
        end = as_of if as_of is not None else latest
    evaluation = as_of if as_of is not None else end
    if today is not None and as_of is None and not win.get("end"):
        latest_field, latest_when = max(dated, key=lambda x: x[1], default=("in_service", ins))
        if _as_utc_naive(latest_when, latest_field).date() > today:
            raise InputError(latest_field, f"{latest_when.date().isoformat()} is later than "
                                           f"today ({today.isoformat()}); give \"as_of\" or "
                                           "\"window.end\" to evaluate a future date")
    for where, when in dated:
        check_not_after(when, evaluation, where, "the evaluation date")
    start = _parse_when(win["start"], "window.start") if win.get("start") else one_year_before(end)
    sif = SifHistory(groups=tuple(groups), bypasses=tuple(bypasses))
    res = achieved_pfd(sif, start, end, as_of=evaluation)

    obs = _observed.observed_unavailability(sif, start, end, as_of=evaluation)
    flags.extend(res.flags)
    end_h = _hours(end, "window.end")
    for name, t1, dates in schedule:
        if t1 < 0:
            mt = -t1
            if end_h - _hours(ins, "in_service") > mt:
                flags.append(f"{name}: in service longer than its mission time "
                             f"({mt:g} h); failures no proof test reveals keep accumulating")
            continue
        prev = ins
        for d in dates:
            if d > end:
                break
            gap = (d - prev) / timedelta(hours=1)
            if gap > t1 + 24.0:
                flags.append(f"{name}: full test on {d.date().isoformat()} came "
                             f"{(gap - t1) / 24.0:.0f} days after it was due")
            prev = max(prev, d)
        due = _hours(prev, "date") + t1
        if end_h > due + 24.0:
            flags.append(f"{name}: full test overdue at {_fmt(end_h)} "
                         f"(due {_fmt(due)}, {(end_h - due) / 24.0:.0f} days late)")
    return {
        "achieved_pfd_avg": res.pfd_avg,
        "window": {"start": res.window_start.isoformat(), "end": res.window_end.isoformat()},
        "hours": res.hours,
        "bypass_hours": res.bypass_hours,
        "pfd_at_window_end": res.pfd_at_end,
        "observed_unavailability": obs.unavailability,
        "observed_unavailable_hours": obs.unavailable_hours,
        "observed_episodes": [{
            "subsystem": e.group, "channels": list(e.channels),
            "onset_after": e.onset_from.isoformat(), "found_at": e.found_at.isoformat(),
            "restored_at": e.restored_at.isoformat(), "found_by": e.found_by,
            "common_cause": e.common_cause, "hours_in_window": e.hours_in_window,
        } for e in obs.episodes],
        "flags": flags,
        "subsystems": {k: {"achieved_pfd_avg": val,
                           "observed_unavailability": obs.groups[k]}
                       for k, val in res.groups.items()},
    }


def _failed_channels(t: dict, tp: str, n: int, failed: bool) -> set[int]:
    """Which channels a test found failed: "failed_channels" (0-based) when given,
    else every channel when "failed" is true."""
    raw = t.get("failed_channels")
    if raw is None:
        return set(range(n)) if failed else set()
    if not isinstance(raw, list):
        raise InputError(f"{tp}.failed_channels", "must be a list of channel numbers (0-based)")
    out: set[int] = set()
    for i, x in enumerate(raw):
        if isinstance(x, bool) or not isinstance(x, int) or not 0 <= x < n:
            raise InputError(f"{tp}.failed_channels[{i}]",
                             f"must be a channel number from 0 to {n - 1}, got {x!r}")
        out.add(x)
    if "failed" in t and t["failed"] is False and out:
        raise InputError(f"{tp}.failed", "is false but failed_channels names failed channels")
    return out
