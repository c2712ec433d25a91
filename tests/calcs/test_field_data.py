"""Field failure-rate statistics (calcs.engine.field_data).

Reference values: /work/shared/reference/check-values.md section 4 (case IDs S4.x).
"""

from __future__ import annotations

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from calcs.engine.errors import InputError
from calcs.engine.field_data import (
    DEFAULT_ALPHA,
    IEC61508_ROUTE_2H_CL,
    IEC61511_PRIOR_USE_CL,
    GammaRate,
    bayes_test_hours,
    demand_rate,
    demand_rate_test,
    demands_needed,
    lower_bound,
    mtbf_lower_bound,
    point_estimate,
    poisson_excess_test,
    pool_device_type,
    prior_from_rate,
    spurious_trip_rate,
    two_sided_interval,
    upper_bound,
)


def test_confidence_level_constants():
    # IEC 61511-1:2016 cl. 11.9 via Dearden, Functional Safety in Practice (secondary),
    # check-values §4 [V, secondary]; IEC 61508-2 Route 2H 90 %, check-values §4 [V, secondary]
    assert IEC61511_PRIOR_USE_CL == 0.70
    assert IEC61508_ROUTE_2H_CL == 0.90
    assert DEFAULT_ALPHA == 0.05  # common practice, no source


def test_zero_failures_upper_bound_70_percent():
    # NIST/SEMATECH e-Handbook 8.4.5.1 formula, check-values S4.1 [V]: 1.2040E-6 /h
    assert upper_bound(0, 1e6, 0.70) == pytest.approx(1.2040e-6, rel=1e-3)
    assert upper_bound(0, 1e6, 0.70) == pytest.approx(-math.log(0.3) / 1e6, rel=1e-9)
    assert lower_bound(0, 1e6, 0.70) == 0.0


def test_chi_square_quantiles_of_worked_exercise():
    # D. J. Smith, Reliability, Maintainability and Risk, 9th ed., App. 8, ch. 5 ex. 1,
    # check-values S4.2 / S4.2b / S4.3 [V]: chi2(60 %, 6) = 6.21, chi2(60 %, 2) = 1.83
    t = 5000.0
    assert upper_bound(2, t, 0.60) * 2 * t == pytest.approx(6.21, abs=0.005)
    assert upper_bound(2, t, 0.60) == pytest.approx(6.2108e-4, rel=1e-3)
    assert mtbf_lower_bound(2, t, 0.60) == pytest.approx(1610, abs=1)
    assert upper_bound(0, t, 0.60) * 2 * t == pytest.approx(1.83, abs=0.005)


def test_upper_bound_90_percent():
    # NIST e-Handbook 8.4.5.1 formula, check-values S4.4 [V]: 3.3404E-6 /h
    assert upper_bound(3, 2e6, 0.90) == pytest.approx(3.3404e-6, rel=1e-3)


def test_two_sided_interval():
    # NIST e-Handbook 8.4.5.1, check-values S4.6a / S4.6b [V]
    lo, up = two_sided_interval(5, 1e6, 0.90)
    assert lo == pytest.approx(1.9701e-6, rel=1e-3)
    assert up == pytest.approx(1.0513e-5, rel=1e-3)


def test_statistical_testing_demands():
    # IEC 61508-7:2010 Annex D Table D.2, check-values S4.5a/b [V]: -ln(alpha) ~ 3 / 4.6
    assert demands_needed(0.1, 0.95) * 0.1 == pytest.approx(3.0, rel=2e-3)
    assert demands_needed(0.1, 0.99) * 0.1 == pytest.approx(4.6, rel=2e-3)
    # IEC 61508-7 D.2.1.3, check-values S4.5c [V]: 30 000 demands for p = 1E-4 at 95 %
    # (the standard rounds -ln 0.05 = 2.9957 to 3; the exact count is 29 958)
    n = math.ceil(demands_needed(1e-4, 0.95))
    assert n == 29958
    assert n == pytest.approx(30000, rel=2e-3)


