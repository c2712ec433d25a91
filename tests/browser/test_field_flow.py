"""A technician records a proof test on a phone-sized screen; a verifier countersigns."""

import shutil
from pathlib import Path

import pytest
from playwright.sync_api import expect

from register import choices
from register.models import Component, SafetyFunction, TestPlan, TestRecord, TestStep
from tests import factories as f
from tests.conftest import need

ARTIFACTS = Path(__file__).resolve().parents[2] / "test-artifacts"


@pytest.fixture
def plant(transactional_db):
    site = f.site("north")
    unit = f.unit(site, code="U10")
    sif = f.sif(unit, tag="U10-SIF-101")
    SafetyFunction.objects.filter(pk=sif.pk).update(required_response_time_s=8.0)
    comps = list(Component.objects.filter(subsystem__sif=sif).order_by("subsystem__position"))
    Component.objects.filter(pk=comps[0].pk).update(tag="LT-101A")
    Component.objects.filter(pk=comps[1].pk).update(tag="XV-101")
    plan = TestPlan.objects.get(sif=sif)
    TestStep.objects.create(plan=plan, position=1, instruction="Raise the level until trip.",
                            measured_quantity="Trip value", unit="%",
                            criterion=choices.CriterionKind.AROUND_SETPOINT,
                            target_value=80.0, tolerance=1.0)
    TestStep.objects.create(plan=plan, position=2, instruction="Time the valve stroke.",
                            measured_quantity="Closing time", unit="s",
                            criterion=choices.CriterionKind.AT_MOST, limit=10.0)
    other = f.sif(unit, tag="U10-SIF-205")  # noise in the list
    from django.utils import timezone

    from register.schedule.due import refresh_plans
    refresh_plans(TestPlan.objects.all(), timezone.localdate())
    f.user("tech", site=site, role=choices.Role.TECHNICIAN)
    f.user("verifier", site=site, role=choices.Role.VERIFIER)
    return {"sif": sif, "plan": plan, "other": other}


def sign_in(page, base, username):
    page.goto(f"{base}/accounts/login/?next=/field/")
    page.get_by_label("User name").fill(username)
    page.get_by_label("Password").fill(f.PASSWORD)
    page.get_by_role("button", name="Sign in").click()


@pytest.mark.browser
def test_technician_records_failing_test_and_verifier_countersigns(plant, live_server, page):
    need(shutil.which("chromium") is not None, "Chromium not installed")
    ARTIFACTS.mkdir(exist_ok=True)
    page.set_viewport_size({"width": 390, "height": 844})
    base = live_server.url
    plan = TestPlan.objects.get(pk=plant["plan"].pk)
    due_before, state_before = plan.next_due_on, _state(plan)
    assert state_before in (choices.PlanState.OVERDUE, choices.PlanState.ESCALATED,
                            choices.PlanState.ESCALATED_2)

    sign_in(page, base, "tech")
    page.get_by_label("Find a test").fill("101A")
    page.get_by_role("button", name="Search").click()
    page.wait_for_url("**/field/?q=101A*")
    tiles = page.locator(".plan-row")
    expect(tiles).to_have_count(1)
    assert "LT-101A" in tiles.first.inner_text()
    page.screenshot(path=str(ARTIFACTS / "field-1-worklist.png"), full_page=True)
    tiles.first.get_by_role("link", name="Record test").click()

    page.get_by_label("Full proof test").check()
    lt = page.locator("fieldset.device", has_text="LT-101A")
    lt.get_by_label("As found (%)").fill("83.2")
    expect(lt.locator("output.judge").first).to_have_text("Outside criterion")
    # The out-of-tolerance value proposes a failed as-found verdict.
    assert lt.locator("input[name$='-as_found'][value='fail']").is_checked()
    # ... and a dangerous undetected failure, so the first sign attempt is not refused for
    # a missing failure mode (the server's judgement, shown through htmx).
    assert lt.get_by_label("Dangerous, undetected (found by this test)").is_checked()
    # The transmitter is asked for its trip value only, not for the valve's closing time.
    expect(lt.get_by_label("As found (s)")).to_have_count(0)
    # On the tolerance boundary (80 ± 1 %) the server judges within.
    lt.get_by_label("As left (%)").fill("81")
    expect(lt.locator("output.judge").nth(1)).to_have_text("Within criterion")
    lt.get_by_label("As left (%)").fill("80.2")
    lt.locator("label.choice", has_text="Pass").nth(1).click()  # as left
    lt.get_by_label("Dangerous, undetected (found by this test)").check()
    lt.get_by_label("Failure description").fill("Trip 3.2 % high as found (drift).")
    lt.get_by_label("Work done").fill("Transmitter recalibrated, trip re-checked.")
    for device in page.locator("fieldset.device").all():
        if "LT-101A" in device.inner_text():
            continue
        device.locator("input[name$='-as_found'][value='pass']").check()
        device.locator("input[name$='-as_left'][value='pass']").check()
    xv = page.locator("fieldset.device", has_text="XV-101")
    expect(xv.get_by_label("As found (%)")).to_have_count(0)
    closing = xv.get_by_label("As found (s)")
    closing.fill("6.4")
    judged = page.locator(f"#{closing.get_attribute('id')}-judge")
    expect(judged).to_have_text("Within criterion")
    page.screenshot(path=str(ARTIFACTS / "field-2-entry.png"), full_page=True)
    page.get_by_label("Your password").fill(f.PASSWORD)
    page.get_by_role("button", name="Save and sign").click()
    page.wait_for_url("**/field/records/*/")
    page.screenshot(path=str(ARTIFACTS / "field-3-signed.png"), full_page=True)
    expect(page.locator("#record-status")).to_contain_text("Signed, awaiting verifier")

    plan.refresh_from_db()
    assert plan.next_due_on != due_before and _state(plan) != state_before
    assert plan.next_due_on.isoformat() in page.locator("#next-due").inner_text()
    assert "Not yet due" in page.locator("#plan-status").inner_text()
    assert "Achieved PFDavg" in page.locator("#achieved").inner_text()

    page.get_by_role("button", name="Sign out").click()
    sign_in(page, base, "verifier")
    page.wait_for_url("**/field/verify/")
    page.get_by_role("link", name="Review U10-SIF-101").click()
    page.get_by_label("Your password").fill(f.PASSWORD)
    page.get_by_role("button", name="Countersign").click()
    expect(page.locator("#record-status")).to_contain_text("Signed and verified")
    assert "Achieved PFDavg" in page.locator("#achieved").inner_text()
    page.screenshot(path=str(ARTIFACTS / "field-4-verified.png"), full_page=True)
    record = TestRecord.objects.get(sif=plant["sif"])
    assert record.status == choices.RecordStatus.VERIFIED


