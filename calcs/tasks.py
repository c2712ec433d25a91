"""Celery tasks of the calcs app: thin wrappers around ``calcs.adapter``.

The nightly recompute splits the SIFs in service into chunks that a Celery group spreads
over the workers on the queue ``settings.CALCS_QUEUE``; every chunk evaluates as of the
same moment, and the field statistics are plant-wide per device type, so the result does
not depend on the chunking.
"""

import datetime as dt

from celery import group, shared_task
from django.conf import settings
from django.utils import timezone

from register import choices
from register.models import SafetyFunction


@shared_task(name="calcs.recompute_sif", acks_late=True)
def recompute_sif(sif_id: int, trigger: str = "record changed") -> int:
    """Recompute one SIF after a record changed (enqueued after commit)."""
    from calcs.adapter import recompute_many

    return len(recompute_many(SafetyFunction.objects.filter(pk=sif_id), trigger=trigger))


@shared_task(name="calcs.recompute_chunk", acks_late=True)
def recompute_chunk(sif_ids: list[int], as_of: str, trigger: str = "nightly") -> int:
    """Recompute these SIFs as of one moment (ISO date-time): one chunk of the night."""
    from calcs.adapter import recompute_many

    return len(recompute_many(SafetyFunction.objects.filter(pk__in=sif_ids), trigger=trigger,
                              as_of=dt.datetime.fromisoformat(as_of)))


def nightly_chunks(as_of: dt.datetime, size: int | None = None) -> group:
    """The group of chunk tasks that recompute every SIF in service as of ``as_of``."""
    size = size or settings.RECOMPUTE_CHUNK_SIFS
    ids = list(SafetyFunction.objects.filter(life_stage=choices.LifeStage.IN_SERVICE)
               .order_by("pk").values_list("pk", flat=True))
    return group(recompute_chunk.si(ids[i:i + size], as_of.isoformat()).set(
        queue=settings.CALCS_QUEUE) for i in range(0, len(ids), size))


@shared_task(name="calcs.recompute_all", acks_late=True)
def recompute_all(chunk_sifs: int | None = None) -> int:
    """Nightly: spread the recompute of every SIF in service over the workers; returns the
    number of chunks sent."""
    chunks = nightly_chunks(timezone.now(), chunk_sifs)
    chunks.apply_async()
    return len(chunks.tasks)
