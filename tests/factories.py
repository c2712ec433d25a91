"""Small builders for test data. Each returns saved, validated objects."""

from __future__ import annotations

import datetime as dt
import itertools

from django.contrib.auth import get_user_model

from register import choices
from register.models import (
    Component,
    DeviceType,
    HazardScenario,
    InitiatingCause,
    Membership,
    PlantUnit,
    ProtectionLayer,
    SafetyFunction,
    Site,
    Subsystem,
    TestPlan,
)

_seq = itertools.count(1)
PASSWORD = "correct-horse-7"


def user(username=None, *, site=None, role=None, **extra):
    username = username or f"user{next(_seq)}"
    u = get_user_model().objects.create_user(username=username, password=PASSWORD,
                                             first_name=username.title(), **extra)
    if site and role:
        Membership.objects.create(user=u, site=site, role=role)
    return u


def site(code=None, **extra):
    code = code or f"site{next(_seq)}"
    return Site.objects.create(code=code, name=f"Site {code}", **extra)


def unit(site_obj, code="U1"):
    return PlantUnit.objects.create(site=site_obj, code=code, name=f"Unit {code}")


def device_type(name=None, **extra):
    values = dict(role="sensing", lambda_du_per_hour=5e-7, lambda_dd_per_hour=1e-6,
                  lambda_s_per_hour=1e-6, device_class="B", systematic_capability=3,
                  source="test value")
    values.update(extra)
    return DeviceType.objects.create(name=name or f"Type {next(_seq)}", **values)


def scenario(site_obj, *, tolerable=1e-5, causes=(0.1,), layers=(0.1,), ref=None):
    sc = HazardScenario.objects.create(
        site=site_obj, reference=ref or f"HZ-{next(_seq)}", title="Overfill",
        consequence="Release", category=choices.ConsequenceCategory.PEOPLE,
        tolerable_frequency_per_year=tolerable)
    for f in causes:
        InitiatingCause.objects.create(scenario=sc, description="cause", frequency_per_year=f)
    for p in layers:
        ProtectionLayer.objects.create(scenario=sc, description="alarm", pfd=p)
    return sc


def sif(unit_obj, *, tag=None, target_sil=2, target_pfd=5e-3, in_service=None,
        voting="1oo1", n_components=None, lambda_du=5e-7, interval_months=12, owner=None,
        final_voting="1oo1"):
    in_service = in_service or dt.date(2020, 1, 1)
    s = SafetyFunction.objects.create(
        unit=unit_obj, tag=tag or f"SIF-{next(_seq)}", name="High level trip",
        safe_state="Inlet closed", target_pfd_avg=target_pfd, target_sil=target_sil,
        in_service_on=in_service, owner=owner)
    dt_type = device_type(lambda_du_per_hour=lambda_du)
    valve = device_type(role="final", lambda_du_per_hour=1e-6, lambda_dd_per_hour=0.0,
                        device_class="A", systematic_capability=2)
    for role, v, typ, prefix in (("sensing", voting, dt_type, "LT"),
                                 ("final", final_voting, valve, "XV")):
        sub = Subsystem.objects.create(sif=s, role=role, name=role, voting=v, beta=0.05,
                                       beta_d=0.025, position=1 if role == "sensing" else 3)
        n = int(v.split("oo")[1].rstrip("D"))
        for i in range(n):
            Component.objects.create(subsystem=sub, tag=f"{prefix}-{s.tag}-{'ABC'[i]}",
                                     device_type=typ, in_service_on=in_service)
    TestPlan.objects.create(sif=s, name="Full proof test", interval_months=interval_months)
    return s


def full_test(sif, tech, when, fail_tag=None):
    """Sign a full test of every component of ``sif``; ``fail_tag`` found failed DU."""
    from register import services
    from register.models import Component

    results = [services.ResultInput(
        component=c, as_found="fail" if c.tag == fail_tag else "pass", as_left="pass",
        failure_mode="du" if c.tag == fail_tag else "",
        failure_description="stuck" if c.tag == fail_tag else "",
        work_done="fixed" if c.tag == fail_tag else "")
        for c in Component.objects.filter(subsystem__sif=sif)]
    rec = services.save_draft(user=tech, sif=sif, kind=choices.TestKind.FULL, results=results,
                              performed_at=when)
    return services.sign_record(rec, tech, PASSWORD)


def trip_and_stroke_steps(plan):
    """Two measured steps of a plan: the transmitters' trip value around a set point of
    80 % (+/- 1) and the valves' closing time (at most 10 s)."""
    from register.models import TestStep

    trip = TestStep.objects.create(
        plan=plan, position=1, instruction="Raise the level signal until trip.",
        measured_quantity="Trip value", unit="%",
        criterion=choices.CriterionKind.AROUND_SETPOINT, target_value=80.0, tolerance=1.0)
    closing = TestStep.objects.create(
        plan=plan, position=2, instruction="Time the valve stroke.",
        measured_quantity="Closing time", unit="s",
        criterion=choices.CriterionKind.AT_MOST, limit=10.0)
    return trip, closing
