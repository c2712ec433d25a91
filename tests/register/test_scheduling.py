"""Due dates and states at their edges (rules in register/schedule/due.py)."""

import datetime as dt

import pytest
from django.core.exceptions import PermissionDenied, ValidationError
from django.utils import timezone

from register import choices, services
from register.models import Component, TestPlan
from register.schedule import services as schedule_services
from register.schedule.due import Thresholds, add_months, state_for, status_of
from tests import factories as f

S = choices.PlanState
TH = Thresholds(due_soon_days=30, escalate_share=0.10, escalate_days=30,
                second_escalation_days=90)


@pytest.mark.parametrize("as_of, expected", [
    (dt.date(2026, 1, 31), S.ON_TRACK),      # 31 days before: not yet due
    (dt.date(2026, 2, 1), S.DUE_SOON),       # lead time starts
    (dt.date(2026, 3, 3), S.DUE_SOON),       # due today is not overdue
    (dt.date(2026, 3, 4), S.OVERDUE),        # one day over
])
def test_states_around_the_due_date(as_of, expected):
    assert state_for(dt.date(2026, 3, 3), as_of, 12, TH)[0] == expected


def test_first_escalation_takes_the_earlier_of_share_and_days():
    due = dt.date(2026, 1, 1)
    # 12-month interval: 10 % is 36.5 days, so the 30-day limit comes first.
    assert state_for(due, due + dt.timedelta(days=30), 12, TH)[0] == S.OVERDUE  # exactly at it
    assert state_for(due, due + dt.timedelta(days=31), 12, TH)[0] == S.ESCALATED
    # 3-month interval: 10 % is 9 days (Jan-Apr 2026 = 90 days), earlier than 30 days.
    assert state_for(due, due + dt.timedelta(days=9), 3, TH)[0] == S.OVERDUE
    assert state_for(due, due + dt.timedelta(days=10), 3, TH)[0] == S.ESCALATED


def test_second_escalation():
    due = dt.date(2026, 1, 1)
    assert state_for(due, due + dt.timedelta(days=90), 12, TH)[0] == S.ESCALATED
    assert state_for(due, due + dt.timedelta(days=91), 12, TH) == (S.ESCALATED_2, 91)


def test_add_months_clamps_to_month_end():
    assert add_months(dt.date(2025, 1, 31), 1) == dt.date(2025, 2, 28)
    assert add_months(dt.date(2024, 2, 29), 12) == dt.date(2025, 2, 28)


pytestmark_db = pytest.mark.django_db


@pytest.fixture
def plant(db):
    s = f.site()
    u = f.unit(s)
    tech = f.user("tech", site=s, role=choices.Role.TECHNICIAN)
    lead = f.user("lead", site=s, role=choices.Role.LEAD)
    sif = f.sif(u, in_service=dt.date(2024, 1, 15))
    return sif, tech, lead


def _test(sif, tech, day, *, kind=choices.TestKind.FULL, fail=False, plan=None):
    results = [services.ResultInput(
        component=c, as_found="fail" if fail else "pass", as_left="pass",
        failure_mode="du" if fail else "", failure_description="stuck" if fail else "",
        work_done="repaired" if fail else "")
        for c in Component.objects.filter(subsystem__sif=sif)]
    rec = services.save_draft(user=tech, sif=sif, kind=kind, results=results,
                              performed_at=dt.datetime.combine(day, dt.time(10), tzinfo=dt.UTC),
                              plan=plan)
    return services.sign_record(rec, tech, f.PASSWORD)


def test_due_date_from_in_service_then_from_last_counting_test(plant):
    sif, tech, _ = plant
    plan = TestPlan.objects.get(sif=sif)
    assert status_of(plan, dt.date(2024, 6, 1)).due_on == dt.date(2025, 1, 15)
    _test(sif, tech, dt.date(2025, 2, 10))
    assert status_of(plan, dt.date(2025, 3, 1)).due_on == dt.date(2026, 2, 10)
    # Seen from before that test, the plant looked as it was then.
    assert status_of(plan, dt.date(2025, 2, 1)).state == S.OVERDUE