def test_pooled_transmitters():
    # 40 transmitters x 3 years, 2 failures: check-values S4.7a/b/c [D]
    recs = [(3 * 8760.0, 0)] * 38 + [(3 * 8760.0, 1)] * 2
    s70 = pool_device_type(recs)
    assert s70.components == 40 and s70.failures == 2
    assert s70.hours == pytest.approx(1_051_200)
    assert s70.point == pytest.approx(1.9026e-6, rel=1e-3)
    assert s70.upper == pytest.approx(3.4395e-6, rel=1e-3)  # 70 %, IEC 61511 level
    assert s70.confidence == 0.70
    s90 = pool_device_type(recs, confidence=IEC61508_ROUTE_2H_CL)
    assert s90.upper == pytest.approx(5.0631e-6, rel=1e-3)  # 90 %, Route 2H level
    assert s70.p_value is None and not s70.exceeds_assumed
    assert "no assumed rate" in s70.reason


def test_bayesian_update_worked_example():
    # NIST/SEMATECH e-Handbook 8.4.6, check-values S4.8a / S4.8b [V formulas, R numbers]:
    # prior a = 2, b = 1400 h; 2 failures in 1909 h -> median MTBF 901 h, 80 % lower 600 h
    post = GammaRate(2, 1400).updated(2, 1909)
    assert (post.shape, post.rate_hours) == (4, 3309)
    assert 1 / post.median == pytest.approx(901, abs=1)
    assert 1 / post.upper(0.80) == pytest.approx(600, abs=1)
    assert post.mean == pytest.approx(4 / 3309)


def test_bayesian_test_length():
    # NIST e-Handbook 8.3.1.5, check-values S4.9 [V formula, R numbers]: 1909 h
    assert bayes_test_hours(600, 0.80, GammaRate(2, 1400), 2) == pytest.approx(1909, abs=1)


def test_zero_failure_mtbf_lower_bound():
    # NIST e-Handbook 8.4.5.1, check-values S4.10 [V]: T / (-ln 0.2) = 621.33 h
    assert mtbf_lower_bound(0, 1000, 0.80) == pytest.approx(621.33, rel=1e-3)


def test_prior_from_generic_rate_has_that_mean():
    prior = prior_from_rate(2e-6, strength=0.5)
    assert prior.mean == pytest.approx(2e-6, rel=1e-12)
    assert prior.shape == 0.5 and prior.rate_hours == pytest.approx(250_000)


def test_poisson_excess_against_hand_computed_tail():
    # P(N >= 5 | mean 1.5) from the Poisson probabilities (common practice, no source)
    mu = 1.5
    tail = 1 - sum(math.exp(-mu) * mu ** k / math.factorial(k) for k in range(5))
    r = poisson_excess_test(5, 1e6, 1.5e-6)
    assert r.expected == pytest.approx(1.5)
    assert r.p_value == pytest.approx(tail, rel=1e-9)
    assert r.exceeds and "too low" in r.reason
    calm = poisson_excess_test(2, 1e6, 1.5e-6)
    assert not calm.exceeds and "consistent" in calm.reason
    assert poisson_excess_test(0, 1e6, 1.5e-6).p_value == 1.0


def test_demand_rate_and_spurious_trips():
    assert demand_rate(3, 2.0) == 1.5
    assert spurious_trip_rate(1, 4.0) == 0.25
    # 4 demands in 2 years where the LOPA assumed 0.1 / year: mean 0.2 (no source needed:
    # Poisson tail computed by hand, common practice)
    t = demand_rate_test(4, 2.0, 0.1)
    tail = 1 - math.exp(-0.2) * (1 + 0.2 + 0.2 ** 2 / 2 + 0.2 ** 3 / 6)
    assert t.p_value == pytest.approx(tail, rel=1e-9)
    assert t.exceeds and "demands" in t.reason
    assert not demand_rate_test(1, 2.0, 0.5).exceeds


