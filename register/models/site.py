"""Sites, plant units and who holds which role where."""

from __future__ import annotations

import zoneinfo

from django.conf import settings
from django.core.exceptions import ValidationError
from django.core.validators import MaxValueValidator, MinValueValidator
from django.db import models
from django.utils.translation import gettext_lazy as _
from simple_history.models import HistoricalRecords

from register import choices
from register.models.base import (
    SiteScopedQuerySet,
    _prob_check,
    probability,
)

# ---------------------------------------------------------------------------------------
# Sites, units, people
# ---------------------------------------------------------------------------------------


def _valid_time_zone(value: str) -> None:
    try:
        zoneinfo.ZoneInfo(value)
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        raise ValidationError(_("Not a known time zone name (for example Europe/Oslo).")) \
            from None


class Site(models.Model):
    """A plant site (refinery, chemical or gas plant) and its follow-up settings."""

    code = models.SlugField(_("code"), max_length=30, unique=True)
    name = models.CharField(_("name"), max_length=200)
    due_soon_days = models.PositiveIntegerField(
        _("due-soon lead time (days)"), default=30,
        help_text=_("A test counts as due soon this many days before its due date."),
    )
    escalate_share = models.FloatField(
        _("first escalation, share of interval"), default=0.10, validators=probability,
        help_text=_("Escalate when overdue by more than this share of the test interval..."),
    )
    escalate_days = models.PositiveIntegerField(
        _("first escalation, days overdue"), default=30,
        help_text=_("...or by more than this many days, whichever comes first."),
    )
    second_escalation_days = models.PositiveIntegerField(
        _("second escalation, days overdue"), default=90,
        help_text=_("Days overdue after which the second escalation level is reached."),
    )
    time_zone = models.CharField(
        _("time zone"), max_length=64, default="UTC", validators=[_valid_time_zone],
        help_text=_("The site's calendar: due dates, the end of a day and the scan follow it "
                    "(an IANA name such as Europe/Oslo or America/Chicago)."),
    )
    rate_basis = models.CharField(
        _("failure rate used for achieved PFDavg"), max_length=10,
        choices=choices.RateBasis.choices, default=choices.RateBasis.FIELD,
        help_text=_("Field (the default): each component's rate is its device type's "
                    "plant-wide estimate updated by the component's own failures and hours "
                    "(empirical Bayes). Design: the rates entered in the register."),
    )
    confidence_level = models.FloatField(
        _("confidence level for field failure rates"), default=0.70,
        validators=[MinValueValidator(0.5), MaxValueValidator(0.999)],
        help_text=_("One-sided upper bound; IEC 61511-1:2016 11.9 asks for at least 70 %."),
    )
    prior_strength = models.FloatField(
        _("prior strength (equivalent failures)"), default=1.0,
        validators=[MinValueValidator(0.01)],
        help_text=_("Shape of the gamma prior built from the library rate."),
    )

    site_path = None
    objects = SiteScopedQuerySet.as_manager()

    @property
    def zone(self) -> zoneinfo.ZoneInfo:
        return zoneinfo.ZoneInfo(self.time_zone)
    history = HistoricalRecords()

    class Meta:
        ordering = ["name"]
        constraints = [_prob_check("escalate_share")]

    def __str__(self):
        return self.name


class PlantUnit(models.Model):
    """An area or process unit of a site (crude unit, compression, tank farm...)."""

    site = models.ForeignKey(Site, on_delete=models.PROTECT, related_name="units")
    code = models.CharField(_("code"), max_length=30)
    name = models.CharField(_("name"), max_length=200)

    site_path = "site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords()

    class Meta:
        ordering = ["site", "code"]
        constraints = [
            models.UniqueConstraint(fields=["site", "code"], name="register_unit_code_per_site")
        ]

    def __str__(self):
        return f"{self.code} {self.name}"


class Membership(models.Model):
    """A person's role at one site. A person may hold several roles at several sites."""

    user = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.CASCADE,
                             related_name="memberships")
    site = models.ForeignKey(Site, on_delete=models.CASCADE, related_name="memberships")
    role = models.CharField(_("role"), max_length=20, choices=choices.Role.choices)

    site_path = "site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords()

    class Meta:
        ordering = ["site", "role", "user"]
        constraints = [
            models.UniqueConstraint(fields=["user", "site", "role"],
                                    name="register_membership_unique")
        ]

    def __str__(self):
        return f"{self.user} - {self.get_role_display()} at {self.site}"


