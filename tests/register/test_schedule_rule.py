"""The one due-date rule over time: ranges agree with days, an edit does not rewrite the
past, states read in SQL equal the states computed from the records, site calendars.

The reference in each check is the rule itself evaluated day by day
(``compute_statuses`` for one date), never the range code under test.
"""

from __future__ import annotations

import datetime as dt
import random
import zoneinfo

import pytest
from django.db import transaction
from django.utils import timezone

from register import choices, services
from register.models import Component, Deferral, TestPlan
from register.schedule.due import (
    LATE_STATES,
    add_months,
    compute_statuses,
    live_statuses,
    on_time_rate,
    plan_timelines,
    refresh_plans,
    with_state,
)
from tests import factories as f

pytestmark = pytest.mark.django_db
S = choices.PlanState
WINDOW_START = dt.date(2023, 1, 1)
WINDOW_END = dt.date(2024, 12, 31)


def _sign(sif, tech, when, components, kind=choices.TestKind.FULL):
    rec = services.save_draft(
        user=tech, sif=sif, kind=kind, performed_at=when,
        results=[services.ResultInput(component=c, as_found="pass", as_left="pass")
                 for c in components])
    services.sign_record(rec, tech, None, check_password=False, signed_at=when)
    return rec


def _noon(day: dt.date) -> dt.datetime:
    return dt.datetime.combine(day, dt.time(12), tzinfo=dt.UTC)


@pytest.fixture(scope="module")
def histories(django_db_setup, django_db_blocker):
    """Twelve SIFs with random histories: full tests of all or only some devices, at
    random dates (early, late, very late), real demands that count for some plans,
    approved deferrals; one module-wide world, rolled back at the end."""
    from register.schedule import followup

    # follow-up work is switched off while building (it runs after commits, and this world
    # is never committed) and done once at the end
    with django_db_blocker.unblock(), transaction.atomic():
        site = _build_histories(followup)
        yield site
        transaction.set_rollback(True)


def _build_histories(followup):
    with followup.suspended():
        site = f.site()
        unit = f.unit(site)
        tech = f.user("tech-h", site=site, role=choices.Role.TECHNICIAN)
        lead = f.user("lead-h", site=site, role=choices.Role.LEAD)
        for seed in range(12):
            rng = random.Random(seed)
            sif = f.sif(unit, tag=f"H-{seed}", voting=rng.choice(["1oo1", "1oo2"]),
                        in_service=dt.date(2021, 1, 1) + dt.timedelta(days=rng.randint(0, 500)),
                        interval_months=rng.choice([6, 12, 24]))
            plan = sif.plans.get()
            if seed % 4 == 3:
                TestPlan.objects.filter(pk=plan.pk).update(demand_counts_as_test=True)
            comps = list(Component.objects.filter(subsystem__sif=sif))
            day = sif.in_service_on
            while True:
                day += dt.timedelta(days=rng.randint(60, 900))
                if day >= WINDOW_END:
                    break
                some = rng.sample(comps, rng.randint(1, len(comps)))
                if rng.random() < 0.2:
                    services.record_demand(user=tech, sif=sif, occurred_at=_noon(day),
                                           successful=True, description="high level",
                                           components_exercised=some)
                else:
                    _sign(sif, tech, _noon(day), some)
            if seed % 3 == 0:  # an approved deferral of the due date in force at its request
                due = compute_statuses(TestPlan.objects.filter(pk=plan.pk), WINDOW_START
                                       ).get(plan.pk).due_on
                d = Deferral.objects.create(
                    plan=plan, due_on=due, proposed_on=due + dt.timedelta(days=40),
                    reason="turnaround", requested_by=tech,
                    status=choices.DeferralStatus.APPROVED, decided_by=lead,
                    decided_at=_noon(due - dt.timedelta(days=10)))
                assert d.pk
    refresh_plans(TestPlan.objects.filter(sif__unit__site=site))
    return site


def test_ranges_agree_with_the_rule_day_by_day(histories):
    """Property: for random histories the overdue periods and the on-time rate computed
    over a range agree with the states the rule gives for each day of the range."""
    plans = list(TestPlan.objects.filter(sif__unit__site=histories)
                 .select_related("sif__unit__site"))
    timelines = plan_timelines(plans, WINDOW_START, WINDOW_END)
    daily: dict[int, list] = {p.pk: [] for p in plans}
    day = WINDOW_START
    while day <= WINDOW_END:
        for pk, st in compute_statuses(plans, day).items():
            daily[pk].append((day, st))
        day += dt.timedelta(days=1)
    checked_overdue = 0
    for plan in plans:
        tl = timelines[plan.pk]
        late_days = {d for d, st in daily[plan.pk] if st.state in LATE_STATES}
        from_periods = {a + dt.timedelta(days=i) for a, b in tl.overdue_periods()
                        for i in range((b - a).days + 1)}
        assert from_periods == late_days, plan.sif.tag
        checked_overdue += len(late_days)
        for d, st in daily[plan.pk]:
            assert tl.state_on(d) == st.state, (plan.sif.tag, d)
        # On-time, from the days: each due date that fell in the range (before its last
        # day) is met on time when, on the due date itself, the next day's due date was
        # already a later one produced by a credit event on or before it.
        dues = {}
        for (_, st0), (d1, st1) in zip(daily[plan.pk], daily[plan.pk][1:], strict=False):
            if st0.due_on and WINDOW_START <= st0.due_on < WINDOW_END:
                dues.setdefault(st0.due_on, None)
                if st1.due_on != st0.due_on and dues[st0.due_on] is None:
                    credited = st1.last_credit_on != st0.last_credit_on
                    if credited:
                        dues[st0.due_on] = d1 <= st0.due_on
                    elif d1 > st0.due_on:
                        dues[st0.due_on] = False
        last = daily[plan.pk][-1][1]
        if last.due_on and WINDOW_START <= last.due_on < WINDOW_END \
                and dues.get(last.due_on) is None:
            dues[last.due_on] = False
        counted = {d: met for d, met in dues.items() if met is not None}
        assert sorted(tl.due_dates()) == sorted(counted.items()), plan.sif.tag
    assert checked_overdue > 100, "the random histories should include overdue time"


