"""The SIF page shows a pending deferral's projection through the same rule and words as
the decision page: for a test already overdue the baseline is testing today."""

import datetime as dt

import pytest
from django.urls import reverse

from register import choices
from register.days import today as site_today
from register.models import TestPlan
from register.schedule import due
from register.schedule.services import request_deferral
from tests import factories as f

pytestmark = pytest.mark.django_db


def test_overdue_plan_projection_compares_with_testing_today(client):
    s = f.site()
    u = f.unit(s)
    tech = f.user("tech", site=s, role=choices.Role.TECHNICIAN)
    lead = f.user("lead", site=s, role=choices.Role.LEAD)
    sif = f.sif(u, in_service=dt.date(2024, 1, 1))  # never tested: due 2025-01-01
    plan = TestPlan.objects.select_related("sif__unit__site").get(sif=sif)
    today = site_today(s)
    status = due.status_of(plan, today)
    assert status.days_overdue > 0
    request_deferral(user=tech, plan=plan, proposed_on=today + dt.timedelta(days=30),
                     reason="shutdown next month")
    client.force_login(lead)
    page = client.get(reverse("register:sif_detail", args=[sif.pk])).content.decode()
    assert f"already {status.days_overdue} days overdue" in page
    assert "Full test today" in page
    assert "test on the due date" not in page
