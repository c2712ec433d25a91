"""On a phone, a technician records a bypass (a bad duration is refused and nothing typed is
lost) and a demand on which a valve failed to act; at the desk the lead authorises the
bypass and finds the failure on the SIF page and in the findings list."""

import shutil

import pytest
from playwright.sync_api import expect

from register import choices
from register.models import Bypass, Component, Demand, Finding
from tests import factories as f
from tests.browser.pages import ARTIFACTS, DESK, PHONE, no_sideways_scroll, sign_in
from tests.conftest import need


@pytest.fixture
def plant(transactional_db):
    site = f.site("east")
    unit = f.unit(site, code="U20")
    sif = f.sif(unit, tag="U20-SIF-201")
    comps = list(Component.objects.filter(subsystem__sif=sif).order_by("subsystem__position"))
    Component.objects.filter(pk=comps[0].pk).update(tag="LT-201")
    Component.objects.filter(pk=comps[1].pk).update(tag="XV-201")
    f.sif(unit, tag="U20-SIF-305")  # noise in the search
    f.user("tech", site=site, role=choices.Role.TECHNICIAN)
    f.user("lead", site=site, role=choices.Role.LEAD)
    return {"sif": sif}


def shot(page, name):
    page.screenshot(path=str(ARTIFACTS / f"operations-{name}.png"), full_page=True)