def _state(plan):
    from register.models import TestPlan
    from register.schedule.due import with_state

    return with_state(TestPlan.objects.filter(pk=plan.pk)).get().state


@pytest.mark.browser
def test_accepting_the_proposed_failure_signs_at_the_first_attempt(plant, live_server, page):
    """A value outside its criterion: the server's live verdict fills in the failure it
    implies (fail, dangerous undetected, a description from the step and value) and the
    technician, accepting it, signs at the first attempt."""
    need(shutil.which("chromium") is not None, "Chromium not installed")
    page.set_viewport_size({"width": 390, "height": 844})
    sign_in(page, live_server.url, "tech")
    page.goto(f"{live_server.url}/field/plans/{plant['plan'].pk}/start/")
    lt = page.locator("fieldset.device", has_text="LT-101A")
    xv = page.locator("fieldset.device", has_text="XV-101")
    # Nothing failed yet: the failure sections are shut, so the page stays short.
    expect(lt.locator("details.failure-section")).not_to_have_attribute("open", "")
    expect(lt.get_by_label("Failure description")).to_be_hidden()
    lt.get_by_label("As found (%)").fill("82.6")
    text = "Trip value as found: 82.6 % is 2.6 % above 80 %, more than the ± 1 % allowed."
    expect(lt.get_by_label("Failure description")).to_have_value(text)
    expect(lt.get_by_label("Failure description")).to_be_visible()
    assert lt.locator("input[name$='-as_found'][value='fail']").is_checked()
    assert lt.get_by_label("Dangerous, undetected (found by this test)").is_checked()
    lt.locator("label.choice", has_text="Pass").nth(1).click()  # as left
    for device in (xv, page.locator("fieldset.device").filter(has_not_text="LT-101A")):
        for radio in device.locator("input[name$='-as_found'][value='pass'], "
                                    "input[name$='-as_left'][value='pass']").all():
            radio.check()
    expect(xv.locator("details.failure-section")).not_to_have_attribute("open", "")
    page.screenshot(path=str(ARTIFACTS / "field-5-proposed-failure.png"), full_page=True)
    page.get_by_label("Your password").fill(f.PASSWORD)
    page.get_by_role("button", name="Save and sign").click()
    page.wait_for_url("**/field/records/*/")
    expect(page.locator("#record-status")).to_contain_text("Signed, awaiting verifier")
    result = TestRecord.objects.get(sif=plant["sif"]).results.get(component__tag="LT-101A")
    assert (result.as_found, result.as_left, result.failure_mode, result.failure_description) \
        == ("fail", "pass", "du", text)
