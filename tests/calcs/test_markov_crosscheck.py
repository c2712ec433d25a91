"""Cross-check of the design equations against a Markov model built here.

The model follows check-values section 7 and shares no code with the engine:
identical channels, each OK / DD (detected, repaired at rate 1/MTTR, the
process keeps running) / DU (hidden) / DUR (found by the proof test, repaired
at rate 1/MRT); independent failures of each OK channel at (1-beta)*lDU and
(1-betaD)*lDD; common cause shocks at beta*lDU (betaD*lDD) move every OK
channel to DU (DD); a single channel has the full rates. All channels are
proof-tested together at t = k*T1 (perfect test: DU -> DUR, or -> OK when
MRT = 0). A KooN group is failed when fewer than K channels are OK.
PFDavg = average unavailability over one test interval in periodic steady
state: iterate p <- p expm(Q T1) J, then average with the Van Loan block
exponential (integral of expm(Q s) over [0, T1]).
"""

import itertools

import numpy as np
import pytest
from scipy.linalg import expm

from calcs.engine import Subsystem, subsystem_pfd_avg

Y = 8760.0


def markov_pfd_avg(k, n, ldu, ldd=0.0, beta=0.0, beta_d=0.0, mttr=0.0, mrt=0.0, t1=Y):
    if n == 1:
        beta = beta_d = 0.0  # single channel: full rates (shock and independent rates add up)
    if ldd > 0 and mttr <= 0:
        raise ValueError("DD failures need a repair time in this model")
    states = [s for s in itertools.product(range(n + 1), repeat=4) if sum(s) == n]
    index = {s: i for i, s in enumerate(states)}
    size = len(states)
    q = np.zeros((size, size))

    def add(src, dst, rate):
        if rate > 0 and src != dst:
            q[index[src], index[dst]] += rate

    for s in states:
        ok, dd, du, dur = s
        if ok > 0:
            add(s, (ok - 1, dd, du + 1, dur), ok * (1 - beta) * ldu)
            add(s, (ok - 1, dd + 1, du, dur), ok * (1 - beta_d) * ldd)
            add(s, (0, dd, du + ok, dur), beta * ldu)
            add(s, (0, dd + ok, du, dur), beta_d * ldd)
        if dd > 0 and mttr > 0:  # states with DD channels are unreachable when lDD = 0
            add(s, (ok + 1, dd - 1, du, dur), dd / mttr)
        if dur > 0 and mrt > 0:  # no DUR states without a repair time
            add(s, (ok + 1, dd, du, dur - 1), dur / mrt)
    q -= np.diag(q.sum(axis=1))

    test = np.zeros((size, size))  # the proof test at the end of each interval
    for s in states:
        ok, dd, du, dur = s
        after = (ok, dd, 0, dur + du) if mrt > 0 else (ok + du, dd, 0, dur)
        test[index[s], index[after]] = 1.0

    step = expm(q * t1)
    p = np.zeros(size)
    p[index[(n, 0, 0, 0)]] = 1.0
    for _ in range(1000):
        new = p @ step @ test
        if np.max(np.abs(new - p)) < 1e-15:
            p = new
            break
        p = new

    block = np.zeros((2 * size, 2 * size))
    block[:size, :size] = q * t1
    block[:size, size:] = np.eye(size) * t1
    integral = expm(block)[:size, size:]  # = integral of expm(Q s) ds over [0, T1]
    failed = np.array([1.0 if s[0] < k else 0.0 for s in states])
    return float(p @ integral @ failed) / t1


def engine_pfd(voting, ldu, ldd=0.0, beta=0.0, beta_d=0.0, mttr=0.0, mrt=0.0, t1=Y):
    sub = Subsystem("group", voting, ldu, t1, lambda_dd_per_hour=ldd, beta=beta, beta_d=beta_d,
                    mttr_hours=mttr, mrt_hours=mrt)
    return subsystem_pfd_avg(sub)


# Markov reference values, check-values section 7 [D]
@pytest.mark.parametrize(
    "case_id, k, n, kwargs, expected",
    [
        ("S7.1", 1, 1, {"ldu": 2e-6}, 8.7091e-3),
        ("S7.2", 1, 1, {"ldu": 1e-6, "ldd": 4e-6, "mttr": 8.0, "mrt": 8.0}, 4.4069e-3),
        ("S7.3", 1, 2, {"ldu": 1e-6, "beta": 0.10, "mrt": 8.0}, 4.5887e-4),
        ("S7.4", 1, 2, {"ldu": 5e-6, "ldd": 5e-6, "beta": 0.05, "beta_d": 0.025, "mttr": 8.0, "mrt": 8.0},
         1.6562e-3),
        ("S7.5", 1, 2, {"ldu": 1e-5}, 2.3965e-3),
    ],
)
def test_markov_model_reproduces_reference(case_id, k, n, kwargs, expected):
    # check-values S7.1-S7.5 [D], rtol 1e-3
    assert markov_pfd_avg(k, n, **kwargs) == pytest.approx(expected, rel=1e-3), case_id


