"""Spreadsheet import and export: round trip, all-or-nothing, errors by row and column."""

from __future__ import annotations

import csv
import datetime as dt
import io
from pathlib import Path

import pytest
from django.conf import settings
from openpyxl import load_workbook

from register import choices, services
from register.lead import spreadsheet
from register.models import (
    Component,
    DeviceType,
    SafetyFunction,
    Subsystem,
    TestPlan,
    TestRecord,
)
from tests import factories as f

pytestmark = pytest.mark.django_db


@pytest.fixture
def plant():
    site = f.site("east")
    unit = f.unit(site, "C3")
    f.unit(site, "D4")
    lead = f.user("lead", site=site, role=choices.Role.LEAD)
    sif = f.sif(unit, tag="SIF-101", in_service=dt.date(2021, 3, 1), target_pfd=9e-3)
    f.sif(unit, tag="SIF-102", in_service=dt.date(2022, 6, 1), voting="2oo3",
          target_pfd=9e-3)
    comp = Component.objects.get(tag="LT-SIF-101-A")
    comp.lambda_du_per_hour = 3.3e-7  # an own rate, not the device type's
    comp.save()
    results = [services.ResultInput(component=c, as_found="pass", as_left="pass")
               for c in Component.objects.filter(subsystem__sif=sif)]
    results[0] = services.ResultInput(component=results[0].component, as_found="fail",
                                      as_left="pass", failure_mode="du",
                                      failure_description="Stuck output",
                                      work_done="Replaced the sensor board")
    rec = services.save_draft(user=lead, sif=sif, kind="full", results=results,
                              performed_at=dt.datetime(2023, 3, 2, 9, 30, tzinfo=dt.UTC),
                              remarks="Annual test")
    services.sign_record(rec, lead, None, check_password=False)
    return {"site": site, "unit": unit, "lead": lead, "sif": sif}


def _counts():
    models = (SafetyFunction, Subsystem, Component, TestPlan, TestRecord)
    rows = {m.__name__: m.objects.count() for m in models}
    rows.update({f"history {m.__name__}": m.history.count() for m in models})
    return rows


@pytest.mark.parametrize("fmt", ["xlsx", "csv"])
def test_export_then_import_changes_nothing(plant, fmt):
    rows = spreadsheet.export_rows(SafetyFunction.objects.filter(unit__site=plant["site"]))
    kinds = [r["record"] for r in rows]
    assert kinds.count("sif") == 2 and kinds.count("component") == 2 + 4
    assert kinds.count("test") == 2  # one record, one row per component result
    data = spreadsheet.to_xlsx(rows) if fmt == "xlsx" else spreadsheet.to_csv(rows)
    table = spreadsheet.read_table(f"register.{fmt}", data)
    plan = spreadsheet.plan_import(plant["site"], table)
    assert plan.errors == []
    assert {s.action for s in plan.steps} == {"unchanged"}
    before = _counts()
    spreadsheet.apply_import(plant["site"], table, plant["lead"], "CR-RT", f.PASSWORD)
    assert _counts() == before
    # The own rate and the failure found survive the trip.
    again = spreadsheet.export_rows(SafetyFunction.objects.filter(unit__site=plant["site"]))
    assert again == rows


