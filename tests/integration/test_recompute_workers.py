"""The nightly recompute spread over real worker processes: the chunks sent as one group
on the calcs queue are shared by both processes of a worker, and the stored result is the
one the same recompute gives in one process (same moment, same SIFs).

Real services: PostgreSQL, the Redis broker (its own database number, from
CELERY_BROKER_URL), a prefork worker started here with two processes.
"""

import math
import re

import pytest
from django.conf import settings
from django.core.management import call_command
from django.db import transaction
from django.utils import timezone

from calcs.adapter import recompute_many
from calcs.models import Assessment
from calcs.tasks import nightly_chunks
from register import choices
from register.models import SafetyFunction, Site
from tests.integration.test_pack_queue import _kill, _worker, broker_tasks  # noqa: F401
from tests.integration.test_scan_worker_killed import _redis_ok, _wait

SIFS = 24
CHUNK = 4

pytestmark = [pytest.mark.services, pytest.mark.xdist_group("services"),
              pytest.mark.django_db(transaction=True)]

FIELDS = ("sif_id", "as_of", "design_pfd_avg", "achieved_pfd_avg", "meets_target",
          "verdict", "flags", "inputs_digest", "error")


def _newest(sif_ids) -> dict[int, tuple]:
    return {row[0]: row for row in Assessment.objects.filter(sif_id__in=sif_ids, latest=True)
            .values_list(*FIELDS)}


def test_two_worker_processes_share_the_nightly_chunks_with_the_same_result(
        tmp_path, broker_tasks):  # noqa: F811
    from django.db import connection

    from tests.conftest import need

    need(connection.vendor == "postgresql", "PostgreSQL not configured (set DATABASE_URL)")
    need(_redis_ok(), "Redis broker not reachable (set CELERY_BROKER_URL to its own database)")
    call_command("make_scale_plant", sifs=SIFS, years=3, code="rcw", verbosity=0)
    site = Site.objects.get(code="rcw")
    qs = SafetyFunction.objects.filter(unit__site=site,
                                       life_stage=choices.LifeStage.IN_SERVICE)
    ids = list(qs.values_list("pk", flat=True))
    assert len(ids) == SIFS
    as_of = timezone.now().replace(microsecond=0)

    # What one process stores for that moment (rolled back: the workers start afresh).
    with transaction.atomic():
        recompute_many(qs, trigger="nightly", as_of=as_of)
        alone = _newest(ids)
        transaction.set_rollback(True)
    assert len(alone) == SIFS and not any(row[-1] for row in alone.values())
    assert not Assessment.objects.filter(sif_id__in=ids).exists()

    worker, out, log = _worker(tmp_path, "calcs2", f"celery,{settings.CALCS_QUEUE}",
                               concurrency=2)
    try:
        chunks = nightly_chunks(as_of, CHUNK)
        assert len(chunks.tasks) == math.ceil(SIFS / CHUNK)
        chunks.apply_async()
        done = re.compile(r"/(ForkPoolWorker-\d+)\] Task calcs\.recompute_chunk\[[^\]]+\] "
                          r"succeeded in [0-9.]+s: (\d+)")
        _wait(lambda: len(done.findall(log.read_text())) >= len(chunks.tasks), 240,
              "the nightly chunks", log)
        runs = done.findall(log.read_text())
    finally:
        _kill(worker, out)
    assert len(runs) == len(chunks.tasks)
    assert {int(n) for _, n in runs} == {CHUNK}  # every chunk recomputed its SIFs
    assert len({process for process, _ in runs}) == 2, runs  # both processes took chunks
    assert _newest(ids) == alone