@pytest.mark.browser
def test_bypass_and_failed_demand_from_the_phone_then_authorised_at_the_desk(
        plant, live_server, page):
    need(shutil.which("chromium") is not None, "Chromium not installed")
    ARTIFACTS.mkdir(exist_ok=True)
    base, sif = live_server.url, plant["sif"]
    page.set_viewport_size(PHONE)

    # The technician finds the SIF by a device tag and records a bypass of one device.
    sign_in(page, base, "tech", "/operations/")
    page.get_by_label("Find a SIF to record a bypass or a demand").fill("LT-201")
    page.get_by_role("button", name="Search").click()
    tiles = page.locator("#found .tile")
    expect(tiles).to_have_count(1)
    no_sideways_scroll(page)
    shot(page, "1-search-390")
    tiles.first.get_by_role("link", name="Record a bypass").click()
    page.get_by_label("LT-201 only (sensing, 1oo1)").check()
    page.get_by_label("Expected duration (hours)").fill("NaN")
    page.get_by_label("Reason", exact=True).fill("Replace the LT-201 electronics board")
    page.get_by_label("Compensating measures", exact=True).fill("Operator watches the local sight glass")
    page.get_by_role("button", name="Record the bypass and ask for authorisation").click()
    expect(page.locator("#form-errors")).to_contain_text("Nothing was lost")
    expect(page.locator("#id_authorised_hours-err")).to_contain_text("number of hours")
    expect(page.get_by_label("Reason", exact=True)).to_have_value("Replace the LT-201 electronics board")
    assert page.get_by_label("LT-201 only (sensing, 1oo1)").is_checked()
    no_sideways_scroll(page)
    shot(page, "2-bypass-refused-390")
    page.get_by_label("Expected duration (hours)").fill("1e9")
    page.get_by_role("button", name="Record the bypass and ask for authorisation").click()
    expect(page.locator("#id_authorised_hours-err")).to_contain_text("At most 720 h")
    assert not Bypass.objects.exists()
    page.get_by_label("Expected duration (hours)").fill("6")
    page.get_by_role("button", name="Record the bypass and ask for authorisation").click()
    page.wait_for_url("**/operations/bypasses/*/")
    expect(page.locator("#bypass-state")).to_contain_text("Awaiting authorisation")
    expect(page.locator("#authorise-form")).to_have_count(0)  # technicians do not authorise
    no_sideways_scroll(page)
    shot(page, "3-bypass-recorded-390")
    bypass = Bypass.objects.get()
    assert bypass.requested_by.username == "tech" and bypass.authorised_by is None

    # A real demand on which the valve failed to act.
    page.goto(f"{base}/operations/sifs/{sif.pk}/demand/")
    page.get_by_label("Real demand (the process called for the trip)").check()
    page.locator(".field-group", has_text="Did the SIF take").get_by_label("No").check()
    page.get_by_label("Cause", exact=True).select_option("process_upset")
    page.get_by_label("What happened, in a few words").fill("High level; XV-201 stayed open")
    page.locator(".field-group", has_text="LT-201 ·").get_by_label("Acted").check()
    page.get_by_role("button", name="Record", exact=True).click()
    expect(page.locator("#device-errors")).to_contain_text("name the device")
    expect(page.get_by_label("What happened, in a few words")).to_have_value(
        "High level; XV-201 stayed open")
    no_sideways_scroll(page)
    shot(page, "4-demand-refused-390")
    page.locator(".field-group", has_text="XV-201 ·").get_by_label("Failed to act").check()
    page.get_by_role("button", name="Record", exact=True).click()
    page.wait_for_url(f"**/sifs/{sif.pk}/*")
    expect(page.locator(".messages")).to_contain_text("1 finding opened")
    demand = Demand.objects.get()
    finding = Finding.objects.get(demand=demand)
    assert finding.component.tag == "XV-201" and finding.owner.username == "lead"
    page.locator("#demands").scroll_into_view_if_needed()
    shot(page, "5-sif-page-after-demand-390")

    # At the desk, the lead authorises the bypass.
    page.get_by_role("button", name="Sign out").click()
    page.set_viewport_size(DESK)
    sign_in(page, base, "lead", "/operations/")
    pending = page.locator("#open-bypasses [data-pending]")
    expect(pending).to_have_text("1 awaiting authorisation")
    expect(page.locator("#open-findings")).to_contain_text("XV-201")
    shot(page, "6-operations-1280")
    page.set_viewport_size(PHONE)
    no_sideways_scroll(page)
    shot(page, "6-operations-390")
    page.set_viewport_size(DESK)
    page.locator("#open-bypasses").get_by_role("link", name="U20-SIF-201").click()
    page.get_by_role("button", name="Authorise the bypass").click()
    expect(page.locator("#authorise-form .alert")).to_contain_text("Confirm")
    page.get_by_label("I have checked the reason").check()
    page.get_by_role("button", name="Authorise the bypass").click()
    expect(page.locator("#authorise-form .alert")).to_contain_text("Enter your password")
    page.get_by_label("I have checked the reason").check()
    page.get_by_label("Your password (asked again to authorise)").fill(f.PASSWORD)
    page.get_by_role("button", name="Authorise the bypass").click()
    expect(page.locator("#bypass-state")).to_contain_text("Authorised")
    expect(page.locator("[data-authoriser]")).to_contain_text("Lead")
    shot(page, "7-bypass-authorised-1280")
    bypass.refresh_from_db()
    assert bypass.authorised_by.username == "lead"

    # The SIF page: requester, authoriser, duration, ran over; the demand; the finding.
    page.goto(f"{base}/sifs/{sif.pk}/#bypasses")
    row = page.locator(f"tr[data-bypass='{bypass.pk}']")
    expect(row).to_contain_text("Tech")
    expect(row).to_contain_text("Lead")
    expect(row.locator("[data-ran-over]")).to_have_text("no")
    expect(page.locator(f"tr[data-demand='{demand.pk}']")).to_contain_text("failed to act")
    expect(page.locator(f"tr[data-finding='{finding.pk}']")).to_contain_text("Open")
    expect(page.locator("#observed-rates [data-rate='demand']")).to_contain_text(
        "1 real demand, 1 failed")
    page.locator("#operation").scroll_into_view_if_needed()
    shot(page, "8-sif-page-1280")
    page.set_viewport_size(PHONE)
    no_sideways_scroll(page)
    shot(page, "8-sif-page-390")

    # The findings list, and the finding with its follow-up form.
    page.goto(f"{base}/operations/findings/")
    expect(page.locator(f"tr[data-finding='{finding.pk}'] [data-age]")).to_have_text("0 d")
    no_sideways_scroll(page)
    shot(page, "9-findings-390")
    page.get_by_role("link", name="XV-201").click()
    page.get_by_label("Corrective work").fill("Solenoid valve replaced; stroke test to follow")
    page.get_by_role("button", name="Save the follow-up").click()
    expect(page.locator("#finding-facts")).to_contain_text("Solenoid valve replaced")
    no_sideways_scroll(page)
    shot(page, "10-finding-390")
    page.set_viewport_size(DESK)
    shot(page, "10-finding-1280")
    finding.refresh_from_db()
    assert finding.corrective_action == "Solenoid valve replaced; stroke test to follow"
