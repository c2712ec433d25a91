"""A real Celery worker and beat on the real Redis broker, against the real PostgreSQL.

Plans refreshed while "not yet due" whose due date has since passed cross the threshold
when beat's scan runs: exactly one state-change row and one notification per change are
recorded, and later scans record none.
"""

import datetime as dt
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import redis
from django.db import connection
from django.utils import timezone

from register import choices
from register.models import Notification, TestPlan
from register.models.notifications import PlanStateChange
from register.schedule.due import refresh_plans, with_state
from tests import factories as f
from tests.conftest import need

ROOT = Path(__file__).resolve().parents[2]
BROKER = os.environ.get("CELERY_BROKER_URL", "redis://127.0.0.1:6379/0")

pytestmark = [pytest.mark.services, pytest.mark.django_db(transaction=True)]


def _redis_ok() -> bool:
    if not BROKER.startswith("redis://"):
        return False
    try:
        return redis.Redis.from_url(BROKER, socket_connect_timeout=2).ping()
    except redis.RedisError:
        return False


def _database_url() -> str:
    s = connection.settings_dict
    return f"postgres://{s['USER']}@{s['HOST'] or '127.0.0.1'}:{s['PORT'] or 5432}/{s['NAME']}"


def test_beat_scan_on_real_worker_sends_one_notification_per_change(tmp_path):
    need(connection.vendor == "postgresql", "PostgreSQL not configured (set DATABASE_URL)")
    need(_redis_ok(), "Redis broker not reachable (set CELERY_BROKER_URL)")
    site = f.site()
    unit = f.unit(site)
    owner = f.user("owner", site=site, role=choices.Role.TECHNICIAN, email="owner@x.invalid")
    f.user("lead", site=site, role=choices.Role.LEAD, email="lead@x.invalid")
    today = timezone.localdate()
    # Two SIFs due yesterday, one due in 10 days; caches computed 60 days ago (all on track).
    for days in (-1, -1, 10):
        f.sif(unit, owner=owner, in_service=today - dt.timedelta(days=365 - days))
    refresh_plans(TestPlan.objects.all(), today - dt.timedelta(days=60))
    sixty_days_ago = today - dt.timedelta(days=60)
    assert set(with_state(TestPlan.objects.all(), sixty_days_ago).values_list(
        "state", flat=True)) == {"on_track"}

    broker = BROKER  # its own database number, given by whoever runs the suite
    redis.Redis.from_url(broker).flushdb()
    env = {**os.environ, "DATABASE_URL": _database_url(), "CELERY_BROKER_URL": broker,
           "CELERY_TASK_ALWAYS_EAGER": "false", "SCAN_PERIOD_SECONDS": "2",
           "DJANGO_SETTINGS_MODULE": "config.settings.base",
           "SIF_LEDGER_VAR_DIR": str(tmp_path), "EMAIL_BACKEND":
           "django.core.mail.backends.locmem.EmailBackend"}
    log_file = open(tmp_path / "worker.log", "w")  # noqa: SIM115 - closed in finally
    worker = subprocess.Popen(
        [sys.executable, "-m", "celery", "-A", "config", "worker", "-B", "--concurrency=1",
         "--loglevel=INFO", f"--schedule={tmp_path / 'beat-schedule'}"],
        cwd=ROOT, env=env, stdout=log_file, stderr=subprocess.STDOUT,
        start_new_session=True)
    try:
        deadline = time.time() + 90
        expected = {("owner", "overdue"), ("owner", "due_soon")}
        while time.time() < deadline:
            rows = list(Notification.objects.values_list("recipient__username", "subject_key"))
            if len(rows) >= 3:
                break
            time.sleep(1)
        time.sleep(6)  # at least two more beat periods: they must add nothing
        rows = list(Notification.objects.values_list("recipient__username", "subject_key"))
        log = (tmp_path / "worker.log").read_text()
        assert len(rows) == 3, log[-3000:]
        assert {(u, k.split(":")[2]) for u, k in rows} == expected
        assert len(set(rows)) == 3
        assert log.count("register.scan") >= 3, "beat should have run the scan several times"
        states = sorted(with_state(TestPlan.objects.all()).values_list("state", flat=True))
        assert states == ["due_soon", "overdue", "overdue"]
        changes = sorted(PlanStateChange.objects.values_list("from_state", "to_state"))
        assert changes == [("", "due_soon"), ("", "overdue"), ("", "overdue")]
    finally:
        os.killpg(worker.pid, signal.SIGTERM)
        worker.wait(timeout=30)
        log_file.close()
