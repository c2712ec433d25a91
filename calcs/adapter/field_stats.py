"""Field data: failure statistics pooled plant-wide per device type, and the rate table
the calculations use."""

from __future__ import annotations

import datetime as dt
import functools
import hashlib
from collections import defaultdict
from dataclasses import dataclass

from calcs.adapter.inputs import (
    RateTable,
)
from calcs.adapter.loading import (
    SIGNIFICANCE,
)
from calcs.engine import field_data as eng_field
from register import choices
from register.models import (
    Component,
    ComponentResult,
    Demand,
    DeviceType,
    SafetyFunction,
    in_force,
)

# ---------------------------------------------------------------------------------------
# Field data: pooled plant-wide per device type
# ---------------------------------------------------------------------------------------


@dataclass(frozen=True)
class TypeStats:
    device_type: DeviceType
    stats: eng_field.DeviceTypeStats


def _stats_fingerprint() -> tuple:
    """Changes whenever something the field statistics depend on changes: the signed,
    current dangerous-undetected results (count and newest id, read through the partial
    index on those few rows), failed-on-demand links, and the newest history row of
    sites, SIFs and components (settings, life stage, in-service dates, device types).
    A passing test does not change it, so recomputing after one stays cheap. Rows
    bulk-inserted without history (synthetic benchmark data) are not seen by the history
    part, which is why the key also carries the date and entries expire after an hour."""
    from django.db import connection

    sql, params = _fingerprint_sql(connection.vendor)
    with connection.cursor() as cur:
        cur.execute(sql, params)
        return tuple(cur.fetchone())


@functools.cache
def _fingerprint_sql(vendor: str) -> tuple[str, tuple]:
    """The fingerprint's one SELECT: each figure a scalar subquery, no FROM. Built once
    per process and database kind (it depends on nothing else)."""
    from django.db.models import F, Func, OuterRef, Subquery

    from register.models import Site, TestRecord

    # The few dangerous undetected results (their partial index), each one's record
    # checked by its key (a scalar subquery, run per result): joined as a set, the planner
    # scanned every test record in parallel to match a few thousand results (50-100 ms at
    # 5,000 SIFs; this way about 20 ms).
    du = (ComponentResult.objects.filter(failure_mode=choices.FailureMode.DANGEROUS_UNDETECTED)
          .annotate(_counts=Subquery(TestRecord.objects.order_by().filter(
              in_force(), pk=OuterRef("record_id")).values("pk")[:1]))
          .filter(_counts__isnull=False))
    failed_on_demand = Demand.failed_components.through.objects.all()
    # Each part's count and newest id in one read of its rows (the results' join with
    # their records is the costly part: done once, not once per figure).
    parts = [(du, ("COUNT", "MAX"), "id"), (failed_on_demand, ("COUNT", "MAX"), "id")] + [
        (model.history.all(), ("MAX",), "history_id")
        for model in (Site, SafetyFunction, Component)]
    froms, columns, params = [], [], []
    for i, (qs, fns, col) in enumerate(parts):
        names = [f"_v{i}_{j}" for j in range(len(fns))]
        sql, p = (qs.order_by().annotate(**{n: Func(F(col), function=fn)
                                            for n, fn in zip(names, fns, strict=True)})
                  .values(*names).query.sql_with_params())
        froms.append(f"({sql}) AS _p{i}")
        columns += [f"_p{i}.{n}" for n in names]
        params.extend(p)
    return f"SELECT {', '.join(columns)} FROM {', '.join(froms)}", tuple(params)


def device_type_stats(site_id: int | None, as_of: dt.date,
                      type_ids: set[int] | None = None) -> dict[int, TypeStats]:
    """As :func:`compute_device_type_stats`, cached until a relevant record changes.

    The pooled statistics cover the whole plant, so computing them dominates the
    recompute of a single SIF; the cache makes that recompute cheap.
    """
    from django.core.cache import cache

    key = "ledger:typestats:" + hashlib.sha256(repr((
        site_id, as_of.isoformat(), sorted(type_ids) if type_ids is not None else None,
        _stats_fingerprint())).encode()).hexdigest()
    found = cache.get(key)
    if found is not None:
        return found
    stats = compute_device_type_stats(site_id, as_of, type_ids)
    cache.set(key, stats, 3600)
    return stats


def compute_device_type_stats(site_id: int | None, as_of: dt.date,
                              type_ids: set[int] | None = None) -> dict[int, TypeStats]:
    """Dangerous undetected failures found by tests and demands over cumulative service
    time, per device type, plant-wide (one site, or all sites when ``site_id`` is None),
    optionally only for ``type_ids``. Aggregated in the database: four queries whose
    result size does not grow with the plant."""
    from django.db.models import Count

    from register.models import Site

    comps = Component.objects.filter(in_service_on__lte=as_of,
                                     subsystem__sif__life_stage=choices.LifeStage.IN_SERVICE)
    if site_id:
        comps = comps.filter(subsystem__sif__unit__site_id=site_id)
    if type_ids is not None:
        comps = comps.filter(device_type_id__in=type_ids)
    failures: dict[int, int] = defaultdict(int)
    for row in (ComponentResult.objects.filter(
            in_force("record__"), component__in=comps,
            failure_mode=choices.FailureMode.DANGEROUS_UNDETECTED)
            .values("component__device_type_id").annotate(n=Count("id"))):
        failures[row["component__device_type_id"]] += row["n"]
    for row in (Demand.failed_components.through.objects.filter(component__in=comps)
                .values("component__device_type_id").annotate(n=Count("id"))):
        failures[row["component__device_type_id"]] += row["n"]
    hours: dict[int, float] = defaultdict(float)
    count: dict[int, int] = defaultdict(int)
    for row in comps.values("device_type_id", "in_service_on").annotate(n=Count("id")):
        hours[row["device_type_id"]] += (as_of - row["in_service_on"]).days * 24.0 * row["n"]
        count[row["device_type_id"]] += row["n"]
    site = Site.objects.filter(pk=site_id).first() if site_id else None
    cl = site.confidence_level if site else eng_field.IEC61511_PRIOR_USE_CL
    strength = site.prior_strength if site else eng_field.DEFAULT_PRIOR_STRENGTH
    out = {}
    for dtype in DeviceType.objects.filter(pk__in=hours.keys()):
        if hours[dtype.pk] <= 0:
            continue
        out[dtype.pk] = TypeStats(dtype, eng_field.pool_device_type(
            [(hours[dtype.pk], failures[dtype.pk])], assumed_rate=dtype.lambda_du_per_hour,
            confidence=cl, prior_strength=strength, alpha=SIGNIFICANCE,
            component_count=count[dtype.pk]))
    return out


def rate_table(site, stats: dict[int, TypeStats], as_of: dt.date) -> RateTable:
    """The site's rate basis applied; ``as_of`` fixes each device's hours in service."""
    basis = site.rate_basis
    by_type = {}
    for type_id, ts in stats.items():
        if basis in (choices.RateBasis.BAYES, choices.RateBasis.FIELD):
            by_type[type_id] = ts.stats.bayes_mean
        elif basis == choices.RateBasis.UPPER:
            by_type[type_id] = ts.stats.upper
    return RateTable(basis=basis, by_type=by_type, as_of=as_of)


