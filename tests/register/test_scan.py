"""The follow-up scan: only the plans whose state may have turned, one append-only row per
state change, one notification per change, idempotent, bounded queries."""

import datetime as dt

import pytest
from django.core import mail
from django.core.management import call_command
from django.db import IntegrityError, connection, transaction
from django.test.utils import CaptureQueriesContext
from django.utils import timezone

from register import choices, services
from register.days import today
from register.models import Notification, TestPlan
from register.models.notifications import AppendOnlyError, PlanStateChange
from register.schedule.due import (
    active_plans,
    add_months,
    compute_statuses,
    live_statuses,
    refresh_plans,
    with_state,
)
from register.schedule.scan import record_transitions, scan
from tests import factories as f
from tests.conftest import need

pytestmark = pytest.mark.django_db
PlanState = choices.PlanState


def _plant(n_sifs, *, days_ago=395, **site):
    s = f.site(**site)
    u = f.unit(s)
    lead = f.user(f"lead{s.pk}", site=s, role=choices.Role.LEAD, email="lead@x.invalid")
    owner = f.user(f"owner{s.pk}", site=s, role=choices.Role.TECHNICIAN, email="o@x.invalid")
    for _ in range(n_sifs):
        f.sif(u, in_service=today(s) - dt.timedelta(days=days_ago), owner=owner)
    return s, lead, owner


def _as_upgraded(site):
    """The plans as the earlier version left them: a due date cached, no state dates yet."""
    refresh_plans(TestPlan.objects.filter(sif__unit__site=site))
    TestPlan.objects.filter(sif__unit__site=site).update(
        due_soon_on=None, escalated_on=None, escalated_2_on=None, next_change_on=None)


def _state(plan, as_of=None):
    return with_state(TestPlan.objects.filter(pk=plan.pk), as_of).get().state


def test_upgrade_scan_announces_each_plan_once_to_the_right_people(
        django_capture_on_commit_callbacks):
    s, lead, owner = _plant(2, days_ago=395)  # due ~30 days ago: overdue, not escalated
    s2, lead2, owner2 = _plant(1, days_ago=485)  # ~120 days overdue: second level
    _as_upgraded(s)
    _as_upgraded(s2)
    with django_capture_on_commit_callbacks(execute=True):
        first = scan()
    assert len(first.plans) == 3 and first.transitions == 3
    rows = PlanStateChange.objects.order_by("plan__sif__unit__site", "id")
    assert [(r.from_state, r.to_state, r.cause) for r in rows] == [
        ("", PlanState.OVERDUE, "scan"), ("", PlanState.OVERDUE, "scan"),
        ("", PlanState.ESCALATED_2, "scan")]
    over = Notification.objects.filter(site=s)
    assert set(over.values_list("recipient__username", "kind")) == {
        (owner.username, choices.NotificationKind.OVERDUE)}
    assert over.count() == 2
    esc = Notification.objects.filter(site=s2)
    assert set(esc.values_list("recipient__username", flat=True)) == {owner2.username,
                                                                     lead2.username}
    assert set(esc.values_list("kind", flat=True)) == {choices.NotificationKind.ESCALATED_2}
    # Each e-mailed once, by its own task after the commit.
    assert first.notifications_created == 4 == len(mail.outbox)
    assert Notification.objects.filter(emailed_at__isnull=True).count() == 0
    with django_capture_on_commit_callbacks(execute=True):
        second = scan()
    assert second.plans == {} and second.transitions == 0
    assert second.notifications_created == 0 and len(mail.outbox) == 4
    assert PlanStateChange.objects.count() == 3


