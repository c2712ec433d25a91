"""The due-date scan as a Celery task."""

import datetime as dt

from celery import shared_task


@shared_task(name="register.scan", acks_late=True)
def scan_task(as_of: str | None = None) -> dict:
    """The periodic due-date and bypass scan (see ``register.schedule.scan``)."""
    from register.schedule.scan import scan

    result = scan(dt.date.fromisoformat(as_of) if as_of else None)
    return {"as_of": result.as_of.isoformat(), "plans": len(result.plans),
            "notifications_created": result.notifications_created,
            "counts": dict(result.counts)}
