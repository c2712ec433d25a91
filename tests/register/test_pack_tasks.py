"""The evidence-pack task's queue and time limits as configured, the compose file's workers
serving every queue, and how a pack stopped at its limit is recorded. (The same on real
worker processes: tests/integration/test_pack_queue.py.)"""

import datetime as dt
import re
from pathlib import Path

import pytest
import yaml
from django.conf import settings
from django.utils import timezone

from config.celery import app
from register.audit.evidence.build import STOPPED_STAGE, mark_failed, time_limit_message
from register.audit.tasks import PackRequest, build_evidence_pack
from register.models import EvidencePack
from tests import factories as f

ROOT = Path(__file__).resolve().parents[2]


def test_packs_are_routed_to_their_own_queue_and_the_scan_is_not():
    router = app.amqp.router
    assert router.route({}, "register.evidence_pack")["queue"].name == settings.PACKS_QUEUE
    assert settings.PACKS_QUEUE not in {"celery", settings.CALCS_QUEUE}
    assert router.route({}, "register.scan")["queue"].name == "celery"


def test_the_task_takes_its_time_limits_from_the_workers_settings():
    task = app.tasks["register.evidence_pack"]
    assert task is build_evidence_pack or task.name == build_evidence_pack.name
    assert task.soft_time_limit == settings.PACK_TIME_LIMIT_SECONDS
    assert task.time_limit == settings.PACK_HARD_TIME_LIMIT_SECONDS > task.soft_time_limit
    assert issubclass(task.Request, PackRequest)
    # Limits written into a message by its sender are not kept: the worker's own apply.
    request = PackRequest.__new__(PackRequest)
    request.time_limits = (5, 3)
    assert request.time_limits == (None, None)


def _queues(command: list[str]) -> set[str]:
    """The queues of a compose worker command, defaults of ${NAME:-default} filled in."""
    if "-Q" not in command:
        return {"celery"}
    listed = re.sub(r"\$\{[A-Z_]+:-([^}]*)\}", r"\1", command[command.index("-Q") + 1])
    return set(listed.split(","))


def test_the_compose_workers_serve_every_queue_and_packs_have_a_worker_of_their_own():
    services = yaml.safe_load((ROOT / "docker-compose.yml").read_text())["services"]
    workers = {name: _queues(svc["command"]) for name, svc in services.items()
               if isinstance(svc.get("command"), list) and "worker" in svc["command"]}
    assert set().union(*workers.values()) >= {"celery", settings.CALCS_QUEUE,
                                              settings.PACKS_QUEUE}
    # The scan's worker takes no pack; the packs' worker takes nothing else.
    assert all(settings.PACKS_QUEUE not in q for q in workers.values() if "celery" in q)
    assert {settings.PACKS_QUEUE} in workers.values()


def test_the_time_limit_message_is_plain_and_names_the_limit():
    assert time_limit_message(900).startswith(
        "The pack took longer than the time limit of 15 minutes and was stopped.")
    assert "of 1 second and" in time_limit_message(1)
    assert "of 90 seconds and" in time_limit_message(90)
    assert "PACK_TIME_LIMIT_SECONDS" in time_limit_message(900)


@pytest.mark.django_db
def test_a_stopped_pack_is_marked_failed_and_a_finished_one_is_left_alone():
    site = f.site()
    user = f.user("packs-auditor", site=site)
    today = timezone.localdate()
    running, done = (EvidencePack.objects.create(
        scope="site", site=site, requested_by=user, status=status,
        period_start=today - dt.timedelta(days=30), period_end=today)
        for status in ("running", "done"))
    assert mark_failed(running.pk, time_limit_message(900), STOPPED_STAGE) == 1
    assert mark_failed(done.pk, time_limit_message(900), STOPPED_STAGE) == 0
    running.refresh_from_db()
    done.refresh_from_db()
    assert (running.status, running.stage, running.error) == (
        "failed", STOPPED_STAGE, time_limit_message(900))
    assert running.finished_at is not None
    assert (done.status, done.error) == ("done", "")
