"""Design calculation of a SIF: PFDavg (low demand) and PFH (high demand).

Default method ``"iec61508-6"``: the simplified equations of IEC 61508-6:2010
Annex B (B.3.2.2 low demand, B.3.3.2 high demand) for one voted group of
identical channels:

* channel equivalent mean down time
  tCE = lDU/lD * (T1/2 + MRT) + lDD/lD * MTTR
* group equivalent mean down time
  tGE = lDU/lD * (T1/3 + MRT) + lDD/lD * MTTR
* 1oo1  PFD = lD * tCE                 PFH = lDU
* 2oo2  PFD = 2 * lD * tCE             PFH = 2 * lDU
* 1oo2  PFD = 2 * l'^2 * tCE * tGE + bD*lDD*MTTR + b*lDU*(T1/2 + MRT)
        PFH = 2 * l' * (1-b)*lDU * tCE + bD*lDD + b*lDU
  with l' = (1-bD)*lDD + (1-b)*lDU (independent dangerous rate)
* 2oo3  as 1oo2 with the factor 6 instead of 2
* 1oo2D t'CE = (lDU*(T1/2+MRT) + (lDD+lSD)*MTTR) / (lDU+lDD+lSD),
        t'GE = T1/3 + MRT,
        PFD = 2(1-b)lDU((1-b)lDU + (1-bD)lDD + lSD) t'CE t'GE + bD*lDD*MTTR + b*lDU*(T1/2+MRT)
        PFH = 2(1-b)lDU((1-b)lDU + (1-bD)lDD + lSD) t'CE + bD*lDD + b*lDU

Other MooN groups (1oo3, 2oo4, 3oo4, ...) use a general approximation, see
:func:`pfd_moon` and :func:`pfh_moon`.

Optional method ``"isa-tr84.00.02"``: the simplified equations of
ISA-TR84.00.02 (dangerous undetected failures only, no repair time):
C(n, k) * (lDU*T)^k / (k+1) + b*lDU*T/2 with k = N-M+1 failures to fail the
group (1oo1 lDU*T/2, 1oo2 (lDU*T)^2/3 + b*lDU*T/2, 2oo3 (lDU*T)^2 + ...,
1oo3 (lDU*T)^3/4 + ...); NooN: N*lDU*T/2. Low demand only, no 1oo2D.

Imperfect and partial proof tests
---------------------------------
lambda_DU is split into parts that are revealed at different intervals:

* a fraction theta (partial test coverage) at the partial test interval
  T_PST (partial stroke test);
* a fraction PTC - theta at the proof test interval T1 (PTC = proof test
  coverage, the share of all DU failures the full proof test reveals, so a
  partial test can only reveal failures the full test also reveals:
  theta <= PTC);
* the rest, 1 - PTC, at the mission time MT (found at overhaul or
  replacement).

In every equation above T1 enters only linearly inside the mean down times,
so putting each part through the equation's down-time terms is the same as
using the weighted interval
    T_eff = theta*T_PST + (PTC - theta)*T1 + (1 - PTC)*MT
in place of T1. For 1oo1 this is exactly
PFD = theta*lDU*T_PST/2 + (PTC-theta)*lDU*T1/2 + (1-PTC)*lDU*MT/2 (+ MRT and
DD terms), the ISA-TR84.00.02 imperfect proof test equation and the partial
stroke test equation of Lundteigen & Rausand (2007). For redundant groups it
keeps the cross terms between parts (a channel failed in a part found at MT
while the other failed in a part found at T1); this is the conservative
choice: evaluating each part alone and adding the results would drop those
cross terms and understate the PFD.

The design figure: simplified equations checked against an exact model
-----------------------------------------------------------------------
The simplified equations are linearised and multiply mean down times as if
they were independent. Over the plausible range of inputs that makes them
too low in some cases (the 1oo2D equation counts two thirds of
lDU*lDD*T1*MTTR for one channel under repair while the other hides an
undetected failure; the time average is the whole product) and far too high
in others (groups of three or four channels with mostly detected failures
and long repairs, large lambda*T). So for groups of up to four channels the
IEC method computes the exact value of :mod:`calcs.engine.markov` (a
periodic Markov model of the same group, tests and schedule) and reports:

* the simplified value when exact <= simplified <= 1.25 * exact
  (``pfd_method`` "simplified equations (IEC 61508-6 Annex B)");
* the exact value when the simplified value is below it ("exact Markov
  model"): the figure is never below the exact value;
* 1.25 * exact when the simplified value is more than 25 % above it
  ("exact Markov model + 25 %"), the upper edge of the accepted band.

That is the simplified value clamped to [exact, 1.25 * exact]. Clamping
(rather than switching to the exact value above the band) keeps the figure
a continuous, non-decreasing function of every rate and of the test
interval, which the longest-interval search and the test-moved comparison
rely on; the figure is always within the band. A caution says why the exact
model set the figure. Groups of more than four channels keep the simplified
value (with a caution that it was not checked). The ISA-TR84.00.02 method is
a chosen method and keeps its value; a caution says when it is below the
exact value. The PFH (high demand) is not changed.

:func:`subsystem_pfd_avg` returns that figure (the same as
:func:`evaluate_subsystem`), :func:`subsystem_pfd_raw` the simplified
equations before clipping, :func:`subsystem_pfd_exact` the exact value.

A SIF is a series of subsystems; its PFDavg (PFH) is the sum of the
subsystem values, the rare-event approximation of 1 - prod(1 - PFD_i).
The linearised equations can exceed 1 for very large lambda*T; such a PFDavg
is reported as 1 with a caution.

All rates are per hour, all times in hours (1 year = 8760 h).
"""

from __future__ import annotations

import contextlib
import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field, replace
from functools import lru_cache

from scipy.optimize import brentq as _brentq

