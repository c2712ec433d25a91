"""A real Celery worker killed with SIGKILL in the middle of a long import: its writing is
rolled back with its database session, the job reads "running" with no one on it, and the
sweep beat runs (here sent to a second real worker) fails it with a plain message;
nothing of the file is in the register.

Real services: PostgreSQL, the Redis broker (its own database number, from
CELERY_BROKER_URL), worker processes started here and killed by their PID.
"""

import pytest
import redis
from django.db import connection

from config.celery import app
from register import choices, job_lease
from register.models import ImportJob, SafetyFunction
from tests import factories as f
from tests.conftest import need
from tests.integration.test_scan_worker_killed import (
    BROKER,
    _kill,
    _other_backends_in_a_transaction,
    _redis_ok,
    _stop,
    _wait,
    _worker,
    broker_tasks,  # noqa: F401 - fixture
)
from tests.register.test_import_job import _csv, _rows

pytestmark = [pytest.mark.services, pytest.mark.django_db(transaction=True)]

SIFS = 120  # 600 rows: long enough to be killed in the middle


def _succeeded(log, task: str) -> int:
    return sum(1 for line in log.read_text().splitlines()
               if f"{task}[" in line and "succeeded" in line)


def test_a_worker_killed_mid_import_leaves_nothing_and_the_sweep_fails_the_job(
        tmp_path, broker_tasks):  # noqa: F811
    need(connection.vendor == "postgresql", "PostgreSQL not configured (set DATABASE_URL)")
    need(_redis_ok(), "Redis broker not reachable (set CELERY_BROKER_URL to its own database)")
    redis.Redis.from_url(BROKER).flushdb()
    site = f.site("killimp")
    f.unit(site, "C3")
    plant = {"sensor": f.device_type("Killed import transmitter").name,
             "valve": f.device_type("Killed import valve", role="final",
                                    lambda_dd_per_hour=0.0).name}
    lead = f.user("killimp_lead", site=site, role=choices.Role.LEAD)
    job = ImportJob.objects.create(site=site, user=lead, reference="CR-KILL",
                                   file_name="long.csv", file_data=_csv(_rows(plant, SIFS)),
                                   rows_total=5 * SIFS)

    first, out, log = _worker(tmp_path, "importer")
    try:
        _wait(lambda: "ready." in log.read_text(), 60, "the first worker", log)
        app.send_task("register.import_job", args=[job.pk])
        # The progress is written beside the import's transaction: kill it mid-way.
        _wait(lambda: ImportJob.objects.get(pk=job.pk).rows_done >= 50, 120,
              "rows being written", log)
        _kill(first, _other_backends_in_a_transaction(0.1))
    finally:
        _stop(first, out)
    job.refresh_from_db()
    assert job.status == ImportJob.Status.RUNNING and 0 < job.rows_done < job.rows_total
    assert not SafetyFunction.objects.filter(unit__site=site).exists()  # rolled back

    second, out, log = _worker(tmp_path, "sweeper")
    try:
        _wait(lambda: "ready." in log.read_text(), 60, "the second worker", log)
        app.send_task("register.sweep_stopped_jobs")
        _wait(lambda: _succeeded(log, "register.sweep_stopped_jobs") >= 1, 60, "the sweep",
              log)
    finally:
        _stop(second, out)
        redis.Redis.from_url(BROKER).flushdb()
    job.refresh_from_db()
    assert job.status == ImportJob.Status.FAILED
    assert job.message == job_lease.GONE["import"] and job.rows_done == 0
    assert not SafetyFunction.objects.filter(unit__site=site).exists()
