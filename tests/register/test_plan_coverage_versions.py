"""A plan's coverage is versioned in time like its interval and scope: a test reveals the
coverage of the plan version in force on its day (capped by the device's own), the design
figure uses the plan's coverage now, and a later change of coverage leaves every past test,
and so every past figure, as it was."""

import datetime as dt

import pytest
from django.utils import timezone

from calcs.adapter import evaluate_design, load, recompute_many
from register import choices, services
from register.models import Component, SafetyFunction, TestPlan
from tests import factories as f

pytestmark = pytest.mark.django_db

HOURS_PER_YEAR = 8760.0  # common practice, no source


@pytest.fixture
def world():
    s = f.site()
    u = f.unit(s)
    return {"site": s, "unit": u,
            "tech": f.user("tech", site=s, role=choices.Role.TECHNICIAN),
            "lead": f.user("lead", site=s, role=choices.Role.LEAD)}


def _change_coverage(plan, lead, coverage):
    services.update_design(plan, lead, reason="procedure revised", reference="CR-77",
                           changes={"coverage": coverage})


def _achieved(sif, as_of):
    (a,) = recompute_many(SafetyFunction.objects.filter(pk=sif.pk), trigger="test",
                          as_of=as_of)
    return a.achieved_pfd_avg


def _coverages(sif):
    (d,) = load(SafetyFunction.objects.filter(pk=sif.pk))
    return sorted({(e.at, e.plan_coverage) for cd in d.all_components() for e in cd.events})


def test_the_design_figure_uses_the_lesser_of_plan_and_device_coverage(world):
    sif = f.sif(world["unit"], interval_months=12)
    plan = TestPlan.objects.get(sif=sif)
    plan.coverage = 0.6
    plan.save()
    (d,) = load(SafetyFunction.objects.filter(pk=sif.pk))
    result = evaluate_design(d)
    for sub, comp in zip(result.subsystems, (Component.objects.get(subsystem__sif=sif,
                                                                    subsystem__role=r)
                                             for r in ("sensing", "final")), strict=True):
        lam, c = comp.lambda_du, min(0.6, comp.proof_test_coverage)
        t1, mt = HOURS_PER_YEAR, comp.mission_time_years * HOURS_PER_YEAR
        # 1oo1 with imperfect proof testing: lambda_DU (C T1/2 + (1 - C) MT/2)
        # (IEC 61508-6:2010 B.3.2.2 with ISA-TR84.00.02-2015 proof-test coverage term;
        # repair time terms are three orders smaller here)
        expected = lam * (c * t1 / 2 + (1 - c) * mt / 2)
        assert sub.pfd_avg == pytest.approx(expected, rel=0.02)


def test_a_later_change_of_coverage_leaves_past_tests_and_figures_as_they_were(world):
    tech, lead = world["tech"], world["lead"]
    now = timezone.now()
    sif = f.sif(world["unit"], in_service=dt.date(2021, 1, 1))
    for years_ago in (3, 2, 1):
        f.full_test(sif, tech, now - dt.timedelta(days=365 * years_ago))
    plan = TestPlan.objects.get(sif=sif)
    before = _achieved(sif, now)
    _change_coverage(plan, lead, 0.5)
    plan.refresh_from_db()
    assert plan.effective_from == timezone.localdate()
    assert {cov for _, cov in _coverages(sif)} == {1.0}  # the past tests keep theirs
    assert _achieved(sif, now) == pytest.approx(before, rel=1e-12)


def test_a_test_after_the_change_reveals_only_the_new_coverage(world):
    tech, lead = world["tech"], world["lead"]
    now = timezone.now()
    figures = {}
    for coverage in (1.0, 0.5):
        sif = f.sif(world["unit"], in_service=dt.date(2021, 1, 1))
        f.full_test(sif, tech, now - dt.timedelta(days=700))
        plan = TestPlan.objects.get(sif=sif)
        if coverage != 1.0:
            _change_coverage(plan, lead, coverage)
        f.full_test(sif, tech, now - dt.timedelta(minutes=5))
        seen = _coverages(sif)
        assert [cov for _, cov in seen] == [1.0, coverage]
        figures[coverage] = _achieved(sif, now + dt.timedelta(days=200))
    # half of lambda_DU keeps its age since the test 700 days ago: the figure is worse
    assert figures[0.5] > figures[1.0] * 1.5


def test_the_plan_change_page_previews_and_saves_a_coverage_change(client, world):
    import html as html_lib
    import re

    from django.urls import reverse

    sif = f.sif(world["unit"])
    plan = TestPlan.objects.get(sif=sif)
    url = reverse("register:edit_design", args=["plan", plan.pk])
    client.force_login(world["lead"])
    (d,) = load(SafetyFunction.objects.filter(pk=sif.pk))
    before = evaluate_design(d).pfd_avg
    post = {"interval_months": 12, "coverage": 0.7, "reason": "Stroke check dropped",
            "reference": "CR-88"}
    page = client.post(url, {**post, "action": "preview"}).content.decode()
    plan.refresh_from_db()
    assert plan.coverage == 1.0  # a preview changes nothing
    after = float(re.search(r'id="design-after">([^<]+)<', page).group(1))
    assert after > before * 2  # 30 % of lambda_DU now waits for the mission time
    fingerprint = html_lib.unescape(re.search(r'name="previewed" value="([^"]+)"',
                                              page).group(1))
    resp = client.post(url, {**post, "action": "save", "previewed": fingerprint})
    assert resp.status_code == 302
    plan.refresh_from_db()
    assert (plan.coverage, plan.effective_from) == (0.7, timezone.localdate())
