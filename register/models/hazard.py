"""Hazard scenarios and their LOPA: initiating causes, protection layers, modifiers."""

from __future__ import annotations

from django.core.exceptions import ValidationError
from django.db import models
from django.db.models import Q
from django.utils.translation import gettext_lazy as _
from simple_history.models import HistoricalRecords

from register import choices
from register.models.base import (
    SiteScopedQuerySet,
    _nonneg_check,
    _prob_check,
    plausible,
    probability,
)
from register.models.site import (
    PlantUnit,
    Site,
)

# ---------------------------------------------------------------------------------------
# Hazard scenarios (LOPA)
# ---------------------------------------------------------------------------------------


class HazardScenario(models.Model):
    """A hazard scenario from the HAZOP/PHA, analysed by LOPA to set a SIF's target."""

    site = models.ForeignKey(Site, on_delete=models.PROTECT, related_name="scenarios")
    unit = models.ForeignKey(PlantUnit, on_delete=models.PROTECT, related_name="scenarios",
                             null=True, blank=True)
    reference = models.CharField(_("HAZOP/PHA reference"), max_length=60)
    title = models.CharField(_("title"), max_length=200)
    consequence = models.TextField(_("consequence"))
    category = models.CharField(_("consequence category"), max_length=12,
                                choices=choices.ConsequenceCategory.choices)
    tolerable_frequency_per_year = models.FloatField(
        _("tolerable frequency (per year)"),
        validators=plausible("tolerable_frequency_per_year"),
        help_text=_("The site's risk criterion for this consequence."),
    )

    site_path = "site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords()

    class Meta:
        ordering = ["site", "reference"]
        constraints = [
            models.UniqueConstraint(fields=["site", "reference"],
                                    name="register_scenario_ref_per_site"),
            models.CheckConstraint(condition=Q(tolerable_frequency_per_year__gt=0),
                                   name="register_scenario_tolerable_positive"),
        ]

    def __str__(self):
        return f"{self.reference} {self.title}"

    def clean(self):
        if self.unit_id and self.site_id and self.unit.site_id != self.site_id:
            raise ValidationError({"unit": _("The unit belongs to another site.")})


class InitiatingCause(models.Model):
    """A cause that starts the scenario, with its frequency and the basis of that number."""

    scenario = models.ForeignKey(HazardScenario, on_delete=models.CASCADE,
                                 related_name="causes")
    description = models.CharField(_("description"), max_length=300)
    frequency_per_year = models.FloatField(_("frequency (per year)"),
                                           validators=plausible("frequency_per_year"))
    basis = models.CharField(_("basis"), max_length=300, blank=True)

    site_path = "scenario__site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords()

    class Meta:
        ordering = ["scenario", "id"]
        constraints = [_nonneg_check("frequency_per_year")]

    def __str__(self):
        return self.description


class ProtectionLayer(models.Model):
    """An independent protection layer other than the SIF (alarm, relief valve, dike...)."""

    scenario = models.ForeignKey(HazardScenario, on_delete=models.CASCADE,
                                 related_name="layers")
    description = models.CharField(_("description"), max_length=300)
    pfd = models.FloatField(_("PFD"), validators=probability)
    basis = models.CharField(_("basis"), max_length=300, blank=True)

    site_path = "scenario__site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords()

    class Meta:
        ordering = ["scenario", "id"]
        constraints = [_prob_check("pfd")]

    def __str__(self):
        return f"{self.description} (PFD {self.pfd:g})"


class ConditionalModifier(models.Model):
    """A conditional probability that multiplies the scenario frequency."""

    scenario = models.ForeignKey(HazardScenario, on_delete=models.CASCADE,
                                 related_name="modifiers")
    kind = models.CharField(_("kind"), max_length=15, choices=choices.ModifierKind.choices)
    probability = models.FloatField(_("probability"), validators=probability)
    basis = models.CharField(_("basis"), max_length=300, blank=True)

    site_path = "scenario__site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords()

    class Meta:
        ordering = ["scenario", "id"]
        constraints = [_prob_check("probability")]

    def __str__(self):
        return f"{self.get_kind_display()} {self.probability:g}"


