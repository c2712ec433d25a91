"""The lead's pages: overview figures and their links, the register list, the SIF page,
design changes under change control, deferral decisions, rights."""

from __future__ import annotations

import datetime as dt
import re

import pytest
from django.db import connection
from django.test.utils import CaptureQueriesContext
from django.urls import reverse
from django.utils import timezone

from calcs import adapter
from calcs.engine import design as eng_design
from register import choices, services
from register.models import Component, SafetyFunction, Subsystem, TestPlan
from register.schedule import services as schedule_services
from register.schedule.due import refresh_plans
from tests import factories as f

pytestmark = pytest.mark.django_db
TODAY = timezone.localdate()


def _ago(days: int) -> dt.date:
    return TODAY - dt.timedelta(days=days)


def _refresh(site):
    refresh_plans(TestPlan.objects.filter(sif__unit__site=site), TODAY)
    adapter.recompute_many(SafetyFunction.objects.filter(unit__site=site), trigger="test")


@pytest.fixture
def plant():
    site = f.site("north")
    u1, u2 = f.unit(site, "A1"), f.unit(site, "B2")
    lead = f.user("lead", site=site, role=choices.Role.LEAD)
    tech = f.user("tech", site=site, role=choices.Role.TECHNICIAN)
    auditor = f.user("auditor", site=site, role=choices.Role.AUDITOR)
    # 12-month plans. Overdue by 10 days; due in about 15 days; not due for half a year;
    # in unit B2 one SIF that cannot meet its target (high λDU) and is SIL 1.
    overdue = f.sif(u1, tag="S-OVER", in_service=_ago(365 + 10), target_sil=2,
                    target_pfd=9e-3)
    soon = f.sif(u1, tag="S-SOON", in_service=_ago(365 - 15), target_sil=2, target_pfd=9e-3)
    fine = f.sif(u1, tag="S-FINE", in_service=_ago(180), target_sil=1, target_pfd=0.05)
    weak = f.sif(u2, tag="S-WEAK", in_service=_ago(300), target_sil=1, target_pfd=0.05,
                 lambda_du=5e-5)
    other_site = f.site("south")
    other_unit = f.unit(other_site, "A1")
    foreign = f.sif(other_unit, tag="S-FOREIGN", in_service=_ago(400))
    other_lead = f.user("otherlead", site=other_site, role=choices.Role.LEAD)
    _refresh(site)
    _refresh(other_site)
    return {"site": site, "u1": u1, "u2": u2, "lead": lead, "tech": tech, "auditor": auditor,
                "overdue": overdue, "soon": soon, "fine": fine, "weak": weak, "foreign": foreign,
                "other_lead": other_lead}


def _list_tags(client, url):
    html = client.get(url).content.decode()
    return set(re.findall(r'<a href="/sifs/\d+/">([^<]+)</a>', html)), html


def test_overview_numbers_link_to_the_lists_behind_them(client, plant):
    client.force_login(plant["lead"])
    html = client.get("/").content.decode()
    assert "Caution:" in html
    links = re.findall(r'<a (?:class="[^"]*" )?href="(/sifs/\?[^"]+)">(?:<span class="big">)?'
                       r'(\d+)(?=<)', html)
    assert len(links) > 20
    checked = 0
    for href, number in links:
        href = href.replace("&amp;", "&")
        tags, page = _list_tags(client, href)
        shown = int(re.search(r"<strong>(\d+)</strong> SIF", page).group(1))
        assert shown == int(number) == len(tags), href
        checked += 1
    assert checked == len(links)
    # The specific figures: one overdue in A1, one due soon, one failing target in B2.
    a1 = plant["u1"].pk
    assert f'href="/sifs/?unit={a1}&amp;plan_state=overdue">1<' in html
    assert f'href="/sifs/?unit={a1}&amp;plan_state=due_soon">1<' in html
    b2 = plant["u2"].pk
    assert f'href="/sifs/?unit={b2}&amp;meets=no">1<' in html
    assert _list_tags(client, f"/sifs/?unit={a1}&plan_state=overdue")[0] == {"S-OVER"}
    assert _list_tags(client, f"/sifs/?unit={b2}&meets=no")[0] == {"S-WEAK"}
    assert "S-FOREIGN" not in html
    # The on-time rate (a percentage) links to the SIFs with a late or missed test.
    assert f'href="/sifs/?unit={a1}&amp;late_12m=true">0 %<' in html
    assert _list_tags(client, f"/sifs/?unit={a1}&late_12m=true")[0] == {"S-OVER"}