from calcs.engine import markov as _markov
from calcs.engine import sil as _sil
from calcs.engine.errors import InputError
from calcs.engine.units import HOURS_PER_YEAR, check_rate
from calcs.engine.voting import Voting, parse_voting

METHOD_IEC = "iec61508-6"
METHOD_ISA = "isa-tr84.00.02"
METHODS = (METHOD_IEC, METHOD_ISA)

#: Longest proof test interval :func:`max_proof_test_interval` reports (20 years).
PROOF_TEST_INTERVAL_CAP_HOURS = 20 * HOURS_PER_YEAR
#: Shortest proof test interval :func:`max_proof_test_interval` tries (1 hour).
PROOF_TEST_INTERVAL_FLOOR_HOURS = 1.0
#: lambda_DU * T above which the linearised equations are flagged as inaccurate.
LAMBDA_T_CAUTION = 0.1
#: The simplified value is used while it lies in [exact, EXACT_BAND * exact].
EXACT_BAND = 1.25
#: Values of ``SubsystemResult.pfd_method``.
PFD_METHOD_SIMPLIFIED = "simplified equations (IEC 61508-6 Annex B)"
PFD_METHOD_ISA = "simplified equations (ISA-TR84.00.02)"
PFD_METHOD_EXACT = "exact Markov model"
PFD_METHOD_CAPPED = "exact Markov model + 25 %"


# ---------------------------------------------------------------------------
# Input checks


def _number(value: object, name: str, *, low: float = 0.0, high: float = math.inf,
            low_open: bool = False) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise InputError(name, f"must be a number, got {value!r}")
    value = float(value)
    if not math.isfinite(value):
        raise InputError(name, f"must be a finite number, got {value!r}")
    if high == 1.0 and low == 0.0 and not low_open:
        if not 0.0 <= value <= 1.0:
            raise InputError(name, f"must be between 0 and 1, got {value:g}")
        return value
    if low_open and value <= low:
        raise InputError(name, f"must be greater than {low:g}, got {value:g}")
    if value < low:
        raise InputError(name, f"must be at least {low:g}, got {value:g}")
    if value > high:
        raise InputError(name, f"must be at most {high:g}, got {value:g}")
    return value


def _probability(value: object, name: str) -> float:
    return _number(value, name, low=0.0, high=1.0)


# ---------------------------------------------------------------------------
# Equations of one voted group (perfect proof test at interval t1)


def _down_time(ldu: float, ldd: float, mttr: float, mrt: float, t1: float, divisor: float) -> float:
    """Equivalent mean down time lDU/lD*(t1/divisor + MRT) + lDD/lD*MTTR (0 if lD = 0)."""
    ld = ldu + ldd
    if ld == 0.0:
        return 0.0
    return (ldu * (t1 / divisor + mrt) + ldd * mttr) / ld


def t_ce(ldu: float, ldd: float, mttr: float, mrt: float, t1: float) -> float:
    """Channel equivalent mean down time tCE (IEC 61508-6:2010 B.3.2.2)."""
    return _down_time(ldu, ldd, mttr, mrt, t1, 2.0)


def t_ge(ldu: float, ldd: float, mttr: float, mrt: float, t1: float) -> float:
    """Voted-group equivalent mean down time tGE (IEC 61508-6:2010 B.3.2.2)."""
    return _down_time(ldu, ldd, mttr, mrt, t1, 3.0)


def pfd_1oo1(ldu: float, ldd: float, mttr: float, mrt: float, t1: float) -> float:
    """1oo1: (lDU + lDD) * tCE = lDU*(T1/2 + MRT) + lDD*MTTR."""
    return ldu * (t1 / 2.0 + mrt) + ldd * mttr


def pfd_2oo2(ldu: float, ldd: float, mttr: float, mrt: float, t1: float) -> float:
    """2oo2: 2 * lD * tCE."""
    return 2.0 * pfd_1oo1(ldu, ldd, mttr, mrt, t1)


def _pfd_redundant_pair(factor: float, ldu, ldd, beta, beta_d, mttr, mrt, t1) -> float:
    lam = (1.0 - beta_d) * ldd + (1.0 - beta) * ldu
    return (factor * lam * lam * t_ce(ldu, ldd, mttr, mrt, t1) * t_ge(ldu, ldd, mttr, mrt, t1)
            + beta_d * ldd * mttr + beta * ldu * (t1 / 2.0 + mrt))


def pfd_1oo2(ldu: float, ldd: float, beta: float, beta_d: float, mttr: float, mrt: float,
             t1: float) -> float:
    """1oo2: 2*l'^2*tCE*tGE + bD*lDD*MTTR + b*lDU*(T1/2 + MRT)."""
    return _pfd_redundant_pair(2.0, ldu, ldd, beta, beta_d, mttr, mrt, t1)


def pfd_2oo3(ldu: float, ldd: float, beta: float, beta_d: float, mttr: float, mrt: float,
             t1: float) -> float:
    """2oo3: 6*l'^2*tCE*tGE + bD*lDD*MTTR + b*lDU*(T1/2 + MRT)."""
    return _pfd_redundant_pair(6.0, ldu, ldd, beta, beta_d, mttr, mrt, t1)


def _t_ce_1oo2d(ldu, ldd, lsd, mttr, mrt, t1) -> float:
    total = ldu + ldd + lsd
    if total == 0.0:
        return 0.0
    return (ldu * (t1 / 2.0 + mrt) + (ldd + lsd) * mttr) / total


def pfd_1oo2d(ldu: float, ldd: float, lsd: float, beta: float, beta_d: float, mttr: float,
              mrt: float, t1: float) -> float:
    """1oo2D per IEC 61508-6:2010 B.3.2.2.5 (t'CE and t'GE = T1/3 + MRT)."""
    tce = _t_ce_1oo2d(ldu, ldd, lsd, mttr, mrt, t1)
    tge = t1 / 3.0 + mrt
    return (2.0 * (1.0 - beta) * ldu * ((1.0 - beta) * ldu + (1.0 - beta_d) * ldd + lsd) * tce * tge
            + beta_d * ldd * mttr + beta * ldu * (t1 / 2.0 + mrt))


