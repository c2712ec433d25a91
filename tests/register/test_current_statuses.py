"""The set-based current status (``current_statuses``: one query of values for the plans
with one version and no approved deferral) equals the whole rule (``compute_statuses``,
plan by plan from ``_load``) on every plan, for past, present and future days, and
``refresh_plans`` writes the columns the whole rule gives.

The reference is the rule itself (``compute_statuses`` and the rule-by-rule refresh),
never the set-based code under test.
"""

from __future__ import annotations

import datetime as dt
import random

import pytest
from django.db import transaction
from django.utils import timezone

from register import choices, services
from register.models import Component, Deferral, TestPlan
from register.schedule import due
from tests import factories as f

pytestmark = pytest.mark.django_db


def _noon(day: dt.date, hour: int = 12) -> dt.datetime:
    return dt.datetime.combine(day, dt.time(hour), tzinfo=dt.UTC)


def _sign(sif, tech, when, components, kind=choices.TestKind.FULL):
    rec = services.save_draft(
        user=tech, sif=sif, kind=kind, performed_at=when,
        results=[services.ResultInput(component=c, as_found="pass", as_left="pass")
                 for c in components])
    return services.sign_record(rec, tech, None, check_password=False, signed_at=when)


@pytest.fixture(scope="module")
def plant(django_db_setup, django_db_blocker):
    """Two sites on calendars far apart; SIFs with random histories: full, partial and
    demand-kind tests of some or all devices (late in the evening UTC, so the site's day
    differs from UTC's), real demands, plans that name some devices, partial plans, a
    correction, a draft, a SIF never tested, an approved deferral and a changed interval
    (the two that need the whole rule). One module-wide world, rolled back at the end."""
    from register.schedule import followup

    with django_db_blocker.unblock(), transaction.atomic(), followup.suspended():
        sites = [f.site(time_zone="Pacific/Auckland"), f.site(time_zone="America/Chicago")]
        plans = []
        for s_i, site in enumerate(sites):
            unit = f.unit(site)
            tech = f.user(f"tech-cs{s_i}", site=site, role=choices.Role.TECHNICIAN)
            lead = f.user(f"lead-cs{s_i}", site=site, role=choices.Role.LEAD)
            for seed in range(8):
                rng = random.Random(seed * 10 + s_i)
                sif = f.sif(unit, tag=f"CS-{s_i}-{seed}",
                            voting=rng.choice(["1oo1", "1oo2", "2oo3"]),
                            in_service=dt.date(2021, 1, 1) + dt.timedelta(
                                days=rng.randint(0, 400)),
                            interval_months=rng.choice([6, 12, 24]))
                plan = sif.plans.get()
                comps = list(Component.objects.filter(subsystem__sif=sif).order_by("pk"))
                if seed % 4 == 1:
                    TestPlan.objects.filter(pk=plan.pk).update(demand_counts_as_test=True)
                if seed % 4 == 2:  # a plan naming some devices (linked without history)
                    plan.components.set(comps[:2])
                partial = TestPlan.objects.create(sif=sif, name="Partial stroke",
                                                  kind=choices.TestKind.PARTIAL,
                                                  interval_months=3)
                plans += [plan, partial]
                if seed == 7:
                    continue  # never tested: the in-service dates stand
                day = sif.in_service_on
                last = None
                while True:
                    day += dt.timedelta(days=rng.randint(40, 500))
                    if day >= timezone.localdate() - dt.timedelta(days=2):
                        break
                    some = rng.sample(comps, rng.randint(1, len(comps)))
                    pick = rng.random()
                    when = _noon(day, rng.choice([1, 12, 23]))
                    if pick < 0.15:  # a real demand; one in five the SIF did not act
                        acted = rng.random() < 0.8
                        services.record_demand(
                            user=tech, sif=sif, occurred_at=when, successful=acted,
                            description="high level",
                            components_exercised=some if acted else some[1:],
                            failed_components=() if acted else some[:1])
                    elif pick < 0.35:
                        _sign(sif, tech, when, some, choices.TestKind.PARTIAL)
                    elif pick < 0.45:
                        _sign(sif, tech, when, some, choices.TestKind.DEMAND)
                    else:
                        last = _sign(sif, tech, when, some)
                if seed == 3:  # the newest full test, replaced by a signed correction
                    last = _sign(sif, tech, _noon(timezone.localdate() - dt.timedelta(days=1)),
                                 comps)
                    draft = services.start_correction(last, tech, "wrong date")
                    services.save_draft(
                        user=tech, sif=sif, plan=None, kind=choices.TestKind.FULL,
                        performed_at=last.performed_at - dt.timedelta(days=1),
                        record=draft, supersedes=last, correction_reason="wrong date",
                        results=[services.ResultInput(component=c, as_found="pass",
                                                      as_left="pass") for c in comps])
                    services.sign_record(draft, tech, None, check_password=False)
                if seed == 4:  # a draft counts for nothing
                    services.save_draft(
                        user=tech, sif=sif, kind=choices.TestKind.FULL,
                        performed_at=_noon(timezone.localdate() - dt.timedelta(days=1)),
                        results=[services.ResultInput(component=c, as_found="pass",
                                                      as_left="pass") for c in comps])
                if seed == 5:  # an approved deferral: the whole rule
                    due_on = due.compute_statuses(TestPlan.objects.filter(pk=plan.pk),
                                                  timezone.localdate())[plan.pk].due_on
                    Deferral.objects.create(
                        plan=plan, due_on=due_on, proposed_on=due_on + dt.timedelta(days=40),
                        reason="turnaround", requested_by=tech,
                        status=choices.DeferralStatus.APPROVED, decided_by=lead,
                        decided_at=_noon(timezone.localdate() - dt.timedelta(days=3)))
                if seed == 6:  # a second version of the plan: the whole rule
                    plan.refresh_from_db()
                    plan.interval_months = 36
                    plan.effective_from = timezone.localdate() - dt.timedelta(days=30)
                    plan._change_reason = "longer interval"
                    plan.save()
        yield {"sites": sites, "plans": TestPlan.objects.filter(sif__unit__site__in=sites)}
        transaction.set_rollback(True)