def test_pool_with_assumed_and_generic_rate():
    recs = [(50_000.0, 2), (80_000.0, 3), (70_000.0, 1)]
    s = pool_device_type(recs, assumed_rate=5e-6, generic_rate=5e-6)
    assert s.failures == 6 and s.hours == 200_000
    assert s.exceeds_assumed and s.p_value < 0.05
    assert s.lower <= s.point <= s.upper
    assert s.bayes_lower <= s.bayes_mean <= s.bayes_upper
    # posterior mean (1 + 6) / (200 000 + 1/5e-6) with the documented prior
    assert s.bayes_mean == pytest.approx(7 / 400_000, rel=1e-12)


@pytest.mark.parametrize("call,field", [
    (lambda: point_estimate(1, 0), "hours"),
    (lambda: upper_bound(-1, 10), "failures"),
    (lambda: upper_bound(1.5, 10), "failures"),
    (lambda: upper_bound(1, 10, 1.0), "confidence"),
    (lambda: pool_device_type([]), "records"),
    (lambda: pool_device_type([(100.0, 1), (-5.0, 0)]), "records[1].hours"),
    (lambda: pool_device_type([(100.0, 1), (5.0, "x")]), "records[1].failures"),
    (lambda: demands_needed(0, 0.95), "p"),
])
def test_bad_inputs_name_the_field(call, field):
    with pytest.raises(InputError) as e:
        call()
    assert e.value.field == field


@settings(max_examples=80, deadline=None)
@given(n=st.integers(0, 200), t=st.floats(1.0, 1e9), cl=st.floats(0.51, 0.995))
def test_bounds_bracket_point(n, t, cl):
    lo, pt, up = lower_bound(n, t, cl), point_estimate(n, t), upper_bound(n, t, cl)
    assert 0.0 <= lo <= pt <= up


@settings(max_examples=60, deadline=None)
@given(n=st.integers(0, 100), t=st.floats(1e3, 1e8), lam0=st.floats(1e-8, 1e-4),
       strength=st.floats(0.1, 10))
def test_more_failures_give_higher_posterior(n, t, lam0, strength):
    prior = prior_from_rate(lam0, strength)
    a, b = prior.updated(n, t), prior.updated(n + 1, t)
    assert b.mean > a.mean
    assert b.upper(0.7) > a.upper(0.7)
    assert poisson_excess_test(n + 1, t, lam0).p_value <= poisson_excess_test(n, t, lam0).p_value


# --------------------------------------------------------------------------
# one device's own rate (empirical Bayes)


def test_device_rate_is_the_gamma_poisson_posterior_mean():
    from calcs.engine.field_data import DEVICE_PRIOR_STRENGTH, device_rate

    lam0, n, hours = 8e-7, 2, 5 * 8760.0
    r = device_rate(lam0, n, hours)
    a, b = DEVICE_PRIOR_STRENGTH, DEVICE_PRIOR_STRENGTH / lam0
    # conjugate update Gamma(a + n, b + T), NIST/SEMATECH e-Handbook 8.4.6; mean by scipy
    post = stats.gamma(a + n, scale=1.0 / (b + hours))
    assert r.rate == pytest.approx(post.mean(), rel=1e-12)
    assert r.posterior.upper(0.7) == pytest.approx(post.ppf(0.7), rel=1e-9)


def test_clean_record_stays_near_its_type_and_three_failures_raise_it():
    from calcs.engine.field_data import DEVICE_PRIOR_STRENGTH, device_rate

    lam0 = 8e-7
    clean = device_rate(lam0, 0, 10 * 8760.0)
    assert 0.95 < clean.ratio < 1.0 and not clean.repeat_offender
    three = device_rate(lam0, 3, 3 * 8760.0)
    a = DEVICE_PRIOR_STRENGTH
    expected_factor = (a + 3) / (a / lam0 + 3 * 8760.0) / lam0  # gamma-Poisson arithmetic
    assert three.ratio == pytest.approx(expected_factor, rel=1e-12)
    assert three.ratio > 2
    # one-sided Poisson test against the type's rate: P(N >= 3 | mu) by scipy
    mu = lam0 * 3 * 8760.0
    assert three.excess.p_value == pytest.approx(stats.poisson.sf(2, mu), rel=1e-9)
    assert three.repeat_offender
