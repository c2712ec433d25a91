"""A long export written by a real Celery worker (PostgreSQL, the Redis broker of this
process): the job's progress is seen rising while it runs, the file equals the direct
export's, and only the person who asked downloads it.

In a module of its own: it commits its plant, which a module-scoped world rolled back
around it (tests/register/test_export_jobs.py) would hide from the worker."""

from __future__ import annotations

import os
import subprocess
import sys
import time

import pytest
from django.db import connection

from register import choices
from register.lead import export_jobs
from register.models import ExportJob
from tests import factories as f
from tests.conftest import need
from tests.register.test_export_jobs import BROWSER, _body, _cells, _client


@pytest.mark.services
@pytest.mark.xdist_group("services")
@pytest.mark.django_db(transaction=True)
def test_a_worker_writes_the_file_with_progress_seen_meanwhile(tmp_path, settings):
    from tests.integration.test_pack_queue import _kill
    from tests.integration.test_scan_worker_killed import (
        BROKER,
        ROOT,
        _database_url,
        _redis_ok,
        _wait,
    )

    need(connection.vendor == "postgresql", "PostgreSQL not configured (set DATABASE_URL)")
    need(_redis_ok(), "Redis broker not reachable (set CELERY_BROKER_URL to its own database)")
    import redis
    from django.core.management import call_command

    from config.celery import app
    from register.models import Site

    call_command("make_scale_plant", sifs=400, years=3, code="xjob", verbosity=0)
    site = Site.objects.get(code="xjob")
    lead = f.user("xjob-lead", site=site, role=choices.Role.LEAD)
    settings.EXPORT_BACKGROUND_SIFS = 100
    redis.Redis.from_url(BROKER).flushdb()
    eager = app.conf.task_always_eager
    app.conf.CELERY_TASK_ALWAYS_EAGER = False  # hand the task to the broker
    env = {**os.environ, "DATABASE_URL": _database_url(), "CELERY_BROKER_URL": BROKER,
           "CELERY_TASK_ALWAYS_EAGER": "false", "DJANGO_SETTINGS_MODULE": "config.settings.base",
           "SIF_LEDGER_VAR_DIR": str(settings.VAR_DIR)}
    log = tmp_path / "worker.log"
    out = open(log, "w")  # noqa: SIM115 - closed by _kill
    worker = subprocess.Popen(
        [sys.executable, "-m", "celery", "-A", "config", "worker", "-Q", settings.PACKS_QUEUE,
         "--concurrency=1", "--loglevel=INFO", "-n", "xjob@%h"],
        cwd=ROOT, env=env, stdout=out, stderr=subprocess.STDOUT, start_new_session=True)
    try:
        c = _client(lead)
        url = "/sifs/export.xlsx"
        assert b"Prepare the file" in c.get(url, HTTP_ACCEPT=BROWSER).content
        resp = c.post(url, HTTP_ACCEPT=BROWSER)
        job = ExportJob.objects.latest("id")
        assert resp.status_code == 302 and job.user == lead
        seen, pages = [], []

        def finished():
            state = c.get(f"/sifs/export-jobs/{job.pk}/status.json").json()
            pages.append((state["status"], state["sifs_done"], state["sifs_total"]))
            return state["finished"]

        _wait(lambda: "ready." in log.read_text(), 90, "the worker", log)
        # The job's row read as often as the database answers (a 400-SIF file is written
        # in a fraction of a second on an idle machine, between two of the page's polls),
        # and the status page between reads.
        row = ExportJob.objects.filter(pk=job.pk).values_list("status", "sifs_done",
                                                               "sifs_total")
        deadline = time.time() + 120
        while not finished():
            assert time.time() < deadline, f"timed out waiting for the export\n{pages[-5:]}"
            for _ in range(200):
                seen.append(row.get())
        seen += pages
        job.refresh_from_db()
        assert job.status == ExportJob.Status.DONE, job.message
        assert job.sifs_done == job.sifs_total == 400
        midway = {done for status, done, _ in seen if status == "running" and 0 < done < 400}
        assert midway <= set(range(export_jobs.PROGRESS_EVERY, 400, export_jobs.PROGRESS_EVERY))
        assert midway, seen[-5:]
        from_job = _body(c.get(f"/sifs/export-jobs/{job.pk}/download/"))
        other = f.user("xjob-lead2", site=site, role=choices.Role.LEAD)
        assert _client(other).get(f"/sifs/export-jobs/{job.pk}/download/").status_code == 404
        settings.EXPORT_BACKGROUND_SIFS = 1000
        assert _cells(from_job, "xlsx") == _cells(_body(c.get(url)), "xlsx")
    finally:
        app.conf.CELERY_TASK_ALWAYS_EAGER = eager
        _kill(worker, out)
        redis.Redis.from_url(BROKER).flushdb()