def test_overview_counts_open_bypass_and_pending_deferral(client, plant):
    services.open_bypass(user=plant["tech"], sif=plant["fine"], authorised_hours=8,
                         started_at=timezone.now() - dt.timedelta(hours=30), reason="valve work")
    plan = plant["overdue"].plans.get()
    schedule_services.request_deferral(user=plant["tech"], plan=plan,
                              proposed_on=TODAY + dt.timedelta(days=20), reason="turnaround")
    client.force_login(plant["lead"])
    html = client.get("/").content.decode()
    a1 = plant["u1"].pk
    assert f'href="/sifs/?unit={a1}&amp;open_bypass=true">1<' in html
    assert "longest 30 h" in html
    assert f'href="/sifs/?unit={a1}&amp;pending_deferral=true">1<' in html
    assert _list_tags(client, f"/sifs/?unit={a1}&open_bypass=true")[0] == {"S-FINE"}
    assert _list_tags(client, "/sifs/?pending_deferral=true")[0] == {"S-OVER"}


def test_on_time_rate_counts_late_and_missed_due_dates(plant):
    from register.lead.views import on_time_rate

    # S-OVER: due 10 days ago, no test: one due date in the period, late.
    # S-SOON, S-FINE, S-WEAK: not yet due: nothing in the period.
    plans = TestPlan.objects.filter(sif__unit__site=plant["site"])
    rate = on_time_rate(plans, TODAY)
    assert (rate.due, rate.on_time) == (1, 0)
    assert rate.late_sif_ids == {plant["overdue"].pk}
    # A test done 5 days late answers that due date late; the next one is a year away.
    result = services.ResultInput(component=Component.objects.filter(
        subsystem__sif=plant["overdue"]).first(), as_found="pass", as_left="pass")
    rec = services.save_draft(user=plant["tech"], sif=plant["overdue"], kind="full",
                              performed_at=timezone.now() - dt.timedelta(days=5),
                              results=[result], plan=plant["overdue"].plans.get())
    services.sign_record(rec, plant["tech"], None, check_password=False)
    rate = on_time_rate(plans, TODAY)
    assert (rate.due, rate.on_time) == (1, 0)


def test_list_filters_and_search(client, plant):
    client.force_login(plant["lead"])
    assert _list_tags(client, "/sifs/")[0] == {"S-OVER", "S-SOON", "S-FINE", "S-WEAK"}
    assert _list_tags(client, "/sifs/?target_sil=2")[0] == {"S-OVER", "S-SOON"}
    assert _list_tags(client, "/sifs/?target_sil=2&overdue=true")[0] == {"S-OVER"}
    assert _list_tags(client, "/sifs/?overdue=false")[0] == {"S-SOON", "S-FINE", "S-WEAK"}
    assert _list_tags(client, "/sifs/?meets=no")[0] == {"S-WEAK"}
    assert _list_tags(client, "/sifs/?meets=yes")[0] == {"S-OVER", "S-SOON", "S-FINE"}
    assert _list_tags(client, "/sifs/?target_sil=1&life_stage=in_service")[0] == {
        "S-FINE", "S-WEAK"}
    assert _list_tags(client, f"/sifs/?unit={plant['u2'].pk}")[0] == {"S-WEAK"}
    # Search by component tag (factory tags components LT-<sif tag>-A, XV-<sif tag>-A).
    assert _list_tags(client, "/sifs/?q=XV-S-FINE")[0] == {"S-FINE"}
    dtype = Component.objects.get(tag="LT-S-SOON-A").device_type
    assert _list_tags(client, f"/sifs/?device_type={dtype.pk}")[0] == {"S-SOON"}
    _tags, html = _list_tags(client, "/sifs/?sort=-tag")
    order = re.findall(r'<a href="/sifs/\d+/">([^<]+)</a>', html)
    assert order == sorted(order, reverse=True)


def test_list_export_follows_the_filter(client, plant):
    client.force_login(plant["auditor"])
    body = b"".join(client.get("/sifs/export.csv?target_sil=2").streaming_content
                    ).decode("utf-8-sig")
    sif_rows = [line for line in body.splitlines() if line.startswith("sif,")]
    assert {line.split(",")[2] for line in sif_rows} == {"S-OVER", "S-SOON"}
    resp = client.get("/sifs/export.xlsx?target_sil=2")
    assert resp.status_code == 200 and b"".join(resp.streaming_content)[:2] == b"PK"


def test_technicians_do_not_export(client, plant):
    client.force_login(plant["tech"])
    assert client.get("/sifs/export.csv").status_code == 403
    assert client.get("/sifs/").status_code == 200
    assert "Export this list" not in client.get("/sifs/").content.decode()


