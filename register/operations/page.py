"""What the pages show of the operations log: rows of bypasses, demands and findings, for
the SIF page (``register.lead.views.sif_detail``) and the operations pages. Reads only."""

from __future__ import annotations

import datetime as dt

from django.db.models import Prefetch

from register import choices
from register.calculations import calculations
from register.days import local_date
from register.models import Bypass, Component, Demand, Finding, SafetyFunction
from register.operations import services as findings_rules
from register.operations.rates import observed_rates, service_start
from register.people import person_name
from register.permissions import Action, can
from register.schedule.scan import bypass_state


def duration_text(hours: float) -> str:
    """A duration for display: hours up to two days, then days."""
    return f"{hours / 24:.1f} d" if hours >= 48 else f"{hours:.1f} h"


def bypass_row(b: Bypass, now: dt.datetime) -> dict:
    """One bypass for display (``requested_by``, ``authorised_by``, ``closed_by`` and
    ``component`` joined)."""
    state = choices.bypass_state_badge(bypass_state(b, now))
    hours = b.duration_hours(now)
    return {"obj": b, "state": state["label"], "style": state["style"],
            "auth": choices.bypass_authorisation_badge(b.authorisation),
            "open": b.ended_at is None, "hours": hours, "duration": duration_text(hours),
            "ran_over": b.ran_over(now), "what": b.component.tag if b.component_id
            else "whole SIF",
            "requester": person_name(b.requested_by, "not recorded"),
            "authoriser": person_name(b.authorised_by, ""),
            "closer": person_name(b.closed_by, "")}


def bypasses_with_people(qs):
    return qs.select_related("sif__unit__site", "component", "requested_by", "authorised_by",
                             "closed_by")


def demand_row(dm: Demand) -> dict:
    """One demand for display, with what each device did (M2M prefetched)."""
    failed = {c.pk for c in dm.failed_components.all()}
    devices = [(c.tag, choices.DeviceOutcome.FAILED.label if c.pk in failed
                else choices.DeviceOutcome.ACTED.label, c.pk in failed)
               for c in sorted({*dm.components_exercised.all(), *dm.failed_components.all()},
                               key=lambda c: c.tag)]
    if dm.spurious:
        outcome = {"label": "spurious trip", "style": "badge-neutral"}
    elif dm.successful:
        outcome = {"label": "acted as required", "style": "badge-ok"}
    else:
        outcome = {"label": "failed on demand", "style": "badge-fail"}
    return {"obj": dm, "outcome": outcome, "devices": devices,
            "cause": dm.get_cause_display(), "recorder": person_name(dm.recorded_by)}


def demands_with_devices(qs):
    devices = Component.objects.only("pk", "tag")
    return qs.select_related("sif", "recorded_by").prefetch_related(
        Prefetch("components_exercised", queryset=devices),
        Prefetch("failed_components", queryset=devices))


def finding_row(f: Finding, now: dt.datetime) -> dict:
    """One finding for display, its age counted in days of its site's calendar
    (``component``, ``owner``, ``result__record``, ``demand``, ``retest`` and
    ``sif__unit__site`` joined)."""
    today = local_date(now, f.sif.unit.site)
    if f.result_id:
        found_by = f"{f.result.record.get_kind_display()} #{f.result.record_id}"
    else:
        found_by = "spurious trip" if f.demand.spurious else "real demand"
    return {"obj": f, "badge": choices.finding_status_badge(f.status),
            "failure": findings_rules.failure_text(f),
            "age": findings_rules.age_days(f, today), "found_by": found_by,
            "overdue": findings_rules.retest_overdue(f, today),
            "owner": person_name(f.owner, "no owner"),
            "closer": person_name(f.closed_by, "")}


def findings_with_links(qs):
    return qs.select_related("sif__unit__site", "component", "owner", "result__record",
                             "demand", "retest", "closed_by")


def sif_operations(user, sif: SafetyFunction, d, now: dt.datetime) -> dict:
    """The SIF page's operations section: bypasses, demands with the observed rates,
    findings, and what the user may do. ``d``: the SIF's loaded data
    (``calculations().load``), for the LOPA scenarios and the devices' dates."""
    site = sif.unit.site
    bypasses = [bypass_row(b, now) for b in bypasses_with_people(
        Bypass.objects.filter(sif=sif)).order_by("-started_at")]
    demands = list(demands_with_devices(Demand.objects.filter(sif=sif)).order_by("-occurred_at"))
    start = service_start(sif, [c.obj.in_service_on for c in d.all_components()])
    rates = observed_rates(demands, start, now, site)
    assumed, assumed_error = None, ""
    if d.scenarios:
        try:
            assumed = calculations().assumed_demand_rate(d.scenarios)
        except calculations().EngineError as exc:
            assumed_error = str(exc)
    findings = [finding_row(f, now) for f in findings_with_links(
        Finding.objects.filter(sif=sif)).order_by("-found_at", "-id")]
    findings.sort(key=lambda row: not row["obj"].is_open)  # open first, newest first
    return {
        "bypass_rows": bypasses, "demand_rows": [demand_row(x) for x in demands],
        "rates": rates, "assumed_demand_rate": assumed, "assumed_rate_error": assumed_error,
        "finding_rows": findings,
        "open_findings": sum(1 for f in findings if f["obj"].is_open),
        "can_open_bypass": can(user, Action.MANAGE_BYPASS, site.pk),
        "can_log_demand": can(user, Action.RECORD_DEMAND, site.pk),
        "can_authorise": can(user, Action.AUTHORISE_BYPASS, site.pk),
    }
