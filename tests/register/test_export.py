"""Exports of the register list: the list for people (the page's rows, order and figures,
human labels, what was counted), the round-trip table, formula neutralisation in every
export, streaming with a query count that does not grow with the plant, and the gate."""

from __future__ import annotations

import csv
import datetime as dt
import io

import pytest
from django.db import connection, transaction
from django.test import Client
from django.test.utils import CaptureQueriesContext
from django.utils import timezone
from openpyxl import load_workbook

from calcs import adapter
from register import choices, services
from register.audit.evidence.tables import _csv as pack_csv
from register.lead.export import PEOPLE_HEADER, neutralise
from register.models import Subsystem, TestPlan
from register.presenters import verdict_badge
from register.schedule import services as schedule_services
from register.schedule.due import refresh_plans
from tests import factories as f

pytestmark = pytest.mark.django_db
TODAY = timezone.localdate()
FORMULA = '=HYPERLINK("http://x")'
CAUTION = ("support, and do not replace, a functional safety assessment by competent "
           "persons under IEC 61511 and local regulations")


def _ago(days: int) -> dt.date:
    return TODAY - dt.timedelta(days=days)


def _refresh(sifs):
    ids = [s.pk for s in sifs]
    refresh_plans(TestPlan.objects.filter(sif_id__in=ids), TODAY)
    adapter.recompute_many(type(sifs[0]).objects.filter(pk__in=ids), trigger="test")


def _add_sifs(unit, tech, n, prefix):
    """``n`` SIFs of ``unit``, each with a signed full test, calculated."""
    sifs = [f.sif(unit, tag=f"{prefix}-{i:02d}", in_service=_ago(200 + 30 * i),
                  target_sil=1 + i % 2, target_pfd=0.05 if i % 2 == 0 else 9e-3)
            for i in range(n)]
    for s in sifs:
        f.full_test(s, tech, timezone.now() - dt.timedelta(days=40))
    _refresh(sifs)
    return sifs


@pytest.fixture(scope="module")
def world(django_db_setup, django_db_blocker):
    with django_db_blocker.unblock(), transaction.atomic():
        site = f.site("exp-north")
        u1, u2 = f.unit(site, "A1"), f.unit(site, "B2")
        users = {
            "lead": f.user("exp-lead", site=site, role=choices.Role.LEAD),
            "tech": f.user("exp-tech", site=site, role=choices.Role.TECHNICIAN),
            "auditor": f.user("exp-auditor", site=site, role=choices.Role.AUDITOR),
        }
        sifs = {
            "over": f.sif(u1, tag="E-OVER", in_service=_ago(375), target_pfd=9e-3),
            "soon": f.sif(u1, tag="E-SOON", in_service=_ago(350), target_pfd=9e-3),
            "fine": f.sif(u1, tag="E-FINE", in_service=_ago(180), target_sil=1,
                          target_pfd=0.05),
            "weak": f.sif(u2, tag="E-WEAK", in_service=_ago(300), target_sil=1,
                          target_pfd=0.05, lambda_du=5e-5),
            "formula": f.sif(u2, tag="E-FORMULA", in_service=_ago(100), target_sil=1,
                             target_pfd=0.05),
        }
        sifs["formula"].name = FORMULA
        sifs["formula"].save()
        Subsystem.objects.filter(sif=sifs["formula"], role="sensing").update(name=FORMULA)
        f.full_test(sifs["fine"], users["tech"], timezone.now() - dt.timedelta(days=20))
        _refresh(list(sifs.values()))
        # never calculated: no figures, no verdict
        sifs["new"] = f.sif(u2, tag="E-NEW", in_service=_ago(10))
        refresh_plans(TestPlan.objects.filter(sif=sifs["new"]), TODAY)
        services.open_bypass(user=users["tech"], sif=sifs["fine"], authorised_hours=8,
                             started_at=timezone.now() - dt.timedelta(hours=5),
                             reason="valve work")
        schedule_services.request_deferral(user=users["tech"], plan=sifs["over"].plans.get(),
                                           proposed_on=TODAY + dt.timedelta(days=20),
                                           reason="turnaround")
        other = f.site("exp-south")
        f.sif(f.unit(other, "A1"), tag="E-FOREIGN", in_service=_ago(400))
        yield {"site": site, "u1": u1, "u2": u2, "sifs": sifs, **users}
        transaction.set_rollback(True)


def _client(user) -> Client:
    c = Client()
    c.force_login(user)
    return c


def _body(response) -> bytes:
    assert response.streaming, "exports are streamed"
    return b"".join(response.streaming_content)


