"""Exports of more SIFs than EXPORT_BACKGROUND_SIFS: the export's address offers a
background job, whose file equals the direct export's for the same filter, whose progress
rises as SIFs are written, and which only the person who asked sees and downloads (the
export right at every site in the file checked again at download). The rights of the job
pages are tested here (the page matrix lists them as covered elsewhere).

The tasks run in-process (eager) here; tests/integration/test_export_job_worker.py runs
one on a real Celery worker."""

from __future__ import annotations

import csv
import datetime as dt
import io
import re

import pytest
from django.db import connection, transaction
from django.test import Client
from django.test.utils import CaptureQueriesContext
from django.utils import timezone
from openpyxl import load_workbook

from register import choices
from register.lead import export, export_jobs
from register.models import ExportJob, Membership
from tests import factories as f

pytestmark = pytest.mark.django_db

EXPORTS = [("/sifs/export.csv", "register"), ("/sifs/export.xlsx", "register"),
           ("/sifs/list.csv", "list"), ("/sifs/list.xlsx", "list")]
QUERY = "q=J-&sort=-tag"
BROWSER = "text/html,application/xhtml+xml,application/xml;q=0.9,*/*;q=0.8"


def _client(user) -> Client:
    c = Client()
    c.force_login(user)
    return c


def _body(response) -> bytes:
    return b"".join(response.streaming_content) if response.streaming else response.content


def _cells(data: bytes, fmt: str) -> list[list]:
    """The file's cells; a workbook's line with the export's minute is left out."""
    if fmt == "csv":
        return list(csv.reader(io.StringIO(data.decode("utf-8-sig"))))
    ws = load_workbook(io.BytesIO(data), read_only=True).worksheets[0]
    return [list(r) for r in ws.iter_rows(values_only=True)
            if not (r and isinstance(r[0], str) and r[0].startswith("As of: "))]


def _ask(client, url, django_capture_on_commit_callbacks):
    """The offer page, then its POST (the job runs in-process once the request commits)."""
    offer = client.get(url, HTTP_ACCEPT=BROWSER)
    assert offer.status_code == 200 and b"Prepare the file" in offer.content
    before = ExportJob.objects.count()
    with django_capture_on_commit_callbacks(execute=True) as queued:
        resp = client.post(url, HTTP_ACCEPT=BROWSER)
    assert len(queued) == 1 and ExportJob.objects.count() == before + 1
    job = ExportJob.objects.latest("id")
    assert resp.status_code == 302 and resp.url == f"/sifs/export-jobs/{job.pk}/"
    job.refresh_from_db()
    return job


# ---------------------------------------------------------------------------------------
# In-process (the task eager), on a world built once
# ---------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def world(django_db_setup, django_db_blocker):
    with django_db_blocker.unblock(), transaction.atomic():
        east, west = f.site("xj-east"), f.site("xj-west")
        ue, uw = f.unit(east, "A1"), f.unit(west, "B1")
        users = {
            "lead": f.user("xj-lead", site=east, role=choices.Role.LEAD),
            "other_lead": f.user("xj-lead2", site=east, role=choices.Role.LEAD),
            "auditor": f.user("xj-auditor", site=east, role=choices.Role.AUDITOR),
            "tech": f.user("xj-tech", site=east, role=choices.Role.TECHNICIAN),
        }
        Membership.objects.create(user=users["lead"], site=west, role=choices.Role.AUDITOR)
        sifs = [f.sif(ue if i % 2 else uw, tag=f"J-{i:02d}", target_sil=1 + i % 2)
                for i in range(7)]
        sifs.append(f.sif(ue, tag="OTHER-1"))
        for s in [s for s in sifs if s.unit_id == ue.pk][:3]:
            f.full_test(s, users["tech"], timezone.now() - dt.timedelta(days=30))
        yield {"east": east, "west": west, "sifs": sifs, **users}
        transaction.set_rollback(True)