def test_import_creates_sif_components_and_tests_then_reimport_is_unchanged(plant):
    rows = [
        {"record": "sif", "unit": "D4", "sif_tag": "SIF-900", "sif_name": "Low flow trip",
         "safe_state": "Pump stopped", "target_sil": "1", "target_pfd_avg": "0.05",
         "in_service_on": "2022-01-10", "proof_test_interval_months": "24"},
        {"record": "component", "unit": "D4", "sif_tag": "SIF-900", "subsystem": "Sensors",
         "role": "sensing", "voting": "1oo1", "beta": "0", "component_tag": "FT-900",
         "device_type": DeviceType.objects.first().name, "in_service_on": "2022-01-10",
         "lambda_du": "500 FIT", "proof_test_coverage": "0.95"},
        {"record": "component", "unit": "D4", "sif_tag": "SIF-900", "subsystem": "Valve",
         "role": "final", "voting": "1oo1", "component_tag": "XV-900",
         "device_type": DeviceType.objects.last().name, "in_service_on": "2022-01-10",
         "lambda_du": "800", "rate_unit": "FIT"},
        {"record": "test", "unit": "D4", "sif_tag": "SIF-900", "component_tag": "FT-900",
         "test_performed_at": "2024-01-05 10:00", "test_kind": "full", "as_found": "pass",
         "as_left": "pass"},
        {"record": "test", "unit": "D4", "sif_tag": "SIF-900", "component_tag": "XV-900",
         "test_performed_at": "2024-01-05 10:00", "test_kind": "full", "as_found": "pass",
         "as_left": "pass"},
    ]
    data = _csv(rows)
    table = spreadsheet.read_table("new.csv", data)
    plan = spreadsheet.plan_import(plant["site"], table)
    assert plan.errors == []
    assert [(s.row, s.action) for s in plan.steps] == [
        (2, "create"), (3, "create"), (4, "create"), (5, "create")]
    spreadsheet.apply_import(plant["site"], table, plant["lead"], "CR-55", f.PASSWORD)
    sif = SafetyFunction.objects.get(tag="SIF-900")
    assert sif.plans.get().interval_months == 24
    assert Component.objects.get(tag="FT-900").lambda_du_per_hour == pytest.approx(5e-7)
    assert Component.objects.get(tag="XV-900").lambda_du_per_hour == pytest.approx(8e-7)
    record = TestRecord.objects.get(sif=sif)
    assert record.is_signed and record.results.count() == 2
    assert sif.history.first().history_change_reason == "[CR-55] spreadsheet import"
    again = spreadsheet.plan_import(plant["site"], spreadsheet.read_table("new.csv", data))
    assert {s.action for s in again.steps} == {"unchanged"}


def _csv(rows) -> bytes:
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=spreadsheet.COLUMNS)
    w.writeheader()
    for r in rows:
        w.writerow(r)
    return buf.getvalue().encode()


def test_file_with_errors_writes_nothing_and_names_row_and_column(plant):
    dtype = DeviceType.objects.first().name
    good_sif = {"record": "sif", "unit": "D4", "sif_tag": "SIF-500", "sif_name": "Trip",
                "safe_state": "Closed", "target_sil": "1", "in_service_on": "2022-01-01"}
    rows = [
        good_sif,                                                             # row 2: fine
        {**good_sif, "unit": "Z9", "sif_tag": "SIF-501"},                     # row 3
        {**good_sif},                                                         # row 4: dup
        {"record": "component", "unit": "D4", "sif_tag": "SIF-500", "subsystem": "S",
         "role": "sensing", "voting": "1oo1", "component_tag": "PT-1", "device_type": dtype,
         "in_service_on": "2022-01-01", "lambda_du": "500"},                  # row 5
        {"record": "component", "unit": "D4", "sif_tag": "SIF-500", "subsystem": "S",
         "role": "sensing", "voting": "1oo1", "component_tag": "PT-2",
         "device_type": "No such transmitter", "in_service_on": "2022-01-01",
         "lambda_du": "2e-7", "rate_unit": "per fortnight"},                  # row 6
        {"record": "component", "unit": "D4", "sif_tag": "SIF-500", "subsystem": "S",
         "role": "sensing", "voting": "1oo1", "component_tag": "LT-SIF-101-A",
         "device_type": dtype, "in_service_on": "2022-01-01"},                # row 7
        {"record": "sif", "unit": "D4", "sif_tag": "SIF-502", "sif_name": "Trip",
         "safe_state": "Closed", "target_sil": "2", "target_pfd_avg": "0.05",
         "in_service_on": "2022-01-01"},                                      # row 8
        {"record": "test", "unit": "D4", "sif_tag": "SIF-500", "component_tag": "PT-1",
         "test_performed_at": "yesterday", "test_kind": "full", "as_found": "fail",
         "as_left": "pass"},                                                  # row 9
    ]
    before = _counts()
    table = spreadsheet.read_table("bad.csv", _csv(rows))
    plan = spreadsheet.plan_import(plant["site"], table)
    found = {(e.row, e.column) for e in plan.errors}
    expected = {
        (3, "unit"), (4, "sif_tag"), (5, "lambda_du"), (6, "device_type"), (6, "rate_unit"),
        (7, "component_tag"), (8, "target_sil"), (9, "test_performed_at"),
        (9, "failure_mode"),
    }
    assert expected <= found, plan.errors
    message = {(e.row, e.column): e.message for e in plan.errors}
    assert "Unknown unit 'Z9'" in message[(3, "unit")]
    assert "FIT" in message[(5, "lambda_du")]
    assert "Duplicate SIF tag" in message[(4, "sif_tag")]
    assert "already used by SIF SIF-101" in message[(7, "component_tag")]
    assert str(plan.errors[0]).startswith("row 3, column unit (B)")
    with pytest.raises(spreadsheet.ImportFailed) as exc:
        spreadsheet.apply_import(plant["site"], table, plant["lead"], "CR-1", f.PASSWORD)
    assert {(e.row, e.column) for e in exc.value.errors} == found
    assert _counts() == before
    assert not SafetyFunction.objects.filter(tag="SIF-500").exists()


