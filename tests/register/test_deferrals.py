"""Deferrals that follow reality: withdrawn once the deferred test is signed, projected
against testing now when the test is already overdue, decided by a lead who did not ask,
with the due date and the projected PFDavg always the server's (real PostgreSQL)."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

import pytest
from django.core.exceptions import ValidationError
from django.db import transaction
from django.urls import reverse
from django.utils import timezone
from rest_framework.test import APIClient

from calcs.engine import history as eng_hist
from register import choices, services
from register.calculations import calculations
from register.models import Component, Deferral, Notification, SafetyFunction, TestPlan
from register.schedule import services as schedule_services
from register.schedule.due import status_of
from tests import factories as f

pytestmark = pytest.mark.django_db

Status = choices.DeferralStatus


@dataclass
class World:
    today: dt.date
    site: object
    tech: object
    lead: object
    lead2: object
    soon: object  # due in about two weeks
    late: object  # overdue by about five weeks
    soon_plan: object
    late_plan: object


def build_world() -> World:
    """One site, a technician and two leads, a SIF coming due and one already overdue,
    each with a stored assessment (real calculation)."""
    today = timezone.localdate()
    site = f.site("dfr")
    unit = f.unit(site)
    tech = f.user("dfr-tech", site=site, role=choices.Role.TECHNICIAN)
    lead = f.user("dfr-lead", site=site, role=choices.Role.LEAD)
    lead2 = f.user("dfr-lead2", site=site, role=choices.Role.LEAD)
    soon = f.sif(unit, tag="DFR-SOON", in_service=today - dt.timedelta(days=350))
    late = f.sif(unit, tag="DFR-LATE", in_service=today - dt.timedelta(days=400))
    calculations().recompute_many(SafetyFunction.objects.filter(pk__in=[soon.pk, late.pk]),
                                  trigger="test world")
    return World(today, site, tech, lead, lead2, soon, late,
                 TestPlan.objects.get(sif=soon), TestPlan.objects.get(sif=late))


@pytest.fixture(scope="module")
def world(django_db_setup, django_db_blocker):
    """Built once for the module inside a transaction rolled back at its end; each test
    runs in its own savepoint."""
    with django_db_blocker.unblock(), transaction.atomic():
        yield build_world()
        transaction.set_rollback(True)


def _full_test(sif, tech, when, *, kind=choices.TestKind.FULL, sign=True):
    results = [services.ResultInput(component=c, as_found="pass", as_left="pass")
               for c in Component.objects.filter(subsystem__sif=sif)]
    rec = services.save_draft(user=tech, sif=sif, kind=kind, results=results, performed_at=when)
    return services.sign_record(rec, tech, f.PASSWORD) if sign else rec


def _ask(world, plan, days=20, user=None):
    return schedule_services.request_deferral(
        user=user or world.tech, plan=plan, reason="Spare valve on order",
        proposed_on=max(world.today, status_of(plan, world.today).due_on)
        + dt.timedelta(days=days))


# --- Withdrawn when the deferred test is done ------------------------------------------------


def test_a_signed_test_withdraws_the_pending_deferral_a_draft_does_not(
        world, django_capture_on_commit_callbacks):
    deferral = _ask(world, world.soon_plan)
    when = timezone.now() - dt.timedelta(hours=2)
    with django_capture_on_commit_callbacks(execute=True):
        draft = _full_test(world.soon, world.tech, when, sign=False)
    deferral.refresh_from_db()
    assert deferral.status == Status.PENDING  # a draft is not a test done

    with django_capture_on_commit_callbacks(execute=True):
        services.sign_record(draft, world.tech, f.PASSWORD)
    deferral.refresh_from_db()
    assert deferral.status == Status.WITHDRAWN
    done_on = when.date()
    cause = f"the deferred test was done on {done_on:%Y-%m-%d}"
    entry = deferral.history.latest("history_id")
    assert entry.status == Status.WITHDRAWN and cause in entry.history_change_reason
    assert cause in deferral.decision_note
    note = Notification.objects.get(recipient=world.tech,
                                    subject_key=f"deferral:{deferral.pk}:withdrawn")
    assert note.kind == choices.NotificationKind.DEFERRAL_WITHDRAWN
    # Nothing left to decide; a second pass changes nothing (idempotent).
    with pytest.raises(ValidationError, match="nothing to decide"):
        schedule_services.decide_deferral(deferral, world.lead, approve=True)
    rows = deferral.history.count()
    assert schedule_services.withdraw_done_deferrals(world.soon.pk) == []
    assert deferral.history.count() == rows


def test_a_test_that_does_not_credit_the_plan_leaves_the_request_pending(
        world, django_capture_on_commit_callbacks):
    deferral = _ask(world, world.late_plan)
    with django_capture_on_commit_callbacks(execute=True):  # a partial test: a full plan waits
        _full_test(world.late, world.tech, timezone.now() - dt.timedelta(hours=1),
                   kind=choices.TestKind.PARTIAL)
    deferral.refresh_from_db()
    assert deferral.status == Status.PENDING
    assert schedule_services.withdraw_done_deferrals(world.late.pk) == []


def test_a_test_done_before_the_request_but_signed_after_it_withdraws_it(
        world, django_capture_on_commit_callbacks):
    done = timezone.now() - dt.timedelta(days=3)
    draft = _full_test(world.late, world.tech, done, sign=False)
    deferral = _ask(world, world.late_plan)  # the draft does not count yet
    with django_capture_on_commit_callbacks(execute=True):
        services.sign_record(draft, world.tech, f.PASSWORD)
    deferral.refresh_from_db()
    assert deferral.status == Status.WITHDRAWN
    assert f"done on {done.date():%Y-%m-%d}" in deferral.decision_note


# --- The projection of an overdue test -----------------------------------------------------


def test_an_overdue_test_is_projected_against_testing_now(world):
    status = status_of(world.late_plan, world.today)
    assert status.days_overdue > 0 and status.due_on < world.today
    as_of = timezone.now()
    proposed = world.today + dt.timedelta(days=30)
    cmp, target = calculations().deferral_projection(world.late_plan, proposed, as_of)
    # Independently: the engine's projection with the next full test right now and the
    # same window (the proposed date plus one plan interval).
    adapter = calculations()
    d = adapter.load(SafetyFunction.objects.filter(pk=world.late.pk))[0]
    rates = adapter.rate_table(world.site, adapter.device_type_stats(world.site.pk,
                                                                     world.today), world.today)
    hist = adapter.history_input(d, rates, assume_closed_after=as_of)
    proposed_at = dt.datetime.combine(proposed, dt.time(0), tzinfo=dt.UTC)
    horizon = proposed_at + dt.timedelta(hours=world.late_plan.interval_hours)
    now = eng_hist.projection(hist, as_of, as_of, horizon,
                              interval_hours=world.late_plan.interval_hours)
    assert cmp.on_due_date.pfd_avg == pytest.approx(now.pfd_avg, rel=1e-9)
    assert cmp.deferred.pfd_avg > cmp.on_due_date.pfd_avg  # waiting a month costs
    effect = schedule_services.projected_effect(world.late_plan, proposed, as_of=as_of)
    assert effect["test_now"] and effect["baseline_on"] == world.today
    assert effect["days_overdue"] == status.days_overdue


def test_a_date_between_the_past_due_date_and_today_is_refused(world):
    status = status_of(world.late_plan, world.today)
    yesterday = world.today - dt.timedelta(days=1)
    assert status.due_on < yesterday
    with pytest.raises(ValidationError) as exc:
        schedule_services.request_deferral(user=world.tech, plan=world.late_plan,
                                           proposed_on=yesterday, reason="late anyway")
    assert "after today" in str(exc.value.message_dict["proposed_on"])
    with pytest.raises(ValueError, match="not after today"):
        calculations().deferral_projection(world.late_plan, yesterday)
    assert not Deferral.objects.filter(plan=world.late_plan).exists()


@pytest.mark.parametrize("proposed", [dt.date(9999, 12, 31), "interval + 1 day"])
def test_a_date_beyond_one_interval_is_refused(world, proposed):
    if proposed == "interval + 1 day":
        proposed = schedule_services.latest_proposal(world.soon_plan, world.today) + \
            dt.timedelta(days=1)
    with pytest.raises(ValidationError) as exc:
        schedule_services.request_deferral(user=world.tech, plan=world.soon_plan,
                                           proposed_on=proposed, reason="far away")
    assert "at most one test interval" in str(exc.value.message_dict["proposed_on"])
    assert not Deferral.objects.filter(plan=world.soon_plan).exists()
    # The last allowed day is accepted.
    latest = schedule_services.latest_proposal(world.soon_plan, world.today)
    assert schedule_services.request_deferral(user=world.tech, plan=world.soon_plan,
                                              proposed_on=latest, reason="turnaround").pk


# --- Who decides ------------------------------------------------------------------------------


def test_the_requester_cannot_decide_his_own_deferral(world):
    deferral = _ask(world, world.soon_plan, user=world.lead)
    assert Notification.objects.filter(subject_key=f"deferral:{deferral.pk}:requested",
                                       recipient=world.lead2).exists()
    assert not Notification.objects.filter(subject_key=f"deferral:{deferral.pk}:requested",
                                           recipient=world.lead).exists()
    for approve, note in ((True, ""), (False, "withdrawn by me")):
        with pytest.raises(ValidationError) as exc:
            schedule_services.decide_deferral(deferral, world.lead, approve=approve, note=note)
        assert "decided_by" in exc.value.message_dict
    deferral.refresh_from_db()
    assert deferral.status == Status.PENDING and deferral.decided_by is None
    schedule_services.decide_deferral(deferral, world.lead2, f.PASSWORD, approve=True)
    deferral.refresh_from_db()
    assert deferral.status == Status.APPROVED and deferral.decided_by == world.lead2
    assert Notification.objects.filter(subject_key=f"deferral:{deferral.pk}:approved",
                                       recipient=world.lead).exists()


def test_the_self_approval_is_refused_on_the_page(client, world):
    deferral = _ask(world, world.soon_plan, user=world.lead)
    client.force_login(world.lead)
    url = reverse("deferrals:decide", args=[deferral.pk])
    page = client.get(url).content.decode()
    assert "another lead of the site decides" in page
    resp = client.post(url, {"decision": "approve", "note": "fine by me"})
    assert resp.status_code == 400
    html = resp.content.decode()
    assert "You asked for this deferral, so you cannot decide it" in html
    assert 'id="decision-form"' in html and "fine by me" in html  # the form and the note stay
    deferral.refresh_from_db()
    assert deferral.status == Status.PENDING


def test_the_decision_history_is_dated_by_at(world):
    at = timezone.now() - dt.timedelta(days=200)
    plan = world.soon_plan
    asked = schedule_services.request_deferral(
        user=world.tech, plan=plan, reason="turnaround moved",
        due_on=status_of(plan, world.today).due_on,
        proposed_on=at.date() + dt.timedelta(days=300), at=at)
    assert asked.history.latest("history_id").history_date == at
    decided_at = at + dt.timedelta(days=2)
    schedule_services.decide_deferral(asked, world.lead, f.PASSWORD, approve=False,
                                      note="test on time",
                                      at=decided_at)
    asked.refresh_from_db()
    assert asked.decided_at == decided_at
    assert asked.history.latest("history_id").history_date == decided_at
    # "Today" of the date rules is the day of ``at``: a date valid then but not now is
    # refused without it.
    with pytest.raises(ValidationError):
        schedule_services.request_deferral(user=world.tech, plan=plan, reason="again",
                                           proposed_on=at.date() + dt.timedelta(days=10))


# --- The API: the server computes the due date and the projection -----------------------------


def test_the_api_ignores_a_client_due_date_and_projection(world):
    api = APIClient()
    api.force_authenticate(world.tech)
    proposed = world.today + dt.timedelta(days=40)
    resp = api.post("/api/deferrals/", {
        "plan": world.late_plan.pk, "due_on": "2020-01-01", "projected_pfd_avg": 0.9,
        "proposed_on": proposed.isoformat(), "reason": "Shutdown moved"}, format="json")
    assert resp.status_code == 201, resp.content
    deferral = Deferral.objects.get(pk=resp.json()["id"])
    assert deferral.due_on == status_of(world.late_plan, world.today).due_on
    assert deferral.due_on.isoformat() != "2020-01-01"
    assert deferral.projected_pfd_avg is None

    api.force_authenticate(world.lead)
    resp = api.post(f"/api/deferrals/{deferral.pk}/decide/",
                    {"approve": True, "note": "", "projected_pfd_avg": 0.9,
                     "password": f.PASSWORD}, format="json")
    assert resp.status_code == 200, resp.content
    deferral.refresh_from_db()
    expected = schedule_services.projected_effect(world.late_plan, proposed)["deferred"]
    assert deferral.projected_pfd_avg == pytest.approx(expected, rel=1e-6)
    assert resp.json()["projected_pfd_avg"] == pytest.approx(expected, rel=1e-6)
    assert deferral.projected_pfd_avg != pytest.approx(0.9)


def test_the_api_explains_a_date_out_of_range_and_writes_nothing(world):
    api = APIClient()
    api.force_authenticate(world.tech)
    resp = api.post("/api/deferrals/", {"plan": world.soon_plan.pk, "proposed_on": "9999-12-31",
                                        "reason": "far"}, format="json")
    assert resp.status_code == 400
    assert "at most one test interval" in resp.json()["proposed_on"][0]
    assert not Deferral.objects.filter(plan=world.soon_plan).exists()
