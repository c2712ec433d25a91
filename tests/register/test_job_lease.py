"""Background jobs whose worker is gone: an export or import job left "running" with no
session holding its lease is failed by the sweep with a plain message, one whose lease is
held is left alone; a job left "running" is run again by the next worker given it, one
held elsewhere is not; a pack "running" past the hard time limit is failed.

The lease is a PostgreSQL advisory lock: another worker is stood for by a second database
session taking the lock (as the worker's session would) and ending.
"""

from __future__ import annotations

import datetime as dt
import time

import pytest
from django.db import DEFAULT_DB_ALIAS, connection, connections
from django.utils import timezone

from register import choices, job_lease
from register.lead import spreadsheet
from register.lead.tasks import resend_queued, sweep_stopped_jobs
from register.models import EvidencePack, ExportJob, ImportJob, SafetyFunction
from tests import factories as f
from tests.conftest import need
from tests.register.test_import_job import _csv, _rows

pytestmark = pytest.mark.django_db


@pytest.fixture
def plant():
    site = f.site("lease")
    f.unit(site, "C3")
    sensor = f.device_type("Lease test transmitter")
    valve = f.device_type("Lease test valve", role="final", lambda_dd_per_hour=0.0)
    lead = f.user("lease_lead", site=site, role=choices.Role.LEAD)
    return {"site": site, "lead": lead, "sensor": sensor.name, "valve": valve.name}


def _import_job(plant, status=ImportJob.Status.RUNNING, sifs=3) -> ImportJob:
    data = _csv(_rows(plant, sifs=sifs))
    return ImportJob.objects.create(
        site=plant["site"], user=plant["lead"], reference="CR-77", file_name="lease.csv",
        file_data=data, rows_total=5 * sifs, rows_done=5 if status == "running" else 0,
        status=status, started_at=timezone.now() if status == "running" else None)


def _export_job(plant) -> ExportJob:
    return ExportJob.objects.create(user=plant["lead"], kind=ExportJob.Kind.LIST, fmt="csv",
                                    status=ExportJob.Status.RUNNING, sifs_total=10,
                                    sifs_done=4, started_at=timezone.now())


class _OtherWorker:
    """A database session of its own that takes jobs' leases, as a worker's would."""

    def __init__(self):
        self.conn = connections.create_connection(DEFAULT_DB_ALIAS)
        with self.conn.cursor() as cur:
            cur.execute("SELECT pg_backend_pid()")
            self.pid = cur.fetchone()[0]

    def take(self, kind: str, job_id: int) -> bool:
        with self.conn.cursor() as cur:
            cur.execute("SELECT pg_try_advisory_lock(%s, %s)",
                        [job_lease.LOCK_CLASS[kind], job_id])
            return cur.fetchone()[0]

    def end(self):
        """The session ends, and its locks with it (once its server process is gone)."""
        self.conn.close()
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:
            with connection.cursor() as cur:
                cur.execute("SELECT count(*) FROM pg_stat_activity WHERE pid = %s",
                            [self.pid])
                if not cur.fetchone()[0]:
                    return
            time.sleep(0.02)
        raise AssertionError("the other session did not end")


def test_a_running_job_is_kept_while_its_lease_is_held_and_failed_once_its_holder_is_gone(
        plant):
    need(connection.vendor == "postgresql", "PostgreSQL not configured (set DATABASE_URL)")
    imp, exp = _import_job(plant), _export_job(plant)
    other = _OtherWorker()
    try:
        assert other.take("import", imp.pk) and other.take("export", exp.pk)
        assert job_lease.sweep() == {"import": [], "export": [], "pack": []}
        imp.refresh_from_db()
        exp.refresh_from_db()
        assert (imp.status, exp.status) == ("running", "running")
    finally:
        other.end()

    assert sweep_stopped_jobs()["failed"] == {"import": [imp.pk], "export": [exp.pk],
                                              "pack": []}
    imp.refresh_from_db()
    exp.refresh_from_db()
    assert imp.status == ImportJob.Status.FAILED and imp.is_finished
    assert imp.message == job_lease.GONE["import"] and "Nothing has been written" in imp.message
    assert imp.rows_done == 0 and imp.finished_at is not None
    assert exp.status == ExportJob.Status.FAILED and exp.message == job_lease.GONE["export"]
    # the sweep itself let go of the leases it took
    again = _OtherWorker()
    try:
        assert again.take("import", imp.pk) and again.take("export", exp.pk)
    finally:
        again.end()
    assert job_lease.sweep() == {"import": [], "export": [], "pack": []}


