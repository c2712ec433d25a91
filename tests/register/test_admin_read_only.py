"""The admin cannot move a figure: design data, plans and records are read-only there
(changes go through the register's services, with reason, reference and recompute)."""

import datetime as dt

import pytest
from django.contrib.auth import get_user_model
from django.urls import reverse

from register.models import SafetyFunction, TestPlan
from tests import factories as f

pytestmark = pytest.mark.django_db


@pytest.fixture
def admin_client(client):
    user = get_user_model().objects.create_superuser("root-x", "root@example.invalid",
                                                     f.PASSWORD)
    client.force_login(user)
    return client


def test_changing_a_plan_interval_in_the_admin_is_refused(admin_client):
    sif = f.sif(f.unit(f.site()), in_service=dt.date(2022, 1, 1))
    plan = TestPlan.objects.filter(sif=sif).first()
    before = (plan.interval_months, plan.history.count())
    url = reverse("admin:register_testplan_change", args=[plan.pk])
    page = admin_client.get(url)
    assert page.status_code == 200  # viewable, with its history
    assert b'name="interval_months"' not in page.content
    resp = admin_client.post(url, {"name": plan.name, "kind": plan.kind,
                                   "interval_months": 36, "coverage": 1})
    assert resp.status_code == 403
    plan.refresh_from_db()
    assert (plan.interval_months, plan.history.count()) == before
    assert admin_client.post(reverse("admin:register_testplan_delete", args=[plan.pk]),
                             {"post": "yes"}).status_code == 403
    assert admin_client.get(reverse("admin:register_safetyfunction_add")).status_code == 403
    assert SafetyFunction.objects.filter(pk=sif.pk).exists()


def test_site_setup_stays_possible(admin_client):
    assert admin_client.get(reverse("admin:register_site_add")).status_code == 200
    assert admin_client.get(reverse("admin:register_membership_add")).status_code == 200


def test_a_staff_lead_sees_only_their_sites_in_the_admin(client):
    """The admin reads through the one gate: a staff member who is not a superuser sees the
    rows of their own sites only; the other site's SIF does not open."""
    from django.contrib.auth.models import Permission

    from register import choices

    own = f.sif(f.unit(f.site()), tag="OWN-1")
    other = f.sif(f.unit(f.site(), code="U2"), tag="FAR-1")
    lead = f.user("staff-lead", site=own.unit.site, role=choices.Role.LEAD)
    lead.is_staff = True
    lead.save()
    lead.user_permissions.add(*Permission.objects.filter(
        codename__in=["view_safetyfunction", "view_devicetype", "view_chainentry"]))
    client.force_login(lead)
    listing = client.get(reverse("admin:register_safetyfunction_changelist"))
    assert listing.status_code == 200
    assert b"OWN-1" in listing.content and b"FAR-1" not in listing.content
    far = client.get(reverse("admin:register_safetyfunction_change", args=[other.pk]))
    assert far.status_code == 302  # "does not exist": back to the admin index
    assert client.get(reverse("admin:register_devicetype_changelist")).status_code == 200
    assert client.get(reverse("admin:register_chainentry_changelist")).status_code == 403
