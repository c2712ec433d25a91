"""Design changes: every edit of the register's design rows, with reason and reference."""

from __future__ import annotations

from django.core.exceptions import ValidationError
from django.db import transaction
from django.db.models import OuterRef, Subquery

from register.changes import attribute
from register.days import today as site_today
from register.models import Component, TestPlan
from register.permissions import Action, require, site_id_of
from register.schedule import followup
from register.services.base import _sif_id_of, check_references

#: Fields of a plan whose change is a new version of the plan (``TestPlan.effective_from``).
PLAN_VERSION_FIELDS = ("interval_months", "coverage", "kind", "demand_counts_as_test",
                       "components")


def _date_plan_change(plan: TestPlan, changes: dict) -> None:
    """A plan change takes effect from a date, by default the day it is approved, never
    earlier: a change dated in the past would rewrite what was due then."""
    if not any(f in changes for f in PLAN_VERSION_FIELDS) and "effective_from" not in changes:
        return
    today = site_today(plan.sif.unit.site)
    if changes.get("effective_from") is None:
        plan.effective_from = today
    elif plan.effective_from < today:
        raise ValidationError({"effective_from": (
            f"A change cannot take effect before today ({today:%Y-%m-%d}): due dates that "
            "have already fallen stay under the plan then in force.")})


def _plan_scope(plan: TestPlan, components) -> set[int]:
    """The component ids a plan change names, all of the plan's own SIF (empty: every
    component of the SIF)."""
    ids = {getattr(c, "pk", c) for c in components or ()}
    found = list(Component.objects.filter(pk__in=ids).select_related("subsystem"))
    if ids - {c.pk for c in found}:
        raise ValidationError({"components": "No such component."})
    check_references(plan.sif, components=found)
    return ids


# ---------------------------------------------------------------------------------------
# Versions: the id of a design record's newest history row
# ---------------------------------------------------------------------------------------


class StaleVersionError(Exception):
    """The record changed since the version the change was based on; nothing was written."""

    def __init__(self, expected: int, current: int | None):
        self.expected, self.current = expected, current
        super().__init__(f"This record changed since version {expected}: it is now at "
                         f"version {current}. Read it again and apply your change to that "
                         "version.")


def current_version(instance) -> int | None:
    """A design record's version: the id of its newest history row (every change under
    change control writes one), or None before its first."""
    if instance.pk is None:
        return None
    return (instance.history.order_by("-history_id")
            .values_list("history_id", flat=True).first())


def with_versions(queryset):
    """``queryset`` with each row's version as ``history_version`` (one subquery, so a list
    reads every version in its own query)."""
    history = queryset.model.history.model
    return queryset.annotate(history_version=Subquery(
        history.objects.filter(id=OuterRef("pk")).order_by("-history_id")
        .values("history_id")[:1]))


@transaction.atomic
def update_design(instance, user, *, reason: str, reference: str, changes: dict,
                  expected_version: int | None = None):
    """Change design data of a register record under change control.

    ``reason`` and ``reference`` (change request number) are required and are kept in the
    change history with the change. ``expected_version``: the version (:func:`current_version`)
    the change is based on; when the record has moved on since, nothing is written and
    :class:`StaleVersionError` is raised (the row is locked while compared, so of two
    changes based on one version only the first is written).
    """
    site_id = site_id_of(instance)
    require(user, Action.EDIT_REGISTER, site_id)
    if expected_version is not None:
        list(type(instance).objects.select_for_update().filter(pk=instance.pk)
             .values_list("pk", flat=True))  # lock the row, then compare
        current = current_version(instance)
        if current != expected_version:
            raise StaleVersionError(expected_version, current)
    if not reason.strip() or not reference.strip():
        raise ValidationError({"reason": "A design change needs a reason and a change "
                                         "request reference."})
    scope = None
    for name, value in changes.items():
        if name == "components" and isinstance(instance, TestPlan):
            scope = _plan_scope(instance, value)
            continue
        setattr(instance, name, value)
    if isinstance(instance, TestPlan):
        if scope is not None and scope == set(instance.components.values_list("pk", flat=True)):
            changes = {k: v for k, v in changes.items() if k != "components"}
            scope = None
        _date_plan_change(instance, changes)
    instance.full_clean()
    attribute(instance, user, f"[{reference}] {reason}").save()
    if scope is not None:
        # a second history row, same reason and in-force date, holding the new scope
        instance.components.set(sorted(scope))
    sif_id = _sif_id_of(instance)
    if sif_id:
        followup.after_test_change(sif_id)
    return instance



@transaction.atomic
def create_design(instance, user, *, reason: str, reference: str, at=None):
    """Add a design row (SIF, subsystem, component, plan, step, scenario and its LOPA rows)
    under change control: the right to edit the register at its site, a reason and a
    change request reference kept in its history, validation, and the follow-up
    (due dates, recompute) after commit. The import and the demo loader add rows here;
    ``at`` dates the history entry when the row was really recorded (the demo's past).
    """
    site_id = site_id_of(instance)
    require(user, Action.EDIT_REGISTER, site_id)
    if not reason.strip() or not reference.strip():
        raise ValidationError({"reason": "A design change needs a reason and a change "
                                         "request reference."})
    instance.full_clean()
    attribute(instance, user, f"[{reference}] {reason}", at=at).save()
    sif_id = _sif_id_of(instance)
    if sif_id:
        followup.after_test_change(sif_id)
    return instance
