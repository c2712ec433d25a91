"""Observed unavailability: failures found make the figure worse, by the stated model.

Every reference below is computed independently in the test: closed forms, or the
conditional-onset q(t) written out by hand on a fine grid and integrated with the
trapezoid rule (numpy), with t_prev chosen by hand for each case.
"""

import json
import math
import subprocess
import sys
from datetime import datetime, timedelta

import numpy as np
import pytest

from calcs.engine.history import Channel, Group, SifHistory, TestEvent, achieved_pfd
from calcs.engine.observed import observed_unavailability

T0 = datetime(2020, 1, 1)


def H(hours):
    return T0 + timedelta(hours=hours)


def q_ref(t, a, b, lam):
    """Conditional onset on (a, b]: (1 - e^{-lam (t-a)}) / (1 - e^{-lam (b-a)})."""
    t = np.asarray(t, float)
    out = np.zeros_like(t)
    m = (t > a) & (t <= b)
    if lam * (b - a) < 1e-12:
        out[m] = (t[m] - a) / (b - a)
    else:
        out[m] = (1 - np.exp(-lam * (t[m] - a))) / (1 - np.exp(-lam * (b - a)))
    return out


def grid_mean(f, a, b, n=400_001):
    t = np.linspace(a, b, n)
    return np.trapezoid(f(t), t) / (b - a)


def one(voting="1oo1", channels=(), bypasses=()):
    return SifHistory(groups=(Group(name="G", voting=voting, channels=tuple(channels)),),
                      bypasses=bypasses)


@pytest.mark.parametrize("x", [1e-6, 0.01, 0.1, 0.5, 0.85])
def test_mean_fraction_matches_conditional_mean_onset(x):
    # Mean fraction of the interval the channel was failed = 1 - E[tau | tau <= T]/T with
    # E[tau | tau <= T] = 1/lam - T e^{-x}/(1 - e^{-x}) (exponential distribution truncated
    # at T; e.g. any reliability textbook's truncated exponential, such as Rausand &
    # Hoyland, System Reliability Theory, 2nd ed., ch. 2, from memory): 1/(1 - e^{-x}) - 1/x.
    T = 8760.0
    lam = x / T
    ch = Channel(lambda_du=lam, in_service=T0,
                 tests=(TestEvent(at=H(T), failed=True, restore_hours=0.0),))
    res = observed_unavailability(one(channels=(ch,)), T0, H(T))
    closed = 1 / (-math.expm1(-x)) - 1 / x if x > 1e-4 else 0.5 + x / 12
    assert res.unavailability == pytest.approx(closed, rel=1e-9)


def test_yearly_1oo1_found_failed_at_last_test_is_about_half():
    # A DU failure found at a proof test: dead for about half the last interval
    # (common practice, no source).
    tests = tuple(TestEvent(at=datetime(2020 + k, 1, 1), failed=(k == 5)) for k in range(1, 6))
    ch = Channel(lambda_du=8e-7, in_service=T0, tests=tests)
    res = observed_unavailability(one(channels=(ch,)), datetime(2024, 1, 1),
                                  datetime(2025, 1, 1))
    assert 0.49 < res.unavailability < 0.51
    assert res.unavailable_hours == pytest.approx(res.unavailability * res.hours)
    (ep,) = res.episodes
    assert ep.onset_from == datetime(2024, 1, 1) and ep.found_at == datetime(2025, 1, 1)
    same_passing = Channel(lambda_du=8e-7, in_service=T0, tests=tuple(
        TestEvent(at=datetime(2020 + k, 1, 1)) for k in range(1, 6)))
    assert observed_unavailability(one(channels=(same_passing,)), datetime(2024, 1, 1),
                                   datetime(2025, 1, 1)).unavailability == 0.0


