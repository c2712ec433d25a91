"""The history model evaluated for many SIFs in one batch (``calcs.engine.batch``) gives
what each SIF gives on its own, to 1e-9 relative, whatever the batch size and order:

* randomised histories (MooN votings including 1oo2D and 2oo4, common cause, partial
  tests, failures found and repaired or replaced, demands, device and SIF bypasses open
  and closed): every window and projection of all of them evaluated together, in small
  batches, in another order, against each alone; and Q(t) at the quadrature nodes against
  a plain scalar evaluation written here from the model's definition (the last renewal
  by ``bisect``, the MooN group by enumerating every state of its channels instead of
  the engine's recurrence);
* the demo plant and a generated plant: the assessments of every SIF evaluated in one
  batch equal those of each SIF alone, and a recompute stores the same figures whatever
  its chunk size.
"""

from __future__ import annotations

import datetime as dt
import itertools
import math
import random
from bisect import bisect_left, bisect_right

import pytest

from calcs.engine.batch import evaluate_many
from calcs.engine.history import evaluate_requests, prepare
from tests.calcs.test_recompute_equivalence import (
    REL,
    YEAR,
    close,
    random_sif,
    same_history_result,
    windows_of,
)

SEEDS = range(60)


def requests_of(seed: int) -> list:
    """The windows of a recompute (and two more) and two projections of one random SIF."""
    sif, as_of, _ = random_sif(seed)
    p = prepare(sif, as_of)
    rng = random.Random(seed + 20_000)
    out = [p.windows_request(windows_of(sif, as_of))]
    for _ in range(2):
        due = as_of + dt.timedelta(hours=rng.uniform(0, 2 * YEAR))
        out.append(p.projection_request(due, interval_hours=rng.choice([YEAR / 2, YEAR]),
                                        coverage=rng.choice([None, rng.uniform(0.3, 1.0)])))
    return out


@pytest.fixture(scope="module")
def requests():
    return [r for seed in SEEDS for r in requests_of(seed)]


@pytest.fixture(scope="module")
def alone(requests):
    return [evaluate_requests([r])[0] for r in requests]


def test_the_histories_cover_the_model():
    """The random histories exercise what the batch must keep apart per SIF."""
    reqs = [r for seed in SEEDS for r in requests_of(seed)]
    groups = [g for r in reqs for g in r.c.groups]
    assert {(g.n, g.m) for g in groups} >= {(1, 1), (2, 1), (2, 2), (3, 2), (3, 1), (4, 2)}
    assert any(g.ccf_segs for g in groups)
    assert any(ch.out_s.size for g in groups for ch in g.channels)  # repairs, device bypasses
    assert any(r.c.byp_s.size for r in reqs)  # SIF bypasses
    assert any(len(ch.segs) > 1 for g in groups for ch in g.channels)  # partial coverage


def test_one_batch_equals_each_sif_alone(requests, alone):
    together = evaluate_requests(requests)
    assert len(together) == len(alone)
    for mine, theirs in zip(together, alone):
        assert len(mine) == len(theirs)
        for x, y in zip(mine, theirs):
            same_history_result(x, y)


@pytest.mark.parametrize("max_pairs", [1, 5_000, 200_000])
def test_the_batch_size_and_order_do_not_matter(requests, alone, max_pairs):
    order = list(range(len(requests)))
    random.Random(max_pairs).shuffle(order)
    items = [(requests[k].c, requests[k].t, int(requests[k].cuts[-1]), requests[k].order)
             for k in order]
    values = evaluate_many(items, max_pairs=max_pairs)
    whole = evaluate_many(items)
    for k, (q_sif, q_groups), (w_sif, w_groups) in zip(order, values, whole):
        r = requests[k]
        assert q_sif.shape == r.t.shape and q_groups.shape == (len(r.c.groups), r.t.size)
        assert all(close(a, b) for a, b in zip(q_sif.tolist(), w_sif.tolist()))
        assert all(close(a, b) for a, b in zip(q_groups.ravel().tolist(),
                                               w_groups.ravel().tolist()))
    # the averages from the small batches are each SIF's own
    from calcs.engine.history import _results

    for k, (q_sif, q_groups) in zip(order, values):
        for x, y in zip(_results(requests[k], q_sif, q_groups), alone[k]):
            same_history_result(x, y)


# ---------------------------------------------------------------------------------------
# Q(t) against a scalar evaluation from the model's definition
# ---------------------------------------------------------------------------------------


def _inside(starts, ends, t: float, right: bool) -> bool:
    return any((s <= t < e) if right else (s < t <= e)
               for s, e in zip(starts.tolist(), ends.tolist()))


def _exposure(segs, t: float, right: bool) -> float:
    total = 0.0
    for rate, r in segs:
        r = r.tolist()
        k = bisect_right(r, t) if right else bisect_left(r, t)
        if k:
            total += rate * max(t - r[k - 1], 0.0)
    return total


