"""Asking for a pack: one validation used by the page, the API and the command."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

from django.conf import settings
from django.utils import timezone

from register.models import (
    EvidencePack,
)

# ---------------------------------------------------------------------------------------
# Asking for a pack (the web page and the API both call this)
# ---------------------------------------------------------------------------------------


#: The longest period one pack may cover (a pack reads every record of the period).
MAX_PACK_YEARS = 10


def service_start(scope: str, site, unit=None, sif=None) -> dt.date | None:
    """The first day of the service life of what a pack covers: the earliest in-service
    date of its SIFs and their components (None when nothing in it has one)."""
    from django.db.models import Min

    from register.models import Component, SafetyFunction

    sifs = SafetyFunction.objects.filter(unit__site=site)
    if scope == EvidencePack.Scope.UNIT and unit is not None:
        sifs = sifs.filter(unit=unit)
    elif scope == EvidencePack.Scope.SIF and sif is not None:
        sifs = sifs.filter(pk=sif.pk)
    days = [sifs.aggregate(d=Min("in_service_on"))["d"],
            Component.objects.filter(subsystem__sif__in=sifs).aggregate(
                d=Min("in_service_on"))["d"]]
    days = [d for d in days if d]
    return min(days) if days else None


def _longest_end(start: dt.date) -> dt.date:
    try:
        return start.replace(year=start.year + MAX_PACK_YEARS)
    except ValueError:  # 29 February
        return start.replace(year=start.year + MAX_PACK_YEARS, day=28)


def pack_request_errors(*, scope: str, site, period_start: dt.date | None,
                        period_end: dt.date | None, unit=None, sif=None) -> dict[str, str]:
    """The one validation of a pack request (page, API and command): field -> message.

    The period lies inside the plausible window (``register.days.check_plausible``), ends
    by today, starts no earlier than the service life of what the pack covers (its first
    in-service date) and spans at most MAX_PACK_YEARS years."""
    from django.core.exceptions import ValidationError

    from register.days import check_plausible

    errors = {}
    if scope == EvidencePack.Scope.UNIT and (unit is None or site is None
                                             or unit.site_id != site.pk):
        errors["unit"] = "Choose a unit of this site for a unit pack."
    if scope == EvidencePack.Scope.SIF and (sif is None or site is None
                                            or sif.unit.site_id != site.pk):
        errors["sif"] = "Choose a SIF of this site for a one-SIF pack."
    for name, day in (("period_start", period_start), ("period_end", period_end)):
        try:
            check_plausible(day, site)
        except ValidationError as exc:
            message = " ".join(exc.messages)
            errors[name] = f"{message[:1].upper()}{message[1:]}."
    if errors.keys() & {"period_start", "period_end"} or not (period_start and period_end):
        return errors
    today = timezone.localdate()
    if period_end < period_start:
        errors["period_end"] = "The period cannot end before it starts."
    elif period_end > today:
        errors["period_end"] = f"The period cannot end in the future (after {today})."
    elif period_end > _longest_end(period_start):
        errors["period_start"] = (f"A pack covers at most {MAX_PACK_YEARS} years; "
                                  "ask for several packs.")
    elif site is not None and "unit" not in errors and "sif" not in errors:
        first = service_start(scope, site, unit, sif)
        if first and period_start < first:
            errors["period_start"] = (f"The period starts before the service life of what "
                                      f"the pack covers (first in service on {first}); "
                                      f"start on or after {first}.")
    return errors


def request_pack(user, *, scope: str, site, period_start: dt.date, period_end: dt.date,
                 unit=None, sif=None, build_in_background: bool = True) -> EvidencePack:
    """Record a pack request and start its build once the request is committed
    (``build_in_background=False``: the caller builds it, as the command does).

    Needs the export right at the site (auditors, verifiers, leads). Asking for a pack
    writes only this request, never a register or test record.
    """
    from django.core.exceptions import ValidationError
    from django.db import transaction

    from register.permissions import Action, require

    require(user, Action.EXPORT, site.pk)
    errors = pack_request_errors(scope=scope, site=site, period_start=period_start,
                                 period_end=period_end, unit=unit, sif=sif)
    if errors:
        raise ValidationError(errors)
    with transaction.atomic():
        pack = EvidencePack.objects.create(
            scope=scope, site=site,
            unit=unit if scope == EvidencePack.Scope.UNIT else None,
            sif=sif if scope == EvidencePack.Scope.SIF else None,
            period_start=period_start, period_end=period_end, requested_by=user)

        def start():
            from register.audit.tasks import build_evidence_pack

            build_evidence_pack.delay(pack.pk)

        if build_in_background:
            transaction.on_commit(start)
    return pack


def pack_file(pack: EvidencePack) -> Path | None:
    """The finished zip of a pack, or None while it is not ready or if it is missing."""
    if pack.status != EvidencePack.Status.DONE or not pack.result_path:
        return None
    path = (Path(settings.VAR_DIR) / pack.result_path).resolve()
    if Path(settings.VAR_DIR).resolve() not in path.parents or not path.exists():
        return None
    return path
