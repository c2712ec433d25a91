"""The on-time rate's one query (PostgreSQL) gives what the plans' timelines give.

The reference is the rule evaluated over each plan's timeline (``on_time_by_timelines``,
the rule's range code, itself checked day by day in ``test_schedule_rule``), for random
histories: full, partial and validation tests of all or some devices, corrections moving
a test's date, real demands that count for some plans, devices put in service late,
plans naming some devices, sites in other time zones, and plans the query leaves to the
timelines (a dated change of interval, an approved deferral).
"""

from __future__ import annotations

import datetime as dt
import random

import pytest
from django.db import connection, transaction

from register import choices, services
from register.models import Component, Deferral, TestPlan
from register.schedule import due
from tests import factories as f
from tests.conftest import need

pytestmark = pytest.mark.django_db
K = choices.TestKind
END = dt.date(2025, 6, 30)


def _at(day: dt.date, hour: int) -> dt.datetime:
    return dt.datetime.combine(day, dt.time(hour), tzinfo=dt.UTC)


def _sign(sif, tech, when, components, kind):
    rec = services.save_draft(
        user=tech, sif=sif, kind=kind, performed_at=when,
        results=[services.ResultInput(component=c, as_found="pass", as_left="pass")
                 for c in components])
    return services.sign_record(rec, tech, None, check_password=False, signed_at=when)


def _correct(rec, tech, when):
    """A signed correction of ``rec`` dated ``when`` (the original stops counting)."""
    draft = services.start_correction(rec, tech, "wrong date")
    draft = services.save_draft(
        user=tech, sif=rec.sif, kind=rec.kind, performed_at=when, record=draft,
        expected_version=draft.draft_version, supersedes=rec, correction_reason="wrong date",
        results=[services.ResultInput(component=r.component, as_found="pass", as_left="pass")
                 for r in rec.results.all()])
    services.sign_record(draft, tech, None, check_password=False, signed_at=when)


@pytest.fixture(scope="module")
def world(django_db_setup, django_db_blocker):
    """Forty SIFs with random histories on three sites (UTC, UTC+13 in winter and
    UTC-6); one module-wide world, rolled back at the end."""
    from register.schedule import followup

    with django_db_blocker.unblock(), transaction.atomic():
        with followup.suspended():
            sites = [f.site(), f.site(time_zone="Pacific/Auckland"),
                     f.site(time_zone="America/Chicago")]
            for n, site in enumerate(sites):
                _build(site, n)
        yield sites
        transaction.set_rollback(True)


def _build(site, n):
    unit = f.unit(site)
    tech = f.user(f"tech-o{n}", site=site, role=choices.Role.TECHNICIAN)
    lead = f.user(f"lead-o{n}", site=site, role=choices.Role.LEAD)
    for seed in range(n * 20, n * 20 + 14):
        rng = random.Random(seed)
        start = dt.date(2019, 1, 1) + dt.timedelta(days=rng.randint(0, 900))
        sif = f.sif(unit, tag=f"O-{seed}", voting=rng.choice(["1oo1", "1oo2", "2oo3"]),
                    in_service=start, interval_months=rng.choice([3, 6, 12, 24, 36]))
        comps = list(Component.objects.filter(subsystem__sif=sif))
        if seed % 5 == 1:  # a device replaced later: its own in-service date
            Component.objects.filter(pk=comps[-1].pk).update(
                in_service_on=start + dt.timedelta(days=rng.randint(100, 2000)))
        plan = sif.plans.get()
        if seed % 4 == 3:
            TestPlan.objects.filter(pk=plan.pk).update(demand_counts_as_test=True)
        if seed % 3 == 2:  # a partial test plan naming some devices
            partial = TestPlan.objects.create(sif=sif, name="Partial stroke",
                                              kind=K.PARTIAL, interval_months=rng.choice([1, 3]))
            partial.components.set(comps[-1:])
        day = start
        signed = []
        while True:
            day += dt.timedelta(days=rng.randint(20, 450))
            if day >= END:
                break
            some = rng.sample(comps, rng.randint(1, len(comps)))
            roll = rng.random()
            when = _at(day, rng.choice([1, 12, 23]))
            if roll < 0.15:
                services.record_demand(user=tech, sif=sif, occurred_at=when, successful=True,
                                       description="high level", components_exercised=some)
            else:
                kind = K.PARTIAL if roll < 0.35 else K.VALIDATION if roll < 0.4 else K.FULL
                signed.append(_sign(sif, tech, when, some, kind))
        if signed and seed % 6 == 0:
            rec = rng.choice(signed)
            _correct(rec, tech, rec.performed_at + dt.timedelta(days=rng.randint(1, 90)))
        if seed % 7 == 5:  # a dated change of interval: the timelines' case
            plan.refresh_from_db()
            plan.interval_months, plan.effective_from = 6, dt.date(2024, 3, 1)
            plan.save()
        if seed % 9 == 4:  # an approved deferral: the timelines' case
            st = due.compute_statuses(TestPlan.objects.filter(pk=plan.pk), dt.date(2024, 1, 1))
            due_on = st[plan.pk].due_on
            Deferral.objects.create(
                plan=plan, due_on=due_on, proposed_on=due_on + dt.timedelta(days=40),
                reason="turnaround", requested_by=tech, status=choices.DeferralStatus.APPROVED,
                decided_by=lead, decided_at=_at(due_on - dt.timedelta(days=10), 12))


