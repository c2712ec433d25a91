"""Background jobs whose worker is gone: told apart from jobs still running, and failed.

A worker writing an export or import job holds the job's *lease* while it runs: a
PostgreSQL session advisory lock named for the job (``held``), taken before the job is
marked running and let go after its outcome is written. The lock ends with the worker's
database session, so a worker killed (SIGKILL, out of memory, a machine restarted) lets
go of it too, while its job still reads "running". ``sweep`` finds those: a running job
whose lease anyone can take has no worker, and is marked failed with a plain message so
its page stops promising a file no one is writing. An import's writing is one
transaction, so nothing of it was written; the message says so.

The same job given to a second worker (the broker hands an unacknowledged task on) runs
there only if it can take the lease: a job still held is left to the worker holding it,
and a job left "running" by a dead worker is run again.

An evidence pack is built by several tasks, each under the worker's time limits; a pack
still "running" longer than ``PACK_HARD_TIME_LIMIT_SECONDS`` after its start has no task
left working on it, and ``sweep`` fails it the same way.

Elsewhere than on PostgreSQL (the demo's SQLite, one process) there are no advisory
locks: ``held`` always grants the lease and ``sweep`` looks at packs only.
"""

from __future__ import annotations

import datetime as dt
import logging
from contextlib import contextmanager

from django.conf import settings
from django.db import DatabaseError, connection
from django.utils import timezone

log = logging.getLogger(__name__)

#: The first key of each kind of job's advisory lock (the second is the job's id).
LOCK_CLASS = {"import": 61511, "export": 61512}

GONE = {
    "import": ("The worker writing this import stopped before it finished. Nothing has "
               "been written: start the import again."),
    "export": "The worker writing this file stopped before it finished. Ask for the export "
              "again.",
    "pack": "The worker building this pack stopped before it finished. Ask for the pack "
            "again.",
}
#: A pack's stage once ``sweep`` has failed it.
GONE_STAGE = "Stopped: its worker is gone"
#: Beyond the hard time limit, how long a pack may still read "running" (its last write).
PACK_GRACE = dt.timedelta(minutes=5)


def _locks() -> bool:
    return connection.vendor == "postgresql"


@contextmanager
def held(kind: str, job_id: int):
    """Hold the lease of job ``job_id`` of ``kind`` ("import", "export") while the block
    runs; yields False (and holds nothing) when another session holds it."""
    if not _locks():
        yield True
        return
    key = [LOCK_CLASS[kind], job_id]
    with connection.cursor() as cur:
        cur.execute("SELECT pg_try_advisory_lock(%s, %s)", key)
        mine = bool(cur.fetchone()[0])
    try:
        yield mine
    finally:
        if mine:
            try:
                with connection.cursor() as cur:
                    cur.execute("SELECT pg_advisory_unlock(%s, %s)", key)
            except DatabaseError:  # the session is gone, and its lock with it
                log.warning("could not let go of the lease of %s job %s", kind, job_id,
                            exc_info=True)


def run_claimed(kind: str, model, job_id: int, write, **claimed):
    """Run ``write(job_id)`` for job ``job_id`` of ``kind`` under its lease, once the job
    is marked running (with ``claimed`` fields too): a job queued, or left "running" by a
    worker that is gone. A job finished, or held by another worker, is left alone; either
    way the job's row is returned as ``write`` or the database has it."""
    with held(kind, job_id) as mine:
        if mine and model.objects.filter(
                pk=job_id, status__in=[model.Status.QUEUED, model.Status.RUNNING]).update(
                status=model.Status.RUNNING, started_at=timezone.now(), **claimed):
            return write(job_id)
    return model.objects.get(pk=job_id)


def sweep(now: dt.datetime | None = None) -> dict[str, list[int]]:
    """Fail every job that reads "running" with no worker left on it; returns the ids
    failed, by kind."""
    from register.models import EvidencePack, ExportJob, ImportJob

    now = now or timezone.now()
    out: dict[str, list[int]] = {"import": [], "export": [], "pack": []}
    if _locks():
        for kind, model in (("import", ImportJob), ("export", ExportJob)):
            running = model.Status.RUNNING
            for pk in model.objects.filter(status=running).values_list("pk", flat=True):
                with held(kind, pk) as free:
                    fields = {"status": model.Status.FAILED, "finished_at": now,
                              "message": GONE[kind]}
                    if kind == "import":
                        fields["rows_done"] = 0
                    if free and model.objects.filter(pk=pk, status=running).update(**fields):
                        out[kind].append(pk)
    limit = dt.timedelta(seconds=settings.PACK_HARD_TIME_LIMIT_SECONDS) + PACK_GRACE
    for pk in EvidencePack.objects.filter(status=EvidencePack.Status.RUNNING,
                                          started_at__lt=now - limit).values_list(
                                              "pk", flat=True):
        if EvidencePack.objects.filter(pk=pk, status=EvidencePack.Status.RUNNING).fail(
                GONE["pack"], GONE_STAGE):
            out["pack"].append(pk)
    for kind, ids in out.items():
        if ids:
            log.warning("%s job(s) %s had no worker left and were marked failed", kind, ids)
    return out
