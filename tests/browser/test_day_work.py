"""The day's work in the browser, end to end: a plan whose steps differ per device shows
each device only its own steps on a phone; a failed demand moves the SIF's achieved
figure; a bypass is closed by a person and its duration shows on the SIF page."""

import datetime as dt
import re
import shutil

import pytest
from django.utils import timezone
from playwright.sync_api import expect

from register import choices, services
from register.models import Bypass, Component, TestPlan, TestStep
from tests import factories as f
from tests.browser.pages import ARTIFACTS, DESK, PHONE, sign_in
from tests.conftest import need


@pytest.fixture
def plant(transactional_db):
    site = f.site("west")
    unit = f.unit(site, code="U40")
    sif = f.sif(unit, tag="U40-SIF-401", in_service=dt.date(2023, 1, 1))
    comps = list(Component.objects.filter(subsystem__sif=sif).order_by("subsystem__position"))
    Component.objects.filter(pk=comps[0].pk).update(tag="LT-401")
    Component.objects.filter(pk=comps[1].pk).update(tag="XV-401")
    plan = TestPlan.objects.get(sif=sif)
    TestStep.objects.create(plan=plan, position=1, instruction="Raise the level until trip.",
                            measured_quantity="Trip value", unit="%",
                            criterion=choices.CriterionKind.AROUND_SETPOINT,
                            target_value=80.0, tolerance=1.0,
                            applies_to_role=choices.SubsystemRole.SENSING)
    TestStep.objects.create(plan=plan, position=2, instruction="Time the valve stroke.",
                            measured_quantity="Closing time", unit="s",
                            criterion=choices.CriterionKind.AT_MOST, limit=10.0,
                            applies_to_role=choices.SubsystemRole.FINAL)
    tech = f.user("tech", site=site, role=choices.Role.TECHNICIAN)
    lead = f.user("lead", site=site, role=choices.Role.LEAD)
    f.full_test(sif, tech, timezone.now() - dt.timedelta(days=60))
    return {"sif": sif, "plan": plan, "tech": tech, "lead": lead}


def shot(page, name):
    ARTIFACTS.mkdir(exist_ok=True)
    page.screenshot(path=str(ARTIFACTS / f"day-{name}.png"), full_page=True)


def achieved(page, base, sif) -> float:
    page.goto(f"{base}/sifs/{sif.pk}/")
    text = page.locator("[data-field='achieved_pfd_avg']").first.inner_text()
    return float(re.search(r"[0-9.]+e[-+][0-9]+", text)[0])


@pytest.mark.browser
def test_each_device_shows_only_its_own_steps_on_a_phone(plant, live_server, page):
    need(shutil.which("chromium") is not None, "Chromium not installed")
    page.set_viewport_size(PHONE)
    base = live_server.url
    sign_in(page, base, "tech", "/field/")
    page.goto(f"{base}/field/plans/{plant['plan'].pk}/start/")
    sensor = page.locator("fieldset.device", has_text="LT-401")
    valve = page.locator("fieldset.device", has_text="XV-401")
    expect(sensor.locator(".measure")).to_have_count(1)
    expect(sensor).to_contain_text("Trip value")
    expect(sensor).not_to_contain_text("Closing time")
    expect(valve.locator(".measure")).to_have_count(1)
    expect(valve).to_contain_text("Closing time")
    expect(valve).not_to_contain_text("Trip value")
    shot(page, "steps-per-device-390")


@pytest.mark.browser
def test_a_failed_demand_moves_the_achieved_figure_and_a_bypass_is_closed(
        plant, live_server, page):
    need(shutil.which("chromium") is not None, "Chromium not installed")
    base, sif = live_server.url, plant["sif"]
    page.set_viewport_size(DESK)
    sign_in(page, base, "lead", f"/sifs/{sif.pk}/")
    before = achieved(page, base, sif)

    # The valve failed to act on a real demand, logged from the phone.
    page.get_by_role("button", name="Sign out").click()
    page.set_viewport_size(PHONE)
    sign_in(page, base, "tech", f"/operations/sifs/{sif.pk}/demand/")
    page.get_by_label("Real demand (the process called for the trip)").check()
    page.locator(".field-group", has_text="Did the SIF take").get_by_label("No").check()
    page.get_by_label("Cause", exact=True).select_option("process_upset")
    page.get_by_label("What happened, in a few words").fill("High level; XV-401 stayed open")
    page.locator(".field-group", has_text="LT-401 ·").get_by_label("Acted").check()
    page.locator(".field-group", has_text="XV-401 ·").get_by_label("Failed to act").check()
    page.get_by_role("button", name="Record", exact=True).click()
    page.wait_for_url(f"**/sifs/{sif.pk}/*")
    expect(page.locator(".messages")).to_contain_text("1 finding opened")
    after = achieved(page, base, sif)
    assert after > before  # a failure revealed by a demand makes the figure worse

    # A bypass of the valve, authorised by the lead, closed by the technician.
    bypass = services.open_bypass(
        user=plant["tech"], sif=sif, started_at=timezone.now() - dt.timedelta(hours=5),
        authorised_hours=4, reason="XV-401 solenoid replaced",
        component=Component.objects.get(tag="XV-401"))
    services.authorise_bypass(bypass, plant["lead"], f.PASSWORD)
    page.goto(f"{base}/operations/bypasses/{bypass.pk}/")
    page.get_by_role("button", name="Record the removal").click()
    expect(page.locator("#bypass-state")).to_contain_text("ran over")
    shot(page, "bypass-closed-390")
    bypass = Bypass.objects.get(pk=bypass.pk)
    assert bypass.ended_at is not None and bypass.closed_by.username == "tech"
    page.set_viewport_size(DESK)
    page.goto(f"{base}/sifs/{sif.pk}/#bypasses")
    row = page.locator(f"tr[data-bypass='{bypass.pk}']")
    expect(row.locator("[data-ran-over]")).to_have_text("yes")
    shot(page, "sif-page-after-1280")
    assert achieved(page, base, sif) > after  # five more hours without the valve
