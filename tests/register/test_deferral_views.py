"""Deferral requests through the web: projection shown first, only the lead decides; the
decide page shows how late the test is and the SIF's figures, and keeps the form when a
decision is refused."""

import datetime as dt

import pytest
from django.urls import reverse
from django.utils import timezone

from register import choices, presenters
from register.calculations import calculations
from register.models import Deferral, SafetyFunction, TestPlan
from register.schedule import services as schedule_services
from register.schedule.due import status_of
from tests import factories as f

pytestmark = pytest.mark.django_db


@pytest.fixture
def plant(client):
    s = f.site()
    u = f.unit(s)
    tech = f.user("tech", site=s, role=choices.Role.TECHNICIAN)
    lead = f.user("lead", site=s, role=choices.Role.LEAD)
    auditor = f.user("aud", site=s, role=choices.Role.AUDITOR)
    sif = f.sif(u, in_service=timezone.localdate() - dt.timedelta(days=350))
    return TestPlan.objects.get(sif=sif), tech, lead, auditor


def test_request_shows_projection_then_lead_approves(client, plant):
    plan, tech, lead, _ = plant
    due = status_of(plan, timezone.localdate()).due_on
    proposed = (due + dt.timedelta(days=60)).isoformat()
    client.force_login(tech)
    url = reverse("deferrals:request", args=[plan.pk])
    page = client.post(url, {"proposed_on": proposed, "reason": "turnaround", "preview": "1"})
    assert page.status_code == 200
    on_due = page.context["projection"]["on_due"]
    later = page.context["projection"]["deferred"]
    assert later > on_due > 0  # a later test means a higher projected PFDavg
    assert b"Projected PFDavg" in page.content
    assert Deferral.objects.count() == 0  # a preview writes nothing
    client.post(url, {"proposed_on": proposed, "reason": "turnaround", "submit": "1"})
    deferral = Deferral.objects.get()
    # The technician cannot decide.
    assert client.post(reverse("deferrals:decide", args=[deferral.pk]),
                       {"decision": "approve"}).status_code == 403
    client.force_login(lead)
    client.post(reverse("deferrals:decide", args=[deferral.pk]),
                {"decision": "approve", "password": f.PASSWORD})
    deferral.refresh_from_db()
    assert deferral.status == choices.DeferralStatus.APPROVED
    assert deferral.projected_pfd_avg == pytest.approx(later, rel=1e-6)
    assert status_of(plan, timezone.localdate()).due_on.isoformat() == proposed


def test_bad_date_and_missing_reason_are_explained(client, plant):
    plan, tech, *_ = plant
    client.force_login(tech)
    url = reverse("deferrals:request", args=[plan.pk])
    r = client.post(url, {"proposed_on": "next week", "reason": "x", "submit": "1"})
    assert r.status_code == 400 and b"YYYY-MM-DD" in r.content
    due = status_of(plan, timezone.localdate()).due_on
    r = client.post(url, {"proposed_on": (due - dt.timedelta(days=1)).isoformat(),
                          "reason": "", "submit": "1"})
    assert r.status_code == 400
    assert Deferral.objects.count() == 0


def test_auditor_and_other_sites_cannot_request(client, plant):
    plan, tech, lead, auditor = plant
    client.force_login(auditor)
    assert client.post(reverse("deferrals:request", args=[plan.pk]),
                       {"proposed_on": "2030-01-01", "reason": "x"}).status_code == 403
    other = f.user("other", site=f.site(), role=choices.Role.LEAD)
    client.force_login(other)
    assert client.get(reverse("deferrals:request", args=[plan.pk])).status_code == 404


# --- The decide page: what the decider sees, and a refused decision keeps the form ----------


@pytest.fixture
def overdue(plant):
    """The plant's plan made overdue by a SIF in service 400 days ago, with a stored
    assessment (a real calculation), and a technician's request to defer it."""
    plan, tech, lead, _ = plant
    late = f.sif(plan.sif.unit, tag="SIF-LATE",
                 in_service=timezone.localdate() - dt.timedelta(days=400))
    calculations().recompute_many(SafetyFunction.objects.filter(pk=late.pk), trigger="test")
    late_plan = TestPlan.objects.get(sif=late)
    deferral = schedule_services.request_deferral(
        user=tech, plan=late_plan, proposed_on=timezone.localdate() + dt.timedelta(days=30),
        reason="Spare actuator on order")
    return late_plan, deferral, lead