def pfd_moon(m: int, n: int, ldu: float, ldd: float, beta: float, beta_d: float, mttr: float,
             mrt: float, t1: float) -> float:
    """General MooN low demand PFDavg (an approximation).

    With k = N - M + 1 dangerous failures needed to fail the group:

    * k = 1 (NooN): N * lD * tCE (every channel failure fails the group;
      common cause failures are not separated, which is conservative).
    * k >= 2: C(N, k) * k! * l'^k * t_1 * t_2 * ... * t_k
      + bD*lDD*MTTR + b*lDU*(T1/2 + MRT), with
      t_j = lDU/lD * (T1/(j+1) + MRT) + lDD/lD * MTTR (t_1 = tCE, t_2 = tGE,
      t_3 = tG2E) and l' = (1-bD)*lDD + (1-b)*lDU.

    This is the pattern of the IEC 61508-6:2010 Annex B equations (factor 2
    for 1oo2, 6 for 2oo3, and 6 * l'^3 * tCE*tGE*tG2E for 1oo3) extended to
    any k; with only DU failures, no repair time and no common cause it
    becomes C(N, k) * (lDU*T1)^k / (k+1), the k-out-of-n approximation of
    M. Rausand & A. Hoyland, "System Reliability Theory" (2nd ed., 2004),
    ch. 10 (also M. Rausand, "Reliability of Safety-Critical Systems", 2014,
    ch. 8). It reproduces the Annex B 1oo1, 2oo2, 1oo2 and 2oo3 equations
    exactly. Common cause failures use the single beta-factor term of Annex B,
    not the PDS C_MooN multipliers, so for groups with k >= 3 the CCF part is
    conservative relative to the PDS method.
    """
    k = n - m + 1
    if k <= 1:
        return n * pfd_1oo1(ldu, ldd, mttr, mrt, t1)
    lam = (1.0 - beta_d) * ldd + (1.0 - beta) * ldu
    prod = 1.0
    for j in range(1, k + 1):
        prod *= _down_time(ldu, ldd, mttr, mrt, t1, j + 1.0)
    return (math.comb(n, k) * math.factorial(k) * lam ** k * prod
            + beta_d * ldd * mttr + beta * ldu * (t1 / 2.0 + mrt))


def pfh_1oo1(ldu: float) -> float:
    """1oo1: PFH = lDU."""
    return ldu


def pfh_2oo2(ldu: float) -> float:
    """2oo2: PFH = 2 * lDU."""
    return 2.0 * ldu


def pfh_1oo2(ldu: float, ldd: float, beta: float, beta_d: float, mttr: float, mrt: float,
             t1: float) -> float:
    """1oo2: 2*l'*(1-b)*lDU*tCE + bD*lDD + b*lDU."""
    lam = (1.0 - beta_d) * ldd + (1.0 - beta) * ldu
    return (2.0 * lam * (1.0 - beta) * ldu * t_ce(ldu, ldd, mttr, mrt, t1)
            + beta_d * ldd + beta * ldu)


def pfh_2oo3(ldu: float, ldd: float, beta: float, beta_d: float, mttr: float, mrt: float,
             t1: float) -> float:
    """2oo3: 6*l'*(1-b)*lDU*tCE + bD*lDD + b*lDU."""
    lam = (1.0 - beta_d) * ldd + (1.0 - beta) * ldu
    return (6.0 * lam * (1.0 - beta) * ldu * t_ce(ldu, ldd, mttr, mrt, t1)
            + beta_d * ldd + beta * ldu)


def pfh_1oo2d(ldu: float, ldd: float, lsd: float, beta: float, beta_d: float, mttr: float,
              mrt: float, t1: float) -> float:
    """1oo2D: 2(1-b)lDU((1-b)lDU + (1-bD)lDD + lSD) t'CE + bD*lDD + b*lDU."""
    tce = _t_ce_1oo2d(ldu, ldd, lsd, mttr, mrt, t1)
    return (2.0 * (1.0 - beta) * ldu * ((1.0 - beta) * ldu + (1.0 - beta_d) * ldd + lsd) * tce
            + beta_d * ldd + beta * ldu)


def pfh_moon(m: int, n: int, ldu: float, ldd: float, beta: float, beta_d: float, mttr: float,
             mrt: float, t1: float) -> float:
    """General MooN PFH (an approximation, same pattern as :func:`pfd_moon`).

    k = 1 (NooN): N * lDU. k >= 2: the group fails when the last of k
    independent failures is a DU failure while the other k-1 channels are
    down: C(N, k) * k! * l'^(k-1) * (1-b)*lDU * t_1 * ... * t_(k-1)
    + bD*lDD + b*lDU. Reproduces the IEC 61508-6:2010 B.3.3.2 equations for
    1oo1, 1oo2 (factor 2), 2oo3 (factor 6) and 1oo3
    (6 * l'^2 * (1-b)*lDU * tCE * tGE).
    """
    k = n - m + 1
    if k <= 1:
        return n * ldu
    lam = (1.0 - beta_d) * ldd + (1.0 - beta) * ldu
    prod = 1.0
    for j in range(1, k):
        prod *= _down_time(ldu, ldd, mttr, mrt, t1, j + 1.0)
    return (math.comb(n, k) * math.factorial(k) * lam ** (k - 1) * (1.0 - beta) * ldu * prod
            + beta_d * ldd + beta * ldu)


def pfd_isa(m: int, n: int, ldu: float, beta: float, t1: float) -> float:
    """ISA-TR84.00.02 simplified PFDavg of a MooN group (DU failures only).

    k = N - M + 1; k = 1: N*lDU*T1/2; k >= 2: C(N, k)*(lDU*T1)^k/(k+1) + b*lDU*T1/2.
    """
    k = n - m + 1
    x = ldu * t1
    if k <= 1:
        return n * x / 2.0
    return math.comb(n, k) * x ** k / (k + 1) + beta * x / 2.0


