"""Where a calendar day begins and ends: one rule for every "as of a date" in the register.

A day is the site's calendar day in the project's time zone (``TIME_ZONE``, UTC by
default): "as of 30 November" means up to the last instant of 30 November there.
"""

from __future__ import annotations

import datetime as dt

from django.utils import timezone


def start_of_day(day: dt.date) -> dt.datetime:
    """The first instant of ``day`` (aware, in the project's time zone)."""
    return timezone.make_aware(dt.datetime.combine(day, dt.time.min),
                               timezone.get_default_timezone())


def end_of_day(day: dt.date) -> dt.datetime:
    """The last instant of ``day`` (aware, in the project's time zone)."""
    return timezone.make_aware(dt.datetime.combine(day, dt.time.max),
                               timezone.get_default_timezone())


#: Clock difference allowed between a device (phone, tablet) and the server.
CLOCK_SKEW = dt.timedelta(minutes=5)


def is_future(value: dt.date | dt.datetime | None) -> bool:
    """The one rule for "a record cannot be dated in the future": a datetime later than
    now (plus CLOCK_SKEW), a date later than today."""
    if value is None:
        return False
    if isinstance(value, dt.datetime):
        return value > timezone.now() + CLOCK_SKEW
    return value > timezone.localdate()
