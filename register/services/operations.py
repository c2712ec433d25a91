"""Demands, bypasses and deferrals."""

from __future__ import annotations

import datetime as dt

from django.core.exceptions import ValidationError
from django.db import transaction
from django.utils import timezone

from register import choices
from register.changes import attribute
from register.models import (
    Bypass,
    Component,
    Demand,
    SafetyFunction,
)
from register.permissions import Action, require
from register.schedule import followup

# ---------------------------------------------------------------------------------------
# Demands, bypasses, deferrals
# ---------------------------------------------------------------------------------------


@transaction.atomic
def record_demand(*, user, sif: SafetyFunction, occurred_at: dt.datetime, successful: bool,
                  description: str, spurious: bool = False,
                  components_exercised=(), failed_components=()) -> Demand:
    require(user, Action.RECORD_DEMAND, sif.unit.site_id)
    demand = Demand(sif=sif, occurred_at=occurred_at, successful=successful, spurious=spurious,
                    description=description, recorded_by=user)
    demand.full_clean()
    attribute(demand, user, "demand recorded").save()
    demand.components_exercised.set(components_exercised)
    demand.failed_components.set(failed_components)
    followup.after_test_change(sif.pk)
    return demand


@transaction.atomic
def open_bypass(*, user, sif: SafetyFunction, started_at: dt.datetime, authorised_hours: float,
                reason: str, compensating_measures: str = "", measures_effective: bool = False,
                component: Component | None = None) -> Bypass:
    require(user, Action.MANAGE_BYPASS, sif.unit.site_id)
    bypass = Bypass(sif=sif, component=component, started_at=started_at,
                    authorised_hours=authorised_hours, reason=reason, authorised_by=user,
                    compensating_measures=compensating_measures,
                    measures_effective=measures_effective)
    bypass.full_clean()
    _overlap_check(bypass)
    attribute(bypass, user, "bypass opened").save()
    followup.after_test_change(sif.pk)
    return bypass


def _overlap_check(bypass: Bypass):
    far_future = timezone.now() + dt.timedelta(days=36500)
    end = bypass.ended_at or far_future
    overlapping = Bypass.objects.filter(sif=bypass.sif, component=bypass.component,
                                        started_at__lt=end).exclude(pk=bypass.pk)
    for other in overlapping:
        if (other.ended_at or far_future) > bypass.started_at:
            raise ValidationError({"started_at": (
                f"This overlaps the bypass started {other.started_at:%Y-%m-%d %H:%M} on the "
                "same equipment; close or correct that one first.")})


@transaction.atomic
def close_bypass(bypass: Bypass, user, ended_at: dt.datetime | None = None) -> Bypass:
    bypass = Bypass.objects.select_for_update().get(pk=bypass.pk)
    require(user, Action.MANAGE_BYPASS, bypass.sif.unit.site_id)
    if bypass.ended_at is not None:
        raise ValidationError("This bypass is already closed.")
    bypass.ended_at = ended_at or timezone.now()
    bypass.cached_state = choices.BypassState.CLOSED
    bypass.full_clean()
    attribute(bypass, user, "bypass closed").save()
    followup.after_test_change(bypass.sif_id)
    return bypass