def _by_rule(plans, day):
    return due.compute_statuses(plans, day)


def test_the_set_based_status_equals_the_rule_on_every_day(plant):
    plans = plant["plans"]
    today = timezone.localdate()
    days = [today - dt.timedelta(days=n) for n in range(0, 1500, 97)] + [
        today + dt.timedelta(days=n) for n in (1, 45, 200, 800)]
    compared = 0
    for day in days:
        assert due.current_statuses(plans, day) == _by_rule(plans, day), day
        assert due.current_statuses(plans, day, many=True) == _by_rule(plans, day), day
        compared += 1
    corrected = plans.get(sif__tag="CS-1-3", kind=choices.TestKind.FULL)
    assert due.current_statuses(plans, today)[corrected.pk].last_credit_on == (
        today - dt.timedelta(days=2))  # the correction's day (noon UTC, Chicago's calendar)
    states = {st.state for st in due.current_statuses(plans, today).values()}
    assert len(states) >= 3, states  # the plant shows several states today
    assert compared == len(days)


def test_only_the_plans_that_need_the_whole_rule_leave_the_query(plant):
    """The deferral, the changed interval, and the plans whose history holds two scopes
    (saved, then its devices named: one version by the rule, two distinct rows for the
    query, which leaves them to the rule)."""
    rows = due._current_sql(plant["plans"], timezone.localdate())
    general = {TestPlan.objects.get(pk=r[0]).sif.tag for r in rows if r[10]}
    assert general == {"CS-0-2", "CS-0-5", "CS-0-6", "CS-1-2", "CS-1-5", "CS-1-6"}
    assert sum(1 for r in rows if r[10]) == len(general)  # their partial plans stay
    assert len(rows) == plant["plans"].count()


def test_today_on_each_site_calendar_is_the_default(plant):
    """Without a date each plan is seen on today of its own site's calendar."""
    from register.days import today

    plans = plant["plans"]
    expected = {}
    for site in plant["sites"]:
        expected |= _by_rule(plans.filter(sif__unit__site=site), today(site))
    assert due.current_statuses(plans) == expected
    assert due.live_statuses(plans) == expected


def test_refresh_writes_the_columns_of_the_rule(plant):
    plans = plant["plans"]
    columns = due.STATE_COLUMNS
    for day in (timezone.localdate(), timezone.localdate() + dt.timedelta(days=300)):
        TestPlan.objects.filter(pk__in=plans).update(**dict.fromkeys(columns))
        due._refresh_by_rule(plans, day)
        reference = {p[0]: p[1:] for p in plans.values_list("pk", *columns)}
        TestPlan.objects.filter(pk__in=plans).update(**dict.fromkeys(columns))
        statuses = due.refresh_plans(plans, day, many=True)
        written = {p[0]: p[1:] for p in plans.values_list("pk", *columns)}
        assert written == reference, day
        assert statuses == _by_rule(plans, day)
        assert any(v[0] is not None for v in written.values())
