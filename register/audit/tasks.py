"""Celery task that builds an evidence pack (see ``register.audit.evidence``).

Packs run on their own queue (``settings.PACKS_QUEUE``, routed in ``CELERY_TASK_ROUTES``;
the section and assembly tasks are sent there by name), so a long pack never holds up the
due-date scan or the recompute. A pack is built in sections of ``PACK_SECTION_SIFS`` SIFs
in parallel, as many at a time as the packs workers have processes, then assembled in a
fixed order: the zip is the same bytes however many sections and workers there were.

A build has a time limit: each task is interrupted at ``PACK_TIME_LIMIT_SECONDS``, and any
task past that time from the pack's start stops at its next step; the pack is marked
failed with a plain message (the pack page shows it). Should a build not stop, the worker
ends its process at ``PACK_HARD_TIME_LIMIT_SECONDS`` and marks the pack failed itself.
"""

from __future__ import annotations

import logging

from celery import shared_task
from celery.exceptions import SoftTimeLimitExceeded
from celery.worker.request import Request
from django.conf import settings

log = logging.getLogger(__name__)


class PackRequest(Request):
    """The worker's side of a pack task: when the hard time limit ends the process that
    built the pack, the pack is marked failed here (in the worker's main process). The time
    limits are the worker's own (the task's, from the worker's settings), not those the
    sender wrote into the message."""

    @property
    def time_limits(self):
        return (None, None)  # (None, None): the task's time_limit and soft_time_limit

    @time_limits.setter
    def time_limits(self, sent):
        pass  # the sender's limits are not the worker's to keep

    def on_timeout(self, soft, timeout):
        super().on_timeout(soft, timeout)
        if soft or not self.args:
            return
        from django.db import connection

        from register.audit.evidence.build import STOPPED_STAGE, mark_failed, time_limit_message

        try:
            mark_failed(int(self.args[0]), time_limit_message(int(timeout)), STOPPED_STAGE)
        except Exception:  # the worker goes on serving the queue whatever happens here
            log.exception("could not mark evidence pack %s failed", self.args[0])
        finally:
            connection.close()


def _limits() -> dict:
    return {"acks_late": True, "Request": PackRequest,
            "soft_time_limit": settings.PACK_TIME_LIMIT_SECONDS,
            "time_limit": settings.PACK_HARD_TIME_LIMIT_SECONDS}


@shared_task(name="register.evidence_pack", **_limits())
def build_evidence_pack(pack_id: int) -> dict:
    """Start the pack: verify the chain, plan its sections and hand them to the packs queue
    as a group of ``register.evidence_pack_section`` tasks; the last section to finish
    sends ``register.evidence_pack_assemble``. Status and progress are kept on the
    EvidencePack row. (With eager tasks the whole pack is built before this returns.)"""
    from celery import group

    from register.audit.evidence import build_steps as b

    pack = b.start(pack_id)
    if pack is None:
        return _result(pack_id)
    try:
        plan = b.begin(pack)
        b.progress_of(pack, settings.PACK_TIME_LIMIT_SECONDS)(5, "Change chain verified")
    except Exception as exc:
        b.failed(pack_id, exc)
        if isinstance(exc, SoftTimeLimitExceeded):
            return _stopped(pack_id)
        raise
    group(build_pack_section.si(pack_id, index, ids).set(queue=settings.PACKS_QUEUE)
          for index, ids in enumerate(plan)).apply_async()
    return _result(pack_id)


@shared_task(name="register.evidence_pack_section", **_limits())
def build_pack_section(pack_id: int, index: int, sif_ids: list[int]) -> dict:
    """One section of a pack (its SIFs' facts, figures, charts and pages); the section
    that finds every other one written starts the assembly."""
    from register.audit.evidence import build_steps as b

    pack = b.running(pack_id)
    if pack is None:  # failed, stopped or done meanwhile
        return _result(pack_id)
    progress = b.progress_of(pack, settings.PACK_TIME_LIMIT_SECONDS)
    try:
        b.section(pack, index, sif_ids, lambda: progress(0, None))
        done, planned = b.sections_done(pack)
        progress(5 + int(85 * done / planned), f"Sections {done} of {planned}")
        last = b.claim_assembly(pack)
    except Exception as exc:
        b.failed(pack_id, exc)
        if isinstance(exc, SoftTimeLimitExceeded):
            return _stopped(pack_id)
        raise
    if last:
        assemble_evidence_pack.apply_async(args=[pack_id], queue=settings.PACKS_QUEUE)
    return _result(pack_id)


@shared_task(name="register.evidence_pack_assemble", **_limits())
def assemble_evidence_pack(pack_id: int) -> dict:
    """Join the sections of a pack into its zip and mark it done."""
    from register.audit.evidence import build_steps as b

    pack = b.running(pack_id)
    if pack is None:
        return _result(pack_id)
    try:
        path = b.assemble(pack, b.progress_of(pack, settings.PACK_TIME_LIMIT_SECONDS))
        b.finish(pack, path)
    except Exception as exc:
        b.failed(pack_id, exc)
        if isinstance(exc, SoftTimeLimitExceeded):
            return _stopped(pack_id)
        raise
    return _result(pack_id)


def _stopped(pack_id: int) -> dict:
    log.warning("evidence pack %s stopped at the time limit of %s s", pack_id,
                settings.PACK_TIME_LIMIT_SECONDS)
    return _result(pack_id)


def _result(pack_id: int) -> dict:
    from register.models import EvidencePack

    pack = EvidencePack.objects.only("status", "result_sha256").get(pk=pack_id)
    return {"pack": pack_id, "status": pack.status, "sha256": pack.result_sha256}
