"""Notifications are e-mailed through a real SMTP server on loopback: each by its own task
on a real Celery worker (Redis broker, tasks not eager), retried with backoff while the
server is down and never marked sent before it accepted the message, then delivered
exactly once; the sweeper does the same for a notification whose task was lost. Subjects
are whole phrases; bodies carry the absolute link and the caution line."""

import datetime as dt
import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import pytest
import redis
from aiosmtpd.controller import Controller
from django.db import connection
from django.utils import timezone

from register import choices
from register.inbox.delivery import email_subject, send_pending_emails
from register.models import Notification
from tests import factories as f
from tests.conftest import need

ROOT = Path(__file__).resolve().parents[2]
BROKER = os.environ.get("CELERY_BROKER_URL", "")
SITE_URL = "https://ledger.example.invalid"


class Inbox:
    def __init__(self):
        self.messages = []

    async def handle_DATA(self, server, session, envelope):
        self.messages.append(envelope)
        return "250 OK"


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _server(port):
    inbox = Inbox()
    controller = Controller(inbox, hostname="127.0.0.1", port=port)
    controller.start()
    return inbox, controller


@pytest.fixture
def smtp(settings):
    port = _free_port()
    inbox, controller = _server(port)
    settings.EMAIL_BACKEND = "django.core.mail.backends.smtp.EmailBackend"
    settings.EMAIL_HOST, settings.EMAIL_PORT = "127.0.0.1", port
    settings.EMAIL_TIMEOUT = 5
    settings.SITE_URL = SITE_URL
    yield inbox, port
    controller.stop()


LONG = ("U10-SIF-101 (High-high level in desalter V-1001 closes inlet): Does not meet its "
        "target: achieved PFDavg over the last 12 months 2.39e-02 is above the target")


def _notes(n=2, *, age=dt.timedelta(hours=1)):
    """Notifications whose own task was lost (created an hour ago, never e-mailed)."""
    site = f.site()
    lead = f.user(f"lead-mail{site.pk}", site=site, role=choices.Role.LEAD,
                  email="lead@example.invalid")
    notes = [Notification.objects.create(recipient=lead, site=site,
                                         kind=choices.NotificationKind.TARGET,
                                         subject_key=f"k{i}", message=LONG, link="/sifs/1/")
             for i in range(n)]
    Notification.objects.filter(pk__in=[x.pk for x in notes]).update(
        created_at=timezone.now() - age)
    return notes


@pytest.mark.django_db
def test_the_sweeper_sends_only_when_accepted_and_retries_after_a_failure(smtp, settings):
    inbox, port = smtp
    notes = _notes()
    fresh = _notes(1, age=dt.timedelta(0))  # its own task is still on its way: left to it
    settings.EMAIL_PORT = _free_port()  # nothing listens there: the send fails
    assert send_pending_emails() == 0
    for n in Notification.objects.filter(pk__in=[x.pk for x in notes]):
        assert n.emailed_at is None and n.email_attempts == 1 and n.email_error
        assert n.email_claimed_at is None  # released for the next try
    assert inbox.messages == []
    settings.EMAIL_PORT = port  # the server is back: the next run delivers both
    assert send_pending_emails() == 2
    assert len(inbox.messages) == 2
    assert send_pending_emails() == 0  # and never twice
    assert Notification.objects.get(pk=fresh[0].pk).email_attempts == 0
    body = inbox.messages[0].content.decode()
    assert f"{SITE_URL}/sifs/1/" in body
    assert "do not replace, a functional safety assessment" in body
    for n in Notification.objects.filter(pk__in=[x.pk for x in notes]):
        assert n.emailed_at is not None and n.email_error == ""


def test_subject_keeps_whole_phrases():
    subject = email_subject(LONG)
    assert len(subject) <= 78 and subject.endswith("…")
    # whole phrases only: here the SIF and what it is
    assert subject == ("[SIF Ledger] U10-SIF-101 (High-high level in desalter V-1001 closes "
                       "inlet)…")
    text = "U10-SIF-101 Full proof test: overdue (due 01 Mar 2026)."
    assert email_subject(text) == "[SIF Ledger] " + text  # short enough: never cut
    assert email_subject(text.replace(")", ", 30 days overdue)")) == (
        "[SIF Ledger] U10-SIF-101 Full proof test: overdue (due 01 Mar 2026…")
    two = ("U10-SIF-101 Full proof test: due soon, due 01 Mar 2026; assigned to the night "
           "shift of unit 10")
    assert email_subject(two) == ("[SIF Ledger] U10-SIF-101 Full proof test: due soon, due "
                                  "01 Mar 2026…")
    # one phrase longer than a subject line is kept whole, not cut inside
    one = "Dangerous failure found in a full proof test of LT-101A LT-101B XV-101 and XV-102"
    assert email_subject(one) == "[SIF Ledger] " + one
    assert email_subject("Short one") == "[SIF Ledger] Short one"


