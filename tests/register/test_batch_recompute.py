"""The batched recompute against the single-SIF path, and what it stores."""

import datetime as dt
import math

import pytest
from django.utils import timezone

from calcs.adapter import assess, device_type_stats, load, rate_table, recompute_many
from calcs.adapter.assessment import _full_due_dates
from calcs.models import Assessment
from register import choices
from register.models import Bypass, Component, SafetyFunction
from tests import factories as f

pytestmark = pytest.mark.django_db

FIGURES = ("design_pfd_avg", "design_pfh_per_hour", "achieved_pfd_avg",
           "achieved_since_service_pfd_avg", "projected_pfd_avg", "observed_unavailability",
           "observed_since_service", "target_pfd_avg")


@pytest.fixture
def world():
    s = f.site()
    u = f.unit(s)
    tech = f.user("tech", site=s, role=choices.Role.TECHNICIAN)
    lead = f.user("lead", site=s, role=choices.Role.LEAD)
    now = timezone.now()
    sifs = []
    for i in range(8):
        sif = f.sif(u, in_service=(now - dt.timedelta(days=500 + 90 * i)).date(),
                    voting="2oo3" if i % 2 else "1oo2", interval_months=6 + 6 * (i % 3))
        f.full_test(sif, tech, now - dt.timedelta(days=300 + 20 * i))
        if i % 3 == 0:
            valve = Component.objects.filter(subsystem__sif=sif, subsystem__role="final").first()
            f.full_test(sif, tech, now - dt.timedelta(days=40 + i), fail_tag=valve.tag)
        if i % 4 == 1:
            Bypass.objects.create(sif=sif, started_at=now - dt.timedelta(days=30),
                                  ended_at=None if i == 1 else now - dt.timedelta(days=29),
                                  authorised_hours=8, reason="maintenance", authorised_by=lead)
        sifs.append(sif)
    broken = f.sif(u)
    broken.subsystems.first().components.all().delete()
    return s, u, tech, sifs + [broken]


def _single(sif, as_of):
    """The single-SIF path: load one SIF, its site's rates, run the engine, store nothing."""
    qs = SafetyFunction.objects.filter(pk=sif.pk)
    d = load(qs)[0]
    stats = device_type_stats(sif.unit.site_id, as_of.date())
    rates = rate_table(sif.unit.site, stats, as_of.date())
    return assess(d, as_of, rates, stats, due_on=_full_due_dates(qs, as_of.date()).get(sif.pk))


def _same(x, y):
    if x is None or y is None:
        return x is y
    return math.isclose(x, y, rel_tol=1e-9, abs_tol=0.0)


def test_the_batched_recompute_equals_the_single_sif_path_on_every_sif(world):
    _, u, _, sifs = world
    as_of = timezone.now()
    batched = {a.sif_id: a for a in recompute_many(SafetyFunction.objects.filter(unit=u),
                                                   trigger="t", as_of=as_of)}
    assert set(batched) == {s.pk for s in sifs}
    for sif in sifs:
        one, many = _single(sif, as_of), batched[sif.pk]
        for name in FIGURES:
            assert _same(getattr(one, name), getattr(many, name)), (sif.tag, name)
        assert one.verdict == many.verdict and one.flags == many.flags
        assert one.meets_target == many.meets_target and one.error == many.error
    assert batched[sifs[-1].pk].error  # the broken one carries its error
    assert any(a.projected_pfd_avg for a in batched.values())


def test_unchanged_inputs_store_nothing_new_and_a_signed_test_moves_the_newest(world):
    _, u, tech, sifs = world
    qs = SafetyFunction.objects.filter(unit=u)
    first = {a.sif_id: a.pk for a in recompute_many(qs, trigger="t")}
    count = Assessment.objects.count()
    again = {a.sif_id: a.pk for a in recompute_many(qs, trigger="t")}
    assert again == first and Assessment.objects.count() == count
    f.full_test(sifs[0], tech, timezone.now() - dt.timedelta(hours=2))
    third = {a.sif_id: a.pk for a in recompute_many(qs, trigger="t")}
    assert third[sifs[0].pk] != first[sifs[0].pk]
    assert {k: v for k, v in third.items() if k != sifs[0].pk} == {
        k: v for k, v in first.items() if k != sifs[0].pk}
    assert Assessment.objects.count() == count + 1
    newest = Assessment.objects.filter(latest=True)
    assert newest.count() == len(sifs)
    assert set(newest.values_list("pk", flat=True)) == set(third.values())
    # The next day the same inputs replace the newest snapshot (no history grows).
    tomorrow = timezone.now() + dt.timedelta(days=1)
    before = {a.sif_id: a for a in Assessment.objects.filter(pk__in=third.values())}
    later = {a.sif_id: a for a in recompute_many(qs, trigger="t", as_of=tomorrow)}
    def outcome(a):
        return a.meets_target, [(x["key"], x["status"]) for x in a.verdict.get("lines", [])]

    moved = {k for k, a in later.items() if outcome(a) != outcome(before[k])}
    assert len(moved) <= len(sifs) // 2
    assert Assessment.objects.count() == count + 1 + len(moved)
    for k, a in later.items():
        stored = Assessment.objects.get(sif_id=k, latest=True)
        assert stored.pk == a.pk and stored.as_of == tomorrow
        assert _same(stored.achieved_pfd_avg, a.achieved_pfd_avg)
        if k not in moved:  # first stored then, refreshed since
            assert stored.computed_at == before[k].computed_at


def test_the_trend_spreads_its_points_over_the_whole_life_with_the_newest(world):
    sif = world[3][0]
    start = timezone.now() - dt.timedelta(days=1000)
    for k in range(50):
        Assessment.objects.create(sif=sif, computed_at=start + dt.timedelta(days=20 * k),
                                  as_of=start + dt.timedelta(days=20 * k),
                                  inputs_digest=str(k), achieved_pfd_avg=1e-3 + k * 1e-5)
    points = Assessment.objects.trend_points(sif.pk, 10)
    times = [p[0] for p in points]
    assert len(points) == 10 and times == sorted(times)
    assert times[-1] == start + dt.timedelta(days=20 * 49)  # the newest
    assert times[0] <= start + dt.timedelta(days=20 * 5)  # reaching back to the start
    assert Assessment.objects.filter(sif=sif, latest=True).get().computed_at == times[-1]


def test_the_nightly_chunks_give_the_same_result_whatever_their_size(world, settings):
    from calcs.tasks import nightly_chunks

    settings.CELERY_TASK_ALWAYS_EAGER = True
    as_of = timezone.now()
    results = []
    for size in (2, 5):
        Assessment.objects.all().delete()
        chunks = nightly_chunks(as_of, size)
        assert len(chunks.tasks) == math.ceil(len(world[3]) / size)
        assert all(t.options["queue"] == "calcs" for t in chunks.tasks)
        chunks.apply()
        results.append({a.sif_id: a for a in Assessment.objects.filter(latest=True)})
    small, large = results
    assert set(small) == set(large) == {s.pk for s in world[3]}
    for sif_id, a in small.items():
        for name in FIGURES:
            assert _same(getattr(a, name), getattr(large[sif_id], name)), name
        assert a.verdict == large[sif_id].verdict and a.as_of == as_of
