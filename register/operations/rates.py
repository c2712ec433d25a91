"""Observed demand and spurious trip rates of a SIF: the one place they are computed.

A rate is the number of events divided by the SIF's time in service, in years of
8760 h (``calcs.engine.units.HOURS_PER_YEAR``, reached through ``calculations()``). The
time in service runs from the SIF's in-service date (else its earliest device's) to the
evaluation moment; only events inside that span count.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

from register.calculations import calculations
from register.days import start_of_day


@dataclass(frozen=True)
class EventRates:
    since: dt.date | None  # start of service
    years: float | None  # years in service, None without a start
    real: int  # real demands
    failed: int  # real demands on which the SIF did not act
    spurious: int  # spurious trips
    demand_per_year: float | None
    spurious_per_year: float | None


def service_start(sif, component_dates=()) -> dt.date | None:
    """The SIF's in-service date, else the earliest in-service date of its devices."""
    if sif.in_service_on:
        return sif.in_service_on
    dates = [d for d in component_dates if d]
    return min(dates) if dates else None


def observed_rates(demands, since: dt.date | None, as_of: dt.datetime, site=None
                   ) -> EventRates:
    """Events per year of service over the time in service from ``since`` to ``as_of``.

    ``demands``: the SIF's Demand rows (any order). ``site``: whose calendar starts the
    first day (default the project's time zone).
    """
    if since is None:
        return EventRates(None, None, 0, 0, 0, None, None)
    start = start_of_day(since, site)
    inside = [x for x in demands if start <= x.occurred_at <= as_of]
    real = [x for x in inside if not x.spurious]
    spurious = len(inside) - len(real)
    failed = sum(1 for x in real if not x.successful)
    hours = (as_of - start).total_seconds() / 3600.0
    if hours <= 0:
        return EventRates(since, 0.0, len(real), failed, spurious, None, None)
    years = hours / calculations().HOURS_PER_YEAR
    return EventRates(since, years, len(real), failed, spurious, len(real) / years,
                      spurious / years)
