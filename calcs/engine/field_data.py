"""Failure rates and demand rates from field records (pure functions).

Conventions: rates per hour, cumulative service time T in hours, 1 year = 8760 h.

* Classical (time-truncated data, NIST/SEMATECH e-Handbook 8.4.5.1):
  point n/T; one-sided upper bound chi2.ppf(CL, 2n+2)/(2T); one-sided lower
  bound chi2.ppf(1-CL, 2n)/(2T) (0 when n = 0); a two-sided interval at
  confidence 1-alpha uses CL = 1-alpha/2 on each side.
* Confidence levels: 70 % upper bound for failure rates used in PFD
  calculations from prior-use data (IEC 61511-1:2016, clause 11.9, as reported
  by a secondary source); 90 % for field-feedback data under IEC 61508-2 Route 2H.
* Bayesian gamma-Poisson update (NIST e-Handbook 8.4.6 / 8.3.1.5): prior
  Gamma(shape a, rate b [hours]); after n failures in T hours the posterior is
  Gamma(a + n, b + T).
* Prior from a generic (library) rate lambda0: a = prior_strength, b = a /
  lambda0, so the prior mean equals lambda0 and the prior weighs as much as
  ``prior_strength`` failures seen in a / lambda0 hours. DEFAULT_PRIOR_STRENGTH
  = 1 (one equivalent failure: field experience of a few failures already
  outweighs the library value). This is a stated, adjustable assumption of this
  software, not taken from a standard.
* Significance test that observed failures exceed what an assumed rate
  predicts: one-sided Poisson test, p = P(N >= n | mean = rate * T); the
  assumed rate is called exceeded when p < alpha, DEFAULT_ALPHA = 0.05 (the
  usual 5 % significance level; common practice, no source).
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

from scipy import stats

from calcs.engine.errors import InputError

#: Upper-bound confidence for prior-use failure rates (IEC 61511-1:2016 cl. 11.9).
IEC61511_PRIOR_USE_CL = 0.70
#: Confidence for field-feedback failure rates under IEC 61508-2 Route 2H.
IEC61508_ROUTE_2H_CL = 0.90
#: Significance level of the "observed exceeds assumed" tests.
DEFAULT_ALPHA = 0.05
#: Prior weight, in equivalent failures, of a generic library rate.
DEFAULT_PRIOR_STRENGTH = 1.0


# --------------------------------------------------------------------------
# validation


def _count(value: Any, field: str) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise InputError(field, f"must be a whole number, got {value!r}")
    if not math.isfinite(value) or value < 0 or int(value) != value:
        raise InputError(field, f"must be a whole number of at least 0, got {value!r}")
    return int(value)


def _positive(value: Any, field: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise InputError(field, f"must be a number, got {value!r}")
    x = float(value)
    if not math.isfinite(x) or x <= 0:
        raise InputError(field, f"must be greater than 0, got {value!r}")
    return x


def _level(value: Any, field: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise InputError(field, f"must be a number between 0 and 1, got {value!r}")
    x = float(value)
    if not 0.0 < x < 1.0:
        raise InputError(field, f"must lie strictly between 0 and 1, got {value!r}")
    return x


# --------------------------------------------------------------------------
# classical estimates


def point_estimate(failures: int, hours: float) -> float:
    """Failure rate n / T per hour."""
    return _count(failures, "failures") / _positive(hours, "hours")


def upper_bound(failures: int, hours: float, confidence: float = IEC61511_PRIOR_USE_CL) -> float:
    """One-sided upper confidence bound chi2(CL; 2n+2) / (2T) per hour."""
    n = _count(failures, "failures")
    t = _positive(hours, "hours")
    cl = _level(confidence, "confidence")
    return float(stats.chi2.ppf(cl, 2 * n + 2) / (2.0 * t))


def lower_bound(failures: int, hours: float, confidence: float = IEC61511_PRIOR_USE_CL) -> float:
    """One-sided lower confidence bound chi2(1-CL; 2n) / (2T); 0 when n = 0."""
    n = _count(failures, "failures")
    t = _positive(hours, "hours")
    cl = _level(confidence, "confidence")
    if n == 0:
        return 0.0
    return float(stats.chi2.ppf(1.0 - cl, 2 * n) / (2.0 * t))


def two_sided_interval(failures: int, hours: float,
                       confidence: float = 0.90) -> tuple[float, float]:
    """Two-sided (lower, upper) interval at ``confidence`` = 1 - alpha: each side
    at 1 - alpha/2."""
    cl = _level(confidence, "confidence")
    side = 1.0 - (1.0 - cl) / 2.0
    return lower_bound(failures, hours, side), upper_bound(failures, hours, side)


def mtbf_lower_bound(failures: int, hours: float, confidence: float) -> float:
    """Lower confidence bound of the MTBF in hours (= 1 / upper rate bound)."""
    return 1.0 / upper_bound(failures, hours, confidence)


# --------------------------------------------------------------------------
# Bayesian gamma-Poisson


@dataclass(frozen=True)
class GammaRate:
    """Gamma distribution of a failure rate: shape a, rate b (hours)."""

    shape: float
    rate_hours: float

    def __post_init__(self) -> None:
        _positive(self.shape, "shape")
        _positive(self.rate_hours, "rate_hours")

    @property
    def mean(self) -> float:
        return self.shape / self.rate_hours

    def quantile(self, q: float) -> float:
        return float(stats.gamma.ppf(_level(q, "q"), self.shape, scale=1.0 / self.rate_hours))

    @property
    def median(self) -> float:
        return self.quantile(0.5)

    def upper(self, confidence: float = IEC61511_PRIOR_USE_CL) -> float:
        """Rate not exceeded with probability ``confidence``."""
        return self.quantile(confidence)

    def lower(self, confidence: float = IEC61511_PRIOR_USE_CL) -> float:
        return self.quantile(1.0 - _level(confidence, "confidence"))

    def updated(self, failures: int, hours: float) -> GammaRate:
        """Posterior after ``failures`` in ``hours``: Gamma(a + n, b + T)."""
        n = _count(failures, "failures")
        t = float(hours)
        if not math.isfinite(t) or t < 0:
            raise InputError("hours", f"must be at least 0, got {hours!r}")
        return GammaRate(self.shape + n, self.rate_hours + t)


def prior_from_rate(generic_rate: float, strength: float = DEFAULT_PRIOR_STRENGTH) -> GammaRate:
    """Prior whose mean is the library rate: a = strength, b = strength / rate."""
    lam0 = _positive(generic_rate, "generic_rate")
    a = _positive(strength, "prior_strength")
    return GammaRate(a, a / lam0)


def bayes_test_hours(mtbf_target: float, confidence: float, prior: GammaRate,
                     allowed_failures: int = 0) -> float:
    """Test time needed to show MTBF >= M at ``confidence`` allowing r failures:
    T = M * G^-1(confidence; a + r, 1) - b (NIST e-Handbook 8.3.1.5).
    A result <= 0 means the prior alone already shows it."""
    m = _positive(mtbf_target, "mtbf_target")
    cl = _level(confidence, "confidence")
    r = _count(allowed_failures, "allowed_failures")
    return float(m * stats.gamma.ppf(cl, prior.shape + r) - prior.rate_hours)


# --------------------------------------------------------------------------
# significance tests, demands, trips


@dataclass(frozen=True)
class ExcessTest:
    """Result of the one-sided Poisson test 'observed exceeds assumed'."""

    observed: int
    expected: float
    p_value: float
    alpha: float
    exceeds: bool
    reason: str


def poisson_excess_test(observed: int, exposure: float, assumed_rate: float,
                        alpha: float = DEFAULT_ALPHA, unit: str = "failures") -> ExcessTest:
    """P(N >= observed | Poisson mean assumed_rate * exposure); ``exceeds`` when
    that probability is below ``alpha``."""
    n = _count(observed, "observed")
    expo = _positive(exposure, "exposure")
    if isinstance(assumed_rate, bool) or not isinstance(assumed_rate, (int, float)) \
            or not math.isfinite(assumed_rate) or assumed_rate < 0:
        raise InputError("assumed_rate", f"must be a number of at least 0, got {assumed_rate!r}")
    a = _level(alpha, "alpha")
    mu = float(assumed_rate) * expo
    if n == 0:
        p = 1.0
    elif mu == 0:
        p = 0.0
    else:
        p = float(stats.poisson.sf(n - 1, mu))
    exceeds = p < a
    if exceeds:
        reason = (f"{n} {unit} observed where {mu:.3g} were expected; so many or more would "
                  f"happen by chance with probability {p:.2g} (below {a:g}): the assumed "
                  "rate is too low")
    else:
        reason = (f"{n} {unit} observed where {mu:.3g} were expected; probability of so many "
                  f"or more by chance {p:.2g} (not below {a:g}): consistent with the assumed "
                  "rate")
    return ExcessTest(n, mu, p, a, exceeds, reason)


def demand_rate_test(demands: int, years: float, assumed_per_year: float,
                     alpha: float = DEFAULT_ALPHA) -> ExcessTest:
    """Observed demands on a SIF against the demand rate assumed in the LOPA."""
    return poisson_excess_test(demands, years, assumed_per_year, alpha, unit="demands")


def demand_rate(demands: int, years: float) -> float:
    """Observed demands per year."""
    return _count(demands, "demands") / _positive(years, "years")


def spurious_trip_rate(trips: int, years: float) -> float:
    """Spurious trips per year."""
    return _count(trips, "trips") / _positive(years, "years")


def demands_needed(p: float, confidence: float = 0.95) -> float:
    """Failure-free demands (test cases) needed to show a probability of failure
    on demand <= p at ``confidence``: -ln(1 - confidence) / p
    (IEC 61508-7 Annex D, statistical testing). Round up for a count."""
    pp = _level(p, "p")
    cl = _level(confidence, "confidence")
    return -math.log(1.0 - cl) / pp


# --------------------------------------------------------------------------
# pooled device type


@dataclass(frozen=True)
class DeviceTypeStats:
    """Pooled field statistics of one device type."""

    components: int
    failures: int
    hours: float
    point: float
    lower: float
    upper: float
    confidence: float
    bayes_mean: float | None
    bayes_lower: float | None
    bayes_upper: float | None
    assumed_rate: float | None
    p_value: float | None
    exceeds_assumed: bool
    reason: str


def pool_device_type(records: Iterable[tuple[float, int]], *,
                     assumed_rate: float | None = None,
                     confidence: float = IEC61511_PRIOR_USE_CL,
                     generic_rate: float | None = None,
                     prior_strength: float = DEFAULT_PRIOR_STRENGTH,
                     alpha: float = DEFAULT_ALPHA,
                     component_count: int | None = None) -> DeviceTypeStats:
    """Pool (service hours, DU failures) of each component of a device type.

    Returns totals, the classical point estimate and one-sided bounds at
    ``confidence``, the Bayesian posterior (prior from ``generic_rate``, or from
    ``assumed_rate`` when no generic rate is given; none if neither) and the
    Poisson test of the observed failures against ``assumed_rate``.
    ``component_count`` states how many components the records stand for when
    they are already summed (for example one total per device type).
    """
    hours = 0.0
    failures = 0
    count = 0
    for i, rec in enumerate(records):
        try:
            h, n = rec
        except (TypeError, ValueError):
            raise InputError(f"records[{i}]", "must be a pair (service hours, failures)") from None
        if isinstance(h, bool) or not isinstance(h, (int, float)) or not math.isfinite(h) \
                or h < 0:
            raise InputError(f"records[{i}].hours", f"must be a number of at least 0, got {h!r}")
        failures += _count(n, f"records[{i}].failures")
        hours += float(h)
        count += 1
    if count == 0:
        raise InputError("records", "at least one component is needed")
    if hours <= 0:
        raise InputError("records", "the total service time must be greater than 0")
    if component_count is not None:
        count = _count(component_count, "component_count")
    cl = _level(confidence, "confidence")
    point = failures / hours
    lo = lower_bound(failures, hours, cl)
    up = upper_bound(failures, hours, cl)
    base = generic_rate if generic_rate is not None else assumed_rate
    b_mean = b_lo = b_up = None
    if base is not None and base > 0:
        post = prior_from_rate(base, prior_strength).updated(failures, hours)
        b_mean, b_lo, b_up = post.mean, post.lower(cl), post.upper(cl)
    p_value = None
    exceeds = False
    if assumed_rate is not None:
        test = poisson_excess_test(failures, hours, assumed_rate, alpha)
        p_value, exceeds = test.p_value, test.exceeds
        reason = (f"{count} components, {hours:,.0f} h in service: " + test.reason
                  + f"; {cl:.0%} upper bound {up:.3g} /h against assumed {assumed_rate:.3g} /h")
    else:
        reason = (f"{count} components, {hours:,.0f} h in service, {failures} dangerous "
                  f"undetected failures: {point:.3g} /h, {cl:.0%} upper bound {up:.3g} /h; "
                  "no assumed rate to compare with")
    return DeviceTypeStats(count, failures, hours, point, lo, up, cl, b_mean, b_lo, b_up,
                           assumed_rate, p_value, exceeds, reason)


# --------------------------------------------------------------------------
# one device's own rate (empirical Bayes)

#: Weight, in equivalent failures, of the device type's plant-wide rate when it serves as
#: the prior of one device's own rate. With 2, a device must show about two failures of
#: its own before its record weighs as much as its type: a stated, adjustable assumption
#: of this software (empirical Bayes shrinkage), not taken from a standard.
DEVICE_PRIOR_STRENGTH = 2.0


@dataclass(frozen=True)
class DeviceRate:
    """One device's DU rate: its type's estimate updated by its own record."""

    type_rate: float
    failures: int
    hours: float
    posterior: GammaRate
    excess: ExcessTest
    repeat_offender: bool

    @property
    def rate(self) -> float:
        """Posterior mean rate (per hour), the figure the calculations use."""
        return self.posterior.mean

    @property
    def ratio(self) -> float:
        return self.rate / self.type_rate


def device_rate(type_rate: float, failures: int, hours: float, *,
                prior_strength: float = DEVICE_PRIOR_STRENGTH,
                alpha: float = DEFAULT_ALPHA) -> DeviceRate:
    """Empirical-Bayes rate of one device (gamma-Poisson, NIST e-Handbook 8.4.6).

    Prior Gamma(a = prior_strength, b = a / type_rate) has the type's plant-wide rate as
    its mean; after the device's own ``failures`` in ``hours`` the posterior is
    Gamma(a + n, b + T) and its mean (a + n) / (b + T) is the device's rate. A clean
    record pulls the rate slightly below the type's, repeated failures raise it.
    ``repeat_offender``: the one-sided Poisson test P(N >= n | type_rate * T) < alpha
    (see :func:`poisson_excess_test`): the device fails significantly more often than
    its type.
    """
    lam0 = _positive(type_rate, "type_rate")
    n = _count(failures, "failures")
    t = float(hours)
    if not math.isfinite(t) or t < 0:
        raise InputError("hours", f"must be at least 0, got {hours!r}")
    post = prior_from_rate(lam0, prior_strength).updated(n, t)
    if t > 0:
        excess = poisson_excess_test(n, t, lam0, alpha)
    else:
        excess = ExcessTest(n, 0.0, 1.0, alpha, False, "no service time yet")
    return DeviceRate(lam0, n, t, post, excess, excess.exceeds)
