"""What the write services share."""

from __future__ import annotations

from register.models import (
    SafetyFunction,
)


def _sif_id_of(instance) -> int | None:
    if isinstance(instance, SafetyFunction):
        return instance.pk
    for path in ("sif_id", "subsystem.sif_id", "plan.sif_id"):
        obj = instance
        try:
            for part in path.split("."):
                obj = getattr(obj, part)
            return obj
        except AttributeError:
            continue
    return None
