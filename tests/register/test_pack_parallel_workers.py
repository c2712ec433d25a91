"""A pack built in sections by real worker processes: one worker with two processes on the
packs queue takes the start task, the sections (both processes at once) and the assembly;
the pack is done and holds what the same pack built in one process holds.

Real services: PostgreSQL, the Redis broker (its own database number), a prefork worker
started here.
"""

import datetime as dt
import io
import re
import zipfile

import pytest
from django.conf import settings
from django.core.management import call_command
from django.utils import timezone

from register import choices
from register.audit.evidence import build_steps as b
from register.audit.evidence import request_pack
from register.models import EvidencePack, Site
from tests import factories as f
from tests.integration.test_pack_queue import _kill, _worker, broker_tasks  # noqa: F401
from tests.integration.test_scan_worker_killed import _redis_ok, _wait
from tests.register.test_pack_parallel import same_pack

SIFS = 12

pytestmark = [pytest.mark.services, pytest.mark.xdist_group("services"),
              pytest.mark.django_db(transaction=True)]


def _unzip(data: bytes) -> dict[str, bytes]:
    with zipfile.ZipFile(io.BytesIO(data)) as zf:
        return {name: zf.read(name) for name in zf.namelist()}


def test_two_worker_processes_build_the_sections_of_one_pack(tmp_path, broker_tasks):  # noqa: F811
    from django.db import connection

    from tests.conftest import need

    need(connection.vendor == "postgresql", "PostgreSQL not configured (set DATABASE_URL)")
    need(_redis_ok(), "Redis broker not reachable (set CELERY_BROKER_URL to its own database)")
    call_command("make_scale_plant", sifs=SIFS, years=3, code="ppw", verbosity=0)
    site = Site.objects.get(code="ppw")
    auditor = f.user("ppw-auditor", site=site, role=choices.Role.AUDITOR)
    today = timezone.localdate()
    worker, out, log = _worker(tmp_path, "packs2", settings.PACKS_QUEUE, concurrency=2,
                               PACK_SECTION_SIFS="3")
    try:
        pack = request_pack(auditor, scope="site", site=site,
                            period_start=today - dt.timedelta(days=3 * 365), period_end=today)
        _wait(lambda: EvidencePack.objects.get(pk=pack.pk).status in ("done", "failed"), 300,
              "the pack", log)
        pack.refresh_from_db()
        assert pack.status == "done", pack.error
        text = log.read_text()
        sections = re.findall(r"/(ForkPoolWorker-\d+)\] Task register\.evidence_pack_section\[",
                              text)
        assert len(sections) == -(-SIFS // 3)
        assert len(set(sections)) == 2, sections  # both processes built sections
        # Sent once and run once (the worker logs each task as received, then succeeded).
        assert len(re.findall(r"Task register\.evidence_pack_assemble\[[^\]]+\] received",
                              text)) == 1
        assert len(re.findall(r"Task register\.evidence_pack_assemble\[[^\]]+\] succeeded",
                              text)) == 1
        assert not b.work_dir(pack).exists() and not (
            tmp_path / "evidence" / f"evidence-pack-{pack.pk}.parts").exists()
        built = _unzip((tmp_path / pack.result_path).read_bytes())
    finally:
        _kill(worker, out)

    # The same pack in one process, at the same moment: the same tables, charts and pages.
    settings.VAR_DIR = tmp_path / "here"
    here = EvidencePack.objects.create(scope="site", site=site, requested_by=auditor,
                                       period_start=pack.period_start,
                                       period_end=pack.period_end)
    here.started_at = pack.started_at
    alone = _unzip(b.build(here, size=1000).read_bytes())
    same_pack(built, pack.pk, alone, here.pk, tmp_path)
