"""A real Celery worker killed with SIGKILL in the middle of a scan leaves nothing half
done (the scan is one transaction); the next run on another worker writes every state
change and notification once, and a run after that writes nothing.

Real services: PostgreSQL, the Redis broker (its own database number, from
CELERY_BROKER_URL), worker processes started here and killed by their PID.
"""

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import redis
from django.contrib.auth import get_user_model
from django.core.management import call_command
from django.db import connection
from django.db.models import Count

from config.celery import app
from register import choices
from register.models import Membership, Notification, SafetyFunction, Site, TestPlan
from register.models.notifications import PlanStateChange
from register.schedule.due import refresh_plans
from tests.conftest import need

ROOT = Path(__file__).resolve().parents[2]
BROKER = os.environ.get("CELERY_BROKER_URL", "")
SIFS = 1500
ANNOUNCED = {"due_soon", "overdue", "escalated", "escalated_2"}

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


def _worker(tmp_path, name):
    env = {**os.environ, "DATABASE_URL": _database_url(), "CELERY_BROKER_URL": BROKER,
           "CELERY_TASK_ALWAYS_EAGER": "false", "DJANGO_SETTINGS_MODULE": "config.settings.base",
           "SIF_LEDGER_VAR_DIR": str(tmp_path), "EMAIL_BACKEND":
           "django.core.mail.backends.locmem.EmailBackend"}
    log = tmp_path / f"{name}.log"
    out = open(log, "w")  # noqa: SIM115 - closed by _stop
    # solo pool: the task runs in this very process, so its PID is the one to kill
    proc = subprocess.Popen(
        [sys.executable, "-m", "celery", "-A", "config", "worker", "--pool=solo",
         "--loglevel=INFO", "-n", f"{name}@%h"], cwd=ROOT, env=env, stdout=out,
        stderr=subprocess.STDOUT, start_new_session=True)
    return proc, out, log


def _stop(proc, out):
    if proc.poll() is None:
        os.kill(proc.pid, signal.SIGTERM)
        proc.wait(timeout=60)
    out.close()


def _wait(condition, seconds, what, log=None):
    deadline = time.time() + seconds
    while time.time() < deadline:
        if condition():
            return
        time.sleep(0.05)
    raise AssertionError(f"timed out waiting for {what}\n" +
                         (log.read_text()[-3000:] if log else ""))


def _kill(proc, backends: list[int]):
    """SIGKILL the worker ``proc`` and wait for its database sessions ``backends`` to end."""
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait(timeout=30)
    assert proc.returncode == -signal.SIGKILL
    _wait(lambda: not any(_backend_alive(pid) for pid in backends), 30,
          "the killed worker's database session to end")


def _scans_done(log: Path) -> int:
    return sum(1 for line in log.read_text().splitlines()
               if "register.scan[" in line and "succeeded" in line)


def _other_backends_in_a_transaction(min_seconds: float) -> list[int]:
    with connection.cursor() as c:
        c.execute("SELECT pid FROM pg_stat_activity WHERE datname = current_database() "
                  "AND pid <> pg_backend_pid() AND xact_start IS NOT NULL "
                  "AND now() - xact_start > %s * interval '1 second'", [min_seconds])
        return [row[0] for row in c.fetchall()]


def _backend_alive(pid: int) -> bool:
    with connection.cursor() as c:
        c.execute("SELECT count(*) FROM pg_stat_activity WHERE pid = %s", [pid])
        return c.fetchone()[0] > 0


def _plant():
    call_command("make_scale_plant", sifs=SIFS, years=3, code="killed", verbosity=0)
    site = Site.objects.get(code="killed")
    users = get_user_model().objects
    lead = users.create_user("killed-lead", email="lead@example.invalid")
    owner = users.create_user("killed-owner", email="owner@example.invalid")
    Membership.objects.create(user=lead, site=site, role=choices.Role.LEAD)
    SafetyFunction.objects.filter(unit__site=site).update(owner=owner)
    plans = TestPlan.objects.filter(sif__unit__site=site)
    # As an earlier version left them: a due date cached, no state dates yet (every plan
    # is then looked at by the next scan, the longest scan there is).
    refresh_plans(plans)
    plans.update(due_soon_on=None, escalated_on=None, escalated_2_on=None,
                 next_change_on=None)
    return lead, owner, plans


@pytest.fixture
def broker_tasks():
    """This process hands tasks to the broker (as beat does in production)."""
    before = app.conf.task_always_eager
    app.conf.CELERY_TASK_ALWAYS_EAGER = False  # the namespaced key is the one read
    yield app
    app.conf.CELERY_TASK_ALWAYS_EAGER = before


def test_a_worker_killed_mid_scan_leaves_nothing_half_done_and_the_next_run_completes(
        tmp_path, broker_tasks):
    need(connection.vendor == "postgresql", "PostgreSQL not configured (set DATABASE_URL)")
    need(_redis_ok(), "Redis broker not reachable (set CELERY_BROKER_URL to its own database)")
    redis.Redis.from_url(BROKER).flushdb()
    lead, owner, plans = _plant()

    first, out, log = _worker(tmp_path, "first")
    try:
        _wait(lambda: "ready." in log.read_text(), 60, "the first worker", log)
        app.send_task("register.scan")
        # The scan is inside its transaction (refreshing the plans): kill the worker there.
        _wait(lambda: _other_backends_in_a_transaction(0.3), 60, "the scan's transaction",
              log)
        _kill(first, _other_backends_in_a_transaction(0.3))
    finally:
        _stop(first, out)
    assert _scans_done(log) == 0  # killed before the scan finished
    # Nothing half done: no row, no notification, no plan refreshed.
    assert PlanStateChange.objects.count() == 0
    assert Notification.objects.count() == 0
    assert not plans.filter(due_soon_on__isnull=False).exists()

    second, out, log = _worker(tmp_path, "second")
    try:
        _wait(lambda: "ready." in log.read_text(), 60, "the second worker", log)
        app.send_task("register.scan")
        _wait(lambda: _scans_done(log) >= 1, 180, "the second run", log)
        rows = PlanStateChange.objects.filter(plan__in=plans)
        assert rows.count() == SIFS  # one first row per plan
        assert not rows.values("plan", "due_on", "to_state").annotate(n=Count("id")).filter(
            n__gt=1).exists()
        announced = rows.filter(to_state__in=ANNOUNCED)
        escalated = announced.filter(to_state__in=["escalated", "escalated_2"]).count()
        assert announced.count() > 0 and escalated > 0  # the plant has late plans
        notes = Notification.objects.all()
        # the owner hears of each announced change, the lead of each escalation
        assert notes.filter(recipient=owner).count() == announced.count()
        assert notes.filter(recipient=lead).count() == escalated
        assert not notes.values("recipient", "subject_key").annotate(n=Count("id")).filter(
            n__gt=1).exists()
        before = (rows.count(), notes.count())

        runs = _scans_done(log)
        app.send_task("register.scan")  # and again: nothing new
        _wait(lambda: _scans_done(log) > runs, 60, "the third run", log)
        assert (rows.count(), Notification.objects.count()) == before
    finally:
        _stop(second, out)
        redis.Redis.from_url(BROKER).flushdb()