def test_on_time_rate_is_the_sum_of_the_plans_due_dates(histories):
    plans = TestPlan.objects.filter(sif__unit__site=histories)
    rate = on_time_rate(plans, WINDOW_END, days=(WINDOW_END - WINDOW_START).days)
    timelines = plan_timelines(plans, WINDOW_START, WINDOW_END)
    dues = [met for tl in timelines.values() for _, met in tl.due_dates()]
    assert (rate.due, rate.on_time) == (len(dues), sum(dues))
    assert 0 < rate.on_time < rate.due


def test_read_time_state_equals_the_rule_400_days_later_without_a_scan(histories):
    """The states lists and the API show (SQL over the stored due date and state dates)
    equal the rule's states on every plan, today and after 400 days with no scan."""
    plans = TestPlan.objects.filter(sif__unit__site=histories)
    refresh_plans(plans)
    today = timezone.localdate()
    for later in (0, 1, 30, 400):
        day = today + dt.timedelta(days=later)
        sql = dict(with_state(plans, as_of=day).values_list("pk", "state"))
        rule = {pk: st.state for pk, st in compute_statuses(plans, day).items()}
        assert sql == rule, later
    assert dict(with_state(plans).values_list("pk", "state")) == {
        pk: st.state for pk, st in live_statuses(plans).items()}


@pytest.fixture
def overdue_plan(db, django_capture_on_commit_callbacks):
    site = f.site()
    unit = f.unit(site)
    lead = f.user("lead-o", site=site, role=choices.Role.LEAD)
    tech = f.user("tech-o", site=site, role=choices.Role.TECHNICIAN)
    f.user("auditor-o", site=site, role=choices.Role.AUDITOR)
    today = timezone.localdate()
    sif = f.sif(unit, tag="O-1", in_service=today - dt.timedelta(days=900))
    plan = sif.plans.get()
    # the register's rows were recorded when the SIF was designed (history dated then)
    from register.models import SafetyFunction, Site, Subsystem

    for model in (Site, SafetyFunction, Subsystem, Component, TestPlan):
        model.history.update(history_date=_noon(sif.in_service_on - dt.timedelta(days=30)))
    with django_capture_on_commit_callbacks(execute=True):
        _sign(sif, tech, _noon(today - dt.timedelta(days=400)),
              list(Component.objects.filter(subsystem__sif=sif)))
    return {"site": site, "sif": sif, "plan": plan, "lead": lead, "tech": tech,
            "today": today}


def test_an_interval_edit_does_not_clear_a_past_overdue(overdue_plan, client,
                                                      django_capture_on_commit_callbacks):
    """12 -> 24 months after the test became overdue: the due date that already fell
    stays (it is still overdue today), and yesterday's state, the on-time rate, the
    as-of view and the evidence pack's overdue periods all keep the overdue."""
    from register.audit.evidence import collect
    from register.models import EvidencePack

    plan, lead, today = overdue_plan["plan"], overdue_plan["lead"], overdue_plan["today"]
    plans = TestPlan.objects.filter(pk=plan.pk)
    yesterday = today - dt.timedelta(days=1)
    before = compute_statuses(plans, yesterday)[plan.pk]
    assert before.state in LATE_STATES and before.days_overdue > 30
    rate_before = on_time_rate(plans, today)
    assert (rate_before.due, rate_before.on_time) == (1, 0)

    with django_capture_on_commit_callbacks(execute=True):  # the follow-up refresh
        services.update_design(plan, lead, reason="longer interval", reference="CR-9",
                               changes={"interval_months": 24})
    plan.refresh_from_db()
    assert plan.effective_from == today
    after_yesterday = compute_statuses(plans, yesterday)[plan.pk]
    assert (after_yesterday.due_on, after_yesterday.state) == (before.due_on, before.state)
    now = live_statuses(plans)[plan.pk]
    assert now.due_on == before.due_on and now.state in LATE_STATES  # still to be done
    assert with_state(plans).get().state == now.state
    rate_after = on_time_rate(plans, today)
    assert (rate_after.due, rate_after.on_time) == (1, 0)

    client.force_login(lead)
    page = client.get(f"/audit/sifs/{plan.sif_id}/as-of/?date={yesterday.isoformat()}")
    html = page.content.decode()
    assert page.status_code == 200
    assert before.due_on.isoformat() in html and "every 12 months" in html
    assert str(choices.PlanState(before.state).label) in html

    pack = EvidencePack.objects.create(
        scope=EvidencePack.Scope.SIF, site=overdue_plan["site"], sif=plan.sif,
        period_start=today - dt.timedelta(days=200), period_end=yesterday,
        requested_by=lead)
    rows = collect(pack).sifs[0]["overdue"]
    assert [r["due_on"] for r in rows] == [before.due_on.isoformat()]
    assert rows[0]["overdue_to"] == yesterday.isoformat()

    # A test done today answers it; the next due date follows the new interval.
    _sign(plan.sif, overdue_plan["tech"], timezone.now() - dt.timedelta(minutes=5),
          list(Component.objects.filter(subsystem__sif=plan.sif)))
    done = live_statuses(plans)[plan.pk]
    assert done.state == S.ON_TRACK and (done.due_on - today).days > 700