def _page_queries(client, url):
    with CaptureQueriesContext(connection) as ctx:
        assert client.get(url).status_code == 200
    return len(ctx.captured_queries)


def test_list_query_count_does_not_grow_with_sifs(client):
    site = f.site()
    u = f.unit(site)
    lead = f.user(site=site, role=choices.Role.LEAD)
    for _ in range(5):
        f.sif(u)
    _refresh(site)
    client.force_login(lead)
    url = "/sifs/?sort=-achieved"
    _page_queries(client, url)  # warm caches (content types, session)
    five = _page_queries(client, url)
    for _ in range(25):
        f.sif(u)
    _refresh(site)
    thirty = _page_queries(client, url)
    assert five == thirty
    # 12 reads, +2 the request's savepoint (ATOMIC_REQUESTS inside the test's transaction),
    # +3 the session saved on every request (its idle expiry moves on), in its own savepoint
    assert thirty <= 17


@pytest.fixture
def scenario_sif(plant):
    sc = f.scenario(plant["site"], tolerable=1e-5, causes=(0.1, 0.05), layers=(0.1,),
                    ref="HZ-77")
    sif = plant["weak"]
    sif.scenarios.add(sc)
    adapter.recompute_many(SafetyFunction.objects.filter(pk=sif.pk), trigger="test")
    return sif


def test_sif_page_shows_lopa_steps_flags_and_charts(client, plant, scenario_sif):
    client.force_login(plant["auditor"])
    html = client.get(reverse("register:sif_detail", args=[scenario_sif.pk])).content.decode()
    assert "HZ-77" in html
    assert "sum of initiating frequencies (per year)" in html
    assert "required SIF PFDavg = tolerable / frequency without the SIF" in html
    assert "0.15" in html  # 0.1 + 0.05 per year
    assert "does not meet the required" in html  # flag from the design check
    assert "Caution:" in html
    assert "/chart/pfd.svg" in html and "/chart/trend.svg" in html
    svg = client.get(reverse("register:sif_chart", args=[scenario_sif.pk, "pfd"]))
    assert svg["Content-Type"] == "image/svg+xml" and b"SIL 1" in svg.content
    trend = client.get(reverse("register:sif_chart", args=[scenario_sif.pk, "trend"]))
    assert b"<svg" in trend.content
    assert "Change rates" not in html  # auditors do not get edit links


def _design_pfd(sif) -> float:
    d = adapter.load(SafetyFunction.objects.filter(pk=sif.pk))[0]
    return eng_design.evaluate_sif(adapter.design_input(d)).pfd_avg


def test_change_control_edit_needs_reason_and_reference_previews_and_records(client, plant):
    sif = plant["fine"]
    plan = sif.plans.get()
    url = reverse("register:edit_design", args=["plan", plan.pk])
    client.force_login(plant["lead"])
    before = _design_pfd(sif)
    resp = client.post(url, {"interval_months": 24, "reason": "", "reference": "",
                             "action": "preview"})
    assert resp.status_code == 200
    assert resp.content.decode().count("Required for any design change") + \
        resp.content.decode().count("This field is required") >= 2
    # Preview: the design PFDavg with a 24-month interval, nothing saved.
    resp = client.post(url, {"interval_months": 24, "reason": "Longer turnaround cycle",
                             "reference": "CR-2026-014", "action": "preview"})
    html = resp.content.decode()
    plan.refresh_from_db()
    assert plan.interval_months == 12
    plan.interval_months = 24
    expected = eng_design.evaluate_sif(_design_with(sif, plan=plan)).pfd_avg
    assert expected > before * 1.5
    assert f'id="design-after">{expected:.2e}<' in html
    assert f'id="design-before">{before:.2e}<' in html
    fingerprint = re.search(r'name="previewed" value="([^"]+)"', html).group(1)
    # Saving values other than the previewed ones is refused (preview again).
    client.post(url, {"interval_months": 36, "reason": "x", "reference": "CR-1",
                      "action": "save", "previewed": fingerprint.replace("&quot;", '"')})
    plan.refresh_from_db()
    assert plan.interval_months == 12
    resp = client.post(url, {"interval_months": 24, "reason": "Longer turnaround cycle",
                             "reference": "CR-2026-014", "action": "save",
                             "previewed": fingerprint.replace("&quot;", '"')})
    assert resp.status_code == 302
    plan.refresh_from_db()
    assert plan.interval_months == 24
    latest = plan.history.first()
    assert latest.history_change_reason == "[CR-2026-014] Longer turnaround cycle"
    assert latest.history_user == plant["lead"]
    page = client.get(reverse("register:sif_detail", args=[sif.pk])).content.decode()
    assert "[CR-2026-014] Longer turnaround cycle" in page
    assert "interval_months: 12 → 24" in page


