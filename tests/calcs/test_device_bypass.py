"""A bypass of one device (calcs.engine.history.Channel.bypasses): the channel counts as
failed for the period, so its group runs on the others. Expected values are computed here
with scipy.integrate.quad over closed-form channel unavailabilities, not by the engine."""

from __future__ import annotations

import itertools
import math
from datetime import datetime, timedelta

import pytest
from scipy.integrate import quad

from calcs.engine.history import Channel, Group, SifHistory, TestEvent, achieved_pfd

T0 = datetime(2015, 1, 1)
YEAR = 8760.0


def H(hours: float) -> datetime:
    return T0 + timedelta(hours=hours)


def _tests(n):
    return tuple(TestEvent(at=H(YEAR * k)) for k in range(1, n + 1))


def test_bypassing_the_only_device_of_a_group_equals_bypassing_the_sif():
    """1oo1 groups in series: one device out is the SIF out (common practice, no
    source)."""
    s, e = 2000.0, 2240.0
    sensor = Channel(lambda_du=5e-7, in_service=T0, tests=_tests(2))
    valve = Channel(lambda_du=2e-6, in_service=T0, tests=_tests(2))
    valve_out = Channel(lambda_du=2e-6, in_service=T0, tests=_tests(2),
                        bypasses=((H(s), H(e)),))

    def sif(v, bypasses=()):
        return SifHistory(groups=(Group(name="s", voting="1oo1", channels=(sensor,)),
                                  Group(name="v", voting="1oo1", channels=(v,))),
                          bypasses=bypasses)

    device = achieved_pfd(sif(valve_out), T0, H(2 * YEAR))
    whole = achieved_pfd(sif(valve, bypasses=((H(s), H(e)),)), T0, H(2 * YEAR))
    base = achieved_pfd(sif(valve), T0, H(2 * YEAR))
    assert device.pfd_avg == pytest.approx(whole.pfd_avg, rel=1e-10)
    assert device.pfd_avg > base.pfd_avg


def test_bypassing_one_channel_of_1oo2_leaves_the_other():
    """1oo2 without common cause: Q = qa*qb, and qb alone while a is bypassed; q(t) =
    1 - exp(-lam * age) since the last test (check-values S2.9 shape; integration here)."""
    lam, s, e = 1e-5, 3000.0, 3500.0
    a_out = Channel(lambda_du=lam, in_service=T0, tests=_tests(2), bypasses=((H(s), H(e)),))
    b = Channel(lambda_du=lam, in_service=T0, tests=_tests(2))

    def q(t):
        age = t - YEAR * math.floor(t / YEAR)
        return 1 - math.exp(-lam * age)

    def group_q(t):
        return q(t) if s <= t < e else q(t) ** 2

    edges = [0.0, s, e, YEAR, 2 * YEAR]
    expected = sum(quad(group_q, lo, hi, epsabs=0, epsrel=1e-12, limit=200)[0]
                   for lo, hi in itertools.pairwise(edges)) / (2 * YEAR)
    res = achieved_pfd(SifHistory(groups=(Group(name="g", voting="1oo2",
                                                channels=(a_out, b)),)), T0, H(2 * YEAR))
    assert res.pfd_avg == pytest.approx(expected, rel=1e-8)
    assert res.bypass_hours == 0  # the SIF itself was never bypassed


def test_an_open_device_bypass_counts_to_the_evaluation_date_only_when_asked():
    ch = Channel(lambda_du=1e-6, in_service=T0, tests=_tests(1),
                 bypasses=((H(YEAR + 100), None),))
    res = achieved_pfd(SifHistory(groups=(Group(name="g", voting="1oo1", channels=(ch,)),)),
                       T0, H(YEAR + 200))
    assert any("no end" in f for f in res.flags)
