"""The follow-up scan: one notification per state change, idempotent, bounded queries."""

import datetime as dt

import pytest
from django.core import mail
from django.core.management import call_command
from django.db import connection
from django.test.utils import CaptureQueriesContext
from django.utils import timezone

from register import choices, services
from register.models import Notification, TestPlan
from register.schedule.scan import scan
from tests import factories as f

pytestmark = pytest.mark.django_db


def _plant(n_sifs, *, months_ago=13):
    s = f.site()
    u = f.unit(s)
    lead = f.user(f"lead{s.pk}", site=s, role=choices.Role.LEAD, email="lead@x.invalid")
    owner = f.user(f"owner{s.pk}", site=s, role=choices.Role.TECHNICIAN, email="o@x.invalid")
    today = timezone.localdate()
    for _ in range(n_sifs):
        f.sif(u, in_service=today - dt.timedelta(days=30 * months_ago), owner=owner)
    return s, lead, owner


def test_second_scan_creates_nothing_new():
    _plant(3)
    first = scan()
    assert first.notifications_created > 0
    assert len(mail.outbox) == first.notifications_created
    second = scan()
    assert second.notifications_created == 0
    assert len(mail.outbox) == first.notifications_created


def test_overdue_goes_to_owner_and_escalation_also_to_lead():
    s, lead, owner = _plant(1, months_ago=13)  # ~30 days overdue: overdue, not escalated
    scan()
    keys = set(Notification.objects.values_list("recipient__username", "subject_key"))
    states = {k.split(":")[2] for _, k in keys}
    assert states == {"overdue"}
    assert {u for u, _ in keys} == {owner.username}

    s2, lead2, owner2 = _plant(1, months_ago=16)  # ~120 days overdue: second level
    scan()
    esc = Notification.objects.filter(subject_key__contains="escalated_2", site=s2)
    assert set(esc.values_list("recipient__username", flat=True)) == {owner2.username,
                                                                     lead2.username}


def test_state_change_after_a_test_is_done(django_capture_on_commit_callbacks):
    s, lead, owner = _plant(1, months_ago=13)
    scan()
    plan = TestPlan.objects.get(sif__unit__site=s)
    assert plan.cached_state == choices.PlanState.OVERDUE
    tech = f.user("t", site=s, role=choices.Role.TECHNICIAN)
    rec = services.save_draft(
        user=tech, sif=plan.sif, kind=choices.TestKind.FULL,
        performed_at=timezone.now() - dt.timedelta(hours=1),
        results=[services.ResultInput(component=c, as_found="pass", as_left="pass")
                 for c in plan.sif.subsystems.first().components.all()]
        + [services.ResultInput(component=c, as_found="pass", as_left="pass")
           for c in plan.sif.subsystems.last().components.all()])
    with django_capture_on_commit_callbacks(execute=True):
        services.sign_record(rec, tech, f.PASSWORD)
    plan.refresh_from_db()
    assert plan.cached_state == choices.PlanState.ON_TRACK
    assert plan.next_due_on > timezone.localdate()
    # ...and the SIF was recomputed after the commit
    assert plan.sif.assessments.filter(trigger="record changed").exists()


def test_scan_query_count_does_not_grow_with_plant_size():
    _plant(2)
    with CaptureQueriesContext(connection) as small:
        scan(notify=False)
    _plant(25)
    with CaptureQueriesContext(connection) as large:
        scan(notify=False)
    assert len(large) == len(small)


def test_bypass_past_its_authorised_time_is_flagged_then_escalated():
    s, lead, owner = _plant(1)
    sif = TestPlan.objects.get(sif__unit__site=s).sif
    b = services.open_bypass(user=lead, sif=sif, started_at=timezone.now() - dt.timedelta(hours=10),
                             authorised_hours=8, reason="maintenance")
    result = scan()
    assert result.bypass_states[b.pk] == choices.BypassState.OVERDUE
    b.refresh_from_db()
    assert b.cached_state == choices.BypassState.OVERDUE
    assert Notification.objects.filter(subject_key=f"bypass:{b.pk}:overdue").exists()


def test_command_as_of_a_past_date_reports_without_writing(capsys):
    _plant(2)
    call_command("scan_plans", "--as-of", "2020-03-01", "--json")
    out = capsys.readouterr().out
    assert '"as_of": "2020-03-01"' in out
    assert Notification.objects.count() == 0


def test_a_scan_cut_off_half_way_is_completed_by_the_next_without_duplicates():
    """A worker killed after writing some notifications: the next scan adds only the
    missing ones."""
    _plant(4)
    first = scan()
    every = list(Notification.objects.order_by("id").values_list("recipient_id", "subject_key"))
    assert len(every) == first.notifications_created >= 4
    # Lose the second half, as if the run had stopped before writing them.
    Notification.objects.filter(pk__in=list(Notification.objects.order_by("id")
                                            .values_list("pk", flat=True))[len(every) // 2:]
                                ).delete()
    again = scan()
    assert again.notifications_created == len(every) - len(every) // 2
    assert sorted(Notification.objects.values_list("recipient_id", "subject_key")) == \
        sorted(every)


def test_changes_in_one_transaction_refresh_the_sif_once(django_capture_on_commit_callbacks):
    from django.db import transaction

    from register.schedule import followup

    s, lead, owner = _plant(2)
    sifs = list(TestPlan.objects.filter(sif__unit__site=s).values_list("sif_id", flat=True))
    with django_capture_on_commit_callbacks() as callbacks, transaction.atomic():
        followup.after_test_change(sifs[0])
        followup.after_test_change(sifs[0])
        followup.after_test_change(sifs[1])
    assert len(callbacks) == 1


def test_a_rolled_back_change_leaves_no_stale_refresh_behind(django_capture_on_commit_callbacks):
    from django.db import transaction

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