def _design_with(sif, plan):
    d = adapter.load(SafetyFunction.objects.filter(pk=sif.pk))[0]
    for p in d.plans:
        if p.pk == plan.pk:
            p.interval_months = plan.interval_months
    return adapter.design_input(d)


def test_component_rate_change_through_the_form(client, plant):
    comp = Component.objects.get(tag="LT-S-FINE-A")
    url = reverse("register:edit_design", args=["component", comp.pk])
    client.force_login(plant["lead"])
    data = {"lambda_du_per_hour": "2e-6", "lambda_dd_per_hour": "", "lambda_s_per_hour": "",
            "proof_test_coverage": "0.9", "partial_test_coverage": "0", "reason": "Certificate "
            "revision", "reference": "CR-9", "action": "preview"}
    html = client.post(url, data).content.decode()
    fp = re.search(r'name="previewed" value="([^"]+)"', html).group(1).replace("&quot;", '"')
    client.post(url, {**data, "action": "save", "previewed": fp})
    comp.refresh_from_db()
    assert comp.lambda_du_per_hour == 2e-6 and comp.proof_test_coverage == 0.9
    assert comp.history.first().history_change_reason == "[CR-9] Certificate revision"


@pytest.mark.parametrize("who", ["tech", "auditor"])
def test_only_leads_edit(client, plant, who):
    sub = Subsystem.objects.filter(sif=plant["fine"]).first()
    client.force_login(plant[who])
    url = reverse("register:edit_design", args=["subsystem", sub.pk])
    assert client.get(url).status_code == 403
    assert client.post(url, {"voting": "1oo2", "beta": 0.1, "beta_d": 0.05, "reason": "r",
                             "reference": "CR", "action": "save"}).status_code == 403
    sub.refresh_from_db()
    assert sub.voting == "1oo1"


def test_other_site_gets_404(client, plant):
    client.force_login(plant["other_lead"])
    sub = Subsystem.objects.filter(sif=plant["fine"]).first()
    assert client.get(reverse("register:edit_design", args=["subsystem", sub.pk])
                      ).status_code == 404
    assert client.get(reverse("register:sif_detail", args=[plant["fine"].pk])
                      ).status_code == 404
    assert "S-FINE" not in client.get("/sifs/").content.decode()


def test_lead_decides_a_deferral_with_the_projection(client, plant):
    plan = plant["overdue"].plans.get()
    deferral = schedule_services.request_deferral(user=plant["tech"], plan=plan,
                                         proposed_on=TODAY + dt.timedelta(days=30),
                                         reason="Spare valve on order")
    client.force_login(plant["lead"])
    page = client.get(reverse("register:sif_detail", args=[plant["overdue"].pk])).content
    assert b"test on the proposed date" in page
    resp = client.post(reverse("deferrals:decide", args=[deferral.pk]),
                       {"decision": "approve", "note": "", "password": f.PASSWORD,
                        "next": f"/sifs/{plant['overdue'].pk}/#deferrals"})
    assert resp.status_code == 302
    assert resp.url == f"/sifs/{plant['overdue'].pk}/#deferrals"  # back to the SIF page
    deferral.refresh_from_db()
    assert deferral.status == choices.DeferralStatus.APPROVED
    assert deferral.projected_pfd_avg and deferral.projected_pfd_avg > 0
    client.force_login(plant["tech"])
    other = schedule_services.request_deferral(user=plant["tech"], plan=plant["soon"].plans.get(),
                                      proposed_on=TODAY + dt.timedelta(days=90), reason="x")
    assert client.post(reverse("deferrals:decide", args=[other.pk]),
                       {"decision": "approve"}).status_code == 403


def test_every_overview_count_equals_the_list_it_opens(client, plant):
    """Each number on the overview (cards and unit rows) opens a list with exactly that
    many SIFs, and the list says what was selected."""
    import html as html_mod

    client.force_login(plant["lead"])
    page = client.get("/").content.decode()
    links = re.findall(r'href="(/sifs/\?[^"]+)">(?:<span class="big">)?(\d+)<', page)
    assert len(links) >= 20
    for url, shown in links:
        listing = client.get(html_mod.unescape(url)).content.decode()
        count = re.search(r'id="list-count"><strong>(\d+)</strong>', listing)
        assert count and count.group(1) == shown, (url, shown)
        if "plan_state=" in url or "late_12m" in url:
            assert 'class="showing"' in listing, url
