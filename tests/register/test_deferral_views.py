"""Deferral requests through the web: projection shown first, only the lead decides."""

import datetime as dt

import pytest
from django.urls import reverse
from django.utils import timezone

from register import choices
from register.models import Deferral, TestPlan
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
    client.post(reverse("deferrals:decide", args=[deferral.pk]), {"decision": "approve"})
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
