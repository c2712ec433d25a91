"""Celery task that builds an evidence pack (see ``register.audit.evidence``).

Packs run on their own queue (``settings.PACKS_QUEUE``, routed in ``CELERY_TASK_ROUTES``),
so a long pack never holds up the due-date scan or the recompute. A build has a time
limit: at ``PACK_TIME_LIMIT_SECONDS`` the task is interrupted and the pack marked failed
with a plain message (the pack page shows it); should the build not stop, the worker ends
its process at ``PACK_HARD_TIME_LIMIT_SECONDS`` and marks the pack failed itself.
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


@shared_task(name="register.evidence_pack", acks_late=True, Request=PackRequest,
             soft_time_limit=settings.PACK_TIME_LIMIT_SECONDS,
             time_limit=settings.PACK_HARD_TIME_LIMIT_SECONDS)
def build_evidence_pack(pack_id: int) -> dict:
    """Build the pack; status and progress are kept on the EvidencePack row."""
    try:
        from register.audit.evidence.build import run

        pack = run(pack_id, time_limit=settings.PACK_TIME_LIMIT_SECONDS)
    except SoftTimeLimitExceeded:  # run() has marked the pack failed with the reason
        log.warning("evidence pack %s stopped at the time limit of %s s", pack_id,
                    settings.PACK_TIME_LIMIT_SECONDS)
        return {"pack": pack_id, "status": "failed", "sha256": ""}
    return {"pack": pack.pk, "status": pack.status, "sha256": pack.result_sha256}