@pytest.fixture
def limit(settings):
    settings.EXPORT_BACKGROUND_SIFS = 3  # the filter below selects 7 SIFs
    return 3


@pytest.mark.parametrize(("url", "kind"), EXPORTS)
def test_the_jobs_file_equals_the_direct_export(world, limit, settings, url, kind,
                                                django_capture_on_commit_callbacks):
    c = _client(world["lead"])
    full = f"{url}?{QUERY}"
    job = _ask(c, full, django_capture_on_commit_callbacks)
    fmt = url.rsplit(".", 1)[1]
    assert (job.kind, job.fmt, job.query) == (kind, fmt, QUERY)
    assert job.status == ExportJob.Status.DONE, job.message
    assert job.sifs_done == job.sifs_total == 7
    assert sorted(job.site_ids) == sorted([world["east"].pk, world["west"].pk])
    status = c.get(f"/sifs/export-jobs/{job.pk}/status.json").json()
    assert (status["status"], status["finished"], status["percent"]) == ("done", True, 100)
    page = c.get(f"/sifs/export-jobs/{job.pk}/").content.decode()
    assert f"/sifs/export-jobs/{job.pk}/download/" in page
    assert "export-status.js" not in page  # finished: no more polling
    download = c.get(f"/sifs/export-jobs/{job.pk}/download/")
    assert download.status_code == 200
    name = f"{export_jobs.NAMES[kind]}-{timezone.localdate().isoformat()}.{fmt}"
    assert name in download["Content-Disposition"]
    from_job = _body(download)

    settings.EXPORT_BACKGROUND_SIFS = 1000  # the same address, now below the limit
    direct = c.get(full)
    assert direct.streaming and direct.status_code == 200
    from_request = _body(direct)
    if fmt == "csv":
        assert from_job == from_request
    assert _cells(from_job, fmt) == _cells(from_request, fmt)
    tags = {row[0] if kind == "list" else row[2] for row in _cells(from_job, fmt)
            if len(row) > 2}
    assert {s.tag for s in world["sifs"][:7]} <= tags and "OTHER-1" not in tags


@pytest.mark.parametrize("accept", [None, "*/*", "text/csv"])
def test_a_script_above_the_limit_gets_409_then_202_with_the_jobs_addresses(
        world, limit, accept, django_capture_on_commit_callbacks):
    """A script is never handed the offer page as if it were the file."""
    c = _client(world["lead"])
    extra = {"HTTP_ACCEPT": accept} if accept else {}
    url = f"/sifs/export.csv?{QUERY}"
    refused = c.get(url, **extra)
    assert refused.status_code == 409 and refused["Content-Type"] == "application/json"
    body = refused.json()
    assert (body["sifs"], body["limit"], body["start"]) == (7, 3, url)
    assert "POST to the same address" in body["detail"]
    with django_capture_on_commit_callbacks(execute=True):
        started = c.post(url, **extra)
    job = ExportJob.objects.latest("id")
    assert started.status_code == 202 and started["Location"] == f"/sifs/export-jobs/{job.pk}/"
    assert started.json()["download_url"] == f"/sifs/export-jobs/{job.pk}/download/"
    status = c.get(started.json()["status_url"]).json()
    assert status["status"] == "done" and status["sifs_done"] == 7
    assert b"J-06" in _body(c.get(started.json()["download_url"]))


def test_at_the_limit_the_export_is_direct(world, settings):
    settings.EXPORT_BACKGROUND_SIFS = 7
    before = ExportJob.objects.count()
    resp = _client(world["lead"]).get(f"/sifs/export.csv?{QUERY}")
    assert resp.streaming and b"J-06" in _body(resp)
    assert ExportJob.objects.count() == before


