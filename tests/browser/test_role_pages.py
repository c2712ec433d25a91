"""In Chromium, at phone width: a technician signs in, lands on his tests, sees only his
menu, and a page he may not open explains why and leads back."""

import shutil

import pytest
from playwright.sync_api import expect

from register import choices
from tests import factories as f
from tests.browser.pages import ARTIFACTS
from tests.conftest import need


@pytest.fixture
def plant(transactional_db):
    site = f.site("south")
    f.sif(f.unit(site, code="U60"), tag="U60-SIF-601")
    f.user("tech", site=site, role=choices.Role.TECHNICIAN)


@pytest.mark.browser
def test_a_technician_lands_on_his_tests_and_a_refusal_says_why(plant, live_server, page):
    need(shutil.which("chromium") is not None, "Chromium not installed")
    ARTIFACTS.mkdir(exist_ok=True)
    page.set_viewport_size({"width": 390, "height": 844})
    base = live_server.url
    page.goto(f"{base}/accounts/login/")
    page.get_by_label("User name").fill("tech")
    page.get_by_label("Password").fill(f.PASSWORD)
    page.get_by_role("button", name="Sign in").click()
    page.wait_for_url(f"{base}/field/")
    nav = page.get_by_role("navigation", name="Main")
    expect(nav.get_by_role("link", name="My tests")).to_be_visible()
    expect(nav.get_by_role("link", name="Operations")).to_be_visible()
    for absent in ("To countersign", "Evidence", "Import", "Chain check"):
        expect(nav.get_by_role("link", name=absent)).to_have_count(0)
    assert page.evaluate("document.documentElement.scrollWidth") <= 390
    page.screenshot(path=str(ARTIFACTS / "roles-tech-landing-390.png"), full_page=True)

    page.goto(f"{base}/import/")
    expect(page.get_by_role("heading", name="This page is not open to you")).to_be_visible()
    expect(page.locator("#reason")).to_have_text(
        "Only a functional-safety lead imports into the register.")
    page.screenshot(path=str(ARTIFACTS / "roles-tech-403-390.png"), full_page=True)
    page.get_by_role("link", name="Back to your start page").click()
    page.wait_for_url(f"{base}/field/")
