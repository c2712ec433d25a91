"""Evidence packs on their own Celery queue, with a time limit, on real worker processes.

A pack asked for on the page's path (``request_pack``) lands on the packs queue: a worker
serving only "celery" never takes it and runs the due-date scan at once; a second worker
on the packs queue builds it, and a scan sent while it builds is done before the pack is.
A worker whose time limit is shorter than the build stops it and the pack is marked failed
with the plain message the pack page shows (the soft limit interrupts the task; the hard
limit, later, only ends a build that did not stop).

Real services: PostgreSQL, the Redis broker (its own database number, from
CELERY_BROKER_URL), worker processes started here (prefork pool: the time limits need it).
"""

import datetime as dt
import html
import os
import signal
import subprocess
import sys
import time

import pytest
import redis
from django.conf import settings
from django.contrib.auth import get_user_model
from django.core.management import call_command
from django.db import connection
from django.urls import reverse
from django.utils import timezone

from config.celery import app
from register import choices
from register.audit.evidence import pack_file, request_pack
from register.audit.evidence.build import STOPPED_STAGE, time_limit_message
from register.audit.evidence.requests import service_start
from register.models import EvidencePack, Membership, Site
from tests.conftest import need
from tests.integration.test_scan_worker_killed import (
    BROKER,
    ROOT,
    _database_url,
    _redis_ok,
    _scans_done,
    _stop,
    _wait,
)

SIFS = 60  # a pack of this plant builds for a good many seconds
LONG_SECTION = 100  # SIFs: its pages take about 3 s on an idle machine, its facts 1 s

pytestmark = [pytest.mark.services, pytest.mark.django_db(transaction=True)]


def _worker(tmp_path, name, queues, concurrency=1, **env_extra):
    """A prefork worker serving ``queues`` only, its log in tmp_path/<name>.log."""
    env = {**os.environ, "DATABASE_URL": _database_url(), "CELERY_BROKER_URL": BROKER,
           "CELERY_TASK_ALWAYS_EAGER": "false", "DJANGO_SETTINGS_MODULE": "config.settings.base",
           "SIF_LEDGER_VAR_DIR": str(tmp_path), "EMAIL_BACKEND":
           "django.core.mail.backends.locmem.EmailBackend", **env_extra}
    log = tmp_path / f"{name}.log"
    out = open(log, "w")  # noqa: SIM115 - closed by _stop
    proc = subprocess.Popen(
        [sys.executable, "-m", "celery", "-A", "config", "worker", "-Q", queues,
         f"--concurrency={concurrency}", "--loglevel=INFO", "-n", f"{name}@%h"],
        cwd=ROOT, env=env, stdout=out, stderr=subprocess.STDOUT, start_new_session=True)
    _wait(lambda: "ready." in log.read_text(), 90, f"worker {name}", log)
    return proc, out, log


def _kill(proc, out):
    """End a worker at once (a pack it may still be building is of no interest)."""
    if proc.poll() is None:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait(timeout=30)
    _stop(proc, out)


@pytest.fixture
def broker_tasks():
    """This process hands tasks to the broker (as the web app does in production)."""
    before = app.conf.task_always_eager
    app.conf.CELERY_TASK_ALWAYS_EAGER = False  # the namespaced key is the one read
    redis.Redis.from_url(BROKER).flushdb()
    yield redis.Redis.from_url(BROKER)
    app.conf.CELERY_TASK_ALWAYS_EAGER = before
    redis.Redis.from_url(BROKER).flushdb()


def _plant(sifs=SIFS):
    need(connection.vendor == "postgresql", "PostgreSQL not configured (set DATABASE_URL)")
    need(_redis_ok(), "Redis broker not reachable (set CELERY_BROKER_URL to its own database)")
    call_command("make_scale_plant", sifs=sifs, years=3, code="packq", verbosity=0)
    site = Site.objects.get(code="packq")
    auditor = get_user_model().objects.create_user("packq-auditor", password="x-Pass-2026!")
    Membership.objects.create(user=auditor, site=site, role=choices.Role.AUDITOR)
    return site, auditor