def _csv_rows(response) -> list[list[str]]:
    return list(csv.reader(io.StringIO(_body(response).decode("utf-8-sig"))))


def _xlsx(response):
    wb = load_workbook(io.BytesIO(_body(response)))
    return wb.worksheets[0]


def _table(ws, first="Tag"):
    """(heading lines, header, rows) of a sheet: the header is the row starting ``first``."""
    rows = [list(r) for r in ws.iter_rows(values_only=True)]
    at = next(i for i, r in enumerate(rows) if r and r[0] == first)
    return [r[0] for r in rows[:at] if r and r[0]], rows[at], rows[at + 1:]


LISTS = ["", "target_sil=2", "sort=-achieved", "meets=no", "sort=due&life_stage=current",
         "open_bypass=true", "pending_deferral=true", "q=E-&sort=-tag"]


@pytest.mark.parametrize("query", LISTS)
def test_people_export_has_the_rows_figures_and_labels_of_the_list(world, query):
    c = _client(world["lead"])
    page = c.get(f"/sifs/?{query}")
    shown = list(page.context["page"].object_list)
    assert page.context["page"].paginator.count == len(shown)  # one page here
    html = page.content.decode()
    header, *rows = _csv_rows(c.get(f"/sifs/list.csv?{query}"))
    assert header == PEOPLE_HEADER
    assert [r[0] for r in rows] == [s.tag for s in shown]  # same rows, same order
    col = {name: i for i, name in enumerate(header)}
    for sif, row in zip(shown, rows, strict=True):
        def num(name, row=row):
            return float(row[col[name]]) if row[col[name]] else None

        assert num("Target PFDavg") == sif.latest_target
        assert num("Design PFDavg") == sif.latest_design
        assert num("Achieved PFDavg (12 months)") == sif.latest_achieved
        if sif.latest_achieved:
            assert f"{sif.latest_achieved:.2e}" in html  # the figure the page prints
            assert num("RRF (1 / achieved PFDavg)") == pytest.approx(1 / sif.latest_achieved)
        else:
            assert row[col["RRF (1 / achieved PFDavg)"]] == ""
        assert row[col["Required SIL"]] == str(sif.target_sil)
        assert row[col["Unit"]] == sif.unit.code
        assert row[col["Verdict"]].lower() == verdict_badge(sif.latest_meets).label
        assert row[col["Test state"]] == str(choices.PlanState(
            sif.worst_state or choices.PlanState.NO_PLAN).label)
        assert row[col["Next test due"]] == (sif.next_due.isoformat() if sif.next_due else "")
        assert row[col["Life stage"]] == sif.get_life_stage_display()
    ws = _xlsx(c.get(f"/sifs/list.xlsx?{query}"))
    _heading, xheader, xrows = _table(ws)
    assert xheader == tuple(PEOPLE_HEADER) or list(xheader) == PEOPLE_HEADER
    assert [r[0] for r in xrows] == [s.tag for s in shown]


def test_people_export_says_why_counts_bypasses_and_deferrals(world):
    c = _client(world["lead"])
    header, *rows = _csv_rows(c.get("/sifs/list.csv"))
    by_tag = {r[0]: dict(zip(header, r)) for r in rows}
    assert "E-FOREIGN" not in by_tag
    weak = world["sifs"]["weak"]
    latest = adapter.latest_assessments([weak.pk])[weak.pk]
    assert latest.meets_target is False
    failed = [x["reason"] for x in latest.verdict["lines"] if x["status"] == "fail"]
    assert failed and all(r in by_tag["E-WEAK"]["Why not meeting the target"] for r in failed)
    for tag, row in by_tag.items():
        if row["Verdict"] == "Meets target":
            assert row["Why not meeting the target"] == "", tag
    assert by_tag["E-NEW"]["Why not meeting the target"] == "Not calculated"
    assert by_tag["E-NEW"]["Achieved PFDavg (12 months)"] == ""
    assert by_tag["E-FINE"]["Open bypasses"] == "1"
    assert by_tag["E-OVER"]["Deferrals awaiting decision"] == "1"
    assert {r["Open bypasses"] for t, r in by_tag.items() if t != "E-FINE"} == {"0"}
    assert by_tag["E-OVER"]["Test state"] == "Overdue"


