"""A long spreadsheet import (more rows than IMPORT_BACKGROUND_ROWS) is confirmed with the
password in the request and written by a background job (eager here), with progress, the
same outcome as the small path, all or nothing, seen only by its owner and the site's
leads."""

from __future__ import annotations

import csv
import io

import pytest
from django.core.exceptions import ValidationError
from django.core.files.uploadedfile import SimpleUploadedFile

from register import choices
from register.lead import spreadsheet
from register.models import Component, ImportJob, SafetyFunction, Subsystem, TestPlan, TestRecord
from tests import factories as f

pytestmark = pytest.mark.django_db

SIFS = 12  # five rows each: 60 rows below the header
THRESHOLD = 20


@pytest.fixture
def plant(settings):
    settings.IMPORT_BACKGROUND_ROWS = THRESHOLD
    east, west = f.site("east"), f.site("west")
    for site in (east, west):
        f.unit(site, "C3")
    sensor = f.device_type("Job test transmitter")
    valve = f.device_type("Job test valve", role="final", lambda_dd_per_hour=0.0)
    return {"east": east, "west": west, "sensor": sensor.name, "valve": valve.name,
            "lead_east": f.user("lead_e", site=east, role=choices.Role.LEAD),
            "lead_west": f.user("lead_w", site=west, role=choices.Role.LEAD)}


def _rows(plant, sifs=SIFS, **bad) -> list[dict]:
    """``sifs`` new SIFs, each with a transmitter, a valve and one full proof test of
    both; ``bad`` overrides cells of the SIF row of the last SIF."""
    out = []
    for i in range(sifs):
        tag = f"SIF-{700 + i}"
        common = {"unit": "C3", "sif_tag": tag}
        sif = {**common, "record": "sif", "sif_name": f"Trip {i}", "safe_state": "Closed",
               "target_sil": "1", "target_pfd_avg": "0.05", "in_service_on": "2022-01-10",
               "proof_test_interval_months": "24"}
        if i == sifs - 1:
            sif.update(bad)
        out += [sif,
                {**common, "record": "component", "subsystem": "Sensors", "role": "sensing",
                 "voting": "1oo1", "component_tag": f"FT-{700 + i}",
                 "device_type": plant["sensor"], "in_service_on": "2022-01-10",
                 "lambda_du": "500 FIT"},
                {**common, "record": "component", "subsystem": "Valve", "role": "final",
                 "voting": "1oo1", "component_tag": f"XV-{700 + i}",
                 "device_type": plant["valve"], "in_service_on": "2022-01-10"}]
        out += [{**common, "record": "test", "component_tag": f"{p}-{700 + i}",
                 "test_performed_at": "2024-01-05 10:00", "test_kind": "full",
                 "as_found": "pass", "as_left": "pass"} for p in ("FT", "XV")]
    return out


def _csv(rows) -> bytes:
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=spreadsheet.COLUMNS)
    writer.writeheader()
    writer.writerows(rows)
    return buf.getvalue().encode()


def _counts():
    models = (SafetyFunction, Subsystem, Component, TestPlan, TestRecord)
    return {m.__name__: (m.objects.count(), m.history.count()) for m in models}


def _check(client, site, data, name="long.csv"):
    upload = SimpleUploadedFile(name, data, content_type="text/csv")
    return client.post("/import/", {"step": "check", "site": site.pk, "file": upload,
                                    "reference": "CR-900"})