# ---------------------------------------------------------------------------------------
# A real worker: server down, retried with backoff, then delivered exactly once
# ---------------------------------------------------------------------------------------


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


@pytest.fixture
def broker_tasks():
    """This process hands tasks to the broker (as the web process does in production)."""
    from config.celery import app

    before = app.conf.task_always_eager
    app.conf.CELERY_TASK_ALWAYS_EAGER = False  # the namespaced key is the one read
    assert not app.conf.task_always_eager
    yield app
    app.conf.CELERY_TASK_ALWAYS_EAGER = before


def _wait(condition, seconds, what):
    deadline = time.time() + seconds
    while time.time() < deadline:
        if condition():
            return
        time.sleep(0.3)
    raise AssertionError(f"timed out waiting for {what}")


@pytest.mark.services
@pytest.mark.django_db(transaction=True)
def test_real_worker_retries_while_the_server_is_down_then_delivers_once(
        tmp_path, broker_tasks):
    need(connection.vendor == "postgresql", "PostgreSQL not configured (set DATABASE_URL)")
    need(_redis_ok(), "Redis broker not reachable (set CELERY_BROKER_URL to its own database)")
    redis.Redis.from_url(BROKER).flushdb()
    port = _free_port()  # the mail server will listen here, later
    env = {**os.environ, "DATABASE_URL": _database_url(), "CELERY_BROKER_URL": BROKER,
           "CELERY_TASK_ALWAYS_EAGER": "false", "DJANGO_SETTINGS_MODULE": "config.settings.base",
           "SIF_LEDGER_VAR_DIR": str(tmp_path), "SITE_URL": SITE_URL,
           "EMAIL_BACKEND": "django.core.mail.backends.smtp.EmailBackend",
           "EMAIL_HOST": "127.0.0.1", "EMAIL_PORT": str(port), "EMAIL_TIMEOUT": "5",
           "EMAIL_USE_TLS": "false"}
    log_path = tmp_path / "worker.log"
    log_file = open(log_path, "w")  # noqa: SIM115 - closed in finally
    worker = subprocess.Popen(
        [sys.executable, "-m", "celery", "-A", "config", "worker", "--pool=solo",
         "--loglevel=INFO"], cwd=ROOT, env=env, stdout=log_file, stderr=subprocess.STDOUT,
        start_new_session=True)
    controller = None
    try:
        site = f.site("north")
        lead = f.user("lead", site=site, role=choices.Role.LEAD, email="lead@example.invalid")
        tech = f.user("tech", site=site, role=choices.Role.TECHNICIAN)
        sif = f.sif(f.unit(site), tag="U10-SIF-101")
        # Signing a record with a dangerous failure notifies the lead; the e-mail task is
        # queued when the signing commits.
        record = f.full_test(sif, tech, timezone.now() - dt.timedelta(hours=2),
                             fail_tag=f"LT-{sif.tag}-A")
        note = Notification.objects.get(recipient=lead, subject_key=f"failure:{record.pk}")

        def current():
            return Notification.objects.get(pk=note.pk)

        _wait(lambda: current().email_attempts >= 2, 60, "two failed attempts")
        n = current()
        assert n.emailed_at is None and "Connection refused" in n.email_error, log_path.read_text()
        assert log_path.read_text().count("Retry in") >= 2  # the task's own retries

        inbox, controller = _server(port)  # the server comes up
        _wait(lambda: current().emailed_at is not None, 60, "delivery")
        # The recompute after the signing may have notified more (the SIF's verdict): every
        # notification is delivered, each exactly once.
        _wait(lambda: not Notification.objects.filter(emailed_at__isnull=True).exists(), 60,
              "every notification delivered")
        time.sleep(4)  # long enough for any duplicate to arrive
        log = log_path.read_text()
        assert len(inbox.messages) == Notification.objects.count(), log[-3000:]
        mine = [m for m in inbox.messages if b"dangerous failure found" in m.content]
        assert len(mine) == 1, log[-3000:]
        n = current()
        assert n.email_error == "" and n.email_claimed_at is None
        message = mine[0]
        assert message.rcpt_tos == ["lead@example.invalid"]
        content = message.content.decode()
        assert f"{SITE_URL}/tests/{record.pk}/" in content
        assert "do not replace, a functional safety assessment" in content
        assert "Subject: [SIF Ledger] U10-SIF-101: dangerous failure found" in content
    finally:
        os.killpg(worker.pid, signal.SIGTERM)
        worker.wait(timeout=30)
        log_file.close()
        if controller is not None:
            controller.stop()