def group_pfd(voting: Voting, ldu: float, ldd: float = 0.0, lsd: float = 0.0, beta: float = 0.0,
              beta_d: float = 0.0, mttr: float = 8.0, mrt: float | None = None,
              t1: float = HOURS_PER_YEAR, method: str = METHOD_IEC) -> float:
    """Unclipped PFDavg of one voted group with a perfect proof test at ``t1``."""
    if mrt is None:
        mrt = mttr
    m, n = voting.m, voting.n
    if method == METHOD_ISA:
        return pfd_isa(m, n, ldu, beta, t1)
    if voting.diagnostic:
        return pfd_1oo2d(ldu, ldd, lsd, beta, beta_d, mttr, mrt, t1)
    if n == 1:
        return pfd_1oo1(ldu, ldd, mttr, mrt, t1)
    if m == n:
        return n * pfd_1oo1(ldu, ldd, mttr, mrt, t1)
    if m == 1 and n == 2:
        return pfd_1oo2(ldu, ldd, beta, beta_d, mttr, mrt, t1)
    if m == 2 and n == 3:
        return pfd_2oo3(ldu, ldd, beta, beta_d, mttr, mrt, t1)
    return pfd_moon(m, n, ldu, ldd, beta, beta_d, mttr, mrt, t1)


def group_pfh(voting: Voting, ldu: float, ldd: float = 0.0, lsd: float = 0.0, beta: float = 0.0,
              beta_d: float = 0.0, mttr: float = 8.0, mrt: float | None = None,
              t1: float = HOURS_PER_YEAR) -> float:
    """PFH (per hour) of one voted group, IEC 61508-6:2010 B.3.3.2 style."""
    if mrt is None:
        mrt = mttr
    m, n = voting.m, voting.n
    if voting.diagnostic:
        return pfh_1oo2d(ldu, ldd, lsd, beta, beta_d, mttr, mrt, t1)
    if m == n:
        return n * ldu
    if m == 1 and n == 2:
        return pfh_1oo2(ldu, ldd, beta, beta_d, mttr, mrt, t1)
    if m == 2 and n == 3:
        return pfh_2oo3(ldu, ldd, beta, beta_d, mttr, mrt, t1)
    return pfh_moon(m, n, ldu, ldd, beta, beta_d, mttr, mrt, t1)


# ---------------------------------------------------------------------------
# Subsystem


@dataclass(frozen=True)
class Subsystem:
    """One subsystem (sensors, logic solver or final elements) of a SIF.

    Field names equal the keys of the JSON case format so error messages name
    what the user typed. ``voting`` may be given as text ("2oo3") and is
    stored parsed. ``mrt_hours`` defaults to ``mttr_hours``.
    ``lambda_s_per_hour`` (total safe rate of one channel) only serves to
    compute the SFF when ``sff`` is not given; ``lambda_sd_per_hour`` (safe
    detected) enters the 1oo2D equations.
    """

    name: str
    voting: Voting | str
    lambda_du_per_hour: float
    proof_test_interval_hours: float
    lambda_dd_per_hour: float = 0.0
    lambda_sd_per_hour: float = 0.0
    lambda_s_per_hour: float | None = None
    beta: float = 0.0
    beta_d: float = 0.0
    mttr_hours: float = 8.0
    mrt_hours: float | None = None
    proof_test_coverage: float = 1.0
    mission_time_hours: float | None = None
    partial_test_interval_hours: float | None = None
    partial_test_coverage: float | None = None
    sff: float | None = None
    hft_type: str | None = None
    systematic_capability: int | None = None

    def __post_init__(self) -> None:
        put = object.__setattr__
        if not isinstance(self.name, str) or not self.name.strip():
            raise InputError("name", f"must be a non-empty text, got {self.name!r}")
        if not isinstance(self.voting, Voting):
            put(self, "voting", parse_voting(self.voting, "voting"))
        for key in ("lambda_du_per_hour", "lambda_dd_per_hour", "lambda_sd_per_hour"):
            put(self, key, check_rate(getattr(self, key), key))
        if self.lambda_s_per_hour is not None:
            put(self, "lambda_s_per_hour", check_rate(self.lambda_s_per_hour, "lambda_s_per_hour"))
        for key in ("beta", "beta_d", "proof_test_coverage"):
            put(self, key, _probability(getattr(self, key), key))
        put(self, "proof_test_interval_hours",
            _number(self.proof_test_interval_hours, "proof_test_interval_hours", low_open=True))
        put(self, "mttr_hours", _number(self.mttr_hours, "mttr_hours"))
        if self.mrt_hours is None:
            put(self, "mrt_hours", self.mttr_hours)
        else:
            put(self, "mrt_hours", _number(self.mrt_hours, "mrt_hours"))
        if self.mission_time_hours is not None:
            put(self, "mission_time_hours",
                _number(self.mission_time_hours, "mission_time_hours", low_open=True))
        if self.proof_test_coverage < 1.0:
            if self.mission_time_hours is None:
                raise InputError("mission_time_hours",
                                 "is required when proof_test_coverage is below 1")
            if self.mission_time_hours < self.proof_test_interval_hours:
                raise InputError("mission_time_hours",
                                 f"must be at least proof_test_interval_hours "
                                 f"({self.proof_test_interval_hours:g}), got {self.mission_time_hours:g}")
        has_pi = self.partial_test_interval_hours is not None
        has_pc = self.partial_test_coverage is not None
        if has_pi != has_pc:
            missing = "partial_test_coverage" if has_pi else "partial_test_interval_hours"
            raise InputError(missing, "partial_test_interval_hours and partial_test_coverage "
                                      "must be given together")
        if has_pi:
            put(self, "partial_test_interval_hours",
                _number(self.partial_test_interval_hours, "partial_test_interval_hours",
                        low_open=True))
            put(self, "partial_test_coverage",
                _probability(self.partial_test_coverage, "partial_test_coverage"))
            if self.partial_test_coverage > self.proof_test_coverage:
                raise InputError("partial_test_coverage",
                                 f"cannot exceed proof_test_coverage ({self.proof_test_coverage:g}): "
                                 f"the full proof test also reveals what the partial test reveals, "
                                 f"got {self.partial_test_coverage:g}")
        if self.sff is not None:
            put(self, "sff", _probability(self.sff, "sff"))
        if self.hft_type is not None:
            kind = self.hft_type.strip().upper() if isinstance(self.hft_type, str) else None
            if kind not in ("A", "B"):
                raise InputError("hft_type", f"must be 'A' or 'B', got {self.hft_type!r}")
            put(self, "hft_type", kind)
        sc = self.systematic_capability
        if sc is not None:
            whole = isinstance(sc, int) or (isinstance(sc, float) and sc.is_integer())
            if isinstance(sc, bool) or not whole or not 1 <= sc <= 4:
                raise InputError("systematic_capability",
                                 f"must be a whole number 1 to 4, got {sc!r}")
            put(self, "systematic_capability", int(sc))

    @property
    def hft(self) -> int:
        return self.voting.hft

    def effective_interval(self, proof_test_interval_hours: float | None = None) -> float:
        """Weighted test interval T_eff (see the module docstring).

        ``proof_test_interval_hours`` replaces T1 when given. A partial test
        interval longer than T1 counts as T1 (the full test comes first); a
        mission time shorter than T1 counts as T1.
        """
        t1 = self.proof_test_interval_hours if proof_test_interval_hours is None \
            else proof_test_interval_hours
        ptc = self.proof_test_coverage
        teff = 0.0
        theta = 0.0
        if self.partial_test_coverage is not None:
            theta = self.partial_test_coverage
            teff += theta * min(self.partial_test_interval_hours, t1)
        teff += (ptc - theta) * t1
        if ptc < 1.0:
            teff += (1.0 - ptc) * max(self.mission_time_hours, t1)
        return teff

    def safe_failure_fraction(self) -> float | None:
        """SFF used for Route 1H: ``sff`` if given, else from lambda_s when given."""
        if self.sff is not None:
            return self.sff
        if self.lambda_s_per_hour is None:
            return None
        total = self.lambda_s_per_hour + self.lambda_dd_per_hour + self.lambda_du_per_hour
        if total == 0.0:
            return None
        return (self.lambda_s_per_hour + self.lambda_dd_per_hour) / total


