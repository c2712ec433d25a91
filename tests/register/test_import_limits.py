"""Spreadsheet import against careless and hostile files: cells that are not finite numbers,
NUL characters, over-long text, implausible dates, and files too large or too long, refused
with the row and column (or the limit) named, before anything is written."""

from __future__ import annotations

import csv
import datetime as dt
import io
import re
import time
import zipfile

import pytest
from django.core.files.uploadedfile import SimpleUploadedFile
from openpyxl import Workbook

from register import choices
from register.lead import spreadsheet
from register.models import MAX_TEXT, Component, SafetyFunction, Subsystem, TestPlan, TestRecord
from tests import factories as f

pytestmark = pytest.mark.django_db


@pytest.fixture
def plant():
    site = f.site("west")
    unit = f.unit(site, "K1")
    lead = f.user("lead", site=site, role=choices.Role.LEAD)
    sif = f.sif(unit, tag="SIF-201", in_service=dt.date(2021, 3, 1))
    return {"site": site, "unit": unit, "lead": lead, "sif": sif}


def _csv(rows: list[dict]) -> bytes:
    out = io.StringIO()
    writer = csv.DictWriter(out, fieldnames=spreadsheet.COLUMNS)
    writer.writeheader()
    for row in rows:
        writer.writerow(row)
    return out.getvalue().encode()


def _counts():
    models = (SafetyFunction, Subsystem, Component, TestPlan, TestRecord)
    return {m.__name__: (m.objects.count(), m.history.count()) for m in models}


SIF_ROW = {"record": "sif", "unit": "K1", "sif_tag": "SIF-300", "sif_name": "Low flow trip",
           "safe_state": "Pump stopped", "target_sil": "1", "target_pfd_avg": "0.05",
           "in_service_on": "2022-01-01"}


def _component_row(dtype: str, **cells) -> dict:
    return {"record": "component", "unit": "K1", "sif_tag": "SIF-201", "subsystem": "sensing",
            "role": "sensing", "voting": "1oo1", "component_tag": "LT-SIF-201-A",
            "device_type": dtype, "in_service_on": "2021-03-01", **cells}


BAD_CELLS = [
    # (what, row cells over SIF_ROW or a component row, column named, words of the message)
    ("nan text", {"target_pfd_avg": "nan"}, "target_pfd_avg", "not a finite number"),
    ("NaN text", {"target_pfd_avg": "NaN"}, "target_pfd_avg", "not a finite number"),
    ("infinity", {"target_pfd_avg": "Infinity"}, "target_pfd_avg", "not a finite number"),
    ("1e400 reads as infinity", {"target_pfd_avg": "1e400"}, "target_pfd_avg",
     "not a finite number"),
    ("target above 1", {"target_pfd_avg": "1.5"}, "target_pfd_avg", "between 1e-09 and 1"),
    ("NUL in a name", {"sif_name": "Low\x00flow"}, "sif_name", "NUL character"),
    ("over-long name", {"sif_name": "x" * (MAX_TEXT + 1)}, "sif_name",
     f"at most {MAX_TEXT:,}"),
    ("year 1", {"in_service_on": "0001-01-01"}, "in_service_on", "earliest plausible"),
    ("year 9999", {"in_service_on": "9999-12-31"}, "in_service_on", "years ahead"),
]
BAD_COMPONENT_CELLS = [
    ("rate nan", {"lambda_du": "nan"}, "lambda_du", "not a finite failure rate"),
    ("rate inf FIT", {"lambda_du": "inf FIT"}, "lambda_du", "not a finite failure rate"),
    ("coverage infinity", {"proof_test_coverage": "-Infinity"}, "proof_test_coverage",
     "not a finite number"),
    ("beta 1e308", {"beta": "1e308"}, "beta", "between 0 and 1"),
    ("NUL in a voting", {"voting": "1oo1\x00"}, "voting", "NUL character"),
]


@pytest.mark.parametrize(("what", "cells", "column", "words"), [
    pytest.param(*case, id=case[0]) for case in BAD_CELLS])
def test_a_bad_sif_cell_is_named_and_nothing_is_written(plant, what, cells, column, words):
    before = _counts()
    table = spreadsheet.read_table("bad.csv", _csv([SIF_ROW, {**SIF_ROW, "sif_tag": "SIF-301",
                                                              **cells}]))
    plan = spreadsheet.plan_import(plant["site"], table)
    assert [(e.row, e.column) for e in plan.errors] == [(3, column)], plan.errors
    assert words in plan.errors[0].message
    assert str(plan.errors[0]).startswith(f"row 3, column {column} (")
    assert _counts() == before
    assert not SafetyFunction.objects.filter(tag="SIF-300").exists()


@pytest.mark.parametrize(("what", "cells", "column", "words"), [
    pytest.param(*case, id=case[0]) for case in BAD_COMPONENT_CELLS])
def test_a_bad_component_cell_is_named(plant, what, cells, column, words):
    dtype = Component.objects.get(tag="LT-SIF-201-A").device_type.name
    table = spreadsheet.read_table("bad.csv", _csv([_component_row(dtype, **cells)]))
    plan = spreadsheet.plan_import(plant["site"], table)
    assert (2, column) in {(e.row, e.column) for e in plan.errors}, plan.errors
    assert any(words in e.message for e in plan.errors if e.column == column), plan.errors