def test_long_file_runs_as_a_job_with_the_small_paths_result(
        client, plant, django_capture_on_commit_callbacks):
    data = _csv(_rows(plant))
    table = spreadsheet.read_table("long.csv", data)
    assert len(table) == 5 * SIFS > THRESHOLD
    # The small path, on the east site.
    small = spreadsheet.apply_import(plant["east"], table, plant["lead_east"], "CR-900",
                                     f.PASSWORD)
    # The same file through the pages on the west site: above the threshold, a job.
    client.force_login(plant["lead_west"])
    resp = _check(client, plant["west"], data)
    assert "written in the background" in resp.content.decode()
    with django_capture_on_commit_callbacks(execute=True) as queued:
        resp = client.post("/import/", {"step": "confirm", "password": f.PASSWORD})
    assert len(queued) == 1
    job = ImportJob.objects.get()
    assert resp.status_code == 302 and resp.url == f"/import/jobs/{job.pk}/"
    assert (job.site, job.user, job.reference) == (plant["west"], plant["lead_west"], "CR-900")
    assert bytes(job.file_data) == data

    status = client.get(f"/import/jobs/{job.pk}/status.json").json()
    assert status["status"] == "done" and status["finished"] is True
    assert status["rows_done"] == status["rows_total"] == 5 * SIFS
    assert status["result"] == spreadsheet.plan_counts(small)
    assert status["result"]["create"] == 4 * SIFS  # a test group is one step
    page = client.get(f"/import/jobs/{job.pk}/").content.decode()
    assert spreadsheet.summary_text("long.csv", small.changes) in page
    assert "import-status.js" not in page  # finished: no more polling

    def exported(site):
        return spreadsheet.export_rows(SafetyFunction.objects.filter(unit__site=site))

    assert exported(plant["west"]) == exported(plant["east"])
    assert len(exported(plant["west"])) == 5 * SIFS
    west_sif = SafetyFunction.objects.get(unit__site=plant["west"], tag="SIF-700")
    assert west_sif.history.first().history_change_reason == "[CR-900] spreadsheet import"
    record = TestRecord.objects.get(sif=west_sif)
    assert record.is_signed and record.performed_by == plant["lead_west"]


def test_a_short_file_keeps_the_request_path(client, plant, settings):
    settings.IMPORT_BACKGROUND_ROWS = 5 * SIFS  # exactly at the threshold: not above it
    client.force_login(plant["lead_west"])
    _check(client, plant["west"], _csv(_rows(plant)))
    resp = client.post("/import/", {"step": "confirm", "password": f.PASSWORD})
    assert resp.status_code == 302 and resp.url.startswith("/sifs/")
    assert not ImportJob.objects.exists()
    assert SafetyFunction.objects.filter(unit__site=plant["west"]).count() == SIFS


def test_wrong_password_creates_no_job(client, plant, django_capture_on_commit_callbacks):
    client.force_login(plant["lead_west"])
    _check(client, plant["west"], _csv(_rows(plant)))
    before = _counts()
    with django_capture_on_commit_callbacks(execute=True) as queued:
        resp = client.post("/import/", {"step": "confirm", "password": "not-the-password"})
    assert resp.status_code == 400
    assert "password is not correct" in resp.content.decode()
    assert queued == [] and not ImportJob.objects.exists() and _counts() == before
    # Nor without the pages.
    with pytest.raises(ValidationError) as err:
        spreadsheet.queue_import(plant["west"], "long.csv", _csv(_rows(plant)),
                                 plant["lead_west"], "CR-900", "")
    assert "password" in err.value.message_dict
    assert not ImportJob.objects.exists()


def test_only_the_owner_and_the_sites_leads_see_the_job(client, plant):
    job = spreadsheet.queue_import(plant["west"], "long.csv", _csv(_rows(plant)),
                                   plant["lead_west"], "CR-900", f.PASSWORD)
    pages = [f"/import/jobs/{job.pk}/", f"/import/jobs/{job.pk}/status.json"]
    other_lead = f.user("lead_w2", site=plant["west"], role=choices.Role.LEAD)
    tech = f.user("tech_w", site=plant["west"], role=choices.Role.TECHNICIAN)
    for user, code in ((plant["lead_west"], 200), (other_lead, 200),
                       (plant["lead_east"], 404), (tech, 404)):
        client.force_login(user)
        assert [client.get(p).status_code for p in pages] == [code, code], user.username
    client.force_login(plant["lead_west"])
    queued = client.get(pages[1]).json()
    assert (queued["status"], queued["rows_done"], queued["finished"]) == ("queued", 0, False)
    assert "import-status.js" in client.get(pages[0]).content.decode()  # polls meanwhile