def subsystem_pfd_raw(sub: Subsystem, method: str = METHOD_IEC,
                      proof_test_interval_hours: float | None = None) -> float:
    """PFDavg of ``sub`` by the simplified equations alone, before clipping to 1."""
    t = sub.effective_interval(proof_test_interval_hours)
    return group_pfd(sub.voting, sub.lambda_du_per_hour, sub.lambda_dd_per_hour,
                     sub.lambda_sd_per_hour, sub.beta, sub.beta_d, sub.mttr_hours, sub.mrt_hours,
                     t, method)


def subsystem_pfd_exact(sub: Subsystem,
                        proof_test_interval_hours: float | None = None) -> float | None:
    """Exact PFDavg of ``sub`` (:mod:`calcs.engine.markov`); None above four channels.

    Same inputs and schedule as the simplified equations: T1 (or
    ``proof_test_interval_hours``), proof test coverage with renewal at the mission
    time, partial tests, MTTR for detected and MRT for revealed failures.
    """
    if sub.voting.n > _markov.MAX_CHANNELS:
        return None
    t1 = sub.proof_test_interval_hours if proof_test_interval_hours is None \
        else proof_test_interval_hours
    return _exact_cached(sub, float(t1))


@lru_cache(maxsize=4096)
def _exact_cached(sub: Subsystem, t1: float) -> float:
    v = sub.voting
    return _markov.pfd_avg(
        v.m, v.n, ldu=sub.lambda_du_per_hour, ldd=sub.lambda_dd_per_hour,
        lsd=sub.lambda_sd_per_hour, beta=sub.beta, beta_d=sub.beta_d, mttr=sub.mttr_hours,
        mrt=sub.mrt_hours, t1=t1, ptc=sub.proof_test_coverage,
        mission=sub.mission_time_hours if sub.proof_test_coverage < 1.0 else None,
        t_pst=sub.partial_test_interval_hours, theta=sub.partial_test_coverage or 0.0,
        diagnostic=v.diagnostic)


@dataclass(frozen=True)
class PfdFigure:
    """The design PFDavg of one subsystem and how it was obtained.

    ``pfd_avg`` is the figure (at most 1), ``method`` one of the ``PFD_METHOD_*``
    texts, ``simplified`` the simplified equations' value before clipping, ``exact``
    the exact Markov value (None when not computed).
    """

    pfd_avg: float
    method: str
    simplified: float
    exact: float | None


def pfd_figure(sub: Subsystem, method: str = METHOD_IEC,
               proof_test_interval_hours: float | None = None) -> PfdFigure:
    """Design PFDavg of ``sub``: the simplified value clamped to [exact, 1.25 * exact].

    See the module text. With the ISA method the ISA value is kept as it is (the
    exact value is not needed for the figure and is not computed here).
    """
    raw = subsystem_pfd_raw(sub, method, proof_test_interval_hours)
    if method == METHOD_ISA:
        return PfdFigure(min(1.0, raw), PFD_METHOD_ISA, raw, None)
    exact = subsystem_pfd_exact(sub, proof_test_interval_hours)
    if exact is None:
        return PfdFigure(min(1.0, raw), PFD_METHOD_SIMPLIFIED, raw, None)
    if raw < exact:
        value, how = exact, PFD_METHOD_EXACT
    elif raw > EXACT_BAND * exact:
        value, how = EXACT_BAND * exact, PFD_METHOD_CAPPED
    else:
        value, how = raw, PFD_METHOD_SIMPLIFIED
    return PfdFigure(min(1.0, value), how, raw, exact)