def test_window_cut_and_restoration_against_fine_grid():
    lam, rest = 3e-6, 72.0
    tests = (TestEvent(at=H(4000)), TestEvent(at=H(9000), failed=True, restore_hours=rest),
             TestEvent(at=H(15000)))
    ch = Channel(lambda_du=lam, in_service=T0, tests=tests)
    a, b = 6000.0, 12000.0
    res = observed_unavailability(one(channels=(ch,)), H(a), H(b))

    def f(t):
        q = q_ref(t, 4000.0, 9000.0, lam)
        q[(t > 9000.0) & (t <= 9000.0 + rest)] = 1.0
        return q

    assert res.unavailability == pytest.approx(grid_mean(f, a, b), rel=1e-5)
    assert res.episodes[0].hours_in_window == pytest.approx(
        grid_mean(f, a, b) * (b - a), rel=1e-5)


def test_passing_retest_ends_the_restoration():
    tests = (TestEvent(at=H(5000), failed=True), TestEvent(at=H(5048)))
    ch = Channel(lambda_du=1e-6, mrt_hours=72, in_service=T0, tests=tests)
    res = observed_unavailability(one(channels=(ch,)), H(5000), H(5100))
    assert res.unavailability == pytest.approx(48.0 / 100.0, rel=1e-9)
    assert res.episodes[0].restored_at == H(5048)
    # the achieved (expected) model keeps the channel down for the same 48 h only
    ach = achieved_pfd(one(channels=(ch,)), H(5000), H(5100))
    assert ach.pfd_avg < 0.49


def test_partial_test_only_bounds_a_failure_it_could_reveal():
    lam, ptc, theta = 2e-6, 0.9, 0.5
    base = dict(lambda_du=lam, proof_test_coverage=ptc, partial_test_coverage=theta,
                in_service=T0)
    # full test at 4000 passes, partial at 7000 passes, full test at 10000 finds a failure:
    # the partial test could not reveal what a full test finds, so t_prev = 4000
    full_found = Channel(**base, tests=(TestEvent(at=H(4000)), TestEvent(at=H(7000),
                                        kind="partial"), TestEvent(at=H(10000), failed=True,
                                                                   restore_hours=0)))
    r1 = observed_unavailability(one(channels=(full_found,)), H(4000), H(10000))
    ref1 = grid_mean(lambda t: q_ref(t, 4000.0, 10000.0, lam * ptc), 4000.0, 10000.0)
    assert r1.unavailability == pytest.approx(ref1, rel=1e-5)
    # a partial test that finds a failure is bounded by the earlier partial (or full) test
    part_found = Channel(**base, tests=(TestEvent(at=H(4000)), TestEvent(at=H(7000),
                                        kind="partial"), TestEvent(at=H(10000), kind="partial",
                                                                   failed=True, restore_hours=0)))
    r2 = observed_unavailability(one(channels=(part_found,)), H(4000), H(10000))
    ref2 = grid_mean(lambda t: q_ref(t, 7000.0, 10000.0, lam * theta), 4000.0, 10000.0)
    assert r2.unavailability == pytest.approx(ref2, rel=1e-5)


def test_failed_demand_is_bounded_only_by_full_coverage_events():
    lam = 1e-6
    tests = (TestEvent(at=H(3000)), TestEvent(at=H(6000), kind="demand", failed=True,
                                              restore_hours=0))
    ch = Channel(lambda_du=lam, proof_test_coverage=0.8, in_service=T0, tests=tests)
    res = observed_unavailability(one(channels=(ch,)), T0, H(6000))
    # the full test (coverage 0.8) cannot rule out what the demand (coverage 1) revealed
    ref = grid_mean(lambda t: q_ref(t, 0.0, 6000.0, lam), 0.0, 6000.0)
    assert res.unavailability == pytest.approx(ref, rel=1e-5)
    assert res.episodes[0].found_by == "demand"


def test_1oo2_one_channel_found_failed_has_no_group_term():
    lam = 2e-6
    a = Channel(lambda_du=lam, in_service=T0,
                tests=(TestEvent(at=H(8760), failed=True, restore_hours=0),))
    b = Channel(lambda_du=lam, in_service=T0, tests=(TestEvent(at=H(8760)),))
    res = observed_unavailability(one("1oo2", (a, b)), T0, H(8760))
    assert res.unavailability == 0.0
    assert len(res.episodes) == 1 and not res.episodes[0].common_cause


