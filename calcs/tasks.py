"""Celery tasks of the calcs app: thin wrappers around ``calcs.adapter``."""

from celery import shared_task

from register import choices
from register.models import SafetyFunction


@shared_task(name="calcs.recompute_sif", acks_late=True)
def recompute_sif(sif_id: int, trigger: str = "record changed") -> int:
    """Recompute one SIF after a record changed (enqueued after commit)."""
    from calcs.adapter import recompute_many

    return len(recompute_many(SafetyFunction.objects.filter(pk=sif_id), trigger=trigger))


@shared_task(name="calcs.recompute_all", acks_late=True)
def recompute_all() -> int:
    """Nightly: recompute every SIF in service."""
    from calcs.adapter import recompute_many

    qs = SafetyFunction.objects.filter(life_stage=choices.LifeStage.IN_SERVICE)
    return len(recompute_many(qs, trigger="nightly"))