def test_a_failing_row_fails_the_job_and_writes_nothing(
        client, plant, django_capture_on_commit_callbacks):
    data = _csv(_rows(plant, target_pfd_avg="nan"))  # the SIF row of the last SIF
    bad_row = 2 + 5 * (SIFS - 1)
    before = _counts()
    with django_capture_on_commit_callbacks(execute=True):
        job = spreadsheet.queue_import(plant["west"], "bad.csv", data, plant["lead_west"],
                                       "CR-900", f.PASSWORD)
    job.refresh_from_db()
    assert job.status == ImportJob.Status.FAILED and job.finished_at
    assert job.rows_done == 0 and job.result == {}
    assert any(e.startswith(f"row {bad_row}, column target_pfd_avg")
               and "not a finite number" in e for e in job.errors), job.errors
    assert "nothing has been written" in job.message
    assert _counts() == before
    client.force_login(plant["lead_west"])
    status = client.get(f"/import/jobs/{job.pk}/status.json").json()
    assert status["status"] == "failed" and status["finished"] is True
    page = client.get(f"/import/jobs/{job.pk}/").content.decode()
    assert "The import failed" in page and f"row {bad_row}, column target_pfd_avg" in page


def test_a_job_whose_owner_lost_the_right_fails_and_writes_nothing(
        plant, django_capture_on_commit_callbacks):
    data = _csv(_rows(plant))
    with django_capture_on_commit_callbacks(execute=False) as queued:
        job = spreadsheet.queue_import(plant["west"], "long.csv", data, plant["lead_west"],
                                       "CR-900", f.PASSWORD)
    plant["lead_west"].memberships.all().delete()
    before = _counts()
    for callback in queued:
        callback()
    job.refresh_from_db()
    assert job.status == ImportJob.Status.FAILED and "right" in job.message
    assert _counts() == before
    # A job is run once: running it again leaves it as it is.
    assert spreadsheet.run_import_job(job.pk).status == ImportJob.Status.FAILED


def test_progress_is_reported_every_chunk_of_rows(plant, monkeypatch):
    monkeypatch.setattr(spreadsheet, "PROGRESS_CHUNK", 10)
    reported: list[int] = []
    table = spreadsheet.read_table("long.csv", _csv(_rows(plant)))
    spreadsheet.apply_import(plant["west"], table, plant["lead_west"], "CR-900", f.PASSWORD,
                             progress=reported.append)
    assert reported == list(range(10, 5 * SIFS + 1, 10))


@pytest.mark.django_db(transaction=True)
def test_progress_shows_to_other_connections_while_the_job_runs(plant, monkeypatch):
    """The rows done are written on a connection of their own: a reader (another thread,
    another connection, as the status page is) sees them rise before the import commits."""
    import threading

    from django.db import connection

    if connection.vendor != "postgresql":
        pytest.skip("live progress needs PostgreSQL")
    monkeypatch.setattr(spreadsheet, "PROGRESS_CHUNK", 10)
    # Queued as queue_import leaves it (which, out of a transaction, would run it at once).
    data = _csv(_rows(plant))
    job = ImportJob.objects.create(site=plant["west"], user=plant["lead_west"],
                                   reference="CR-900", file_name="long.csv", file_data=data,
                                   rows_total=5 * SIFS)
    seen: list[tuple[str, int, int]] = []
    stop = threading.Event()

    def watch():
        try:
            while not stop.is_set():
                status, rows = ImportJob.objects.values_list("status", "rows_done").get(
                    pk=job.pk)
                sifs = SafetyFunction.objects.filter(unit__site=plant["west"]).count()
                seen.append((status, rows, sifs))
                stop.wait(0.02)
        finally:
            connection.close()

    watcher = threading.Thread(target=watch)
    watcher.start()
    try:
        done = spreadsheet.run_import_job(job.pk)
    finally:
        stop.set()
        watcher.join()
    assert (done.status, done.rows_done) == ("done", 5 * SIFS)
    midway = {rows for status, rows, _ in seen if status == "running" and 0 < rows < 5 * SIFS}
    assert midway, seen[-5:]
    assert midway <= set(range(10, 5 * SIFS, 10))
    # Meanwhile nothing of the import was visible to others: all or nothing.
    assert {sifs for status, _, sifs in seen if status == "running"} == {0}
    assert SafetyFunction.objects.filter(unit__site=plant["west"]).count() == SIFS