def test_xlsx_heading_states_what_was_counted_the_date_and_the_caution(world):
    c = _client(world["auditor"])
    query = "target_sil=2&sort=-achieved"
    showing = c.get(f"/sifs/?{query}").context["showing"]  # the list's own words
    assert showing and "Target SIL" in showing[0]
    ws = _xlsx(c.get(f"/sifs/list.xlsx?{query}"))
    heading, _header, rows = _table(ws)
    text = "\n".join(heading)
    assert f"Counted: {len(rows)} SIFs where {'; '.join(showing)}" in text
    assert "Sorted by: Achieved PFDavg (descending)" in text
    assert f"As of: {TODAY.isoformat()}" in text
    assert CAUTION in text
    # numbers stay numbers, dates are dates
    achieved = [r[PEOPLE_HEADER.index("Achieved PFDavg (12 months)")] for r in rows]
    figures = [v for v in achieved if v is not None]
    assert figures and all(isinstance(v, float) for v in figures)
    assert figures == sorted(figures, reverse=True)


def test_neutralise_rule():
    for text in ("=1+2", "+1", "-1", "@SUM(A1)", "\tx", "\rx", FORMULA):
        assert neutralise(text) == "'" + text
    for value in ("a=b", "", "1oo2", "'=x", -1.5, 3, None, TODAY, True):
        assert neutralise(value) == value


def test_formula_text_is_neutralised_in_every_export(world):
    c = _client(world["lead"])
    quoted = "'" + FORMULA
    rows = _csv_rows(c.get("/sifs/list.csv?q=E-FORMULA"))
    assert rows[1][:2] == ["E-FORMULA", quoted]
    ws = _xlsx(c.get("/sifs/list.xlsx?q=E-FORMULA"))
    _heading, header, xrows = _table(ws)
    cell = next(cl for row in ws.iter_rows() for cl in row if cl.value == quoted)
    assert cell.data_type == "s"  # text, not a formula
    assert xrows[0][1] == quoted
    assert not any(isinstance(v, str) and v.startswith("=") for r in xrows for v in r)
    # the round-trip table: the SIF name and the subsystem name
    table = _csv_rows(c.get("/sifs/export.csv?q=E-FORMULA"))
    cols = table[0]
    cells = [dict(zip(cols, r)) for r in table[1:]]
    assert cells[0]["sif_name"] == quoted
    assert quoted in {r["subsystem"] for r in cells if r["record"] == "component"}
    ws = _xlsx(c.get("/sifs/export.xlsx?q=E-FORMULA"))
    values = [cl for row in ws.iter_rows(min_row=2) for cl in row if cl.value is not None]
    assert not any(cl.data_type == "f" for cl in values)
    assert sum(1 for cl in values if cl.value == quoted) >= 2
    # numbers stay numbers in the round-trip workbook
    assert any(isinstance(cl.value, float) for cl in values)
    # the evidence pack's CSV files
    pack = pack_csv([{"sif": FORMULA, "value": -0.5, "note": "@x", "list": ["=a"]}],
                    ["sif", "value", "note", "list"]).decode()
    assert next(csv.reader(io.StringIO(pack.splitlines()[1]))) == [
        "'" + FORMULA, "-0.5", "'@x", '["=a"]']


@pytest.mark.parametrize("url", ["/sifs/list.csv", "/sifs/list.xlsx", "/sifs/export.csv",
                                 "/sifs/export.xlsx"])
def test_refused_user_gets_403_and_nothing(world, url):
    response = _client(world["tech"]).get(url)
    assert response.status_code == 403
    assert b"E-OVER" not in response.content and b"PK" not in response.content[:2]


def test_bad_filter_or_format_is_refused(world):
    c = _client(world["lead"])
    bad = c.get("/sifs/list.csv?sort=bogus")
    assert bad.status_code == 400 and b"E-OVER" not in bad.content
    assert c.get("/sifs/list.pdf").status_code == 404


def _queries(client, url) -> int:
    with CaptureQueriesContext(connection) as ctx:
        response = client.get(url)
        assert response.status_code == 200
        _body(response)
    return len(ctx.captured_queries)


EXPORTS = ["/sifs/list.csv", "/sifs/list.xlsx?sort=-due", "/sifs/export.csv",
           "/sifs/export.xlsx", "/sifs/list.csv?late_12m=false&repeat_offender=false"]


def test_query_count_does_not_grow_with_the_number_of_sifs(world):
    c = _client(world["lead"])
    small = {url: _queries(c, url) for url in EXPORTS}
    rows_small = len(_csv_rows(c.get("/sifs/list.csv")))
    with transaction.atomic():
        _add_sifs(world["u1"], world["tech"], 6, "E-MORE")
        large = {url: _queries(c, url) for url in EXPORTS}
        assert len(_csv_rows(c.get("/sifs/list.csv"))) == rows_small + 6
        transaction.set_rollback(True)
    assert large == small
    assert max(small.values()) <= 22  # +2: the request's savepoint (ATOMIC_REQUESTS inside the test's transaction)
