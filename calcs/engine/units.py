"""Units and plausibility limits shared by every entry point of the engine.

One place for the rules that the command, the register's forms, the import and the API
all apply to a failure rate, so a value refused in one is refused in all.
"""

from __future__ import annotations

import math
from datetime import date, datetime

from calcs.engine.errors import InputError

#: 1 year = 8760 h (the convention of IEC 61508-6 Annex B and of this software).
HOURS_PER_YEAR = 8760.0
#: One month of a test interval: a twelfth of a year (730 h).
HOURS_PER_MONTH = HOURS_PER_YEAR / 12
#: 1 FIT = 1e-9 failures per hour.
FIT_PER_HOUR = 1e-9
#: A failure rate above this (per hour) is refused as implausible: 1e-4 /h is 100 000 FIT,
#: a dangerous failure about once a year, far above any device fit for a SIF. A value such
#: as 500 is almost always a rate in FIT written without its unit (common practice, no
#: source).
MAX_PLAUSIBLE_RATE_PER_HOUR = 1e-4


def check_rate(value: object, field: str) -> float:
    """A failure rate per hour: a finite number from 0 to MAX_PLAUSIBLE_RATE_PER_HOUR.

    Raises :class:`InputError` naming ``field``; the message suggests FIT when the
    value looks like one.
    """
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise InputError(field, f"must be a number (failures per hour), got {value!r}")
    x = float(value)
    if not math.isfinite(x):
        raise InputError(field, f"must be a finite number, got {value!r}")
    if x < 0:
        raise InputError(field, f"must be at least 0, got {x:g}")
    if x > MAX_PLAUSIBLE_RATE_PER_HOUR:
        hint = ""
        if x >= 1.0:
            hint = (f"; if it is in FIT, that is {x * FIT_PER_HOUR:g} per hour")
        raise InputError(field, f"{x:g} per hour is implausible (above "
                                f"{MAX_PLAUSIBLE_RATE_PER_HOUR:g} per hour){hint}")
    return x


def check_not_after(when: date | datetime, limit: date | datetime, field: str,
                    what: str = "today") -> None:
    """Refuse a record dated after ``limit`` (the evaluation date, or today).

    Dates and datetimes compare by calendar date when one of them is a date.
    """
    a = when.date() if isinstance(when, datetime) and not isinstance(limit, datetime) else when
    b = limit.date() if isinstance(limit, datetime) and not isinstance(when, datetime) else limit
    if isinstance(a, datetime) and isinstance(b, datetime) and (a.tzinfo is None) != (
            b.tzinfo is None):
        a, b = a.replace(tzinfo=None), b.replace(tzinfo=None)
    if a > b:
        shown = when.isoformat() if isinstance(when, date) else str(when)
        raise InputError(field, f"{shown} is after {what} ({limit.isoformat()}); a record "
                                "cannot be dated in the future")