def test_partial_test_does_not_move_a_full_plan(plant):
    sif, tech, _ = plant
    plan = TestPlan.objects.get(sif=sif)
    _test(sif, tech, dt.date(2025, 1, 10), kind=choices.TestKind.PARTIAL)
    assert status_of(plan, dt.date(2025, 2, 1)).due_on == dt.date(2025, 1, 15)


def test_failed_test_followed_by_retest(plant):
    sif, tech, _ = plant
    plan = TestPlan.objects.get(sif=sif)
    _test(sif, tech, dt.date(2025, 1, 10), fail=True)
    _test(sif, tech, dt.date(2025, 1, 12))
    assert status_of(plan, dt.date(2025, 2, 1)).due_on == dt.date(2026, 1, 12)


def test_drafts_and_superseded_records_do_not_count(plant):
    sif, tech, _ = plant
    plan = TestPlan.objects.get(sif=sif)
    comp = Component.objects.filter(subsystem__sif=sif).first()
    services.save_draft(user=tech, sif=sif, kind=choices.TestKind.FULL,
                        performed_at=dt.datetime(2025, 1, 5, tzinfo=dt.UTC),
                        results=[services.ResultInput(component=comp, as_found="pass",
                                                      as_left="pass")])
    assert status_of(plan, dt.date(2025, 2, 1)).due_on == dt.date(2025, 1, 15)


def test_deferral_approved_moves_due_once_and_an_early_test_resets(plant):
    sif, tech, lead = plant
    plan = TestPlan.objects.get(sif=sif)
    today = timezone.localdate()
    due = status_of(plan, today).due_on
    d = schedule_services.request_deferral(user=tech, plan=plan, proposed_on=today + dt.timedelta(days=40),
                                  reason="turnaround")
    with pytest.raises(PermissionDenied):
        schedule_services.decide_deferral(d, tech, approve=True)  # technicians cannot decide
    schedule_services.decide_deferral(d, lead, f.PASSWORD, approve=True, note="accepted")
    st = status_of(plan, today)
    assert st.due_on == today + dt.timedelta(days=40) and st.deferred
    # A second deferral of the same due date cannot be approved.
    d2 = schedule_services.request_deferral(user=tech, plan=plan, due_on=due,
                                   proposed_on=today + dt.timedelta(days=80), reason="again")
    with pytest.raises(ValidationError, match="deferred once"):
        schedule_services.decide_deferral(d2, lead, approve=True)
    # The test done early, before the deferred date: the next due date follows the test.
    done = min(today, due + dt.timedelta(days=10))
    _test(sif, tech, done)
    assert status_of(plan, today).due_on == add_months(done, 12)


def test_successful_demand_counts_only_where_plan_allows_and_for_exercised_parts(plant):
    sif, tech, _ = plant
    plan = TestPlan.objects.get(sif=sif)
    comps = list(Component.objects.filter(subsystem__sif=sif))
    when = dt.datetime(2025, 1, 10, 3, tzinfo=dt.UTC)
    services.record_demand(user=tech, sif=sif, occurred_at=when, successful=True,
                           description="trip", components_exercised=comps[:1])
    assert status_of(plan, dt.date(2025, 2, 1)).due_on == dt.date(2025, 1, 15)
    plan.demand_counts_as_test = True
    plan.save()
    # Only one component was exercised: the other still governs.
    assert status_of(plan, dt.date(2025, 2, 1)).due_on == dt.date(2025, 1, 15)
    services.record_demand(user=tech, sif=sif, occurred_at=when + dt.timedelta(hours=1),
                           successful=True, description="trip", components_exercised=comps)
    assert status_of(plan, dt.date(2025, 2, 1)).due_on == dt.date(2026, 1, 10)


def test_a_demand_logged_as_a_test_record_counts_only_where_the_plan_allows(plant):
    sif, tech, _ = plant
    plan = TestPlan.objects.get(sif=sif)
    _test(sif, tech, dt.date(2025, 1, 10), kind=choices.TestKind.DEMAND)
    assert status_of(plan, dt.date(2025, 2, 1)).due_on == dt.date(2025, 1, 15)
    plan.demand_counts_as_test = True
    plan.save()
    assert status_of(plan, dt.date(2025, 2, 1)).due_on == dt.date(2026, 1, 10)