def test_the_scan_looks_only_at_plans_whose_date_has_come():
    s = f.site()
    u = f.unit(s)
    f.user(f"lead{s.pk}", site=s, role=choices.Role.LEAD, email="lead@x.invalid")
    start = today(s)
    for days in (300, 340, 360, 380, 420):  # due in 65, 25, 5 days; 15, 55 days ago
        f.sif(u, in_service=start - dt.timedelta(days=days))
    plans = active_plans().filter(sif__unit__site=s)
    refresh_plans(plans)  # as the services do when a plan is created
    record_transitions(live_statuses(plans), at=timezone.now(), cause="plan")
    seen = {}
    for ahead in (0, 10, 30, 45, 70, 130, 130):
        day = start + dt.timedelta(days=ahead)
        due = set(plans.filter(next_change_on__lte=day).values_list("pk", flat=True))
        result = scan(day)
        assert set(result.plans) == due, ahead
        # every plan's state on that day, read from the columns, is the rule's
        expected = {pk: st.state for pk, st in compute_statuses(plans, day).items()}
        assert dict(with_state(plans, day).values_list("pk", "state")) == expected
        for pk, state in expected.items():
            seen.setdefault(pk, []).append(state)
    # one row per state each plan went through, never twice (the day +130 ran twice)
    for pk, states in seen.items():
        went = [r.to_state for r in PlanStateChange.objects.filter(plan_id=pk).order_by("id")]
        assert went == list(dict.fromkeys(states)), (pk, went, states)
        assert all(r.from_state == prev for prev, r in zip(
            [""] + went, PlanStateChange.objects.filter(plan_id=pk).order_by("id")))


def test_each_site_is_scanned_on_its_own_calendar():
    east = f.site(time_zone="Pacific/Kiritimati")  # UTC+14
    west = f.site(time_zone="Pacific/Pago_Pago")  # UTC-11: always at least a day behind
    turn = today(east)
    assert today(west) < turn
    for s in (east, west):
        f.sif(f.unit(s), in_service=add_months(turn + dt.timedelta(days=30), -12))
    plans = active_plans().filter(sif__unit__site__in=[east, west])
    refresh_plans(plans, turn - dt.timedelta(days=1))
    assert set(plans.values_list("due_soon_on", flat=True)) == {turn}
    result = scan()
    assert {TestPlan.objects.get(pk=pk).sif.unit.site_id for pk in result.plans} == {east.pk}
    east_plan, west_plan = plans.get(sif__unit__site=east), plans.get(sif__unit__site=west)
    assert _state(east_plan) == PlanState.DUE_SOON
    assert _state(west_plan) == PlanState.ON_TRACK  # its day has not come yet


def test_state_change_rows_are_append_only():
    s, lead, owner = _plant(1)
    _as_upgraded(s)
    scan()
    row = PlanStateChange.objects.get()
    row.cause = "plan"
    with pytest.raises(AppendOnlyError):
        row.save()
    with pytest.raises(AppendOnlyError):
        row.delete()
    with pytest.raises(AppendOnlyError):
        PlanStateChange.objects.filter(pk=row.pk).update(cause="plan")
    with pytest.raises(AppendOnlyError):
        PlanStateChange.objects.filter(pk=row.pk).delete()
    need(connection.vendor == "postgresql", "the database trigger needs PostgreSQL")
    for sql in ("UPDATE register_planstatechange SET to_state = 'on_track' WHERE id = %s",
                "DELETE FROM register_planstatechange WHERE id = %s"):
        with pytest.raises(IntegrityError), transaction.atomic(), connection.cursor() as c:
            c.execute(sql, [row.pk])
    assert PlanStateChange.objects.get().to_state == PlanState.OVERDUE