def test_unreadable_files_are_refused():
    with pytest.raises(spreadsheet.FileError):
        spreadsheet.read_table("x.xlsx", b"not a workbook")
    with pytest.raises(spreadsheet.FileError, match="missing: record"):
        spreadsheet.read_table("x.csv", b"unit,sif_tag\nA,B\n")
    with pytest.raises(spreadsheet.FileError, match="Unknown column"):
        spreadsheet.read_table("x.csv", b"record,unit,sif_tag,colour\nsif,A,B,red\n")


def test_import_pages_check_then_confirm(client, plant):
    from django.core.files.uploadedfile import SimpleUploadedFile

    rows = [{"record": "sif", "unit": "C3", "sif_tag": "SIF-101", "sif_name": "Renamed trip",
             "safe_state": "Inlet closed", "target_sil": "2", "target_pfd_avg": "0.009",
             "in_service_on": "2021-03-01", "proof_test_interval_months": "12"}]
    client.force_login(plant["lead"])
    upload = SimpleUploadedFile("change.csv", _csv(rows), content_type="text/csv")
    resp = client.post("/import/", {"step": "check", "site": plant["site"].pk,
                                    "file": upload, "reference": "CR-77"})
    html = resp.content.decode()
    assert "High level trip → Renamed trip" in html and "Confirm the import" in html
    assert SafetyFunction.objects.get(tag="SIF-101").name == "High level trip"
    resp = client.post("/import/", {"step": "confirm", "password": f.PASSWORD})
    assert resp.status_code == 302
    sif = SafetyFunction.objects.get(tag="SIF-101")
    assert sif.name == "Renamed trip"
    assert sif.history.first().history_change_reason == "[CR-77] spreadsheet import"
    tech = f.user("tech2", site=plant["site"], role=choices.Role.TECHNICIAN)
    client.force_login(tech)
    assert client.get("/import/").status_code == 403


def test_sample_file_in_fixtures_checks_clean():
    """The sample files describe the invented demo plant's units and device library."""
    import json

    spec = json.loads((Path(settings.BASE_DIR) / "fixtures" / "demo_plant.json").read_text())
    site = f.site("sample")
    for u in spec["units"]:
        f.unit(site, u["code"])
    for t in spec["device_types"]:
        DeviceType.objects.get_or_create(name=t["name"], defaults={
            "role": t["role"], "lambda_du_per_hour": t["du"], "lambda_dd_per_hour": t["dd"],
            "lambda_s_per_hour": t["s"], "device_class": t["class"], "source": "demo"})
    lead = f.user("samplelead", site=site, role=choices.Role.LEAD)
    for name in ("sample_import.xlsx", "sample_import.csv"):
        data = (Path(settings.BASE_DIR) / "fixtures" / name).read_bytes()
        table = spreadsheet.read_table(name, data)
        plan = spreadsheet.plan_import(site, table)
        assert plan.errors == [], (name, plan.errors)
        assert plan.changes >= 5
    spreadsheet.apply_import(site, spreadsheet.read_table("s.xlsx", (
        Path(settings.BASE_DIR) / "fixtures" / "sample_import.xlsx").read_bytes()), lead, "CR-S",
        f.PASSWORD)
    assert SafetyFunction.objects.filter(unit__site=site).count() >= 2
    wb = load_workbook(io.BytesIO(spreadsheet.to_xlsx(spreadsheet.export_rows(
        SafetyFunction.objects.filter(unit__site=site)))))
    assert [c.value for c in wb.active[1]] == spreadsheet.COLUMNS