AS_OF = [END, dt.date(2024, 2, 29), dt.date(2023, 1, 1), dt.date(2021, 7, 15)]


@pytest.mark.parametrize("as_of", AS_OF)
@pytest.mark.parametrize("days", [365, 90, 1000])
def test_the_query_counts_as_the_timelines_do(world, as_of, days):
    need(connection.vendor == "postgresql", "the query is PostgreSQL's")
    plans = TestPlan.objects.filter(sif__unit__site__in=world)
    fast = due.on_time_rate(plans, as_of, days)
    ref = due.on_time_by_timelines(plans, as_of, days)
    assert fast.per_plan == ref.per_plan
    assert fast.late_sif_ids == ref.late_sif_ids
    assert (fast.due, fast.on_time) == (ref.due, ref.on_time)
    if days == 365 and as_of == END:
        assert ref.due > 15 and 0 < ref.on_time < ref.due, "a mixed record of due dates"
    assert fast.per_plan.keys() == set(plans.values_list("pk", flat=True))


def test_the_query_alone_on_the_plans_it_counts(world):
    """The query's own rows, for the plans it is used for (one version, no deferral),
    equal the timelines' counts: the fallback does not hide a wrong count."""
    need(connection.vendor == "postgresql", "the query is PostgreSQL's")
    plans = TestPlan.objects.filter(sif__unit__site__in=world)
    versions = due.plan_versions(list(plans.values_list("pk", flat=True)))
    deferred = set(Deferral.objects.values_list("plan_id", flat=True))
    simple = [p for p in plans if len(versions.get(p.pk, ())) <= 1 and p.pk not in deferred]
    assert len(simple) >= 40
    assert len(simple) < plans.count(), "some plans are left to the timelines"
    for as_of in AS_OF:
        ref = due.on_time_by_timelines(TestPlan.objects.filter(pk__in=[p.pk for p in simple]),
                                       as_of)
        rows = due._on_time_sql([p.pk for p in simple], max(p.interval_months for p in simple),
                                as_of - dt.timedelta(days=365), as_of)
        assert {pk: (n, ok) for pk, _, _, n, ok in rows} == ref.per_plan, as_of


def test_a_plan_list_or_a_query_alike(world):
    need(connection.vendor == "postgresql", "the query is PostgreSQL's")
    plans = TestPlan.objects.filter(sif__unit__site=world[1])
    as_list = due.on_time_rate(list(plans.select_related("sif__unit__site")), END)
    assert as_list.per_plan == due.on_time_rate(plans, END).per_plan
    assert due.on_time_rate(TestPlan.objects.none(), END).per_plan == {}