def test_a_test_dated_year_one_is_refused_at_the_check(plant):
    """Test rows are not model-validated at the check; their date is judged there all the
    same (register.days.check_plausible), so the check and the confirm agree."""
    row = {"record": "test", "unit": "K1", "sif_tag": "SIF-201",
           "component_tag": "LT-SIF-201-A", "test_performed_at": "0001-01-01T00:00:00",
           "test_kind": "full", "as_found": "pass", "as_left": "pass"}
    plan = spreadsheet.plan_import(plant["site"], spreadsheet.read_table("t.csv", _csv([row])))
    assert [(e.row, e.column) for e in plan.errors] == [(2, "test_performed_at")]


def test_row_limit(plant, settings):
    settings.IMPORT_MAX_ROWS = 3
    rows = [{**SIF_ROW, "sif_tag": f"SIF-{400 + i}"} for i in range(3)]
    assert len(spreadsheet.read_table("ok.csv", _csv(rows))) == 3
    with pytest.raises(spreadsheet.FileError, match=r"more than 3 rows below the header"):
        spreadsheet.read_table("long.csv", _csv(rows + [SIF_ROW]))


def test_byte_limit(plant, settings):
    data = _csv([SIF_ROW])
    settings.IMPORT_MAX_BYTES = len(data)
    assert spreadsheet.read_table("ok.csv", data)
    with pytest.raises(spreadsheet.FileError, match=f"at most {len(data) - 1:,} bytes"):
        settings.IMPORT_MAX_BYTES = len(data) - 1
        spreadsheet.read_table("big.csv", data)


def test_a_csv_field_beyond_the_csv_readers_own_limit_is_a_file_error():
    data = b"record,unit,sif_tag,remarks\nsif,K1,SIF-1,\"" + b"x" * 200_000 + b"\"\n"
    with pytest.raises(spreadsheet.FileError, match="cannot be read"):
        spreadsheet.read_table("wide.csv", data)


def _lying_workbook(last_row: int, dimension: str) -> bytes:
    """A small workbook: the header, one SIF row at ``last_row``, and a sheet that states
    its size as ``dimension`` (e.g. the whole width of a sheet)."""
    wb = Workbook()
    ws = wb.active
    ws.title = spreadsheet.SHEET_NAME
    ws.append(spreadsheet.COLUMNS)
    for column, value in enumerate([SIF_ROW.get(c) for c in spreadsheet.COLUMNS], 1):
        if value is not None:
            ws.cell(row=last_row, column=column, value=value)
    buffer = io.BytesIO()
    wb.save(buffer)
    out = io.BytesIO()
    with zipfile.ZipFile(buffer) as src, zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as dst:
        for info in src.infolist():
            data = src.read(info.filename)
            if info.filename == "xl/worksheets/sheet1.xml":
                data, n = re.subn(rb'<dimension ref="[^"]*"', f'<dimension ref="{dimension}"'
                                  .encode(), data)
                assert n == 1
            dst.writestr(info, data)
    return out.getvalue()


def test_a_workbook_stating_a_huge_size_is_read_for_what_it_holds(plant):
    """The sheet says it is 16,384 columns by 8,000 rows; the file is a few KB. Reading
    pads no row to the stated width and stops counting at the row limit."""
    data = _lying_workbook(8000, "A1:XFD8000")
    assert len(data) < 10_000
    started = time.perf_counter()
    rows = spreadsheet.read_table("lying.xlsx", data)
    elapsed = time.perf_counter() - started
    assert [(n, r["sif_tag"]) for n, r in rows] == [(8000, "SIF-300")]
    assert elapsed < 3.0, elapsed  # stated width padded out, this took tens of seconds


def test_a_workbook_with_a_row_past_the_limit_stops_at_the_limit(plant, settings):
    data = _lying_workbook(1_048_576, "A1:XFD1048576")  # the last row a sheet can have
    started = time.perf_counter()
    with pytest.raises(spreadsheet.FileError, match=r"more than 20,000 rows"):
        spreadsheet.read_table("far.xlsx", data)
    assert time.perf_counter() - started < 3.0


def test_a_workbook_that_unpacks_far_beyond_its_size_is_refused(settings):
    settings.IMPORT_MAX_BYTES = 1000
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as archive:
        archive.writestr("xl/worksheets/sheet1.xml", b" " * (spreadsheet.UNPACKED_FACTOR
                                                             * 1000 + 1))
    assert len(out.getvalue()) <= 1000
    with pytest.raises(spreadsheet.FileError, match="unpacks to"):
        spreadsheet.read_table("bomb.xlsx", out.getvalue())


def test_the_import_page_names_the_cell_and_writes_nothing(client, plant, settings):
    client.force_login(plant["lead"])
    before = _counts()
    bad = _csv([{**SIF_ROW, "target_pfd_avg": "nan"}])
    resp = client.post("/import/", {"step": "check", "site": plant["site"].pk,
                                    "file": SimpleUploadedFile("bad.csv", bad), "reference":
                                    "CR-5"})
    html = resp.content.decode()
    assert resp.status_code == 200 and "target_pfd_avg" in html and "not a finite" in html
    assert "Confirm the import" not in html
    settings.IMPORT_MAX_ROWS = 1
    long = _csv([SIF_ROW, {**SIF_ROW, "sif_tag": "SIF-302"}])
    resp = client.post("/import/", {"step": "check", "site": plant["site"].pk,
                                    "file": SimpleUploadedFile("long.csv", long), "reference":
                                    "CR-5"})
    assert resp.status_code == 200 and "more than 1 rows" in resp.content.decode()
    assert _counts() == before
