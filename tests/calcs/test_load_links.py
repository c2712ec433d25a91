"""Loading on PostgreSQL reads the many-to-many links with their rows (ARRAY subqueries):
the same SIF data and inputs digest as reading each link table on its own, in fewer
queries; the field-statistics fingerprint is one query with the figures of its parts."""

from __future__ import annotations

from django.db import connection
from django.db.models import Count, Max
from django.test.utils import CaptureQueriesContext
from django.utils import timezone

from calcs.adapter import assessment, field_stats, load
from register import choices
from register.models import (
    Component,
    ComponentResult,
    Demand,
    SafetyFunction,
    Site,
    in_force,
)


def _shape(d) -> tuple:
    """What the engine and the digest read from one loaded SIF, as plain values."""
    return (
        d.sif.pk,
        [s.pk for s in d.subsystems],
        {sub: [(c.obj.pk, [(e.at, e.kind, e.failed, e.record_id, e.credited, e.plan_id,
                            e.plan_coverage) for e in c.events]) for c in comps]
         for sub, comps in d.components.items()},
        [p.pk for p in d.plans], d.plan_components,
        [(sc.pk, [x.pk for x in sc.loaded_causes], [x.pk for x in sc.loaded_layers],
          [x.pk for x in sc.loaded_modifiers]) for sc in d.scenarios],
        [b.pk for b in d.bypasses], [x.pk for x in d.demands],
    )


def test_links_read_with_their_rows_equal_the_link_tables_read_alone(demo_plant):
    assert connection.vendor == "postgresql"
    qs = SafetyFunction.objects.filter(unit__site=demo_plant.site)
    with CaptureQueriesContext(connection) as merged_q:
        merged = load(qs)
    with CaptureQueriesContext(connection) as alone_q:
        alone = load(qs, link_arrays=False)
    assert [_shape(d) for d in merged] == [_shape(d) for d in alone]
    # the demo has links of every kind, so the comparison covers them
    assert any(d.plan_components.get(p.pk) for d in alone for p in d.plans)
    assert any(d.scenarios for d in alone)
    assert any(d.demands for d in alone)
    # four link tables no longer read on their own
    assert len(merged_q.captured_queries) == len(alone_q.captured_queries) - 4

    as_of = timezone.now()
    site = demo_plant.site
    types = {c.obj.device_type_id for d in alone for c in d.all_components()}
    stats = field_stats.device_type_stats(site.pk, as_of.date(), types)
    rates = field_stats.rate_table(site, stats, as_of.date())
    dues = assessment._full_due_dates(qs, as_of.date())
    for a, b in zip(merged, alone):
        due = dues.get(a.sif.pk)
        assert (assessment.inputs_digest(a, rates, stats, due)
                == assessment.inputs_digest(b, rates, stats, due))


def test_one_sif_loads_in_fewer_queries_with_link_arrays(demo_plant):
    sif = SafetyFunction.objects.filter(unit__site=demo_plant.site).order_by("pk").first()
    one = SafetyFunction.objects.filter(pk=sif.pk)
    with CaptureQueriesContext(connection) as merged_q:
        load(one)
    with CaptureQueriesContext(connection) as alone_q:
        load(one, link_arrays=False)
    assert len(merged_q.captured_queries) == len(alone_q.captured_queries) - 4


def test_fingerprint_is_one_query_of_the_figures_of_its_parts(demo_plant):
    with CaptureQueriesContext(connection) as ctx:
        got = field_stats._stats_fingerprint()
    assert len(ctx.captured_queries) == 1
    du = (ComponentResult.objects.filter(
        in_force("record__"), failure_mode=choices.FailureMode.DANGEROUS_UNDETECTED)
        .aggregate(n=Count("id"), last=Max("id")))
    fod = Demand.failed_components.through.objects.aggregate(n=Count("id"), last=Max("id"))
    expected = (du["n"], du["last"], fod["n"], fod["last"]) + tuple(
        m.history.aggregate(x=Max("history_id"))["x"] for m in (Site, SafetyFunction, Component))
    assert got == expected
    assert du["n"] > 0 and fod["n"] > 0  # the demo plant has both kinds of failure

    # a new failed-on-demand link moves it
    demand = Demand.objects.filter(sif__unit__site=demo_plant.site).order_by("pk").first()
    comp = Component.objects.filter(subsystem__sif=demand.sif).exclude(
        pk__in=demand.failed_components.values("pk")).order_by("pk").first()
    assert comp is not None
    demand.failed_components.add(comp)
    moved = field_stats._stats_fingerprint()
    assert moved[2] == got[2] + 1 and moved[3] > got[3]
