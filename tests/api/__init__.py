"""A small invented plant for the API tests: two sites, personas, one of everything."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field

from django.utils import timezone
from rest_framework.authtoken.models import Token
from rest_framework.test import APIClient

from calcs.models import Assessment
from register import choices, services
from register.models import Component, Deferral, EvidencePack, Notification, TestPlan
from tests import factories as f

ROLES = ("lead", "technician", "verifier", "auditor", "outsider", "anonymous")


@dataclass
class Place:
    site: object
    unit: object
    sif: object
    plan: object
    components: list
    subsystem: object
    scenario: object
    signed: object
    draft: object
    demand: object
    bypass: object
    deferral: object
    assessment: object
    performer: object
    pack: object = None


@dataclass
class World:
    users: dict
    own: Place
    other: Place
    notes: dict = field(default_factory=dict)

    def client(self, role: str) -> APIClient:
        c = APIClient()
        if role != "anonymous":
            token, _ = Token.objects.get_or_create(user=self.users[role])
            c.credentials(HTTP_AUTHORIZATION=f"Token {token.key}")
        return c


def _place(code: str, performer, unit_code="U1", tag="SIF-100") -> Place:
    site = f.site(code)
    unit = f.unit(site, unit_code)
    sif = f.sif(unit, tag=tag)
    plan = TestPlan.objects.get(sif=sif)
    comps = list(Component.objects.filter(subsystem__sif=sif).order_by("tag"))
    now = timezone.now()
    scenario = f.scenario(site, ref=f"HZ-{code}")
    return Place(site=site, unit=unit, sif=sif, plan=plan, components=comps,
                 subsystem=comps[0].subsystem, scenario=scenario, signed=None, draft=None,
                 demand=None, bypass=None, deferral=None, assessment=None,
                 performer=performer), now


def _fill(place: Place, now):
    user = place.performer
    comp = place.components[0]
    result = [services.ResultInput(component=comp, as_found="pass", as_left="pass")]
    place.signed = services.save_draft(user=user, sif=place.sif, plan=place.plan,
                                       kind=choices.TestKind.FULL,
                                       performed_at=now - dt.timedelta(days=2), results=result)
    services.sign_record(place.signed, user, f.PASSWORD)
    place.signed.refresh_from_db()
    place.draft = services.save_draft(user=user, sif=place.sif, plan=place.plan,
                                      kind=choices.TestKind.PARTIAL,
                                      performed_at=now - dt.timedelta(days=1), results=result)
    place.demand = services.record_demand(user=user, sif=place.sif,
                                          occurred_at=now - dt.timedelta(days=5),
                                          successful=True, description="High level trip")
    place.bypass = services.open_bypass(user=user, sif=place.sif,
                                        started_at=now - dt.timedelta(hours=3),
                                        authorised_hours=8, reason="Transmitter swap")
    place.deferral = Deferral.objects.create(
        plan=place.plan, due_on=now.date() + dt.timedelta(days=10),
        proposed_on=now.date() + dt.timedelta(days=60),
        reason="Turnaround moved", requested_by=user)
    place.pack = EvidencePack.objects.create(
        scope="site", site=place.site, period_start=dt.date(2025, 1, 1),
        period_end=dt.date(2025, 12, 31), requested_by=user)
    place.assessment = Assessment.objects.create(
        sif=place.sif, computed_at=now, as_of=now, inputs_digest="0" * 64,
        achieved_pfd_avg=2e-3, meets_target=True)


def build_world() -> World:
    own, now = _place("north", None, tag="SIF-100")
    other, _ = _place("south", None, tag="SIF-100")
    users = {
        "lead": f.user("lead", site=own.site, role=choices.Role.LEAD),
        "technician": f.user("tech", site=own.site, role=choices.Role.TECHNICIAN),
        "verifier": f.user("verifier", site=own.site, role=choices.Role.VERIFIER),
        "auditor": f.user("auditor", site=own.site, role=choices.Role.AUDITOR),
        "outsider": f.user("outsider", site=other.site, role=choices.Role.LEAD),
    }
    own.performer = users["technician"]
    other.performer = users["outsider"]
    _fill(own, now)
    _fill(other, now)
    world = World(users=users, own=own, other=other)
    for role, u in users.items():
        site = other.site if role == "outsider" else own.site
        world.notes[role] = Notification.objects.create(
            recipient=u, site=site, kind=choices.NotificationKind.PLAN_STATE,
            subject_key=f"plan:{role}", message=f"A plan changed state ({role}).")
    return world
