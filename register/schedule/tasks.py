"""The due-date scan as a Celery task."""

import datetime as dt

from celery import shared_task


@shared_task(name="register.scan", acks_late=True)
def scan_task(as_of: str | None = None) -> dict:
    """The periodic due-date and bypass scan (see ``register.schedule.scan``); each site on
    its own calendar unless ``as_of`` is given."""
    from register.schedule.scan import scan

    result = scan(dt.date.fromisoformat(as_of) if as_of else None)
    return {"as_of": result.as_of.isoformat() if result.as_of else None,
            "plans_looked_at": len(result.plans), "state_changes": result.transitions,
            "notifications_created": result.notifications_created,
            "emails_swept": result.emails_sent, "counts": dict(result.counts)}
