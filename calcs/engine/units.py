"""Units and plausibility limits shared by every entry point of the engine.

One place for the rules that the command, the register's forms, the import and the API
all apply to a failure rate, so a value refused in one is refused in all.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
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


# --------------------------------------------------------------------------------------
# Plausible ranges: one table for every number that enters (model validation, API,
# forms, import, the command). A value outside its range is a typing error or a unit
# mistake, not a design; NaN and infinities are never accepted. Ranges are common
# practice, no source, chosen wide enough for any real process plant.
# --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Bound:
    """The plausible range of one quantity: ``lo`` to ``hi`` in ``unit``; ``lo_open``
    excludes ``lo`` itself (a duration that must be more than 0)."""

    lo: float
    hi: float
    unit: str = ""
    lo_open: bool = False

    def text(self) -> str:
        unit = f" {self.unit}" if self.unit else ""
        if self.lo_open:
            return f"more than {self.lo:g} and at most {self.hi:g}{unit}"
        return f"between {self.lo:g} and {self.hi:g}{unit}"


#: Longest interval a plan, a mission time or a test interval can state: 100 years.
MAX_PLAUSIBLE_HOURS = 100 * HOURS_PER_YEAR
#: A measured value, setpoint or limit in any engineering unit stays within +-1e9 (Pa,
#: ppm, mm...); beyond that it is a typing error.
MAX_PROCESS_VALUE = 1e9

BOUNDS: dict[str, Bound] = {
    # dangerous failure rates (see MAX_PLAUSIBLE_RATE_PER_HOUR)
    "rate_per_hour": Bound(0.0, MAX_PLAUSIBLE_RATE_PER_HOUR, "per hour"),
    # safe (spurious) failure rates: a trip a week at most, 1e-2 per hour
    "safe_rate_per_hour": Bound(0.0, 1e-2, "per hour"),
    # probabilities, coverages, common-cause factors, shares
    "fraction": Bound(0.0, 1.0),
    # a required PFDavg (SIL 4 and below: 1e-9 .. 1) and PFH
    "target_pfd": Bound(1e-9, 1.0),
    "target_pfh_per_hour": Bound(1e-12, 1e-3, "per hour"),
    # an average probability computed or stated (PFDavg, unavailability)
    "pfd": Bound(0.0, 1.0),
    # repair and restoration times: at most a year
    "repair_hours": Bound(0.0, HOURS_PER_YEAR, "h"),
    # test intervals and mission times in hours
    "interval_hours": Bound(0.0, MAX_PLAUSIBLE_HOURS, "h", lo_open=True),
    "mission_time_years": Bound(0.1, 100.0, "years"),
    # process safety and response times: at most a week
    "seconds": Bound(0.0, 7 * 24 * 3600.0, "s"),
    # setpoints, targets, limits and measured values in their own unit
    "process_value": Bound(-MAX_PROCESS_VALUE, MAX_PROCESS_VALUE),
    "tolerance": Bound(0.0, MAX_PROCESS_VALUE),
    # initiating-event frequencies and tolerable frequencies, per year
    "frequency_per_year": Bound(0.0, 1000.0, "per year"),
    "tolerable_frequency_per_year": Bound(1e-12, 10.0, "per year"),
}

#: No record of a SIF is dated before this day (process-plant safety systems with
#: records this register could hold start in the 1960s; common practice, no source).
EARLIEST_PLAUSIBLE_DATE = date(1960, 1, 1)
#: A planned date (proposed test date, bypass end, evidence period) is at most this
#: many years ahead of today.
HORIZON_YEARS = 10


def check_number(value: object, quantity: str, field: str) -> float:
    """A finite number inside the plausible range of ``quantity`` (a key of BOUNDS).

    Raises :class:`InputError` naming ``field``. Failure rates go through
    :func:`check_rate` (its message suggests FIT).
    """
    if quantity == "rate_per_hour":
        return check_rate(value, field)
    bound = BOUNDS[quantity]
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise InputError(field, f"must be a number, got {value!r}")
    x = float(value)
    if not math.isfinite(x):
        raise InputError(field, f"must be a finite number, got {value!r}")
    below = x <= bound.lo if bound.lo_open else x < bound.lo
    if below or x > bound.hi:
        raise InputError(field, f"must be {bound.text()}, got {x:g}")
    return x


def check_date_window(when: date | datetime, field: str, *, today: date | None = None,
                      earliest: date | None = None) -> None:
    """Refuse a date before ``earliest`` (default EARLIEST_PLAUSIBLE_DATE) or more than
    HORIZON_YEARS after ``today`` (when given)."""
    day = when.date() if isinstance(when, datetime) else when
    first = earliest or EARLIEST_PLAUSIBLE_DATE
    if day < first:
        raise InputError(field, f"{day.isoformat()} is before {first.isoformat()}, the "
                                "earliest plausible date")
    if today is not None:
        try:
            last = today.replace(year=today.year + HORIZON_YEARS)
        except ValueError:  # 29 February
            last = today.replace(year=today.year + HORIZON_YEARS, day=28)
        if day > last:
            raise InputError(field, f"{day.isoformat()} is more than {HORIZON_YEARS} years "
                                    f"ahead (after {last.isoformat()})")