def test_progress_rises_as_the_sifs_are_written(world, limit, monkeypatch,
                                                django_capture_on_commit_callbacks):
    monkeypatch.setattr(export_jobs, "PROGRESS_EVERY", 2)
    c = _client(world["lead"])
    with CaptureQueriesContext(connection) as ctx:
        job = _ask(c, f"/sifs/export.xlsx?{QUERY}", django_capture_on_commit_callbacks)
    table = ExportJob._meta.db_table
    reported = [int(m[1]) for q in ctx.captured_queries if f'UPDATE "{table}"' in q["sql"]
                for m in [re.search(r'"sifs_done" = (\d+)', q["sql"])] if m]
    assert reported == [2, 4, 6, 7]  # every two SIFs, then all of them at the end
    assert job.status == ExportJob.Status.DONE


def test_only_the_person_who_asked_sees_and_downloads_it(world, limit,
                                                          django_capture_on_commit_callbacks):
    job = _ask(_client(world["lead"]), f"/sifs/list.csv?{QUERY}",
               django_capture_on_commit_callbacks)
    pages = [f"/sifs/export-jobs/{job.pk}/", f"/sifs/export-jobs/{job.pk}/status.json",
             f"/sifs/export-jobs/{job.pk}/download/"]
    for who, code in (("lead", 200), ("other_lead", 404), ("auditor", 404), ("tech", 404)):
        assert [_client(world[w]).get(p).status_code for w in [who] for p in pages] == \
            [code] * 3, who
    assert Client().get(pages[0]).status_code == 302  # signed out: to sign in
    # The right is checked again at download: without the export right at one site of
    # the file, the file is refused (the page still shows the job).
    Membership.objects.filter(user=world["lead"], site=world["west"]).delete()
    c = _client(world["lead"])
    assert c.get(pages[0]).status_code == 200
    assert c.get(pages[2]).status_code == 403


def test_without_the_export_right_no_job_is_made(world, limit):
    before = ExportJob.objects.count()
    c = _client(world["tech"])
    assert c.get(f"/sifs/export.xlsx?{QUERY}").status_code == 403
    assert c.post(f"/sifs/export.xlsx?{QUERY}").status_code == 403
    assert _client(world["lead"]).post("/sifs/export.xlsx?sort=bogus").status_code == 400
    assert _client(world["lead"]).post("/sifs/export.pdf").status_code == 404
    assert ExportJob.objects.count() == before


def test_a_job_whose_owner_left_fails_without_a_file(world, limit,
                                                     django_capture_on_commit_callbacks):
    c = _client(world["auditor"])
    with django_capture_on_commit_callbacks(execute=False) as queued:
        c.post(f"/sifs/export.csv?{QUERY}")
    job = ExportJob.objects.latest("id")
    type(world["auditor"]).objects.filter(pk=world["auditor"].pk).update(is_active=False)
    for callback in queued:
        callback()
    job.refresh_from_db()
    assert job.status == ExportJob.Status.FAILED and "no longer active" in job.message
    assert export_jobs.job_file(job) is None and not job.result_path
    # A job is run once: running it again leaves it as it is.
    assert export_jobs.run_export_job(job.pk).status == ExportJob.Status.FAILED


def test_the_workbook_writer_keeps_each_kind_of_value():
    """The sheet written row by row reads back as written: text (escaped, blanks kept,
    control characters removed, formulas neutralised), numbers, truth values, dates."""
    day = dt.date(2026, 3, 1)
    rows = [[" a & <b> ", 1.5e-3, 7, True, day, None, "=1+1", "x\x01y", ""]] * 3
    header = [f"h{i}" for i in range(9)]
    with export.xlsx_file("Sheet & more", header, rows, heading=["Line one"]) as out:
        ws = load_workbook(io.BytesIO(out.read())).worksheets[0]
    assert ws.title == "Sheet & more" and ws.freeze_panes == "A4"
    got = [list(r) for r in ws.iter_rows(values_only=True)]
    assert got[0][0] == "Line one" and got[2] == header and ws["A3"].font.b
    for row in got[3:]:
        assert row[:5] == [" a & <b> ", 1.5e-3, 7, True, dt.datetime(2026, 3, 1)]
        assert row[5:] == [None, "'=1+1", "xy", None]
    assert len(got) == 6