def reference_q(c, t: float, right: bool) -> tuple[float, list[float]]:
    """Q_sif and each Q_group at ``t`` (just after it, or just before with not right)."""
    log_groups = []
    for g in c.groups:
        qs = []
        for ch in g.channels:
            ls = ch.log_surv_dd - _exposure(ch.segs, t, right)
            if _inside(ch.out_s, ch.out_e, t, right):
                ls = -math.inf
            qs.append(-math.expm1(ls))
        failing = g.n - g.m + 1  # this many failed channels fail the group
        q_ind = 0.0
        for state in itertools.product((False, True), repeat=g.n):
            if sum(state) >= failing:
                q_ind += math.prod(q if down else 1.0 - q for q, down in zip(qs, state))
        log_ind = -math.inf if q_ind >= 1.0 else math.log1p(-q_ind)
        log_groups.append(g.log_surv_dd_ccf - _exposure(g.ccf_segs, t, right) + log_ind)
    q_sif = 1.0 if _inside(c.byp_s, c.byp_e, t, right) else -math.expm1(sum(log_groups))
    return q_sif, [-math.expm1(x) for x in log_groups]


def near(a: float, b: float) -> bool:
    return math.isclose(a, b, rel_tol=REL, abs_tol=1e-15)


def test_q_at_the_nodes_equals_the_scalar_evaluation(requests):
    rng = random.Random(5)
    picked = rng.sample(range(len(requests)), 40)
    items = [(requests[k].c, requests[k].t, int(requests[k].cuts[-1]), requests[k].order)
             for k in picked]
    checked = 0
    for k, (q_sif, q_groups) in zip(picked, evaluate_many(items)):
        r = requests[k]
        n_right = int(r.cuts[-1])
        points = list(range(0, n_right, 11)) + list(range(n_right, r.t.size))  # and ends
        for i in points:
            want, groups = reference_q(r.c, float(r.t[i]), i < n_right)
            assert near(q_sif[i], want), (k, i, q_sif[i], want)
            assert all(near(q_groups[j, i], x) for j, x in enumerate(groups)), (k, i)
            checked += 1
    assert checked > 1000


# ---------------------------------------------------------------------------------------
# Assessments: the demo plant and a generated plant
# ---------------------------------------------------------------------------------------


def _jobs(qs, end):
    from calcs.adapter import assessment, field_stats, load

    loaded = load(qs)
    site = loaded[0].sif.unit.site
    types = {c.obj.device_type_id for d in loaded for c in d.all_components()}
    stats = field_stats.device_type_stats(site.pk, end.date(), types)
    rates = field_stats.rate_table(site, stats, end.date())
    dues = assessment._full_due_dates(qs, end.date())
    return [(d, rates, stats, dues.get(d.sif.pk), None) for d in loaded]


def same_value(x, y) -> bool:
    if isinstance(x, float) and isinstance(y, float):
        return close(x, y)
    if isinstance(x, dict) and isinstance(y, dict):
        return x.keys() == y.keys() and all(same_value(x[k], y[k]) for k in x)
    if isinstance(x, (list, tuple)) and isinstance(y, (list, tuple)):
        return len(x) == len(y) and all(same_value(a, b) for a, b in zip(x, y))
    return x == y


FIGURES = ("achieved_pfd_avg", "achieved_since_service_pfd_avg", "observed_unavailability",
           "observed_since_service", "projected_pfd_avg", "design_pfd_avg", "achieved_sil",
           "meets_target", "error", "flags", "verdict", "detail", "inputs_digest")


def same_assessment(a, b) -> None:
    for name in FIGURES:
        assert same_value(getattr(a, name), getattr(b, name)), (a.sif.tag, name)


def batch_equals_alone(qs, end) -> int:
    from calcs.adapter.assessment import assess, assess_many

    jobs = _jobs(qs, end)
    together = assess_many(jobs, end, trigger="test")
    for job, a in zip(jobs, together):
        d, rates, stats, due, _ = job
        same_assessment(a, assess(d, end, rates, stats, due_on=due, trigger="test"))
    assert not [a.error for a in together if a.error], [a.error for a in together][:3]
    return sum(1 for a in together if a.achieved_pfd_avg is not None)


def recompute_does_not_depend_on_the_chunk(qs, end) -> None:
    from calcs.adapter import recompute_many
    from calcs.adapter.assessment import assess_many

    stored = {a.sif_id: a for a in recompute_many(qs, trigger="test", as_of=end, chunk=3)}
    together = assess_many(_jobs(qs, end), end, trigger="test")  # all in one batch
    assert len(stored) == len(together)
    for a in together:
        same_assessment(stored[a.sif_id], a)


def test_demo_plant_one_batch_equals_each_sif_alone(demo_plant):
    from django.utils import timezone

    from register.models import SafetyFunction

    qs = SafetyFunction.objects.filter(unit__site=demo_plant.site)
    end = timezone.now() + dt.timedelta(days=1)
    assert batch_equals_alone(qs, end) >= 30
    recompute_does_not_depend_on_the_chunk(qs, end + dt.timedelta(days=1))


@pytest.fixture
def scale_plant(db):
    """A generated plant with three years of tests, failures, demands and bypasses (in the
    test's own transaction: a module-wide one would still be open when the demo test of
    this file points the connection at the demo's database, which closes it)."""
    from django.core.management import call_command

    from register.models import SafetyFunction, Site

    call_command("make_scale_plant", sifs=24, years=3, code="bateng", verbosity=0)
    return SafetyFunction.objects.filter(unit__site=Site.objects.get(code="bateng"))


@pytest.mark.django_db
def test_generated_plant_one_batch_equals_each_sif_alone(scale_plant):
    from django.utils import timezone

    end = timezone.now() + dt.timedelta(days=1)
    assert batch_equals_alone(scale_plant, end) == scale_plant.count()
    recompute_does_not_depend_on_the_chunk(scale_plant, end)