def subsystem_pfd_avg(sub: Subsystem, method: str = METHOD_IEC,
                      proof_test_interval_hours: float | None = None) -> float:
    """Design PFDavg of one subsystem, at most 1 (the figure :func:`evaluate_subsystem` reports)."""
    return pfd_figure(sub, method, proof_test_interval_hours).pfd_avg


def subsystem_pfh(sub: Subsystem, proof_test_interval_hours: float | None = None) -> float:
    """PFH (per hour) of one subsystem (IEC 61508-6 method)."""
    t = sub.effective_interval(proof_test_interval_hours)
    return group_pfh(sub.voting, sub.lambda_du_per_hour, sub.lambda_dd_per_hour,
                     sub.lambda_sd_per_hour, sub.beta, sub.beta_d, sub.mttr_hours, sub.mrt_hours, t)


# ---------------------------------------------------------------------------
# SIF


@dataclass(frozen=True)
class SifDesign:
    """A SIF: subsystems in series, demand mode, calculation method, targets."""

    subsystems: tuple[Subsystem, ...]
    demand_mode: str = _sil.LOW
    method: str = METHOD_IEC
    route: str = _sil.ROUTE_AUTO
    target_pfd_avg: float | None = None
    target_pfh_per_hour: float | None = None

    def __post_init__(self) -> None:
        put = object.__setattr__
        subs = tuple(self.subsystems) if not isinstance(self.subsystems, (str, bytes)) else ()
        if not subs:
            raise InputError("subsystems", "must list at least one subsystem")
        names = set()
        for i, sub in enumerate(subs):
            if not isinstance(sub, Subsystem):
                raise InputError(f"subsystems[{i}]", "must be a Subsystem")
            if sub.name in names:
                raise InputError(f"subsystems[{i}].name", f"'{sub.name}' is used twice")
            names.add(sub.name)
        put(self, "subsystems", subs)
        put(self, "demand_mode", _sil.normalise_mode(self.demand_mode))
        if self.method not in METHODS:
            raise InputError("method", f"must be one of {', '.join(METHODS)}, got {self.method!r}")
        if self.route not in _sil.ROUTES:
            raise InputError("route", f"must be one of {', '.join(_sil.ROUTES)}, got {self.route!r}")
        if self.method == METHOD_ISA:
            if self.demand_mode != _sil.LOW:
                raise InputError("method", "the ISA-TR84.00.02 equations cover low demand only")
            for i, sub in enumerate(subs):
                if sub.voting.diagnostic:
                    raise InputError(f"subsystems[{i}].voting",
                                     "1oo2D is not covered by the ISA-TR84.00.02 equations; "
                                     "use method iec61508-6")
        if self.target_pfd_avg is not None:
            put(self, "target_pfd_avg",
                _number(self.target_pfd_avg, "target_pfd_avg", low_open=True, high=1.0))
        if self.target_pfh_per_hour is not None:
            put(self, "target_pfh_per_hour",
                _number(self.target_pfh_per_hour, "target_pfh_per_hour", low_open=True))


@dataclass(frozen=True)
class SubsystemResult:
    """Design result of one subsystem.

    ``pfd_avg`` is the design figure, ``pfd_method`` says which method gave it (one of
    the ``PFD_METHOD_*`` texts), ``pfd_avg_simplified`` is the simplified equations'
    value (before clipping to 1) and ``pfd_avg_exact`` the exact Markov value (None
    where it was not computed: more than four channels).
    """

    name: str
    voting: str
    hft: int
    pfd_avg: float
    pfh_per_hour: float | None
    effective_test_interval_hours: float
    sff: float | None
    architecture: _sil.ArchitectureLimit
    systematic_capability: int | None
    caution: tuple[str, ...] = ()
    pfd_method: str = PFD_METHOD_SIMPLIFIED
    pfd_avg_simplified: float | None = None
    pfd_avg_exact: float | None = None

    @property
    def architectural_sil(self) -> int:
        return self.architecture.sil


@dataclass(frozen=True)
class SifResult:
    """Design result of a SIF.

    ``sil`` is the band of the computed PFDavg (low demand) or PFH (high
    demand); ``claimable_sil`` also applies the architectural limit and the
    lowest systematic capability, ``sil_limited_by`` says which one sets it.
    ``meets_target`` compares PFDavg with ``target_pfd_avg`` in low demand
    and PFH with ``target_pfh_per_hour`` in high demand (None without one).
    """

    demand_mode: str
    method: str
    pfd_avg: float
    rrf: float
    pfh_per_hour: float | None
    sil: int
    architectural_sil: int
    systematic_capability: int | None
    claimable_sil: int
    sil_limited_by: str
    meets_target: bool | None
    subsystems: tuple[SubsystemResult, ...]
    caution: tuple[str, ...] = field(default=())


