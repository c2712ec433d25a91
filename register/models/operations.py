"""What happened in operation besides tests: demands, bypasses, deferrals."""

from __future__ import annotations

import datetime as dt

from django.conf import settings
from django.core.exceptions import ValidationError
from django.core.validators import MinValueValidator
from django.db import models
from django.db.models import Q
from django.utils.translation import gettext_lazy as _
from simple_history.models import HistoricalRecords

from register import choices
from register.days import is_future
from register.models.base import (
    SiteScopedQuerySet,
)
from register.models.design import (
    Component,
    SafetyFunction,
    TestPlan,
)


class Demand(models.Model):
    """A real demand on the SIF (a real trip), successful or not."""

    sif = models.ForeignKey(SafetyFunction, on_delete=models.PROTECT, related_name="demands")
    occurred_at = models.DateTimeField(_("occurred at"))
    successful = models.BooleanField(_("the SIF acted as required"))
    spurious = models.BooleanField(
        _("spurious trip (no real process demand)"), default=False,
    )
    description = models.TextField(_("description"))
    components_exercised = models.ManyToManyField(Component, blank=True,
                                                  related_name="demands")
    failed_components = models.ManyToManyField(Component, blank=True,
                                               related_name="failed_on_demand")
    recorded_by = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.PROTECT)

    site_path = "sif__unit__site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords(m2m_fields=[components_exercised, failed_components])

    class Meta:
        ordering = ["-occurred_at"]

    def __str__(self):
        return f"{self.sif.tag} demand {self.occurred_at:%Y-%m-%d}"

    def clean(self):
        if is_future(self.occurred_at):
            raise ValidationError({"occurred_at": _("The demand date is in the future.")})
        if self.spurious and not self.successful:
            raise ValidationError({"spurious": _("A spurious trip is a trip: mark it "
                                                 "successful.")})


class Bypass(models.Model):
    """A SIF, or part of it, deliberately disabled (maintenance, start-up) under authorisation."""

    sif = models.ForeignKey(SafetyFunction, on_delete=models.PROTECT, related_name="bypasses")
    component = models.ForeignKey(Component, on_delete=models.PROTECT, null=True, blank=True,
                                  related_name="bypasses",
                                  help_text=_("Leave empty when the whole SIF is bypassed."))
    started_at = models.DateTimeField(_("started at"))
    ended_at = models.DateTimeField(_("ended at"), null=True, blank=True)
    authorised_hours = models.FloatField(_("authorised duration (h)"),
                                         validators=[MinValueValidator(0.1)])
    reason = models.TextField(_("reason"))
    authorised_by = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.PROTECT,
                                      related_name="authorised_bypasses")
    compensating_measures = models.TextField(_("compensating measures"), blank=True)
    measures_effective = models.BooleanField(
        _("compensating measures give equivalent protection"), default=False,
        help_text=_("If not, the bypassed time counts as the SIF being unavailable."),
    )
    cached_state = models.CharField(max_length=10, choices=choices.BypassState.choices,
                                    default=choices.BypassState.OPEN, editable=False)

    site_path = "sif__unit__site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords(excluded_fields=["cached_state"])

    class Meta:
        ordering = ["-started_at"]
        verbose_name_plural = _("bypasses")
        constraints = [
            models.CheckConstraint(
                condition=Q(ended_at__isnull=True) | Q(ended_at__gte=models.F("started_at")),
                name="register_bypass_end_after_start",
            ),
        ]

    def __str__(self):
        return f"{self.sif.tag} bypass from {self.started_at:%Y-%m-%d %H:%M}"

    def clean(self):
        errors = {}
        if self.started_at and self.ended_at and self.ended_at < self.started_at:
            errors["ended_at"] = _("The bypass cannot end before it starts.")
        if is_future(self.started_at):
            errors["started_at"] = _("The bypass start is in the future.")
        if self.component_id and self.sif_id and self.component.subsystem.sif_id != self.sif_id:
            errors["component"] = _("The component belongs to another SIF.")
        if errors:
            raise ValidationError(errors)

    def duration_hours(self, as_of: dt.datetime) -> float:
        end = self.ended_at or as_of
        return max(0.0, (end - self.started_at).total_seconds() / 3600.0)


class Deferral(models.Model):
    """A request to postpone a due proof test, and the lead's decision on it."""

    plan = models.ForeignKey(TestPlan, on_delete=models.PROTECT, related_name="deferrals")
    due_on = models.DateField(_("due date being deferred"))
    proposed_on = models.DateField(_("proposed new date"))
    reason = models.TextField(_("reason"))
    requested_by = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.PROTECT,
                                     related_name="requested_deferrals")
    requested_at = models.DateTimeField(auto_now_add=True)
    status = models.CharField(_("status"), max_length=10, choices=choices.DeferralStatus.choices,
                              default=choices.DeferralStatus.PENDING)
    decided_by = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.PROTECT,
                                   related_name="decided_deferrals", null=True, blank=True)
    decided_at = models.DateTimeField(_("decided at"), null=True, blank=True)
    decision_note = models.TextField(_("decision note"), blank=True)
    projected_pfd_avg = models.FloatField(
        _("projected PFDavg to the proposed date"), null=True, blank=True,
        help_text=_("As shown to the decider when the decision was made."),
    )

    site_path = "plan__sif__unit__site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords()

    class Meta:
        ordering = ["-requested_at"]
        constraints = [
            models.CheckConstraint(condition=Q(proposed_on__gt=models.F("due_on")),
                                   name="register_deferral_later_than_due"),
            # One deferral per due cycle can be approved.
            models.UniqueConstraint(fields=["plan", "due_on"],
                                    condition=Q(status="approved"),
                                    name="register_deferral_one_approved_per_due"),
        ]

    def __str__(self):
        return f"{self.plan} deferral to {self.proposed_on}"

    def clean(self):
        if self.due_on and self.proposed_on and self.proposed_on <= self.due_on:
            raise ValidationError({"proposed_on": _(
                "The proposed date must be after the current due date (%(due)s)."
            ) % {"due": self.due_on}})