def test_a_change_cannot_take_effect_in_the_past(overdue_plan):
    from django.core.exceptions import ValidationError

    plan = overdue_plan["plan"]
    with pytest.raises(ValidationError) as err:
        services.update_design(plan, overdue_plan["lead"], reason="r", reference="CR-1",
                               changes={"interval_months": 6,
                                        "effective_from": overdue_plan["today"]
                                        - dt.timedelta(days=3)})
    assert "effective_from" in err.value.message_dict
    plan.refresh_from_db()
    assert plan.interval_months == 12


def test_a_due_date_not_yet_fallen_follows_the_new_interval(db):
    site = f.site()
    lead = f.user("lead-n", site=site, role=choices.Role.LEAD)
    today = timezone.localdate()
    sif = f.sif(f.unit(site), in_service=today - dt.timedelta(days=100))
    plan = sif.plans.get()
    plans = TestPlan.objects.filter(pk=plan.pk)
    before = live_statuses(plans)[plan.pk]
    services.update_design(plan, lead, reason="shorter", reference="CR-2",
                           changes={"interval_months": 6})
    after = live_statuses(plans)[plan.pk]
    assert after.due_on < before.due_on
    assert after.due_on == add_months(sif.in_service_on, 6)
    # the change preview tells the same before saving
    from register.schedule.due import status_with_change

    assert status_with_change(plan, 12, today, today).due_on == before.due_on


@pytest.mark.parametrize(("zone", "local_time", "credited_on"), [
    # west of UTC: 20:00 on 1 March in Chicago is 02:00 on 2 March UTC
    ("America/Chicago", dt.datetime(2025, 3, 1, 20, 0), dt.date(2025, 3, 1)),
    # east of UTC: 08:00 on 1 March in Tokyo is 23:00 on 28 February UTC
    ("Asia/Tokyo", dt.datetime(2025, 3, 1, 8, 0), dt.date(2025, 3, 1)),
])
def test_due_dates_follow_the_site_calendar(zone, local_time, credited_on):
    site = f.site(time_zone=zone)
    tech = f.user(f"tech-{zone[:4]}", site=site, role=choices.Role.TECHNICIAN)
    sif = f.sif(f.unit(site), in_service=dt.date(2024, 6, 1))
    plan = sif.plans.get()
    when = local_time.replace(tzinfo=zoneinfo.ZoneInfo(zone))
    assert when.astimezone(dt.UTC).date() != credited_on  # the UTC date differs
    _sign(sif, tech, when, list(Component.objects.filter(subsystem__sif=sif)))
    st = compute_statuses(TestPlan.objects.filter(pk=plan.pk), dt.date(2025, 6, 1))[plan.pk]
    assert st.last_credit_on == credited_on
    assert st.due_on == dt.date(2026, 3, 1)
    # the end of 1 March on the site's calendar includes the test; the day before does not
    assert compute_statuses(TestPlan.objects.filter(pk=plan.pk), dt.date(2025, 2, 28)
                            )[plan.pk].last_credit_on != credited_on


def test_the_change_preview_says_what_happens_to_the_due_date(overdue_plan, client):
    plan, lead = overdue_plan["plan"], overdue_plan["lead"]
    due = live_statuses(TestPlan.objects.filter(pk=plan.pk))[plan.pk].due_on
    client.force_login(lead)
    page = client.post(f"/design/plan/{plan.pk}/edit/", {
        "interval_months": 24, "effective_from": "", "reason": "longer", "reference": "CR-3",
        "action": "preview"})
    html = page.content.decode()
    assert page.status_code == 200 and 'id="plan-effect"' in html
    # the due date already fell: it stays, and the page says so
    assert html.count(due.isoformat()) >= 2
    assert "it stays, and the test is still late until it is done" in html
    plan.refresh_from_db()
    assert plan.interval_months == 12  # a preview writes nothing