def test_a_job_held_by_another_worker_is_not_run_and_one_left_running_is_run_again(plant):
    need(connection.vendor == "postgresql", "PostgreSQL not configured (set DATABASE_URL)")
    job = _import_job(plant)
    other = _OtherWorker()
    try:
        assert other.take("import", job.pk)
        assert spreadsheet.run_import_job(job.pk).status == ImportJob.Status.RUNNING
        assert not SafetyFunction.objects.filter(unit__site=plant["site"]).exists()
    finally:
        other.end()
    # its worker is gone, its writing rolled back: the next worker given it writes it
    done = spreadsheet.run_import_job(job.pk)
    assert done.status == ImportJob.Status.DONE, done.message
    assert done.rows_done == done.rows_total == 15
    assert SafetyFunction.objects.filter(unit__site=plant["site"]).count() == 3
    # and once done, never again
    assert spreadsheet.run_import_job(job.pk).finished_at == done.finished_at
    assert SafetyFunction.objects.filter(unit__site=plant["site"]).count() == 3


def test_a_pack_running_past_the_hard_time_limit_is_failed_and_a_younger_one_is_not(
        plant, settings):
    settings.PACK_HARD_TIME_LIMIT_SECONDS = 600
    now = timezone.now()
    today = timezone.localdate()

    def pack(started_minutes_ago):
        return EvidencePack.objects.create(
            scope=EvidencePack.Scope.SITE, site=plant["site"], requested_by=plant["lead"],
            period_start=today - dt.timedelta(days=365), period_end=today,
            status=EvidencePack.Status.RUNNING,
            started_at=now - dt.timedelta(minutes=started_minutes_ago))

    old, young = pack(10 + 6), pack(10 + 4)  # the limit, plus five minutes' grace
    assert sweep_stopped_jobs()["failed"]["pack"] == [old.pk]
    old.refresh_from_db()
    young.refresh_from_db()
    assert old.status == EvidencePack.Status.FAILED
    assert (old.error, old.stage) == (job_lease.GONE["pack"], job_lease.GONE_STAGE)
    assert young.status == EvidencePack.Status.RUNNING


def test_a_job_still_queued_long_after_it_was_asked_for_is_sent_again_and_written_once(
        plant, settings):
    settings.JOB_RESEND_MINUTES = 15
    lost, young = (_import_job(plant, status=ImportJob.Status.QUEUED) for _ in range(2))
    now = timezone.now()
    ImportJob.objects.filter(pk=lost.pk).update(created_at=now - dt.timedelta(minutes=16))
    ImportJob.objects.filter(pk=young.pk).update(created_at=now - dt.timedelta(minutes=14))
    # its message lost: sent again, and written (tasks run in this process here)
    assert sweep_stopped_jobs()["resent"] == {"import": [lost.pk], "export": []}
    lost.refresh_from_db()
    young.refresh_from_db()
    assert lost.status == ImportJob.Status.DONE, lost.message
    assert young.status == ImportJob.Status.QUEUED
    assert SafetyFunction.objects.filter(unit__site=plant["site"]).count() == 3
    # a second message of the same job writes nothing more
    assert spreadsheet.run_import_job(lost.pk).finished_at == lost.finished_at
    assert resend_queued(now) == {"import": [], "export": []}
    assert SafetyFunction.objects.filter(unit__site=plant["site"]).count() == 3


def test_beat_runs_the_sweep(settings):
    entry = settings.CELERY_BEAT_SCHEDULE["stopped-jobs"]
    assert entry["task"] == sweep_stopped_jobs.name
    assert entry["schedule"] == settings.JOB_SWEEP_SECONDS > 0
