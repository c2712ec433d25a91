"""Achieved PFDavg of a SIF from its recorded life (proof tests, repairs, bypasses).

The design calculation assumes tests exactly every T1. This module instead takes
what actually happened — the dates of full and partial tests, tests that found a
dangerous failure, bypasses — and computes the time-dependent probability of
failure on demand PFD(t) and its average over a window (the "achieved PFDavg").

The engine never reads the clock: every date is a parameter.

Model (all rates per hour, times in hours, 1 year = 8760 h)
------------------------------------------------------------
Channel, dangerous undetected failures (rate lambda_DU):

* The rate is split by how deep a test must go to reveal the failure. Tests are
  nested: a test with coverage c reveals the share c of lambda_DU, and that
  share includes everything a less thorough test reveals. With the channel's
  partial-test coverage theta and full-test coverage PTC (theta <= PTC):

    - theta * lDU           revealed by partial AND full tests;
    - (PTC - theta) * lDU   revealed by full tests only;
    - (1 - PTC) * lDU       revealed by no test; only an overhaul (or putting
                            the channel into service) renews it.

  A test record may state its own coverage; the split then gets one more
  boundary so that the record reveals exactly the share it states.
* Each share j is a hidden state with probability 1 - exp(-lambda_j * age_j(t)),
  where age_j is the time since that share was last renewed (in service,
  overhaul, a test of coverage >= the share's upper boundary).
* A test that found a dangerous failure makes the channel unavailable (q = 1)
  for restore_hours (default: the channel's MRT); at the end of the repair the
  channel is as new (every share renewed).
* Dangerous detected failures add a constant (1 - beta_D) * lambda_DD * MTTR.
* q_channel(t) = 1 - (1 - q_DD) * prod_j (1 - q_j(t)).

Group (MooN): the channels' independent parts use (1 - beta) * lambda_DU. The
common-cause share beta * lambda_DU is ONE hidden state of the group, split the
same way by coverage and renewed by a test of ANY channel that reaches its
depth (the first channel tested reveals a failure common to all). Common
detected failures add beta_D * lambda_DD * MTTR at group level. For
non-identical channels the common-cause rates use the geometric mean of the
channels' rates (a stated choice). A 1-channel group ignores beta and beta_D.

    Q_indep(t) = P(at least N - M + 1 channels failed)   (Poisson-binomial)
    Q_group(t) = 1 - (1 - Q_ccf(t)) * (1 - Q_indep(t))
    Q_sif(t)   = 1 - prod_groups (1 - Q_group(t)), and 1 during a bypass.

Achieved PFDavg = time average of Q_sif over the window. Between two events
(any renewal, repair start/end, bypass start/end) Q_sif is smooth, so each such
piece (split further into pieces of at most ``max_piece_hours``) is integrated
with Gauss-Legendre quadrature; the result is exact to well below 1e-6 relative.

Dates: ``date`` or ``datetime``; timezone-aware values are converted to UTC,
naive values are taken as UTC. Returned datetimes are naive UTC, or aware UTC
when the window end passed in was aware.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import UTC, date, datetime, timedelta
from typing import Any

import numpy as np

from calcs.engine.batch import evaluate_many
from calcs.engine.errors import InputError
from calcs.engine.units import check_rate
from calcs.engine.voting import parse_voting

TEST_KINDS = ("full", "partial", "demand")

#: Relative difference between the history model run on a perfect schedule and
#: a design PFDavg above which :func:`planned_schedule_check` flags the pair.
#: Justification: the simplified (Annex B / ISA) equations are linearised and
#: conservative — for lambda*T1 <= 0.1 they exceed the exact time-dependent
#: average by up to +6.7 % (check-values S7.5, independent 1oo2) — and they add
#: MRT terms (about 2*MRT/T1, 0.2 % for 8 h and one year) that this model only
#: counts when a test actually finds a failure. 15 % leaves room for these
#: known, explained differences; anything larger means the design calculation
#: and the register do not describe the same function (interval, rates,
#: voting or coverage differ).
DEFAULT_SCHEDULE_TOLERANCE = 0.15

_EPOCH = datetime(1970, 1, 1)
_EPOCH_UTC = _EPOCH.replace(tzinfo=UTC)
_HOUR = timedelta(hours=1)
_GL_CACHE: dict[int, tuple[np.ndarray, np.ndarray]] = {}


# --------------------------------------------------------------------------
# dates


def _as_utc_naive(value: Any, field_name: str) -> datetime:
    if isinstance(value, datetime):
        dt = value
    elif isinstance(value, date):
        dt = datetime(value.year, value.month, value.day)
    else:
        raise InputError(field_name, f"must be a date or datetime, got {value!r}")
    if dt.tzinfo is not None:
        dt = dt.astimezone(UTC).replace(tzinfo=None)
    return dt


def _hours(value: Any, field_name: str) -> float:
    # Hours since the epoch, exactly (value - epoch) / 1 h on the UTC time line. An aware
    # value is subtracted from an aware epoch directly (Python does that in integer
    # microseconds, the same as converting to naive UTC first, without the conversion).
    if type(value) is datetime:
        tz = value.tzinfo
        if tz is None:
            return (value - _EPOCH) / _HOUR
        if tz.utcoffset(value) is not None:
            return (value - _EPOCH_UTC) / _HOUR
    return (_as_utc_naive(value, field_name) - _EPOCH) / _HOUR


def _check_date(value: Any, field_name: str) -> None:
    """Raise as :func:`_as_utc_naive` would for a value that is no date."""
    if not isinstance(value, date):
        _as_utc_naive(value, field_name)


def _is_aware(value: Any) -> bool:
    return isinstance(value, datetime) and value.tzinfo is not None


def _to_dt(hours: float, aware: bool = False) -> datetime:
    dt = _EPOCH + timedelta(hours=float(hours))
    # round to the microsecond grid to avoid 23:59:59.999999 artefacts
    dt = dt.replace(microsecond=0) + timedelta(seconds=round(dt.microsecond / 1e6))
    return dt.replace(tzinfo=UTC) if aware else dt


def _fmt(hours: float) -> str:
    dt = _to_dt(hours)
    return dt.date().isoformat() if dt.time() == datetime.min.time() else dt.isoformat()


def one_year_before(value: datetime) -> datetime:
    """The same calendar date one year earlier (29 February -> 28 February)."""
    try:
        return value.replace(year=value.year - 1)
    except ValueError:
        return value.replace(year=value.year - 1, day=28)


# --------------------------------------------------------------------------
# validation helpers


def _num(value: Any, field_name: str, lo: float = 0.0, hi: float | None = None) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise InputError(field_name, f"must be a number, got {value!r}")
    x = float(value)
    if not math.isfinite(x):
        raise InputError(field_name, f"must be a finite number, got {value!r}")
    if x < lo:
        raise InputError(field_name, f"must be at least {lo:g}, got {x:g}")
    if hi is not None and x > hi:
        raise InputError(field_name, f"must be at most {hi:g}, got {x:g}")
    return x


# --------------------------------------------------------------------------
# inputs


@dataclass(frozen=True, kw_only=True)
class TestEvent:
    """One recorded test (or real demand) of a channel.

    ``coverage`` is the share of the channel's lambda_DU this event reveals;
    None means the channel default: its proof-test coverage for a full test,
    its partial-test coverage for a partial test, 0 for a demand (a real demand
    counts as a test only for the coverage recorded with it).
    ``failed``: a dangerous failure was found. ``restore_hours``: downtime after
    a failure found (None = the channel's MRT); a later passing test of the
    channel ends it earlier. ``replaced``: the device found failed was replaced
    (or overhauled), which renews every share of lambda_DU; otherwise it was
    repaired, which renews only the shares this test covers.
    """

    __test__ = False  # not a pytest test class

    at: datetime
    kind: str = "full"
    coverage: float | None = None
    failed: bool = False
    restore_hours: float | None = None
    replaced: bool = False

    def __post_init__(self) -> None:
        cov = self.coverage
        if (type(self.at) is datetime and self.kind in TEST_KINDS
                and self.failed.__class__ is bool and self.replaced.__class__ is bool
                and self.restore_hours is None
                and (cov is None or (type(cov) is float and 0.0 <= cov <= 1.0))):
            return  # the common case, valid (the checks below would pass)
        _check_date(self.at, "at")
        if self.kind not in TEST_KINDS:
            raise InputError("kind", f"must be one of {', '.join(TEST_KINDS)}, got {self.kind!r}")
        if self.coverage is not None:
            _num(self.coverage, "coverage", 0.0, 1.0)
        if not isinstance(self.failed, bool):
            raise InputError("failed", f"must be true or false, got {self.failed!r}")
        if self.restore_hours is not None:
            _num(self.restore_hours, "restore_hours")
        if not isinstance(self.replaced, bool):
            raise InputError("replaced", f"must be true or false, got {self.replaced!r}")


@dataclass(frozen=True, kw_only=True)
class Channel:
    """One channel (device) of a voted group and its recorded tests."""

    lambda_du: float
    in_service: datetime
    lambda_dd: float = 0.0
    mttr_hours: float = 8.0
    mrt_hours: float | None = None
    proof_test_coverage: float = 1.0
    partial_test_coverage: float = 0.0
    overhaul_at: datetime | None = None
    tests: tuple[TestEvent, ...] = ()
    #: (start, end) periods in which this device alone was bypassed (end None: still
    #: bypassed): the channel counts as failed then, so its group loses one channel
    bypasses: tuple[tuple[datetime, datetime | None], ...] = ()

    def __post_init__(self) -> None:
        check_rate(self.lambda_du, "lambda_du")
        check_rate(self.lambda_dd, "lambda_dd")
        _num(self.mttr_hours, "mttr_hours")
        if self.mrt_hours is not None:
            _num(self.mrt_hours, "mrt_hours")
        ptc = _num(self.proof_test_coverage, "proof_test_coverage", 0.0, 1.0)
        theta = _num(self.partial_test_coverage, "partial_test_coverage", 0.0, 1.0)
        if theta > ptc:
            raise InputError(
                "partial_test_coverage",
                f"{theta:g} exceeds the full proof-test coverage {ptc:g}; a partial test "
                "cannot reveal more than a full test",
            )
        _as_utc_naive(self.in_service, "in_service")
        if self.overhaul_at is not None:
            _as_utc_naive(self.overhaul_at, "overhaul_at")
        tests = tuple(self.tests)
        for i, t in enumerate(tests):
            if not isinstance(t, TestEvent):
                raise InputError(f"tests[{i}]", f"must be a TestEvent, got {type(t).__name__}")
        object.__setattr__(self, "tests", tests)
        object.__setattr__(self, "bypasses", _bypass_pairs(self.bypasses))

    @property
    def mrt(self) -> float:
        return float(self.mttr_hours if self.mrt_hours is None else self.mrt_hours)


@dataclass(frozen=True, kw_only=True)
class Group:
    """A voted group (subsystem) of channels, e.g. two transmitters 1oo2."""

    name: str
    voting: str
    channels: tuple[Channel, ...]
    beta: float = 0.0
    beta_d: float = 0.0

    def __post_init__(self) -> None:
        if not isinstance(self.name, str) or not self.name.strip():
            raise InputError("name", "must be a non-empty text")
        v = parse_voting(self.voting, "voting")
        _num(self.beta, "beta", 0.0, 1.0)
        _num(self.beta_d, "beta_d", 0.0, 1.0)
        chans = tuple(self.channels)
        for i, c in enumerate(chans):
            if not isinstance(c, Channel):
                raise InputError(f"channels[{i}]", f"must be a Channel, got {type(c).__name__}")
        if len(chans) != v.n:
            raise InputError(
                "channels", f"voting {v} needs {v.n} channels, {len(chans)} given"
            )
        object.__setattr__(self, "channels", chans)


@dataclass(frozen=True, kw_only=True)
class SifHistory:
    """A SIF: groups in series, plus its bypass periods.

    ``bypasses`` are (start, end) pairs; end None means still bypassed at the
    evaluation date. During a bypass the SIF counts as unavailable (PFD = 1, no
    compensating measure credited).
    """

    groups: tuple[Group, ...]
    bypasses: tuple[tuple[datetime, datetime | None], ...] = ()
    name: str = ""

    def __post_init__(self) -> None:
        groups = tuple(self.groups)
        if not groups:
            raise InputError("groups", "at least one group is needed")
        names = set()
        for i, g in enumerate(groups):
            if not isinstance(g, Group):
                raise InputError(f"groups[{i}]", f"must be a Group, got {type(g).__name__}")
            if g.name in names:
                raise InputError(f"groups[{i}].name", f"'{g.name}' is used twice")
            names.add(g.name)
        object.__setattr__(self, "groups", groups)
        object.__setattr__(self, "bypasses", _bypass_pairs(self.bypasses))


def _bypass_pairs(bypasses) -> tuple:
    byp = tuple(tuple(b) for b in bypasses)
    for i, b in enumerate(byp):
        if len(b) != 2:
            raise InputError(f"bypasses[{i}]", "must be a (start, end) pair")
        _as_utc_naive(b[0], f"bypasses[{i}].start")
        if b[1] is not None:
            _as_utc_naive(b[1], f"bypasses[{i}].end")
    return byp


# --------------------------------------------------------------------------
# results


@dataclass(frozen=True)
class HistoryResult:
    """Achieved PFDavg over a window."""

    pfd_avg: float
    window_start: datetime
    window_end: datetime
    hours: float
    groups: dict[str, float]
    bypass_hours: float
    pfd_at_end: float
    flags: tuple[str, ...] = ()


@dataclass(frozen=True)
class ScheduleCheck:
    """History model on a perfect schedule compared with a design PFDavg."""

    model_pfd_avg: float
    design_pfd_avg: float
    relative_difference: float
    tolerance: float
    within_tolerance: bool
    horizon_hours: float
    message: str


@dataclass(frozen=True)
class DeferralComparison:
    """PFDavg over the same horizon with the next test on its due date or later."""

    on_due_date: HistoryResult
    deferred: HistoryResult
    increase: float
    relative_increase: float


# --------------------------------------------------------------------------
# compiled form


@dataclass
class _CChannel:
    segs: list[tuple[float, np.ndarray]]
    log_surv_dd: float
    out_s: np.ndarray
    out_e: np.ndarray


@dataclass
class _CGroup:
    name: str
    m: int
    n: int
    channels: list[_CChannel]
    ccf_segs: list[tuple[float, np.ndarray]]
    log_surv_dd_ccf: float


@dataclass
class _Compiled:
    groups: list[_CGroup]
    byp_s: np.ndarray
    byp_e: np.ndarray
    events: np.ndarray
    start_h: float  # all channels in service from here
    flags: list[str] = field(default_factory=list)


def sorted_unique(values: np.ndarray) -> np.ndarray:
    """``np.unique`` of a 1-D float array (sorted, each value once), without its overhead
    (most arrays here have a handful of values)."""
    x = np.sort(values)
    if x.size < 2:
        return x
    keep = np.empty(x.size, dtype=bool)
    keep[0] = True
    np.not_equal(x[1:], x[:-1], out=keep[1:])
    return x[keep]


def _merge(starts: np.ndarray, ends: np.ndarray) -> tuple[np.ndarray, np.ndarray, int]:
    """Merge intervals; return merged starts, ends and how many overlaps were joined."""
    if starts.size == 0:
        return starts, ends, 0
    order = np.argsort(starts, kind="stable")
    s, e = starts[order], ends[order]
    ms, me = [s[0]], [e[0]]
    overlaps = 0
    for a, b in zip(s[1:], e[1:]):
        if a < me[-1]:
            overlaps += 1
            me[-1] = max(me[-1], b)
        elif a == me[-1]:
            me[-1] = max(me[-1], b)
        else:
            ms.append(a)
            me.append(b)
    return np.array(ms), np.array(me), overlaps


def _geo_mean(values: Sequence[float]) -> float:
    if any(v <= 0 for v in values):
        return 0.0
    return float(math.exp(sum(math.log(v) for v in values) / len(values)))


def _default_cov(ch: Channel, kind: str) -> float:
    if kind == "full":
        return ch.proof_test_coverage
    if kind == "partial":
        return ch.partial_test_coverage
    return 0.0


@dataclass
class _PChannel:
    """One channel prepared for an evaluation date (independent of the window end and of
    planned tests): renewal times, the tests kept with their coverage, repairs, bypasses."""

    lam: float  # (1 - beta) * lambda_DU
    ptc: float
    bounds: frozenset[float]
    renew_all: np.ndarray
    kept_t: np.ndarray
    kept_c: np.ndarray
    fail_s: list[float]
    fail_e: list[float]
    bypasses: list[tuple[float, float | None]]  # end None: open, runs to the window end
    log_surv_dd: float
    events: list[_Event]  # the recorded tests used (up to the evaluation date)
    after: int  # tests dated after the evaluation date (not used)
    outages: tuple | None = None  # merged repairs and bypasses, kept once none is open


@dataclass
class _PGroup:
    name: str
    m: int
    n: int
    single: bool
    channels: list[_PChannel]
    bounds: frozenset[float]
    tests_t: np.ndarray  # tests of any channel, with their coverage
    tests_c: np.ndarray
    base: np.ndarray  # renewals of the common-cause share (in service, overhauls)
    lam: float  # beta * lambda_DU (geometric mean of the channels)
    log_surv_dd_ccf: float


@dataclass
class _Prepared:
    groups: list[_PGroup]
    bypasses: list[tuple[float, float | None]]
    start_h: float
    flags: list[str]
    outages: tuple | None = None  # merged SIF bypasses, kept once none is open


def _prepare(sif: SifHistory, cutoff_h: float | None, open_bypasses: bool = True) -> _Prepared:
    """The part of :func:`_compile` that depends on the records and the evaluation date
    only (records after ``cutoff_h`` are not used). ``open_bypasses``: a bypass without an
    end runs to the window end (False: it is ignored)."""
    flags: list[str] = []
    pgroups: list[_PGroup] = []
    start_h = -math.inf
    after = 0
    for g in sif.groups:
        v = parse_voting(g.voting)
        single = v.n == 1
        beta = 0.0 if single else float(g.beta)
        beta_d = 0.0 if single else float(g.beta_d)
        pchans: list[_PChannel] = []
        group_bounds: set[float] = {0.0, 1.0}
        tests_t: list[float] = []
        tests_c: list[float] = []
        group_renew_all: list[float] = []
        same = all(c is g.channels[0] for c in g.channels)
        for ci, ch in enumerate(g.channels):
            if same and ci:
                # the same channel again (a planned history): the same preparation, the
                # same flags (given once), its tests and renewals already in the group's
                pchans.append(pchans[0])
                after += pchans[0].after
                continue
            label = f"{g.name} channel {ci + 1}" if v.n > 1 and not same else g.name
            ins = _hours(ch.in_service, "in_service")
            start_h = max(start_h, ins)
            renew_all = [ins]
            if ch.overhaul_at is not None:
                oh = _hours(ch.overhaul_at, "overhaul_at")
                if oh < ins:
                    flags.append(f"{label}: overhaul on {_fmt(oh)} is before the channel went "
                                 f"into service ({_fmt(ins)}); ignored")
                elif cutoff_h is None or oh <= cutoff_h:
                    renew_all.append(oh)
                    group_renew_all.append(oh)
            bounds = {0.0, 1.0, float(ch.partial_test_coverage), float(ch.proof_test_coverage)}
            kept_t: list[float] = []
            kept_c: list[float] = []
            fail_s: list[float] = []
            fail_e: list[float] = []
            used: list[_Event] = []
            ch_after = 0
            for ev in _channel_events(ch, label, ins, cutoff_h, flags):
                th, cov = ev.at_h, ev.coverage
                if ev.after_cutoff:
                    ch_after += 1
                    continue
                used.append(ev)
                bounds.add(cov)
                tests_t.append(th)
                tests_c.append(cov)
                if ev.failed:
                    if ev.restored_h > th:
                        fail_s.append(th)
                        fail_e.append(ev.restored_h)
                    if ev.replaced:
                        renew_all.append(ev.restored_h)
                    else:
                        # a repair fixes what was found and the test checked what it covers:
                        # the shares up to this coverage are as new, the rest keep their age
                        kept_t.append(ev.restored_h)
                        kept_c.append(cov)
                else:
                    kept_t.append(th)
                    kept_c.append(cov)
            after += ch_after
            byp = _bypass_raw(ch.bypasses, open_bypasses, flags, f"{label}: ")
            group_bounds |= bounds
            qdd = min(1.0, (1.0 - beta_d) * float(ch.lambda_dd) * float(ch.mttr_hours))
            pchans.append(_PChannel(
                lam=(1.0 - beta) * float(ch.lambda_du), ptc=float(ch.proof_test_coverage),
                bounds=frozenset(bounds), renew_all=np.array(renew_all, dtype=float),
                kept_t=np.array(kept_t, dtype=float), kept_c=np.array(kept_c, dtype=float),
                fail_s=fail_s, fail_e=fail_e, bypasses=byp,
                log_surv_dd=math.log1p(-qdd) if qdd < 1 else -math.inf, events=used,
                after=ch_after))
        lam_g, log_dd_ccf = 0.0, 0.0
        base = np.empty(0)
        if not single:
            lam_g = beta * _geo_mean([float(c.lambda_du) for c in g.channels])
            ins_g = min(_hours(c.in_service, "in_service") for c in g.channels)
            base = np.array([ins_g] + group_renew_all, dtype=float)
            mttr_g = sum(float(c.mttr_hours) for c in g.channels) / v.n
            qdd_c = min(1.0, beta_d * _geo_mean([float(c.lambda_dd) for c in g.channels]) * mttr_g)
            log_dd_ccf = math.log1p(-qdd_c) if qdd_c < 1 else -math.inf
        pgroups.append(_PGroup(g.name, v.m, v.n, single, pchans, frozenset(group_bounds),
                               np.array(tests_t, dtype=float), np.array(tests_c, dtype=float),
                               base, lam_g, log_dd_ccf))
    if after:
        flags.append(f"{after} test record(s) dated after the evaluation date "
                     f"({_fmt(cutoff_h)}) are not used")
    byp = _bypass_raw(sif.bypasses, open_bypasses, flags)
    return _Prepared(pgroups, byp, start_h, flags)


def _segments(lam: float, bounds, renew_all: np.ndarray, kept_t: np.ndarray,
              kept_c: np.ndarray, events: list[np.ndarray]) -> list[tuple[float, np.ndarray]]:
    """The shares of lambda between coverage boundaries, each with its renewal times: the
    renewals of everything, and the tests that reach the share's upper boundary."""
    segs = []
    for lo, hi in itertools.pairwise(sorted(bounds)):
        rate = lam * (hi - lo)
        if rate <= 0.0:
            continue
        r = sorted_unique(np.concatenate([renew_all, kept_t[kept_c >= hi - 1e-12]]))
        segs.append((rate, r))
        events.append(r)
    return segs


def _finish(p: _Prepared, end_h: float | None,
            extra: dict[int, list[tuple[float, float | None]]] | None = None) -> _Compiled:
    """The compiled form of a prepared SIF: open bypasses run to ``end_h``; ``extra``:
    planned (time, coverage) full tests per group index added to every channel of that
    group (coverage None: the channel's proof-test coverage)."""
    events: list[np.ndarray] = []
    cgroups: list[_CGroup] = []
    for gi, pg in enumerate(p.groups):
        planned = extra.get(gi) if extra else None
        planned_t = np.array([t for t, _ in planned], dtype=float) if planned else None
        group_bounds = set(pg.bounds)
        tests_t, tests_c = [pg.tests_t], [pg.tests_c]
        cchans: list[_CChannel] = []
        done: dict[int, _CChannel] = {}
        for pc in pg.channels:
            if id(pc) in done:  # the same channel again: its times are in already
                cchans.append(done[id(pc)])
                continue
            bounds, kept_t, kept_c = pc.bounds, pc.kept_t, pc.kept_c
            if planned:
                if all(c is None for _, c in planned):  # the channel's own coverage
                    planned_c = np.full(len(planned), pc.ptc)  # (a boundary already)
                else:
                    planned_c = np.array([pc.ptc if c is None else float(c)
                                          for _, c in planned], dtype=float)
                    bounds = bounds | set(planned_c.tolist())
                    group_bounds |= bounds
                kept_t = np.concatenate([kept_t, planned_t])
                kept_c = np.concatenate([kept_c, planned_c])
                tests_t.append(planned_t)
                tests_c.append(planned_c)
            segs = _segments(pc.lam, bounds, pc.renew_all, kept_t, kept_c, events)
            ms, me, _ = pc.outages or _outages(pc, pc.fail_s, pc.fail_e, pc.bypasses, end_h)
            events.extend((ms, me))
            cc = _CChannel(segs, pc.log_surv_dd, ms, me)
            done[id(pc)] = cc
            cchans.append(cc)
        ccf_segs = []
        if not pg.single:
            ccf_segs = _segments(pg.lam, group_bounds, pg.base, np.concatenate(tests_t),
                                 np.concatenate(tests_c), events)
        cgroups.append(_CGroup(pg.name, pg.m, pg.n, cchans, ccf_segs, pg.log_surv_dd_ccf))
    flags = list(p.flags)
    ms, me, overlaps = p.outages or _outages(p, [], [], p.bypasses, end_h)
    if overlaps:
        flags.append(f"{overlaps} overlapping bypass record(s) merged; "
                     "the overlapping time is counted once")
    events.extend((ms, me))
    return _Compiled(cgroups, ms, me, sorted_unique(np.concatenate(events)), p.start_h,
                     list(dict.fromkeys(flags)))


def _outages(owner, fail_s: list[float], fail_e: list[float],
             bypasses: list[tuple[float, float | None]], end_h: float | None
             ) -> tuple[np.ndarray, np.ndarray, int]:
    """Repairs and bypasses merged (starts, ends, overlaps joined); kept on ``owner``
    when no bypass is open (then they do not depend on ``end_h``)."""
    out = _bypass_close(bypasses, end_h)
    merged = _merge(np.array(fail_s + [s for s, _ in out], dtype=float),
                    np.array(fail_e + [e for _, e in out], dtype=float))
    if all(e is not None for _, e in bypasses):
        owner.outages = merged
    return merged


def _compile(sif: SifHistory, cutoff_h: float | None, end_h: float | None = None,
             extra: dict[int, list[tuple[float, float | None]]] | None = None) -> _Compiled:
    """Turn a SifHistory into arrays of renewal times.

    ``cutoff_h``: records after it are not used (counted in a flag).
    ``end_h``: open bypasses run to here. ``extra``: planned (time, coverage)
    full tests per group index added to every channel of that group.
    """
    return _finish(_prepare(sif, cutoff_h, end_h is not None), end_h, extra)


def _bypass_raw(bypasses, open_ok: bool, flags: list[str], label: str = ""
                ) -> list[tuple[float, float | None]]:
    """Bypass periods in hours, end None where still open (only with ``open_ok``, else
    ignored); one ending before it starts is ignored; each with a flag."""
    out: list[tuple[float, float | None]] = []
    for i, (s, e) in enumerate(bypasses):
        sh = _hours(s, f"bypasses[{i}].start")
        if e is None:
            if not open_ok:
                flags.append(f"{label}bypass from {_fmt(sh)} has no end; ignored")
                continue
            flags.append(f"{label}bypass from {_fmt(sh)} has no end; counted as still active")
            out.append((sh, None))
            continue
        eh = _hours(e, f"bypasses[{i}].end")
        if eh < sh:
            flags.append(f"{label}bypass from {_fmt(sh)} ends before it starts "
                         f"({_fmt(eh)}); ignored")
            continue
        if eh > sh:
            out.append((sh, eh))
    return out


def _bypass_close(raw: list[tuple[float, float | None]], end_h: float | None
                  ) -> list[tuple[float, float]]:
    """Bypass periods with the open ones running to ``end_h`` (kept if that is later than
    their start)."""
    out = []
    for sh, eh in raw:
        if eh is None:
            eh = max(end_h, sh)
            if not eh > sh:
                continue
        out.append((sh, eh))
    return out


@dataclass(slots=True)
class _Event:
    """One recorded test of a channel, resolved: times in hours, coverage, restoration."""

    at_h: float
    kind: str
    coverage: float
    failed: bool
    replaced: bool
    restored_h: float  # end of the restoration after a failure found (= at_h otherwise)
    after_cutoff: bool = False


def _channel_events(ch: Channel, label: str, ins: float, cutoff_h: float | None,
                    flags: list[str]) -> list[_Event]:
    """The channel's tests in time order with coverage and restoration resolved.

    A failure found keeps the channel down for its restore time (default MRT), or until
    the next test of that channel that shows it working, whichever comes first.
    Tests before the in-service date are flagged and dropped; tests after ``cutoff_h``
    are returned with ``after_cutoff`` (not used).
    """
    out: list[_Event] = []
    tests = ch.tests
    timed = sorted([(_hours(t.at, "at"), i) for i, t in enumerate(tests)])
    default = {kind: float(_default_cov(ch, kind)) for kind in TEST_KINDS}
    any_failed = False
    for th, i in timed:  # in time order, ties in record order (a stable sort)
        t = tests[i]
        if th < ins:
            flags.append(f"{label}: {t.kind} test on {_fmt(th)} is before the channel "
                         f"went into service ({_fmt(ins)}); ignored")
            continue
        cov = default[t.kind] if t.coverage is None else float(t.coverage)
        late = cutoff_h is not None and th > cutoff_h
        if t.failed:
            any_failed = True
            rest = ch.mrt if t.restore_hours is None else float(t.restore_hours)
            out.append(_Event(th, t.kind, cov, True, t.replaced, th + rest, late))
        else:
            out.append(_Event(th, t.kind, cov, False, t.replaced, th, late))
    if not any_failed:
        return out
    used = [e for e in out if not e.after_cutoff]
    for i, e in enumerate(used):
        if not e.failed:
            continue
        for later in used[i + 1:]:
            if later.at_h >= e.restored_h:
                break
            if not later.failed and later.at_h > e.at_h:
                e.restored_h = later.at_h  # the retest shows the device working
                break
    return out


# --------------------------------------------------------------------------
# evaluation


def _last_at_or_before(r: np.ndarray, t: np.ndarray, n_right: int) -> np.ndarray:
    """Index of the last element of ``r`` at or before each of the first ``n_right``
    points of ``t`` (value just after, right limit) and strictly before each of the rest
    (value just before, left limit); -1 where there is none."""
    if n_right >= t.size:
        return np.searchsorted(r, t, "right") - 1
    if n_right <= 0:
        return np.searchsorted(r, t, "left") - 1
    return np.concatenate([np.searchsorted(r, t[:n_right], "right"),
                           np.searchsorted(r, t[n_right:], "left")]) - 1


def _in_intervals(t: np.ndarray, s: np.ndarray, e: np.ndarray, n_right: int) -> np.ndarray:
    """Inside [s, e) for the first ``n_right`` points (right limit), inside (s, e] for
    the rest (left limit)."""
    if s.size == 0:
        return np.zeros(t.shape, dtype=bool)
    idx = _last_at_or_before(s, t, n_right)
    ok = idx >= 0
    end = e[np.maximum(idx, 0)]
    if n_right >= t.size:
        return ok & (t < end)
    if n_right <= 0:
        return ok & (t <= end)
    inside = t < end
    inside[n_right:] = t[n_right:] <= end[n_right:]
    return ok & inside


def _exposure(segs: list[tuple[float, np.ndarray]], t: np.ndarray, n_right: int) -> np.ndarray:
    s = np.zeros(t.shape)
    for rate, r in segs:
        idx = _last_at_or_before(r, t, n_right)
        np.maximum(idx, 0, out=idx)
        age = t - r[idx]
        np.maximum(age, 0.0, out=age)
        s += rate * age
    return s


def _log_group_survival(g: _CGroup, t: np.ndarray, n_right: int) -> np.ndarray:
    """log(1 - Q_group(t)) (right limit at the first ``n_right`` points, left limit at
    the rest). Call with floating-point warnings silenced (see :func:`_evaluate`)."""
    logs = []
    for ch in g.channels:
        ls = ch.log_surv_dd - _exposure(ch.segs, t, n_right)
        if ch.out_s.size:
            ls[_in_intervals(t, ch.out_s, ch.out_e, n_right)] = -np.inf
        logs.append(ls)
    f = g.n - g.m + 1  # failed channels that fail the group
    if f == 1:
        log_ind = np.sum(logs, axis=0)
    else:
        qs = [-np.expm1(ls) for ls in logs]
        if f == g.n:
            q_ind = np.prod(qs, axis=0)
        else:
            dist = np.zeros((g.n + 1, t.size))
            dist[0] = 1.0
            for i, q in enumerate(qs):
                p = 1.0 - q
                dist[1:i + 2] = dist[1:i + 2] * p + dist[0:i + 1] * q
                dist[0] *= p
            q_ind = dist[f:].sum(axis=0)
        log_ind = np.log1p(-np.minimum(q_ind, 1.0))
    log_ccf = g.log_surv_dd_ccf - _exposure(g.ccf_segs, t, n_right) if g.ccf_segs else (
        np.full(t.shape, g.log_surv_dd_ccf))
    return log_ind + log_ccf


def _evaluate(c: _Compiled, t: np.ndarray, left: bool = False, *,
              n_right: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Return (Q_sif(t), Q_group(t) as (G, P) array): the value just after each point
    (right limit), or just before it with ``left``; with ``n_right``, just after the
    first ``n_right`` points and just before the rest (one pass for both). A batch of one
    (:func:`calcs.engine.batch.evaluate_many`)."""
    if n_right is None:
        n_right = 0 if left else t.size
    return evaluate_many([(c, t, n_right)])[0]


def _gauss(order: int) -> tuple[np.ndarray, np.ndarray]:
    if order not in _GL_CACHE:
        _GL_CACHE[order] = np.polynomial.legendre.leggauss(order)
    return _GL_CACHE[order]


def _nodes(events: np.ndarray, a: float, b: float, order: int,
           max_piece: float) -> tuple[np.ndarray, np.ndarray]:
    inner = events[events.searchsorted(a, "right"):events.searchsorted(b, "left")]  # sorted
    edges = np.concatenate([[a], inner, [b]])
    lengths = edges[1:] - edges[:-1]
    nsub = np.ceil(lengths / max_piece).astype(int)
    np.maximum(nsub, 1, out=nsub)
    if nsub.max() > 1:
        starts = np.repeat(edges[:-1], nsub)
        sub = np.repeat(lengths / nsub, nsub)
        k = np.arange(nsub.sum()) - np.repeat(np.cumsum(nsub) - nsub, nsub)
        lo = starts + k * sub
        half = sub / 2.0
    else:
        lo = edges[:-1]
        half = lengths / 2.0
    x, w = _gauss(order)
    mid = lo + half
    t = (mid[:, None] + half[:, None] * x[None, :]).ravel()
    wt = (half[:, None] * w[None, :]).ravel()
    return t, wt


def _bypass_hours(c: _Compiled, a: float, b: float) -> float:
    if c.byp_s.size == 0:
        return 0.0
    return float(np.sum(np.clip(np.minimum(c.byp_e, b) - np.maximum(c.byp_s, a), 0.0, None)))


def _window(c: _Compiled, a: float, b: float, flags: list[str]) -> tuple[float, float]:
    if not b > a:
        raise InputError("window", f"the window end ({_fmt(b)}) must be after its start "
                                   f"({_fmt(a)})")
    if b <= c.start_h:
        raise InputError("window", f"the window ends ({_fmt(b)}) before every channel is in "
                                   f"service ({_fmt(c.start_h)})")
    if a < c.start_h:
        flags.append(f"window start {_fmt(a)} is before every channel is in service; "
                     f"counted from {_fmt(c.start_h)}")
        a = c.start_h
    return a, b


def _average(c: _Compiled, a: float, b: float, order: int, max_piece: float,
             aware: bool, flags: list[str]) -> HistoryResult:
    return _averages(c, [(a, b, aware, flags)], order, max_piece)[0]


def _averages(c: _Compiled, windows: Sequence[tuple[float, float, bool, list[str]]],
              order: int, max_piece: float) -> list[HistoryResult]:
    """The average over each (start, end, aware, flags) window (see :class:`Request`)."""
    return evaluate_requests([Request(c, windows, order, max_piece)])[0]


class Request:
    """Averages of one compiled SIF over (start, end, aware, flags) windows, ready to be
    evaluated with others (:func:`evaluate_requests`): the windows are checked (an
    InputError is raised here, not in the batch) and their quadrature nodes laid out,
    every window's nodes first and then every distinct end (the value just before it)."""

    __slots__ = ("c", "cuts", "ends", "meta", "order", "spans", "t", "weights")

    def __init__(self, c: _Compiled, windows: Sequence[tuple[float, float, bool, list[str]]],
                 order: int = 8, max_piece: float = 2190.0):
        self.c, self.order = c, int(order)
        self.spans = [_window(c, a, b, flags) for a, b, _, flags in windows]
        self.meta = [(aware, flags) for _, _, aware, flags in windows]
        nodes = [_nodes(c.events, a, b, int(order), float(max_piece)) for a, b in self.spans]
        self.weights = [w for _, w in nodes]
        self.cuts = np.cumsum([0] + [t.size for t, _ in nodes])
        self.ends = sorted({b for _, b in self.spans})
        self.t = np.concatenate([t for t, _ in nodes] + [np.array(self.ends)])


def evaluate_requests(requests: Sequence[Request]) -> list[list[HistoryResult]]:
    """The results of each request, every node of every request evaluated together."""
    values = evaluate_many([(r.c, r.t, int(r.cuts[-1]), r.order) for r in requests])
    return [_results(r, q_sif, q_groups) for r, (q_sif, q_groups) in zip(requests, values)]


def _results(r: Request, q_sif: np.ndarray, q_groups: np.ndarray) -> list[HistoryResult]:
    c, cuts = r.c, r.cuts
    end_q = q_sif[cuts[-1]:]
    out = []
    for k, ((a, b), w, (aware, flags)) in enumerate(zip(r.spans, r.weights, r.meta)):
        lo, hi = cuts[k], cuts[k + 1]
        span = b - a
        out.append(HistoryResult(
            pfd_avg=float(np.dot(w, q_sif[lo:hi]) / span),
            window_start=_to_dt(a, aware),
            window_end=_to_dt(b, aware),
            hours=span,
            groups={g.name: float(np.dot(w, q_groups[i, lo:hi]) / span)
                    for i, g in enumerate(c.groups)},
            bypass_hours=_bypass_hours(c, a, b),
            pfd_at_end=float(end_q[r.ends.index(b)]),
            flags=tuple(flags),
        ))
    return out


def _resolve_start(sif_c: _Compiled, window_start: Any, end_dt: datetime) -> float:
    if window_start is None:
        return _hours(one_year_before(end_dt), "window_start")
    if isinstance(window_start, str):
        if window_start != "in_service":
            raise InputError("window_start", "must be a date, None (12 months) or 'in_service'")
        return sif_c.start_h
    return _hours(window_start, "window_start")


# --------------------------------------------------------------------------
# public functions


class PreparedHistory:
    """One SIF's recorded life prepared once for one evaluation date ``as_of`` (records
    after it are not used): the achieved PFDavg over any number of windows and the
    projections from that date all reuse the one preparation. Each method gives what the
    single-SIF function of the same name gives for that SIF and date (those functions
    prepare a history and call it)."""

    def __init__(self, sif: SifHistory, as_of: Any):
        if as_of is None:
            raise InputError("as_of", "an evaluation date is required")
        self.sif = sif
        self.as_of = as_of
        self.as_of_h = _hours(as_of, "as_of")
        self._prepared = _prepare(sif, self.as_of_h)
        self._by_end: dict[float, _Compiled] = {}

    def compiled(self, end_h: float | None = None) -> _Compiled:
        """The compiled form with open bypasses running to ``end_h`` (default: the
        evaluation date), built once per end."""
        end_h = self.as_of_h if end_h is None else float(end_h)
        c = self._by_end.get(end_h)
        if c is None:
            c = self._by_end[end_h] = _finish(self._prepared, end_h)
        return c

    @property
    def resolved_events(self) -> list[list[list[_Event]]]:
        """The recorded tests used, per group and channel, in time order, restorations
        resolved (the observed-unavailability model reads the same ones)."""
        return [[pc.events for pc in pg.channels] for pg in self._prepared.groups]

    def achieved(self, window_start: Any = None, window_end: Any = None, *, order: int = 8,
                 max_piece_hours: float = 2190.0, end_h: float | None = None
                 ) -> HistoryResult:
        """Achieved PFDavg over [window_start, window_end] (end default: the evaluation
        date; start as in :func:`achieved_pfd`). Open bypasses run to ``end_h`` (default:
        the evaluation date)."""
        window_end = self.as_of if window_end is None else window_end
        c = self.compiled(end_h)
        b = _hours(window_end, "window_end")
        a = _resolve_start(c, window_start, _as_utc_naive(window_end, "window_end"))
        return _average(c, a, b, int(order), float(max_piece_hours), _is_aware(window_end),
                        list(c.flags))

    def windows(self, windows: Sequence[tuple[Any, Any]], *, order: int = 8,
                max_piece_hours: float = 2190.0) -> list[HistoryResult]:
        """:meth:`achieved` for each (start, end) window (evaluated together)."""
        return evaluate_requests([self.windows_request(windows, order=order,
                                                       max_piece_hours=max_piece_hours)])[0]

    def windows_request(self, windows: Sequence[tuple[Any, Any]], *, order: int = 8,
                        max_piece_hours: float = 2190.0) -> Request:
        """:meth:`windows` as a :class:`Request`, to be evaluated with other SIFs'
        (:func:`evaluate_requests`)."""
        c = self.compiled()
        spans = []
        for start, end in windows:
            end = self.as_of if end is None else end
            b = _hours(end, "window_end")
            a = _resolve_start(c, start, _as_utc_naive(end, "window_end"))
            spans.append((a, b, _is_aware(end), list(c.flags)))
        return Request(c, spans, int(order), float(max_piece_hours))

    def projection(self, next_test_at: Any, horizon_end: Any = None, *,
                   interval_hours: float | None = None, coverage: float | None = None,
                   order: int = 8, max_piece_hours: float = 2190.0) -> HistoryResult:
        """See :func:`projection` (from the evaluation date)."""
        return evaluate_requests([self.projection_request(
            next_test_at, horizon_end, interval_hours=interval_hours, coverage=coverage,
            order=order, max_piece_hours=max_piece_hours)])[0][0]

    def projection_request(self, next_test_at: Any, horizon_end: Any = None, *,
                           interval_hours: float | None = None, coverage: float | None = None,
                           order: int = 8, max_piece_hours: float = 2190.0) -> Request:
        """:meth:`projection` as a :class:`Request` (one window)."""
        as_h = self.as_of_h
        nt_h = _hours(next_test_at, "next_test_at")
        if nt_h < as_h:
            raise InputError("next_test_at",
                             f"{_fmt(nt_h)} is before the as-of date {_fmt(as_h)}")
        if interval_hours is not None:
            interval_hours = _num(interval_hours, "interval_hours")
            if interval_hours <= 0:
                raise InputError("interval_hours", "must be greater than 0")
        if coverage is not None:
            _num(coverage, "coverage", 0.0, 1.0)
        if horizon_end is None:
            if interval_hours is None:
                raise InputError("horizon_end", "give a horizon end or a test interval")
            hz_h = nt_h + interval_hours
            aware = _is_aware(next_test_at)
        else:
            hz_h = _hours(horizon_end, "horizon_end")
            aware = _is_aware(horizon_end)
        if hz_h <= as_h:
            raise InputError("horizon_end", "must be after the as-of date")
        planned_t = [nt_h]
        if interval_hours:
            k = nt_h + interval_hours
            while k < hz_h:
                planned_t.append(k)
                k += interval_hours
        cov = None if coverage is None else float(coverage)  # None: each channel's PTC
        extra = {gi: [(t, cov) for t in planned_t] for gi in range(len(self.sif.groups))}
        c = _finish(self._prepared, hz_h, extra)
        flags = list(c.flags)
        if nt_h >= hz_h:
            flags.append(f"the next test ({_fmt(nt_h)}) falls after the horizon end; "
                         "it does not affect this projection")
        return Request(c, [(as_h, hz_h, aware, flags)], int(order), float(max_piece_hours))


def prepare(sif: SifHistory, as_of: Any) -> PreparedHistory:
    """``sif`` prepared once for the evaluation date ``as_of`` (see
    :class:`PreparedHistory`)."""
    return PreparedHistory(sif, as_of)


def achieved_pfd(sif: SifHistory, window_start: Any = None, window_end: Any = None, *,
                 as_of: Any = None, order: int = 8,
                 max_piece_hours: float = 2190.0) -> HistoryResult:
    """Achieved PFDavg of ``sif`` over [window_start, window_end].

    ``window_end`` is required (the engine never reads the clock).
    ``window_start``: a date; None = the same calendar date 12 months before
    the end; "in_service" = from the date every channel is in service.
    ``as_of`` (default: window_end) is the evaluation date; records dated after
    it are not used and are flagged. ``order`` (Gauss-Legendre points per
    piece) and ``max_piece_hours`` set the integration grid.
    """
    if window_end is None:
        raise InputError("window_end", "an evaluation date is required")
    end_h = _hours(window_end, "window_end")
    p = PreparedHistory(sif, window_end if as_of is None else as_of)
    return p.achieved(window_start, window_end, order=order,
                      max_piece_hours=max_piece_hours, end_h=end_h)


def achieved_pfd_windows(sif: SifHistory, windows: Sequence[tuple[Any, Any]], *,
                         as_of: Any, order: int = 8, max_piece_hours: float = 2190.0,
                         prepared: PreparedHistory | None = None) -> list[HistoryResult]:
    """Several windows of one SIF sharing one evaluation date (prepared once;
    ``prepared``: the same SIF and evaluation date already prepared)."""
    p = prepared if prepared is not None else PreparedHistory(sif, as_of)
    return p.windows(windows, order=order, max_piece_hours=max_piece_hours)


def pfd_series(sif: SifHistory, start: Any, end: Any, points: int = 500, *,
               as_of: Any = None) -> tuple[list[datetime], np.ndarray]:
    """PFD(t) for plotting: ``points`` evenly spaced samples, plus at every
    event time the value just before and just after it (same timestamp twice)
    so the sawtooth drops are drawn vertically."""
    if isinstance(points, bool) or not isinstance(points, int) or points < 2:
        raise InputError("points", "must be an integer of at least 2")
    end_h = _hours(end, "end")
    c = PreparedHistory(sif, end if as_of is None else as_of).compiled(end_h)
    a, b = _window(c, _hours(start, "start"), end_h, [])
    uni = np.linspace(a, b, points)
    ev = c.events[(c.events > a) & (c.events < b)]
    times = np.concatenate([uni, ev, ev])
    left = np.concatenate([np.zeros(uni.size, bool), np.ones(ev.size, bool),
                           np.zeros(ev.size, bool)])
    left[points - 1] = True  # the end point: value just before the end
    order = np.lexsort((~left, times))
    times, left = times[order], left[order]
    vals = np.empty(times.size)
    vals[left], _ = _evaluate(c, times[left], left=True)
    vals[~left], _ = _evaluate(c, times[~left], left=False)
    aware = _is_aware(end)
    return [_to_dt(h, aware) for h in times], vals


def projection(sif: SifHistory, as_of: Any, next_test_at: Any, horizon_end: Any = None, *,
               interval_hours: float | None = None, coverage: float | None = None,
               order: int = 8, max_piece_hours: float = 2190.0) -> HistoryResult:
    """PFDavg over [as_of, horizon_end] if every channel gets its next full test
    at ``next_test_at`` (and then every ``interval_hours``, if given), all passing.

    Records after ``as_of`` are not used. ``coverage``: coverage of the planned
    tests (None = each channel's proof-test coverage). Partial tests are not
    projected (conservative). ``horizon_end`` defaults to next_test_at +
    interval_hours. Compare a due date with a proposed later date over the same
    horizon (see :func:`compare_deferral`).
    """
    return PreparedHistory(sif, as_of).projection(
        next_test_at, horizon_end, interval_hours=interval_hours, coverage=coverage,
        order=order, max_piece_hours=max_piece_hours)


def compare_deferral(sif: SifHistory, as_of: Any, due_at: Any, proposed_at: Any,
                     horizon_end: Any, *, interval_hours: float | None = None) -> DeferralComparison:
    """Projected PFDavg over [as_of, horizon_end] with the next full test on its
    due date versus on a proposed later date."""
    p = PreparedHistory(sif, as_of)
    on_due = p.projection(due_at, horizon_end, interval_hours=interval_hours)
    later = p.projection(proposed_at, horizon_end, interval_hours=interval_hours)
    inc = later.pfd_avg - on_due.pfd_avg
    rel = inc / on_due.pfd_avg if on_due.pfd_avg > 0 else math.inf if inc > 0 else 0.0
    return DeferralComparison(on_due, later, inc, rel)


# --------------------------------------------------------------------------
# perfect schedule versus design figure


@dataclass(frozen=True, kw_only=True)
class PlannedGroup:
    """Design inputs of one group for :func:`planned_schedule_check`."""

    name: str = "group"
    voting: str = "1oo1"
    lambda_du: float
    proof_test_interval_hours: float
    lambda_dd: float = 0.0
    beta: float = 0.0
    beta_d: float = 0.0
    mttr_hours: float = 8.0
    mrt_hours: float | None = None
    proof_test_coverage: float = 1.0
    partial_test_interval_hours: float | None = None
    partial_test_coverage: float = 0.0
    mission_time_hours: float | None = None


def planned_history(groups: Sequence[PlannedGroup], horizon_hours: float,
                    in_service: datetime = datetime(2000, 1, 1)) -> SifHistory:
    """A SifHistory with every test exactly on schedule and never a failure found.

    Full tests every T1 from in_service, partial tests every partial interval
    (skipped where a full test falls at the same time); an overhaul at the
    mission time when it lies inside the horizon.
    """
    out = []
    for i, p in enumerate(groups):
        t1 = _num(p.proof_test_interval_hours, f"groups[{i}].proof_test_interval_hours")
        if t1 <= 0:
            raise InputError(f"groups[{i}].proof_test_interval_hours", "must be greater than 0")
        v = parse_voting(p.voting, f"groups[{i}].voting")
        times: list[tuple[float, str]] = []
        k = 1
        while k * t1 <= horizon_hours + 1e-9:
            times.append((k * t1, "full"))
            k += 1
        if p.partial_test_interval_hours:
            tp = _num(p.partial_test_interval_hours, f"groups[{i}].partial_test_interval_hours")
            if tp > 0:
                k = 1
                while k * tp <= horizon_hours + 1e-9:
                    tt = k * tp
                    if abs(tt / t1 - round(tt / t1)) > 1e-9:
                        times.append((tt, "partial"))
                    k += 1
        times.sort()
        tests = tuple(TestEvent(at=in_service + timedelta(hours=h), kind=kd) for h, kd in times)
        overhaul = None
        if p.mission_time_hours and p.mission_time_hours < horizon_hours:
            overhaul = in_service + timedelta(hours=float(p.mission_time_hours))
        try:
            ch = Channel(lambda_du=p.lambda_du, lambda_dd=p.lambda_dd, mttr_hours=p.mttr_hours,
                         mrt_hours=p.mrt_hours, proof_test_coverage=p.proof_test_coverage,
                         partial_test_coverage=p.partial_test_coverage, in_service=in_service,
                         overhaul_at=overhaul, tests=tests)
            out.append(Group(name=p.name, voting=p.voting, beta=p.beta, beta_d=p.beta_d,
                             channels=(ch,) * v.n))
        except InputError as e:
            raise InputError(f"groups[{i}].{e.field}", e.message) from None
    return SifHistory(groups=tuple(out))


def planned_schedule_check(groups: Sequence[PlannedGroup], design_pfd_avg: float, *,
                           horizon_hours: float | None = None,
                           tolerance: float = DEFAULT_SCHEDULE_TOLERANCE) -> ScheduleCheck:
    """Run the history model with every test exactly on schedule and compare
    with a design PFDavg.

    Horizon: ``horizon_hours`` if given, else the longest mission time, else
    ten times the longest proof-test interval. The pair is flagged when
    |model/design - 1| > ``tolerance`` (see DEFAULT_SCHEDULE_TOLERANCE).
    """
    groups = list(groups)
    if not groups:
        raise InputError("groups", "at least one group is needed")
    design = _num(design_pfd_avg, "design_pfd_avg", 0.0, 1.0)
    if design <= 0:
        raise InputError("design_pfd_avg", "must be greater than 0")
    tol = _num(tolerance, "tolerance")
    if horizon_hours is None:
        mts = [float(p.mission_time_hours) for p in groups if p.mission_time_hours]
        horizon_hours = max(mts) if mts else 10.0 * max(float(p.proof_test_interval_hours)
                                                        for p in groups)
    horizon_hours = _num(horizon_hours, "horizon_hours")
    if horizon_hours <= 0:
        raise InputError("horizon_hours", "must be greater than 0")
    origin = datetime(2000, 1, 1)
    sif = planned_history(groups, horizon_hours, origin)
    res = achieved_pfd(sif, origin, origin + timedelta(hours=horizon_hours))
    rel = res.pfd_avg / design - 1.0
    ok = abs(rel) <= tol
    if ok:
        msg = (f"on a perfect schedule the history model gives {res.pfd_avg:.4g}, "
               f"{rel:+.1%} from the design figure {design:.4g} (within ±{tol:.0%})")
    elif rel > 0:
        msg = (f"on a perfect schedule the history model gives {res.pfd_avg:.4g}, "
               f"{rel:+.1%} above the design figure {design:.4g}: the design calculation "
               "looks optimistic or uses other inputs than the register")
    else:
        msg = (f"on a perfect schedule the history model gives {res.pfd_avg:.4g}, "
               f"{rel:+.1%} below the design figure {design:.4g}: the design figure "
               "and the register inputs do not describe the same function")
    return ScheduleCheck(res.pfd_avg, design, rel, tol, ok, horizon_hours, msg)