def evaluate_subsystem(sub: Subsystem, demand_mode: str = _sil.LOW, method: str = METHOD_IEC,
                       route: str = _sil.ROUTE_AUTO) -> SubsystemResult:
    """PFDavg, PFH (high demand only) and architectural limit of one subsystem.

    The PFDavg is :func:`pfd_figure` (the same in both demand modes); the cautions
    about how it was obtained are given in low demand mode, where it sets the SIL.
    """
    teff = sub.effective_interval()
    fig = pfd_figure(sub, method)
    raw, exact = fig.simplified, fig.exact
    if method == METHOD_ISA and sub.voting.n <= _markov.MAX_CHANNELS:
        exact = subsystem_pfd_exact(sub)
    low = demand_mode == _sil.LOW
    caution: list[str] = []
    name, voting = sub.name, str(sub.voting)
    from_simplified = fig.method in (PFD_METHOD_SIMPLIFIED, PFD_METHOD_ISA)
    if raw > 1.0 and from_simplified:
        caution.append(f"{name}: the linearised PFDavg ({raw:.3g}) exceeds 1 and is "
                       f"reported as 1; the simplified equations are not valid here")
    if low and fig.method == PFD_METHOD_EXACT:
        caution.append(f"{name}: the simplified {voting} equation is "
                       f"{_percent(1.0 - raw / exact)} below the exact Markov value "
                       f"({exact:.3g}); the exact value is used")
    elif low and fig.method == PFD_METHOD_CAPPED:
        caution.append(f"{name}: the simplified {voting} equations give {_times(raw, exact)} "
                       f"the exact Markov value ({exact:.3g}); the figure is the exact value "
                       f"+ 25 % (the upper edge of the accepted band)")
    elif low and fig.method == PFD_METHOD_ISA and exact is not None and raw < exact:
        caution.append(f"{name}: the ISA-TR84.00.02 value is {_percent(1.0 - raw / exact)} "
                       f"below the exact Markov value ({exact:.3g}); it is reported as the "
                       f"chosen method gives it")
    elif low and exact is None and method == METHOD_IEC:
        caution.append(f"{name}: {voting} has more than {_markov.MAX_CHANNELS} channels; the "
                       f"simplified equations are not checked against the exact Markov model")
    lt = sub.lambda_du_per_hour * teff
    if lt > LAMBDA_T_CAUTION and from_simplified:
        text = (f"{name}: lambda_DU x test interval = {lt:.3g} is above "
                f"{LAMBDA_T_CAUTION:g}; the simplified equations lose accuracy "
                f"(they overstate the PFDavg)")
        if exact and raw >= exact:
            text += f"; here {_percent(raw / exact - 1.0)} above the exact Markov value"
        caution.append(text)
    pfh = None
    if demand_mode == _sil.HIGH:
        pfh = group_pfh(sub.voting, sub.lambda_du_per_hour, sub.lambda_dd_per_hour,
                        sub.lambda_sd_per_hour, sub.beta, sub.beta_d, sub.mttr_hours,
                        sub.mrt_hours, teff)
    sff_value = sub.safe_failure_fraction()
    arch = _sil.architectural_limit(sub.voting.hft, demand_mode, sff_value, sub.hft_type, route)
    return SubsystemResult(
        name=sub.name, voting=voting, hft=sub.voting.hft, pfd_avg=fig.pfd_avg,
        pfh_per_hour=pfh, effective_test_interval_hours=teff, sff=sff_value, architecture=arch,
        systematic_capability=sub.systematic_capability, caution=tuple(caution),
        pfd_method=fig.method, pfd_avg_simplified=raw, pfd_avg_exact=exact,
    )


def _percent(fraction: float) -> str:
    return f"{100.0 * fraction:.3g} %"


def _times(value: float, reference: float) -> str:
    if reference <= 0.0:
        return "a positive value against 0 for"
    return f"{value / reference:.3g} times"


def sif_pfd_avg(subsystems: Iterable[Subsystem], method: str = METHOD_IEC) -> float:
    """Sum of subsystem PFDavg (rare-event approximation of 1 - prod(1 - PFD_i)), at most 1."""
    return min(1.0, sum(subsystem_pfd_avg(s, method) for s in subsystems))


def sif_pfh(subsystems: Iterable[Subsystem]) -> float:
    """Sum of subsystem PFH (per hour)."""
    return sum(subsystem_pfh(s) for s in subsystems)


def evaluate_sif(sif: SifDesign) -> SifResult:
    """Full design result of a SIF (see :class:`SifResult`)."""
    mode = sif.demand_mode
    results = tuple(evaluate_subsystem(s, mode, sif.method, sif.route) for s in sif.subsystems)
    pfd = min(1.0, sum(r.pfd_avg for r in results))
    pfh = sum(r.pfh_per_hour for r in results) if mode == _sil.HIGH else None
    if mode == _sil.LOW:
        band, measure = _sil.sil_from_pfd(pfd), "pfd_avg"
    else:
        band, measure = _sil.sil_from_pfh(pfh), "pfh"
    limit = _sil.sif_limit(
        band,
        {r.name: r.architecture.sil for r in results},
        {r.name: r.systematic_capability for r in results},
        measure,
    )
    meets = None
    if mode == _sil.LOW and sif.target_pfd_avg is not None:
        meets = pfd <= sif.target_pfd_avg
    elif mode == _sil.HIGH and sif.target_pfh_per_hour is not None:
        meets = pfh <= sif.target_pfh_per_hour
    caution = tuple(c for r in results for c in r.caution)
    return SifResult(
        demand_mode=mode, method=sif.method, pfd_avg=pfd,
        rrf=math.inf if pfd == 0.0 else 1.0 / pfd, pfh_per_hour=pfh, sil=band,
        architectural_sil=limit.architectural_sil,
        systematic_capability=limit.systematic_capability, claimable_sil=limit.sil,
        sil_limited_by=limit.limited_by, meets_target=meets, subsystems=results, caution=caution,
    )


# ---------------------------------------------------------------------------
# Proof test interval questions


def _chosen(sif: SifDesign, subsystem: str | None) -> list[bool]:
    if subsystem is None:
        return [True] * len(sif.subsystems)
    flags = [s.name == subsystem for s in sif.subsystems]
    if not any(flags):
        raise InputError("subsystem", f"no subsystem named {subsystem!r}")
    return flags


def _total(sif: SifDesign, flags: Sequence[bool], t1: float | None, measure: str) -> float:
    total = 0.0
    for sub, chosen in zip(sif.subsystems, flags):
        t = t1 if chosen else None
        if measure == "pfd_avg":
            total += subsystem_pfd_avg(sub, sif.method, t)
        else:
            total += subsystem_pfh(sub, t)
    return min(1.0, total) if measure == "pfd_avg" else total