def test_1oo2_both_found_failed_same_day_share_one_onset():
    lam = 2e-6
    a = Channel(lambda_du=lam, in_service=T0,
                tests=(TestEvent(at=H(8760), failed=True, restore_hours=0),))
    b = Channel(lambda_du=lam, in_service=T0,
                tests=(TestEvent(at=H(8763), failed=True, restore_hours=0),))
    res = observed_unavailability(one("1oo2", (a, b)), T0, H(8764))
    # shared onset: the group is failed with the one q(t) (not q_a * q_b) until the first
    # finding; then a is repaired at once and b alone (known failed) does not fail 1oo2
    ref = grid_mean(lambda t: q_ref(t, 0.0, 8760.0, lam), 0.0, 8764.0)
    assert res.unavailability == pytest.approx(ref, rel=1e-5)
    assert res.episodes[0].common_cause and res.episodes[0].channels == (0, 1)


def test_1oo2_found_failed_on_different_days_multiply():
    lam = 2e-6
    a = Channel(lambda_du=lam, in_service=T0,
                tests=(TestEvent(at=H(8000), failed=True, restore_hours=0),))
    b = Channel(lambda_du=lam, in_service=T0,
                tests=(TestEvent(at=H(8760), failed=True, restore_hours=0),))
    res = observed_unavailability(one("1oo2", (a, b)), T0, H(8760))
    ref = grid_mean(lambda t: q_ref(t, 0.0, 8000.0, lam) * q_ref(t, 0.0, 8760.0, lam),
                    0.0, 8760.0)
    assert res.unavailability == pytest.approx(ref, rel=1e-5)


def test_2oo3_k_out_of_n_and_series_and_bypass():
    lam = 1e-6
    f1 = Channel(lambda_du=lam, in_service=T0,
                 tests=(TestEvent(at=H(5000), failed=True, restore_hours=10),))
    f2 = Channel(lambda_du=lam, in_service=T0,
                 tests=(TestEvent(at=H(7000), failed=True, restore_hours=10),))
    ok = Channel(lambda_du=lam, in_service=T0, tests=(TestEvent(at=H(7000)),))
    valve = Channel(lambda_du=lam, in_service=T0,
                    tests=(TestEvent(at=H(6000), failed=True, restore_hours=0),))
    sif = SifHistory(groups=(Group(name="PT", voting="2oo3", channels=(f1, f2, ok)),
                             Group(name="XV", voting="1oo1", channels=(valve,))),
                     bypasses=((H(7500), H(7600)),))
    res = observed_unavailability(sif, T0, H(8000))

    def f(t):
        q1 = q_ref(t, 0.0, 5000.0, lam)
        q1[(t > 5000) & (t <= 5010)] = 1.0
        q2 = q_ref(t, 0.0, 7000.0, lam)
        q2[(t > 7000) & (t <= 7010)] = 1.0
        pt = q1 * q2  # 2oo3 fails with two of three; the third channel never failed
        xv = q_ref(t, 0.0, 6000.0, lam)
        qs = 1 - (1 - pt) * (1 - xv)
        qs[(t >= 7500) & (t < 7600)] = 1.0
        return qs

    assert res.unavailability == pytest.approx(grid_mean(f, 0.0, 8000.0), rel=1e-4)
    assert res.bypass_hours == pytest.approx(100.0)
    assert set(res.groups) == {"PT", "XV"}


