"""Where a calendar day begins and ends: one rule for every "as of a date" in the register.

A day is a site's calendar day in the site's time zone (``Site.time_zone``); where no
site is given, the project's ``TIME_ZONE``. "As of 30 November" means up to the last
instant of 30 November there; a test at 20:00 on 1 March in Chicago is done on 1 March.
"""

from __future__ import annotations

import datetime as dt
import zoneinfo

from django.utils import timezone


def zone_of(site=None) -> dt.tzinfo:
    """The time zone of a site (or of its name), else the project's."""
    if site is None:
        return timezone.get_default_timezone()
    name = site if isinstance(site, str) else site.time_zone
    return zoneinfo.ZoneInfo(name)


def start_of_day(day: dt.date, site=None) -> dt.datetime:
    """The first instant of ``day`` (aware) on the site's calendar."""
    return dt.datetime.combine(day, dt.time.min, tzinfo=zone_of(site))


def end_of_day(day: dt.date, site=None) -> dt.datetime:
    """The last instant of ``day`` (aware) on the site's calendar."""
    return dt.datetime.combine(day, dt.time.max, tzinfo=zone_of(site))


def local_date(moment: dt.datetime, site=None) -> dt.date:
    """The site's calendar date of an instant."""
    return moment.astimezone(zone_of(site)).date()


def today(site=None) -> dt.date:
    """Today on the site's calendar."""
    return local_date(timezone.now(), site)


#: Clock difference allowed between a device (phone, tablet) and the server.
CLOCK_SKEW = dt.timedelta(minutes=5)


def is_future(value: dt.date | dt.datetime | None, site=None) -> bool:
    """The one rule for "a record cannot be dated in the future": a datetime later than
    now (plus CLOCK_SKEW), a date later than today on the site's calendar."""
    if value is None:
        return False
    if isinstance(value, dt.datetime):
        return value > timezone.now() + CLOCK_SKEW
    return value > today(site)


def check_plausible(value: dt.date | dt.datetime | None, site=None, *,
                    earliest: dt.date | None = None, field: str | None = None) -> None:
    """The one rule for a plausible date: not before ``earliest`` (default: the earliest
    plausible date, ``calcs.engine.units.EARLIEST_PLAUSIBLE_DATE``), not more than
    ``HORIZON_YEARS`` after today on the site's calendar. Raises ``ValidationError``
    (keyed by ``field`` when given)."""
    from django.core.exceptions import ValidationError

    from register.calculations import calculations

    if value is None:
        return
    day = value
    if isinstance(value, dt.datetime):
        try:
            day = local_date(value, site) if value.tzinfo else value.date()
        except OverflowError:  # year 1 or 9999 moved across the date line
            day = value.date()
    try:
        calculations().check_date_window(day, field or "date", today=today(site),
                                         earliest=earliest)
    except calculations().InputError as exc:
        if field:
            raise ValidationError({field: exc.message}) from None
        raise ValidationError(exc.message, code="implausible_date") from None