def test_decide_page_shows_how_late_the_current_figures_and_testing_now(client, overdue):
    plan, deferral, lead = overdue
    status = status_of(plan, timezone.localdate())
    assessment = calculations().latest_assessments([plan.sif_id])[plan.sif_id]
    client.force_login(lead)
    resp = client.get(reverse("deferrals:decide", args=[deferral.pk]))
    assert resp.status_code == 200
    html = resp.content.decode()
    assert f'data-days-overdue="{status.days_overdue}"' in html and status.days_overdue > 0
    assert str(choices.plan_state_badge(status.state)["label"]) in html
    assert f"{assessment.achieved_pfd_avg:.2e}" in html
    assert presenters.verdict_badge(assessment.meets_target).label in html
    assert 'data-baseline="now"' in html and "Full test today" in html
    assert "on its due date" not in html.split('id="effect"')[1]  # never a past due date
    assert resp.context["projection"]["deferred"] > resp.context["projection"]["on_due"]


def test_reject_without_a_note_keeps_the_request_and_the_form(client, overdue):
    _, deferral, lead = overdue
    client.force_login(lead)
    resp = client.post(reverse("deferrals:decide", args=[deferral.pk]),
                       {"decision": "reject", "note": "  "})
    assert resp.status_code == 400
    html = resp.content.decode()
    assert "Say why the deferral is rejected." in html
    assert 'id="decision-form"' in html and "Spare actuator on order" in html
    assert "Decided:" not in html and "None" not in html
    deferral.refresh_from_db()
    assert deferral.status == choices.DeferralStatus.PENDING
    resp = client.post(reverse("deferrals:decide", args=[deferral.pk]),
                       {"decision": "reject", "note": "Test it this week",
                        "password": f.PASSWORD})
    assert resp.status_code == 302
    deferral.refresh_from_db()
    assert deferral.status == choices.DeferralStatus.REJECTED
    page = client.get(reverse("deferrals:decide", args=[deferral.pk])).content.decode()
    assert "Decided: <strong>Rejected</strong> by Lead" in page and "Test it this week" in page


@pytest.mark.parametrize("proposed, message", [
    ("9999-12-31", b"at most one test interval"),
    ("yesterday", b"must be after today"),
])
def test_request_dates_out_of_range_are_explained(client, plant, proposed, message):
    plan, tech, *_ = plant
    if proposed == "yesterday":
        proposed = (timezone.localdate() - dt.timedelta(days=1)).isoformat()
    client.force_login(tech)
    url = reverse("deferrals:request", args=[plan.pk])
    for action in ("preview", "submit"):
        r = client.post(url, {"proposed_on": proposed, "reason": "x", action: "1"})
        assert r.status_code == 400 and message in r.content
    assert Deferral.objects.count() == 0


def test_a_stored_date_out_of_range_shows_an_error_not_a_crash(client, plant):
    plan, tech, lead, _ = plant
    due = status_of(plan, timezone.localdate()).due_on
    far = Deferral.objects.create(plan=plan, due_on=due, proposed_on=dt.date(9999, 12, 31),
                                  reason="stored before the date rule", requested_by=tech)
    client.force_login(lead)
    url = reverse("deferrals:decide", args=[far.pk])
    page = client.get(url)
    assert page.status_code == 200 and b'id="date-error"' in page.content
    resp = client.post(url, {"decision": "approve"})
    assert resp.status_code == 400 and b"at most one test interval" in resp.content
    far.refresh_from_db()
    assert far.status == choices.DeferralStatus.PENDING


def test_a_request_whose_date_has_passed_is_explained_on_the_sif_page(client, plant):
    plan, tech, lead, _ = plant
    yesterday = timezone.localdate() - dt.timedelta(days=1)
    Deferral.objects.create(plan=plan, due_on=yesterday - dt.timedelta(days=5),
                            proposed_on=yesterday, reason="left pending", requested_by=tech)
    client.force_login(lead)
    page = client.get(reverse("register:sif_detail", args=[plan.sif_id]))
    assert page.status_code == 200
    assert b"Projection not available" in page.content and b"not after today" in page.content