def test_a_signed_test_is_a_transition_row_too(django_capture_on_commit_callbacks):
    s, lead, owner = _plant(1, days_ago=395)
    _as_upgraded(s)
    scan()
    plan = TestPlan.objects.get(sif__unit__site=s)
    assert _state(plan) == PlanState.OVERDUE
    tech = f.user("t", site=s, role=choices.Role.TECHNICIAN)
    with django_capture_on_commit_callbacks(execute=True):
        f.full_test(plan.sif, tech, timezone.now() - dt.timedelta(hours=1))
    assert _state(plan) == PlanState.ON_TRACK
    notes = Notification.objects.count()
    statuses = live_statuses(TestPlan.objects.filter(pk=plan.pk))
    rows = record_transitions(statuses, at=timezone.now(), cause=choices.ChangeCause.RECORD)
    assert [(r.from_state, r.to_state, r.due_on, r.cause) for r in rows] == [
        (PlanState.OVERDUE, PlanState.ON_TRACK, statuses[plan.pk].due_on, "record")]
    assert statuses[plan.pk].due_on > today(s)
    assert Notification.objects.count() == notes  # back on track is not announced
    assert record_transitions(statuses, at=timezone.now(), cause="record") == []
    assert PlanStateChange.objects.filter(plan=plan).count() == 2
    # ...and the SIF was recomputed after the commit
    assert plan.sif.assessments.filter(trigger="record changed").exists()


def test_scan_query_count_does_not_grow_with_plant_size():
    def queries(n):
        s, *_ = _plant(n)
        _as_upgraded(s)
        with CaptureQueriesContext(connection) as report:
            scan(notify=False)
        with CaptureQueriesContext(connection) as full:
            result = scan()
        assert result.transitions == n and result.notifications_created == n
        return len(report), len(full)

    small = queries(2)
    # the second plant's scan sees only its own plans (the first plant is done)
    large = queries(25)
    assert large == small


def test_bypass_past_its_authorised_time_is_announced_once():
    s, lead, owner = _plant(1)
    sif = TestPlan.objects.get(sif__unit__site=s).sif
    b = services.open_bypass(user=lead, sif=sif, started_at=timezone.now() - dt.timedelta(hours=10),
                             authorised_hours=8, reason="maintenance")
    result = scan()
    assert result.bypass_states[b.pk] == choices.BypassState.OVERDUE
    b.refresh_from_db()
    assert b.announced_state == choices.BypassState.OVERDUE
    notes = Notification.objects.filter(subject_key=f"bypass:{b.pk}:overdue")
    assert set(notes.values_list("recipient__username", flat=True)) == {lead.username,
                                                                       owner.username}
    assert scan().notifications_created == 0
    # far past it (twice the authorised time): escalated, to the leads as well
    result = scan(timezone.localdate() + dt.timedelta(days=1))
    assert result.bypass_states[b.pk] == choices.BypassState.ESCALATED
    assert Notification.objects.filter(subject_key=f"bypass:{b.pk}:escalated").exists()


def test_command_as_of_a_past_date_reports_without_writing(capsys):
    s, *_ = _plant(2)
    _as_upgraded(s)
    call_command("scan_plans", "--as-of", "2020-03-01", "--json")
    out = capsys.readouterr().out
    assert '"as_of": "2020-03-01"' in out
    assert Notification.objects.count() == 0 and PlanStateChange.objects.count() == 0
    call_command("scan_plans")
    out = capsys.readouterr().out
    assert "state changes: 2; notifications created: 2" in out


def test_changes_in_one_transaction_refresh_the_sif_once(django_capture_on_commit_callbacks):
    from register.schedule import followup

    s, lead, owner = _plant(2)
    sifs = list(TestPlan.objects.filter(sif__unit__site=s).values_list("sif_id", flat=True))
    with django_capture_on_commit_callbacks() as callbacks, transaction.atomic():
        followup.after_test_change(sifs[0])
        followup.after_test_change(sifs[0])
        followup.after_test_change(sifs[1])
    assert len(callbacks) == 1


def test_a_rolled_back_change_leaves_no_stale_refresh_behind(django_capture_on_commit_callbacks):
    from register.schedule import followup

    s, lead, owner = _plant(2)
    sifs = list(TestPlan.objects.filter(sif__unit__site=s).values_list("sif_id", flat=True))
    try:
        with transaction.atomic():
            followup.after_test_change(sifs[0])
            raise RuntimeError
    except RuntimeError:
        pass
    with django_capture_on_commit_callbacks() as callbacks, transaction.atomic():
        followup.after_test_change(sifs[1])
    assert len(callbacks) == 1
