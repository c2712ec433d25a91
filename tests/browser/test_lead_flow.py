"""The lead narrows the register to overdue SIL 2 SIFs, opens one, reads its charts and
lengthens a proof-test interval under change control, seeing the design PFDavg change."""

import datetime as dt
import shutil
from pathlib import Path

import pytest
from django.utils import timezone

from calcs import adapter
from register import choices
from register.models import SafetyFunction, TestPlan
from register.schedule.due import refresh_plans
from tests import factories as f
from tests.conftest import need

ARTIFACTS = Path(__file__).resolve().parents[2] / "test-artifacts"


@pytest.fixture
def plant(transactional_db):
    site = f.site("west")
    unit = f.unit(site, code="U20")
    today = timezone.localdate()
    late = f.sif(unit, tag="U20-SIF-301", target_pfd=9e-3,
                 in_service=today - dt.timedelta(days=400))
    f.sif(unit, tag="U20-SIF-302", target_pfd=9e-3, in_service=today - dt.timedelta(days=100))
    f.sif(unit, tag="U20-SIF-303", target_sil=1, target_pfd=0.05,
          in_service=today - dt.timedelta(days=500))
    f.scenario(site, ref="HZ-301")
    late.scenarios.add(f.scenario(site, ref="HZ-302", tolerable=1e-5, causes=(0.1,),
                                  layers=(0.1,)))
    refresh_plans(TestPlan.objects.all(), today)
    adapter.recompute_many(SafetyFunction.objects.all(), trigger="test")
    f.user("lead", site=site, role=choices.Role.LEAD)
    return {"late": late}


def shot(page, name, width):
    page.set_viewport_size({"width": width, "height": 900})
    page.screenshot(path=str(ARTIFACTS / f"lead-{name}-{width}.png"), full_page=True)


@pytest.mark.browser
def test_lead_filters_opens_and_changes_a_test_interval(plant, live_server, page):
    need(shutil.which("chromium") is not None, "Chromium not installed")
    ARTIFACTS.mkdir(exist_ok=True)
    base = live_server.url
    page.set_viewport_size({"width": 1280, "height": 900})
    page.goto(f"{base}/accounts/login/")
    page.get_by_label("User name").fill("lead")
    page.get_by_label("Password").fill(f.PASSWORD)
    page.get_by_role("button", name="Sign in").click()
    page.wait_for_url(f"{base}/")
    shot(page, "overview", 1280)
    shot(page, "overview", 820)
    page.set_viewport_size({"width": 1280, "height": 900})

    page.get_by_role("link", name="SIF register").click()
    page.get_by_label("Target sil").select_option("2")
    page.get_by_label("Overdue test").select_option("true")
    page.get_by_role("button", name="Apply").click()
    rows = page.locator("table.register tbody tr")
    assert rows.count() == 1
    assert "U20-SIF-301" in rows.first.inner_text()
    shot(page, "list", 1280)
    shot(page, "list", 820)
    page.set_viewport_size({"width": 1280, "height": 900})

    page.get_by_role("link", name="U20-SIF-301").click()
    chart = page.locator("img[src$='/chart/pfd.svg']")
    chart.scroll_into_view_if_needed()
    page.wait_for_function("img => img.naturalWidth > 0", arg=chart.element_handle())
    assert page.get_by_text("required SIF PFDavg = tolerable / frequency without the SIF"
                            ).first.is_visible()
    shot(page, "sif", 1280)
    shot(page, "sif", 820)
    page.set_viewport_size({"width": 1280, "height": 900})

    page.get_by_role("link", name="Change interval").click()
    before = page.locator("#design-before").inner_text()
    page.get_by_label("Interval (months)").fill("36")
    page.get_by_label("Reason for the change").fill("Run length extended to three years")
    page.get_by_label("Change request reference").fill("CR-2026-031")
    page.get_by_role("button", name="Show the effect").click()
    after = page.locator("#design-after").inner_text()
    assert float(after) > 2 * float(before)
    shot(page, "edit", 1280)
    shot(page, "edit", 820)
    page.set_viewport_size({"width": 1280, "height": 900})
    page.get_by_role("button", name="Save change").click()
    page.wait_for_url("**/sifs/*/#design")
    message = page.locator(".messages").inner_text()
    assert f"{before} → {after}" in message
    assert page.get_by_text("[CR-2026-031] Run length extended to three years").is_visible()
    assert TestPlan.objects.get(sif=plant["late"]).interval_months == 36
