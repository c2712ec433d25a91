"""Property tests (hypothesis) of the design equations and SIL bands."""

import math

from hypothesis import assume, given, settings
from hypothesis import strategies as st

from calcs.engine import (
    SifDesign,
    Subsystem,
    evaluate_sif,
    max_proof_test_interval,
    sil_band,
    sil_from_pfd,
    sil_from_pfh,
    subsystem_pfd_avg,
    subsystem_pfh,
)

VOTINGS = ["1oo1", "1oo2", "2oo2", "2oo3", "1oo3", "2oo4", "3oo4", "1oo2D", "3oo3"]

# Realistic domain of the simplified equations: lDU*T1 up to about 0.2, detected failures
# repaired within days. (Outside it the linearised values can exceed 1 and are clipped.)
ldu_s = st.floats(0.0, 5e-6)
ldd_s = st.floats(0.0, 5e-5)
lsd_s = st.floats(0.0, 5e-5)
frac_s = st.floats(0.0, 0.3)
repair_s = st.floats(0.0, 72.0)
t1_s = st.floats(100.0, 43800.0)


def channel(**fixed):
    return st.fixed_dictionaries({
        "lambda_du_per_hour": fixed.get("ldu", ldu_s),
        "lambda_dd_per_hour": ldd_s,
        "lambda_sd_per_hour": lsd_s,
        "beta": frac_s,
        "beta_d": frac_s,
        "mttr_hours": repair_s,
        "mrt_hours": repair_s,
        "proof_test_interval_hours": fixed.get("t1", t1_s),
    })


def make(voting, data, **override):
    return Subsystem("group", voting, **{**data, **override})


@settings(max_examples=300, deadline=None)
@given(st.sampled_from(VOTINGS), channel(ldu=st.floats(0.0, 1e-4),
                                         t1=st.floats(1.0, 175200.0)))
def test_pfd_in_unit_interval(voting, data):
    pfd = subsystem_pfd_avg(make(voting, data))
    assert 0.0 <= pfd <= 1.0
    assert subsystem_pfh(make(voting, data)) >= 0.0


@settings(max_examples=300, deadline=None)
@given(st.sampled_from(VOTINGS), channel(), st.floats(1.0, 3.0))
def test_monotone_in_lambda_du(voting, data, factor):
    low = subsystem_pfd_avg(make(voting, data))
    high = subsystem_pfd_avg(make(voting, data,
                                  lambda_du_per_hour=data["lambda_du_per_hour"] * factor))
    assert high >= low * (1 - 1e-12)


@settings(max_examples=300, deadline=None)
@given(st.sampled_from(VOTINGS), channel(), st.floats(1.0, 3.0))
def test_monotone_in_proof_test_interval(voting, data, factor):
    low = subsystem_pfd_avg(make(voting, data))
    high = subsystem_pfd_avg(make(voting, data, proof_test_interval_hours=data[
        "proof_test_interval_hours"] * factor))
    assert high >= low * (1 - 1e-12)
    pfh_low = subsystem_pfh(make(voting, data))
    pfh_high = subsystem_pfh(make(voting, data, proof_test_interval_hours=data[
        "proof_test_interval_hours"] * factor))
    assert pfh_high >= pfh_low * (1 - 1e-12)


@settings(max_examples=300, deadline=None)
@given(channel())
def test_1oo2_never_worse_than_1oo1(data):
    assert subsystem_pfd_avg(make("1oo2", data)) <= subsystem_pfd_avg(make("1oo1", data)) * (
        1 + 1e-12)
    assert subsystem_pfd_avg(make("1oo3", data)) <= subsystem_pfd_avg(make("1oo2", data)) * (
        1 + 1e-12)
    assert subsystem_pfd_avg(make("2oo2", data)) >= subsystem_pfd_avg(make("1oo1", data)) * (
        1 - 1e-12)


@settings(max_examples=200, deadline=None)
@given(channel(), st.floats(0.0, 1.0), st.floats(0.0, 1.0), st.floats(1.0, 30.0))
def test_partial_test_never_hurts_and_coverage_gap_never_helps(data, ptc, theta_share, mt_years):
    t1 = data["proof_test_interval_hours"]
    base = subsystem_pfd_avg(make("1oo2", data))
    mission = max(t1, mt_years * 8760.0)
    imperfect = subsystem_pfd_avg(make("1oo2", data, proof_test_coverage=ptc,
                                       mission_time_hours=mission))
    assert imperfect >= base * (1 - 1e-12)
    with_pst = subsystem_pfd_avg(make("1oo2", data, proof_test_coverage=ptc,
                                      mission_time_hours=mission,
                                      partial_test_interval_hours=t1 / 12,
                                      partial_test_coverage=ptc * theta_share))
    assert with_pst <= imperfect * (1 + 1e-12)


@given(st.integers(1, 4), st.floats(0.0, 1.0, exclude_max=True))
def test_values_inside_a_band_get_that_sil(sil, position):
    for mode, lookup in (("low", sil_from_pfd), ("high", sil_from_pfh)):
        low, high = sil_band(sil, mode)
        value = low * (high / low) ** position  # log-uniform inside [low, high)
        assume(value < high * (1 - 1e-9))
        assert lookup(value) == sil
        assert lookup(low) == sil
        assert lookup(high) == sil - 1


@given(st.floats(0.0, 1.0))
def test_sil_never_increases_with_pfd(pfd):
    assert sil_from_pfd(pfd) >= sil_from_pfd(min(1.0, pfd * 1.5))


@settings(max_examples=50, deadline=None)
@given(channel(ldu=st.floats(1e-8, 5e-6)), st.floats(1e-4, 5e-2))
def test_max_interval_is_the_limit(data, target):
    sif = SifDesign((make("1oo2", data),), target_pfd_avg=target)
    t = max_proof_test_interval(sif)
    if t is None:
        short = SifDesign((make("1oo2", data, proof_test_interval_hours=1.0),),
                          target_pfd_avg=target)
        assert evaluate_sif(short).meets_target is False
        return
    at = SifDesign((make("1oo2", data, proof_test_interval_hours=t),), target_pfd_avg=target)
    assert evaluate_sif(at).pfd_avg <= target
    if t < 20 * 8760.0:
        beyond = SifDesign((make("1oo2", data, proof_test_interval_hours=t * 1.001),),
                           target_pfd_avg=target)
        assert evaluate_sif(beyond).pfd_avg > target
        assert math.isclose(evaluate_sif(at).pfd_avg, target, rel_tol=1e-6)
