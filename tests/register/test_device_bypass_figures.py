"""A bypass of one device moves the SIF's achieved PFDavg: with a 1oo1 valve as much as a
bypass of the whole SIF for the same period; with compensating measures recorded as
effective, not at all."""

import datetime as dt

import pytest
from django.utils import timezone

from register import choices, services
from register.models import Component, SafetyFunction
from tests import factories as f

pytestmark = pytest.mark.django_db


def _achieved(sif, as_of):
    from calcs.adapter import recompute_many

    (a,) = recompute_many(SafetyFunction.objects.filter(pk=sif.pk), trigger="test",
                          as_of=as_of)
    return a.achieved_pfd_avg


def test_a_device_bypass_worsens_the_achieved_figure_like_a_sif_bypass():
    s = f.site()
    u = f.unit(s)
    tech = f.user("tech", site=s, role=choices.Role.TECHNICIAN)
    lead = f.user("lead", site=s, role=choices.Role.LEAD)
    now = timezone.now()
    started = now - dt.timedelta(days=20)
    ended = started + dt.timedelta(hours=72)
    figures = {}
    for how in ("none", "device", "sif", "compensated"):
        sif = f.sif(u, in_service=dt.date(2023, 1, 1))
        f.full_test(sif, tech, now - dt.timedelta(days=100))
        valve = Component.objects.get(subsystem__sif=sif, subsystem__role="final")
        if how != "none":
            b = services.open_bypass(
                user=tech, sif=sif, started_at=started, authorised_hours=72,
                reason="valve positioner replaced", component=None if how == "sif" else valve,
                compensating_measures="operator at the manual valve" if how == "compensated"
                else "", measures_effective=how == "compensated")
            services.authorise_bypass(b, lead, f.PASSWORD)
            services.close_bypass(b, tech, ended_at=ended)
        figures[how] = _achieved(sif, now)
    assert figures["device"] > figures["none"]
    assert figures["device"] == pytest.approx(figures["sif"], rel=1e-9)
    assert figures["compensated"] == pytest.approx(figures["none"], rel=1e-12)


def test_a_bypass_awaiting_authorisation_asks_the_sites_other_leads(
        django_capture_on_commit_callbacks):
    from register.models import Notification

    s = f.site()
    u = f.unit(s)
    lead = f.user("lead", site=s, role=choices.Role.LEAD)
    other_lead = f.user("lead2", site=s, role=choices.Role.LEAD)
    f.user("tech", site=s, role=choices.Role.TECHNICIAN)
    sif = f.sif(u)
    with django_capture_on_commit_callbacks(execute=True):
        b = services.open_bypass(user=lead, sif=sif, started_at=timezone.now(),
                                 authorised_hours=4, reason="transmitter swap")
    notes = Notification.objects.filter(kind=choices.NotificationKind.BYPASS_REQUESTED)
    assert [n.recipient for n in notes] == [other_lead]  # never the requester, never a tech
    assert f"/operations/bypasses/{b.pk}/" in notes[0].link
