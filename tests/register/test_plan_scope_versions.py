"""A change of a plan's scope (the devices it names) is a new version of the plan from a
date, like a change of interval: due dates that fell before it stay, the past reads as it
was, and the change preview says what it does."""

import datetime as dt

import pytest
from django.utils import timezone

from register import choices, services
from register.days import today as site_today
from register.models import Component, TestPlan
from register.schedule import due
from tests import factories as f

pytestmark = pytest.mark.django_db

PlanState = choices.PlanState


def _test(sif, tech, comps, when):
    rec = services.save_draft(
        user=tech, sif=sif, kind=choices.TestKind.FULL, performed_at=when,
        results=[services.ResultInput(component=c, as_found="pass", as_left="pass")
                 for c in comps])
    return services.sign_record(rec, tech, f.PASSWORD)


def _plan():
    return TestPlan.objects.select_related("sif__unit__site").order_by("pk").first()


@pytest.fixture
def world():
    s = f.site()
    u = f.unit(s)
    tech = f.user("tech", site=s, role=choices.Role.TECHNICIAN)
    lead = f.user("lead", site=s, role=choices.Role.LEAD)
    sif = f.sif(u, in_service=dt.date(2020, 1, 1))
    sensor = Component.objects.get(subsystem__sif=sif, subsystem__role="sensing")
    valve = Component.objects.get(subsystem__sif=sif, subsystem__role="final")
    # the plan was set up at commissioning, long before today's changes
    TestPlan.history.filter(sif=sif).update(
        history_date=dt.datetime(2020, 1, 1, tzinfo=dt.UTC))
    today = site_today(s)
    now = timezone.now()
    # The sensor was last tested 500 days ago, the valve 200 days ago: under a 12-month
    # plan for the whole SIF the test fell due 500 days ago + 12 months.
    _test(sif, tech, [sensor], now - dt.timedelta(days=500))
    _test(sif, tech, [valve], now - dt.timedelta(days=200))
    return {"sif": sif, "sensor": sensor, "valve": valve, "lead": lead, "tech": tech,
            "today": today}


def _expected_due(last: dt.date, months: int) -> dt.date:
    """Calendar months, the day clipped to the month's length (common practice, no
    source): computed here with the standard library only."""
    import calendar

    y, m = divmod(last.month - 1 + months, 12)
    y, m = last.year + y, m + 1
    return dt.date(y, m, min(last.day, calendar.monthrange(y, m)[1]))


def test_narrowing_the_scope_keeps_the_overdue_that_fell_before(world):
    plan, today, lead = _plan(), world["today"], world["lead"]
    sensor_last = today - dt.timedelta(days=500)
    whole_due = _expected_due(sensor_last, 12)
    assert whole_due < today
    before = due.compute_statuses([plan], today)[plan.pk]
    assert before.due_on == whole_due and before.state in due.LATE_STATES

    # Preview: naming the valve only, from today, does not clear the overdue.
    preview = due.status_with_change(plan, 12, today, today, components=[world["valve"].pk])
    assert preview.due_on == whole_due

    services.update_design(plan, lead, reason="sensor moved to its own plan",
                           reference="CR-77", changes={"components": [world["valve"].pk]})
    assert set(plan.components.values_list("pk", flat=True)) == {world["valve"].pk}
    after = due.compute_statuses([_plan()], today)[plan.pk]
    assert after.due_on == whole_due  # it had fallen before the change: it stays

    # The past reads as it was: 30 days ago the plan named the whole SIF.
    month_ago = today - dt.timedelta(days=30)
    assert due.compute_statuses([_plan()], month_ago)[plan.pk].due_on == whole_due

    # The next test of the valve alone now meets the narrowed plan.
    _test(world["sif"], world["tech"], [world["valve"]], timezone.now())
    met = due.compute_statuses([_plan()], today)[plan.pk]
    assert met.due_on == _expected_due(today, 12)
    assert met.state == PlanState.ON_TRACK
    # and the overdue period before it survives in the timeline
    timeline = due.plan_timelines([_plan()], today - dt.timedelta(days=400), today)[plan.pk]
    # (before the valve test 200 days ago the plan was overdue on the valve's in-service
    # date; then on the sensor's test until today's test of the narrowed scope)
    assert timeline.overdue_periods()[-1] == (whole_due + dt.timedelta(days=1),
                                              today - dt.timedelta(days=1))


def test_widening_the_scope_applies_from_its_date_only(world):
    """A plan naming only the valve, widened to the whole SIF from today: the untested
    sensor's older test now drives the due date, but yesterday is unchanged."""
    plan, today, lead, valve = _plan(), world["today"], world["lead"], world["valve"]
    services.update_design(plan, lead, reason="valve only", reference="CR-1",
                           changes={"components": [valve.pk]})
    # that change took effect today too; look at the state under it tomorrow
    valve_due = _expected_due(today - dt.timedelta(days=200), 12)
    yesterday = today - dt.timedelta(days=1)
    assert due.compute_statuses([_plan()], yesterday)[plan.pk].due_on != valve_due

    # widen again from a later date: scheduled in advance
    later = today + dt.timedelta(days=10)
    services.update_design(_plan(), lead, reason="whole SIF again", reference="CR-2",
                           changes={"components": [], "effective_from": later})
    plan = _plan()
    assert plan.effective_from == later
    # before the later date the valve-only version is in force
    assert due.compute_statuses([plan], today + dt.timedelta(days=5))[plan.pk].due_on \
        == due.compute_statuses([plan], today)[plan.pk].due_on


def test_a_plan_cannot_name_another_sifs_device(world):
    from django.core.exceptions import ValidationError

    other = f.sif(world["sif"].unit)
    foreign = Component.objects.filter(subsystem__sif=other).first()
    with pytest.raises(ValidationError) as exc:
        services.update_design(_plan(), world["lead"], reason="x", reference="CR-3",
                               changes={"components": [foreign.pk]})
    assert "components" in exc.value.message_dict
