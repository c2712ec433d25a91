"""The pages that run scripts work under the site's Content-Security-Policy, with no
violation reported by the browser: the test entry page (htmx, the discard question), an
evidence pack that is still building (its progress script) and the API documentation."""

import shutil

import pytest
from playwright.sync_api import expect

from register import choices
from register.models import EvidencePack, TestPlan, TestRecord, TestStep
from tests import factories as f
from tests.browser.pages import PHONE, sign_in
from tests.conftest import need

# Recorded from the page itself (an init script is not bound by the page's policy), so a
# blocked script, style, image or frame is seen even when the browser logs nothing.
WATCH = """window.__csp = [];
document.addEventListener("securitypolicyviolation", function (e) {
  window.__csp.push(e.violatedDirective + " " + (e.blockedURI || "inline"));
});"""


class Watch:
    def __init__(self, page):
        self.page = page
        self.console = []
        page.add_init_script(WATCH)
        page.on("console", lambda m: self.console.append((m.type, m.text)))
        page.on("pageerror", lambda e: self.console.append(("pageerror", str(e))))

    def violations(self):
        in_page = self.page.evaluate("window.__csp || []")
        logged = [text for kind, text in self.console
                  if "Content Security Policy" in text or "Content-Security-Policy" in text]
        return in_page + logged

    def errors(self):
        return [(kind, text) for kind, text in self.console if kind in ("error", "pageerror")]

    def assert_clean(self):
        assert self.violations() == []
        assert self.errors() == []


@pytest.fixture
def plant(transactional_db):
    site = f.site("north")
    unit = f.unit(site, code="U10")
    sif = f.sif(unit, tag="U10-SIF-101")
    plan = TestPlan.objects.get(sif=sif)
    TestStep.objects.create(plan=plan, position=1, instruction="Raise the level until trip.",
                            measured_quantity="Trip value", unit="%",
                            criterion=choices.CriterionKind.AROUND_SETPOINT,
                            target_value=80.0, tolerance=1.0)
    f.user("tech", site=site, role=choices.Role.TECHNICIAN)
    f.user("lead", site=site, role=choices.Role.LEAD)
    return {"site": site, "sif": sif, "plan": plan}


@pytest.mark.browser
def test_entry_page_runs_htmx_and_its_question_without_violations(plant, live_server, page):
    need(shutil.which("chromium") is not None, "Chromium not installed")
    page.set_viewport_size(PHONE)
    watch = Watch(page)
    base = live_server.url
    sign_in(page, base, "tech", "/field/")
    page.goto(f"{base}/field/plans/{plant['plan'].pk}/start/")
    # htmx asks the server for its verdict as the value is typed.
    box = page.get_by_label("As found (%)").first
    box.fill("83.2")
    expect(page.locator("output.judge").first).to_have_text("Outside criterion")
    box.fill("80.3")
    expect(page.locator("output.judge").first).to_have_text("Within criterion")
    for radio in page.locator("input[name$='-as_found'][value='pass'], "
                              "input[name$='-as_left'][value='pass']").all():
        radio.check()
    page.get_by_role("button", name="Save draft").click()
    page.wait_for_load_state("load")
    expect(page.get_by_role("button", name="Discard this draft")).to_be_visible()
    record = TestRecord.objects.get(sif=plant["sif"])
    # The question comes from static/js/confirm.js: cancelled, nothing happens ...
    asked = []
    page.once("dialog", lambda d: (asked.append(d.message), d.dismiss()))
    page.get_by_role("button", name="Discard this draft").click()
    expect(page.get_by_role("button", name="Discard this draft")).to_be_visible()
    assert asked == ["Discard this draft and its entries?"]
    assert TestRecord.objects.filter(pk=record.pk).exists()
    watch.assert_clean()
    # ... accepted, the draft goes.
    page.once("dialog", lambda d: d.accept())
    page.get_by_role("button", name="Discard this draft").click()
    page.wait_for_url("**/field/")
    assert not TestRecord.objects.filter(pk=record.pk).exists()
    watch.assert_clean()


@pytest.mark.browser
def test_the_policy_is_enforced_and_a_violation_would_be_seen(plant, live_server, page):
    """The check above can fail: an inline script added to a page is refused and seen."""
    need(shutil.which("chromium") is not None, "Chromium not installed")
    watch = Watch(page)
    sign_in(page, live_server.url, "tech", "/field/")
    ran = page.evaluate("""() => { window.__ran = false;
        const s = document.createElement("script"); s.textContent = "window.__ran = true";
        document.body.appendChild(s); return window.__ran; }""")
    assert ran is False
    page.wait_for_function("window.__csp.length > 0")
    assert any(v.startswith("script-src") for v in watch.violations()), watch.violations()


@pytest.mark.browser
def test_building_pack_shows_its_progress_then_its_end(plant, live_server, page):
    need(shutil.which("chromium") is not None, "Chromium not installed")
    lead = plant["site"].memberships.get(role=choices.Role.LEAD).user
    pack = EvidencePack.objects.create(
        scope=EvidencePack.Scope.SITE, site=plant["site"], requested_by=lead,
        period_start="2025-01-01", period_end="2025-12-31",
        status=EvidencePack.Status.RUNNING, progress=10, stage="Reading the register")
    watch = Watch(page)
    url = f"/audit/packs/{pack.pk}/"
    sign_in(page, live_server.url, "lead", url)
    expect(page.locator("#pack-stage")).to_have_text("10 % Reading the register")
    EvidencePack.objects.filter(pk=pack.pk).update(progress=60, stage="Writing the records")
    expect(page.locator("#pack-stage")).to_have_text("60 % Writing the records", timeout=10_000)
    assert page.locator("#pack-progress").evaluate("el => el.value") == 60
    EvidencePack.objects.filter(pk=pack.pk).update(status=EvidencePack.Status.FAILED,
                                                   error="disk full")
    expect(page.get_by_role("alert")).to_contain_text("disk full", timeout=10_000)
    watch.assert_clean()


@pytest.mark.browser
def test_api_docs_render_without_violations(plant, live_server, page):
    need(shutil.which("chromium") is not None, "Chromium not installed")
    watch = Watch(page)
    sign_in(page, live_server.url, "lead", "/api/docs/")
    expect(page.locator(".swagger-ui .info .title")).to_contain_text("SIF Ledger API",
                                                                    timeout=15_000)
    expect(page.locator(".opblock").first).to_be_visible()
    watch.assert_clean()


@pytest.mark.browser
def test_sif_page_charts_load_under_the_policy(plant, live_server, page):
    """The charts are SVG files of the site itself: they need no data: images."""
    need(shutil.which("chromium") is not None, "Chromium not installed")
    watch = Watch(page)
    url = f"/sifs/{plant['sif'].pk}/"
    sign_in(page, live_server.url, "lead", url)
    charts = page.locator("figure.chart img")
    expect(charts).to_have_count(2)
    for chart in charts.all():
        chart.scroll_into_view_if_needed()
        page.wait_for_function("img => img.complete", arg=chart.element_handle())
        assert chart.evaluate("img => img.naturalWidth") > 0
    watch.assert_clean()