def test_found_failure_makes_the_achieved_figure_no_better_when_coverage_is_imperfect():
    # A repair renews only what the test covers; the untested share keeps its age
    # (check: a replaced device renews everything, so it may be better).
    def sif(failed, replaced=False):
        tests = tuple(TestEvent(at=datetime(2015 + k, 1, 1), failed=(failed and k == 3),
                                replaced=replaced and k == 3) for k in range(1, 6))
        ch = Channel(lambda_du=2e-6, proof_test_coverage=0.7, in_service=datetime(2015, 1, 1),
                     tests=tests)
        return one(channels=(ch,))

    win = (datetime(2019, 1, 1), datetime(2020, 1, 1))
    passed = achieved_pfd(sif(False), *win).pfd_avg
    repaired = achieved_pfd(sif(True), *win).pfd_avg
    replaced = achieved_pfd(sif(True, True), *win).pfd_avg
    assert repaired >= passed * (1 - 1e-9)
    assert replaced < passed
    # Monte Carlo check of the passing twin (independent): untested share 0.3 lam aged
    # since 2015, tested share 0.7 lam renewed each 1 January.
    rng = np.random.default_rng(7)
    lam = 2e-6
    t_start = (datetime(2019, 1, 1) - datetime(2015, 1, 1)).total_seconds() / 3600
    n = 200_000
    t = t_start + rng.random(n) * 8760.0
    untested = rng.exponential(1 / (0.3 * lam), n) < t
    tested = rng.exponential(1 / (0.7 * lam), n) < (t - t_start)
    mc = np.mean(untested | tested)
    assert passed == pytest.approx(mc, abs=4 * math.sqrt(mc * (1 - mc) / n))


def cli(case):
    out = subprocess.run([sys.executable, "-m", "calcs", "-"], input=json.dumps(case),
                         capture_output=True, text=True, check=False)
    return out.returncode, (json.loads(out.stdout) if out.returncode == 0 else out.stderr)


def test_command_outputs_observed_figures_and_failed_channels():
    case = {"in_service": "2020-01-01", "window": {"start": "2021-01-01", "end": "2022-01-01"},
            "subsystems": [{"name": "PT", "voting": "1oo2", "lambda_du_per_hour": 1e-6,
                            "proof_test_interval_hours": 8760,
                            "tests": [{"date": "2021-01-01"},
                                      {"date": "2022-01-01", "failed_channels": [1]}]},
                           {"name": "XV", "voting": "1oo1", "lambda_du_per_hour": 2e-6,
                            "proof_test_interval_hours": 8760,
                            "tests": [{"date": "2021-01-01"},
                                      {"date": "2022-01-01", "failed": True}]}]}
    code, out = cli(case)
    assert code == 0, out
    assert out["subsystems"][0]["observed_unavailability"] == 0.0  # one of two: no term
    x = 2e-6 * 8760
    assert out["subsystems"][1]["observed_unavailability"] == pytest.approx(
        1 / (-math.expm1(-x)) - 1 / x, rel=1e-6)
    assert out["observed_unavailability"] == pytest.approx(
        out["subsystems"][1]["observed_unavailability"], rel=1e-9)
    assert out["observed_unavailable_hours"] == pytest.approx(
        out["observed_unavailability"] * 8760, rel=1e-9)
    assert [e["subsystem"] for e in out["observed_episodes"]] == ["PT", "XV"]
    assert out["observed_episodes"][0]["channels"] == [1]


def test_command_refuses_future_and_bad_records():
    base = {"in_service": "2020-01-01",
            "subsystems": [{"name": "V", "voting": "1oo1", "lambda_du_per_hour": 1e-6,
                            "proof_test_interval_hours": 8760,
                            "tests": [{"date": "2021-01-01"}, {"date": "2099-01-01"}]}]}
    code, err = cli(base)
    assert code == 2 and "subsystems[0].tests[1].date" in err and "\n" not in err.strip()
    code, err = cli({**base, "as_of": "2022-01-01"})
    assert code == 2 and "subsystems[0].tests[1].date" in err
    bad = json.loads(json.dumps(base))
    bad["subsystems"][0]["tests"] = [{"date": "2021-01-01", "failed_channels": [1]}]
    code, err = cli(bad)
    assert code == 2 and "failed_channels[0]" in err
    fit = json.loads(json.dumps(base))
    fit["subsystems"][0]["tests"] = []
    fit["subsystems"][0]["lambda_du_per_hour"] = 500
    code, err = cli(fit)
    assert code == 2 and "subsystems[0].lambda_du_per_hour" in err