def proof_test_interval_cap(sif: SifDesign, *, subsystem: str | None = None,
                            cap_hours: float = PROOF_TEST_INTERVAL_CAP_HOURS) -> float:
    """Cap used by :func:`max_proof_test_interval`: ``cap_hours`` or a shorter mission time."""
    flags = _chosen(sif, subsystem)
    cap = _number(cap_hours, "cap_hours", low_open=True)
    for sub, chosen in zip(sif.subsystems, flags):
        if chosen and sub.proof_test_coverage < 1.0:
            cap = min(cap, sub.mission_time_hours)
    return cap


def max_proof_test_interval(sif: SifDesign, target: float | None = None, *,
                            subsystem: str | None = None,
                            cap_hours: float = PROOF_TEST_INTERVAL_CAP_HOURS) -> float | None:
    """Longest common proof test interval T1 (hours) that still meets the target.

    The same T1 is applied to every subsystem (or only to the subsystem named
    ``subsystem``; the others keep their own interval); partial test
    intervals, coverages and mission times stay as they are. The measure is
    the SIF PFDavg in low demand mode (``target`` defaults to
    ``sif.target_pfd_avg``) and the SIF PFH in high demand mode (default
    ``sif.target_pfh_per_hour``). PFDavg and PFH do not decrease when T1
    grows, so the answer is found by bisection (relative precision 1e-10).

    Returns None when even a 1 hour interval does not meet the target (the
    other contributions alone are too large). Returns the cap when the
    target is met at the cap: 20 years by default, or the shortest mission
    time of the varied subsystems that have an imperfect proof test
    (uncovered failures are found at the mission time anyway).
    """
    measure = "pfd_avg" if sif.demand_mode == _sil.LOW else "pfh"
    if target is None:
        target = sif.target_pfd_avg if measure == "pfd_avg" else sif.target_pfh_per_hour
        if target is None:
            raise InputError("target_pfd_avg" if measure == "pfd_avg" else "target_pfh_per_hour",
                             "a target is needed to find the longest proof test interval")
    target = _number(target, "target", low_open=True)
    flags = _chosen(sif, subsystem)
    cap = proof_test_interval_cap(sif, subsystem=subsystem, cap_hours=cap_hours)
    lo = min(PROOF_TEST_INTERVAL_FLOOR_HOURS, cap)
    if _total(sif, flags, lo, measure) > target:
        return None
    if _total(sif, flags, cap, measure) <= target:
        return cap
    return _longest_meeting(lambda t: _total(sif, flags, t, measure) <= target,
                            lambda t: _total(sif, flags, t, measure) - target, lo, cap)


def _longest_meeting(meets, excess, lo: float, hi: float) -> float:
    """Largest t in [lo, hi) with meets(t), given meets(lo) and not meets(hi).

    Brent's method on log t finds the crossing of the (non-decreasing) ``excess``
    in a few evaluations (each may need an exact Markov solve); every evaluated point
    narrows the bracket [lo, hi], which is then bisected down to a relative width of
    1e-10, so the answer always meets the target.
    """
    bracket = [lo, hi]

    def g(x: float) -> float:
        t = min(max(math.exp(x), bracket[0]), bracket[1])
        value = excess(t)
        if value <= 0.0:
            bracket[0] = max(bracket[0], t)
        else:
            bracket[1] = min(bracket[1], t)
        return value

    if hi > lo:
        # on a failure to converge the bisection below finishes the job
        with contextlib.suppress(RuntimeError, ValueError):
            _brentq(g, math.log(lo), math.log(hi), xtol=1e-11, rtol=1e-14, maxiter=100)
    lo, hi = bracket
    while hi - lo > 1e-10 * hi:
        mid = math.sqrt(lo * hi) if hi > 4.0 * lo else 0.5 * (lo + hi)
        if meets(mid):
            lo = mid
        else:
            hi = mid
    return lo


@dataclass(frozen=True)
class TestMoveResult:
    """PFDavg for the planned and for the actual (moved) proof test interval."""

    planned_interval_hours: float
    actual_interval_hours: float
    planned_pfd_avg: float
    moved_pfd_avg: float

    @property
    def ratio(self) -> float:
        return math.inf if self.planned_pfd_avg == 0 else self.moved_pfd_avg / self.planned_pfd_avg


def pfd_if_test_moved(item: Subsystem | SifDesign, planned_interval_hours: float,
                      actual_interval_hours: float, *, subsystem: str | None = None,
                      method: str | None = None) -> TestMoveResult:
    """PFDavg of the proof test cycle whose test was moved (late or early).

    The design figure (:func:`subsystem_pfd_avg`, the same one
    :func:`evaluate_sif` reports) is evaluated twice: once with T1 = the
    planned interval and once with T1 = the actual interval. The second value
    is the figure of a schedule with that interval throughout, a stand-in for
    the one stretched (or shortened) cycle; with the linearised equations it
    equals the time average over that one cycle started just after a perfect
    test. ``item`` is one subsystem or a SIF; for a
    SIF the interval is changed for every subsystem, or only for the one named
    ``subsystem``, and the others keep their own interval.
    """
    planned = _number(planned_interval_hours, "planned_interval_hours", low_open=True)
    actual = _number(actual_interval_hours, "actual_interval_hours", low_open=True)
    if isinstance(item, Subsystem):
        meth = method or METHOD_IEC
        return TestMoveResult(planned, actual, subsystem_pfd_avg(item, meth, planned),
                              subsystem_pfd_avg(item, meth, actual))
    if not isinstance(item, SifDesign):
        raise InputError("item", "must be a Subsystem or a SifDesign")
    if method is not None and method != item.method:
        item = replace(item, method=method)
    flags = _chosen(item, subsystem)
    return TestMoveResult(planned, actual, _total(item, flags, planned, "pfd_avg"),
                          _total(item, flags, actual, "pfd_avg"))