@pytest.mark.parametrize(
    "case_id, voting, kwargs, formula",
    [
        ("S7.1", "1oo1", {"ldu": 2e-6}, 8.760e-3),
        ("S7.2", "1oo1", {"ldu": 1e-6, "ldd": 4e-6, "mttr": 8.0, "mrt": 8.0}, 4.420e-3),
        ("S7.3", "1oo2", {"ldu": 1e-6, "beta": 0.10, "mrt": 8.0}, 4.5961e-4),
        ("S7.4", "1oo2", {"ldu": 5e-6, "ldd": 5e-6, "beta": 0.05, "beta_d": 0.025, "mttr": 8.0, "mrt": 8.0},
         1.6958e-3),
        ("S7.5", "1oo2", {"ldu": 1e-5}, 2.5579e-3),
    ],
)
def test_engine_simplified_formula_column(case_id, voting, kwargs, formula):
    # check-values section 7, column "simplified formula" (IEC 61508-6 Annex B eq. [R])
    assert engine_pfd(voting, **kwargs) == pytest.approx(formula, rel=1e-3), case_id


def _grid():
    for voting, (k, n) in (("1oo1", (1, 1)), ("1oo2", (1, 2)), ("2oo3", (2, 3))):
        for ldu in (1e-7, 1e-6, 5e-6, 1.1e-5):
            for ldd in (0.0, 1e-6, 1e-5):
                for beta in (0.0, 0.05, 0.10):
                    for repair in (0.0, 8.0, 72.0):
                        if ldd > 0 and repair == 0.0:
                            continue
                        for t1 in (4380.0, Y):
                            if ldu * t1 <= 0.1:
                                yield voting, k, n, ldu, ldd, beta, repair, t1


def _du_dominated(voting, ldu, ldd, repair, t1):
    """Where the 10 % band of check-values section 7 is meant to hold.

    DU failures dominate (lDD*MTTR at most 10 % of lDU*T1/2, repair <= 8 h) and the
    linearisation variable lDU*T1 is at most 0.1 (1oo1, 1oo2; the architectures of the
    S7 cases). For 2oo3 the limit is 0.08: the exact unavailability is the average of
    3F^2 - 2F^3 with F = 1 - exp(-lDU*t), so (lDU*T1)^2 overstates it by about
    1.25*lDU*T1 (derived here), i.e. 10 % at lDU*T1 = 0.08.
    """
    limit = 0.08 if voting == "2oo3" else 0.1
    return ldu * t1 <= limit and repair <= 8.0 and ldd * repair <= 0.1 * ldu * t1 / 2


def test_engine_is_conservative_and_close_to_markov():
    # The Annex B equations are linearised (1 - exp(-x) replaced by x) and multiply mean down
    # times as if independent, which overstates the unavailability: check-values section 7 shows
    # the gap growing with lambda*T1 (+0.6 % at 0.02 for 1oo1, +6.7 % at 0.09 for 1oo2) and
    # proposes 0 <= formula/Markov - 1 <= 10 % for lambda*T1 <= 0.1 as acceptance band.
    # Everywhere on the grid the formula must stay conservative. Outside the DU-dominated domain
    # (long repairs, many detected failures) Annex B counts the overlap of two detected failures
    # as 2*(lDD*MTTR)^2 where two independently repaired channels give about (lDD*MTTR)^2, so the
    # formula may be up to twice the Markov value there (common practice, no source).
    in_band = 0
    for voting, k, n, ldu, ldd, beta, repair, t1 in _grid():
        args = {"ldu": ldu, "ldd": ldd, "beta": beta, "beta_d": beta / 2, "mttr": repair, "mrt": repair, "t1": t1}
        ratio = engine_pfd(voting, **args) / markov_pfd_avg(k, n, **args) - 1
        assert ratio >= 0.0, (voting, args, ratio)
        if _du_dominated(voting, ldu, ldd, repair, t1):
            assert ratio <= 0.10, (voting, args, ratio)
            in_band += 1
        else:
            assert ratio <= 1.0, (voting, args, ratio)
    assert in_band > 80


@pytest.mark.parametrize(
    "case_id, voting, k, n, kwargs, gap",
    [
        ("S7.1", "1oo1", 1, 1, {"ldu": 2e-6}, 0.0058),
        ("S7.2", "1oo1", 1, 1, {"ldu": 1e-6, "ldd": 4e-6, "mttr": 8.0, "mrt": 8.0}, 0.0030),
        ("S7.3", "1oo2", 1, 2, {"ldu": 1e-6, "beta": 0.10, "mrt": 8.0}, 0.0016),
        ("S7.4", "1oo2", 1, 2, {"ldu": 5e-6, "ldd": 5e-6, "beta": 0.05, "beta_d": 0.025, "mttr": 8.0,
                                    "mrt": 8.0}, 0.0239),
        ("S7.5", "1oo2", 1, 2, {"ldu": 1e-5}, 0.0673),
    ],
)
def test_gap_formula_vs_markov(case_id, voting, k, n, kwargs, gap):
    # check-values section 7, column "formula/Markov - 1" [D]
    ratio = engine_pfd(voting, **kwargs) / markov_pfd_avg(k, n, **kwargs) - 1
    assert ratio == pytest.approx(gap, abs=0.0005), case_id
