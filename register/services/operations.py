"""Demands and bypasses: recording a demand or spurious trip (each device that failed to act
opens a finding), opening a bypass (a request until a lead who is not the requester
authorises it), authorising and closing it. Deferrals are in ``register.schedule.services``;
findings in ``register.operations.services``."""

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
from register.operations import services as findings
from register.permissions import Action, require
from register.schedule import followup
from register.services.base import Reauthenticated, confirm_password, reference_errors

# ---------------------------------------------------------------------------------------
# Demands, bypasses, deferrals
# ---------------------------------------------------------------------------------------


def _device_errors(sif: SafetyFunction, successful: bool, spurious: bool, acted,
                   failed) -> dict[str, list[str]]:
    """The per-device rules of a demand: devices of this SIF, each either acted or failed,
    and a real demand the SIF did not act on names the device(s) that failed."""
    errors = reference_errors(sif, components_exercised=acted, failed_components=failed)
    failed_ids = {c.pk for c in failed}  # by id: two sites may both have an LT-100
    both = sorted({c.tag for c in acted if c.pk in failed_ids})
    if both:
        errors["failed_components"] = [f"A device either acted or failed to act, not both: "
                                       f"{', '.join(both)}."]
    if not successful and not spurious and not failed:
        errors.setdefault("failed_components", []).append(
            "The SIF did not act: name the device or devices that failed to act (each opens "
            "a finding).")
    return errors


@transaction.atomic
def record_demand(*, user, sif: SafetyFunction, occurred_at: dt.datetime, successful: bool,
                  description: str, spurious: bool = False,
                  components_exercised=(), failed_components=(),
                  cause: str = choices.DemandCause.NOT_RECORDED,
                  at: dt.datetime | None = None) -> Demand:
    """Record a real demand or a spurious trip with what each device did.

    ``components_exercised``: devices that acted; ``failed_components``: devices that failed
    to act. Each failed device opens a finding (``register.operations.services``), whether or
    not the SIF as a whole acted. ``at`` dates the history rows (the demo loader).
    """
    require(user, Action.RECORD_DEMAND, sif.unit.site_id)
    acted, failed = list(components_exercised), list(failed_components)
    demand = Demand(sif=sif, occurred_at=occurred_at, successful=successful, spurious=spurious,
                    description=description, recorded_by=user, cause=cause)
    errors = _device_errors(sif, successful, spurious, acted, failed)
    try:
        demand.full_clean()
    except ValidationError as exc:
        for key, messages in exc.message_dict.items():
            errors.setdefault(key, []).extend(messages)
    if errors:
        raise ValidationError(errors)
    attribute(demand, user, "demand recorded", at=at).save()
    demand.components_exercised.set(acted)
    demand.failed_components.set(failed)
    findings.open_for_demand(demand, failed, user, at=at)
    followup.after_test_change(sif.pk)
    return demand


@transaction.atomic
def open_bypass(*, user, sif: SafetyFunction, started_at: dt.datetime, authorised_hours: float,
                reason: str, compensating_measures: str = "", measures_effective: bool = False,
                component: Component | None = None, at: dt.datetime | None = None) -> Bypass:
    """Record a bypass put in place at ``started_at`` and ask for its authorisation.

    The bypass counts as bypass time from ``started_at`` whether or not it is authorised
    (the function is disabled either way); until a lead of the site who is not ``user``
    authorises it (:func:`authorise_bypass`) it shows as awaiting authorisation.
    """
    require(user, Action.MANAGE_BYPASS, sif.unit.site_id)
    bypass = Bypass(sif=sif, component=component, started_at=started_at,
                    authorised_hours=authorised_hours, reason=(reason or "").strip(),
                    requested_by=user, compensating_measures=compensating_measures,
                    measures_effective=measures_effective)
    bypass.full_clean()
    _overlap_check(bypass)
    attribute(bypass, user, "bypass opened", at=at).save()
    followup.after_test_change(sif.pk)
    transaction.on_commit(lambda: _ask_for_authorisation(bypass.pk))
    return bypass


def _ask_for_authorisation(bypass_id: int) -> None:
    """Once committed, a bypass still in place and not yet authorised asks the site's
    leads (a bypass recorded already authorised or removed, as the demo's past, does not)."""
    from register.inbox import notices

    bypass = Bypass.objects.filter(pk=bypass_id, authorised_by__isnull=True,
                                   ended_at__isnull=True).select_related(
        "sif__unit__site", "component").first()
    if bypass is not None:
        notices.bypass_requested(bypass)


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
def authorise_bypass(bypass: Bypass, user, password: str | Reauthenticated | None = None, *,
                     check_password=True, at: dt.datetime | None = None) -> Bypass:
    """A lead of the site, never the requester, authorises a bypass still in place,
    re-entering the password (``services.base.confirm_password``).

    ``check_password=False`` is for the demo loader's invented past only. ``at`` is the
    moment of the authorisation and dates its history row (default now).
    """
    bypass = Bypass.objects.select_for_update().select_related("sif__unit").get(pk=bypass.pk)
    require(user, Action.AUTHORISE_BYPASS, bypass.sif.unit.site_id)
    if bypass.authorised_by_id is not None:
        raise ValidationError("This bypass is already authorised.")
    if bypass.ended_at is not None:
        raise ValidationError("This bypass has ended: it ran without an authorisation, and "
                              "that stays on record.")
    bypass.authorised_by = user
    bypass.authorised_at = at or timezone.now()
    bypass.full_clean()  # the model refuses the requester as authoriser (Bypass.clean)
    if check_password:  # last, so that the person hears of any other problem first
        confirm_password(user, password, outcome="the bypass is not authorised")
    attribute(bypass, user, "bypass authorised", at=at).save()
    return bypass


@transaction.atomic
def close_bypass(bypass: Bypass, user, ended_at: dt.datetime | None = None,
                 at: dt.datetime | None = None) -> Bypass:
    """Record the removal of the bypass at ``ended_at`` (default now) by ``user``."""
    bypass = Bypass.objects.select_for_update().get(pk=bypass.pk)
    require(user, Action.MANAGE_BYPASS, bypass.sif.unit.site_id)
    if bypass.ended_at is not None:
        raise ValidationError("This bypass is already closed.")
    bypass.ended_at = ended_at or timezone.now()
    bypass.closed_by = user
    bypass.full_clean()
    attribute(bypass, user, "bypass closed", at=at).save()
    followup.after_test_change(bypass.sif_id)
    return bypass