def _ask(site, auditor) -> EvidencePack:
    """A site pack asked for as the page asks (queued once the request is committed)."""
    today = timezone.localdate()
    start = max(service_start("site", site) or today, today - dt.timedelta(days=3 * 365))
    return request_pack(auditor, scope="site", site=site, period_start=start,
                        period_end=today)


def _status(pack) -> str:
    return EvidencePack.objects.values_list("status", flat=True).get(pk=pack.pk)


def test_a_pack_waits_on_its_own_queue_and_never_delays_the_scan(tmp_path, broker_tasks):
    site, auditor = _plant()
    r = broker_tasks
    pack = _ask(site, auditor)
    # On the packs queue (a Redis list named after it), nothing on the default queue.
    assert r.llen(settings.PACKS_QUEUE) == 1 and r.llen("celery") == 0

    general, general_out, general_log = _worker(tmp_path, "general", "celery")
    packs = None
    try:
        app.send_task("register.scan")
        _wait(lambda: _scans_done(general_log) >= 1, 90, "the scan", general_log)
        time.sleep(1)  # time enough to have taken the pack too, were it on its queue
        assert _status(pack) == "queued"
        assert r.llen(settings.PACKS_QUEUE) == 1
        assert "register.evidence_pack[" not in general_log.read_text()  # never received

        packs, packs_out, packs_log = _worker(tmp_path, "packs", settings.PACKS_QUEUE)
        _wait(lambda: _status(pack) == "running", 60, "the pack to start", packs_log)
        app.send_task("register.scan")
        t = time.monotonic()
        _wait(lambda: _scans_done(general_log) >= 2, 60, "the scan beside the pack",
              general_log)
        scan_seconds = time.monotonic() - t
        assert _status(pack) == "running", "the pack ended before the scan: not a long pack"
        _wait(lambda: _status(pack) in ("done", "failed"), 600, "the pack", packs_log)
        pack.refresh_from_db()
        assert pack.status == "done", pack.error
        assert (tmp_path / pack.result_path).stat().st_size == pack.result_size > 0
        build_seconds = (pack.finished_at - pack.started_at).total_seconds()
        assert scan_seconds < build_seconds / 2, (scan_seconds, build_seconds)
        assert "register.scan[" not in packs_log.read_text()
    finally:
        _stop(general, general_out)
        if packs is not None:
            _kill(packs, packs_out)


def test_a_pack_over_its_time_limit_is_marked_failed_with_a_plain_message(
        tmp_path, broker_tasks, client):
    # One section of all the SIFs, so that the worker's soft limit comes in the middle of
    # its pages (where the pack's own check, from the pack's start, does not look): on a
    # fast machine short sections each end below the limit and the pack's own check at
    # the next step stops the build instead, and so it does on a slow one when the
    # section's first steps (facts and figures, where it looks) last past the limit.
    site, auditor = _plant(sifs=LONG_SECTION)
    client.force_login(auditor)

    # The soft limit interrupts the build, which records the failure and its reason.
    worker, out, log = _worker(tmp_path, "soft", settings.PACKS_QUEUE,
                               PACK_TIME_LIMIT_SECONDS="2", PACK_HARD_TIME_LIMIT_SECONDS="60",
                               PACK_SECTION_SIFS=str(LONG_SECTION))
    try:
        pack = _ask(site, auditor)
        _wait(lambda: _status(pack) == "failed", 60, "the pack to stop", log)
        pack.refresh_from_db()
        assert pack.error == time_limit_message(2)
        assert pack.stage == STOPPED_STAGE and pack.finished_at is not None
        assert pack.result_path == "" and pack_file(pack) is None
        assert "Soft time limit (2s) exceeded" in log.read_text()
        page = client.get(reverse("audit:pack_detail", args=[pack.pk])).content.decode()
        assert "The build failed: " + html.escape(time_limit_message(2)) in page
        status = client.get(reverse("audit:pack_status", args=[pack.pk])).json()
        assert status["status"] == "failed" and status["finished"] is True
    finally:
        _stop(worker, out)
