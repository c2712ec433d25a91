"""The register: sites, hazard scenarios, safety functions, their hardware, test plans and
the records of what happened in operation (tests, demands, bypasses, deferrals).

Units: failure rates per hour, frequencies per year, probabilities as fractions 0..1.
Validation lives in ``clean()`` (messages keyed by field); named database constraints
back up the most important rules for writes that skip ``full_clean()``.
"""

from __future__ import annotations

import datetime as dt

from django.conf import settings
from django.core.exceptions import ValidationError
from django.core.validators import MaxValueValidator, MinValueValidator
from django.db import models
from django.db.models import Q
from django.urls import reverse
from django.utils.translation import gettext_lazy as _
from simple_history.models import HistoricalRecords

from calcs.engine.units import HOURS_PER_MONTH, HOURS_PER_YEAR  # noqa: F401 - re-exported

from . import choices
from .days import is_future

probability = [MinValueValidator(0.0), MaxValueValidator(1.0)]
non_negative = [MinValueValidator(0.0)]


def _plausible_rate(value):
    """The one plausibility rule for failure rates (calcs.engine.units.check_rate)."""
    from calcs.engine.errors import InputError
    from calcs.engine.units import check_rate

    if value is None:
        return
    try:
        check_rate(value, "rate")
    except InputError as exc:
        raise ValidationError(exc.message) from None


plausible_rate = [_plausible_rate]
positive_frequency = [MinValueValidator(0.0)]


def _prob_check(field: str) -> models.CheckConstraint:
    return models.CheckConstraint(
        condition=Q(**{f"{field}__gte": 0.0}) & Q(**{f"{field}__lte": 1.0}),
        name=f"%(app_label)s_%(class)s_{field}_0_1",
    )


def _nonneg_check(field: str) -> models.CheckConstraint:
    return models.CheckConstraint(
        condition=Q(**{f"{field}__gte": 0.0}) | Q(**{f"{field}__isnull": True}),
        name=f"%(app_label)s_%(class)s_{field}_nonneg",
    )


class SiteScopedQuerySet(models.QuerySet):
    """Querysets that can be restricted to the sites where a user has a right.

    ``site_path`` on the model names the lookup from the model to its Site.
    """

    def restrict(self, user, action: str = "view"):
        """Only rows at sites where ``user`` has the right (``register.permissions``)."""
        from .permissions import restrict

        return restrict(self, user, action)


# ---------------------------------------------------------------------------------------
# Sites, units, people
# ---------------------------------------------------------------------------------------


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


# ---------------------------------------------------------------------------------------
# Device library
# ---------------------------------------------------------------------------------------


class DeviceType(models.Model):
    """A device model in the library with its generic failure data and their source.

    Components take their rates from here unless they carry their own.
    """

    name = models.CharField(_("name"), max_length=200, unique=True)
    role = models.CharField(_("used for"), max_length=10, choices=choices.SubsystemRole.choices)
    lambda_du_per_hour = models.FloatField(_("λDU (per hour)"), validators=plausible_rate)
    lambda_dd_per_hour = models.FloatField(_("λDD (per hour)"), default=0.0,
                                           validators=plausible_rate)
    lambda_s_per_hour = models.FloatField(_("λS (per hour)"), default=0.0,
                                          validators=non_negative)
    device_class = models.CharField(_("type A/B"), max_length=1,
                                    choices=choices.DeviceClass.choices,
                                    default=choices.DeviceClass.B)
    systematic_capability = models.PositiveSmallIntegerField(
        _("systematic capability (SC)"), null=True, blank=True,
        validators=[MinValueValidator(1), MaxValueValidator(4)],
    )
    source = models.CharField(_("data source"), max_length=300,
                              help_text=_("Where the rates come from (certificate, handbook)."))

    site_path = None
    objects = models.Manager()
    history = HistoricalRecords()

    class Meta:
        ordering = ["name"]
        constraints = [
            _nonneg_check("lambda_du_per_hour"),
            _nonneg_check("lambda_dd_per_hour"),
            _nonneg_check("lambda_s_per_hour"),
        ]

    def __str__(self):
        return self.name


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
        validators=[MinValueValidator(1e-12), MaxValueValidator(10.0)],
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
                                           validators=positive_frequency)
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


# ---------------------------------------------------------------------------------------
# Safety functions and their hardware
# ---------------------------------------------------------------------------------------


class SafetyFunction(models.Model):
    """A safety instrumented function (SIF): the unit of the register."""

    unit = models.ForeignKey(PlantUnit, on_delete=models.PROTECT, related_name="sifs")
    tag = models.CharField(_("tag"), max_length=40)
    name = models.CharField(_("name"), max_length=200)
    safe_state = models.CharField(_("safe state"), max_length=300)
    demand_mode = models.CharField(_("demand mode"), max_length=12,
                                   choices=choices.DemandMode.choices,
                                   default=choices.DemandMode.LOW)
    scenarios = models.ManyToManyField(HazardScenario, related_name="sifs", blank=True)
    target_pfd_avg = models.FloatField(
        _("required PFDavg"), null=True, blank=True,
        validators=[MinValueValidator(1e-9), MaxValueValidator(1.0)],
        help_text=_("Low demand. Leave empty to take it from the strictest LOPA scenario."),
    )
    target_pfh_per_hour = models.FloatField(
        _("required PFH (per hour)"), null=True, blank=True,
        validators=[MinValueValidator(1e-12), MaxValueValidator(1e-3)],
        help_text=_("High demand / continuous mode."),
    )
    target_sil = models.PositiveSmallIntegerField(
        _("target SIL"), validators=[MinValueValidator(1), MaxValueValidator(4)],
        help_text=_("The SIL the target falls in (checked against the target on save)."),
    )
    process_safety_time_s = models.FloatField(_("process safety time (s)"), null=True,
                                              blank=True, validators=non_negative)
    required_response_time_s = models.FloatField(_("required response time (s)"), null=True,
                                                  blank=True, validators=non_negative)
    trip_setpoint = models.FloatField(_("trip setpoint"), null=True, blank=True)
    setpoint_unit = models.CharField(_("setpoint unit"), max_length=20, blank=True)
    life_stage = models.CharField(_("life stage"), max_length=15,
                                  choices=choices.LifeStage.choices,
                                  default=choices.LifeStage.IN_SERVICE)
    in_service_on = models.DateField(_("in service since"), null=True, blank=True)
    owner = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.SET_NULL, null=True,
                              blank=True, related_name="owned_sifs")

    site_path = "unit__site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords(m2m_fields=[scenarios])

    class Meta:
        ordering = ["tag"]
        verbose_name = _("safety instrumented function")
        constraints = [
            models.UniqueConstraint(fields=["unit", "tag"], name="register_sif_tag_per_unit"),
            models.CheckConstraint(
                condition=Q(target_pfd_avg__isnull=True)
                | (Q(target_pfd_avg__gt=0) & Q(target_pfd_avg__lte=1)),
                name="register_sif_target_pfd_range",
            ),
        ]

    def __str__(self):
        return f"{self.tag} {self.name}"

    def get_absolute_url(self):
        return reverse("register:sif_detail", args=[self.pk])

    @property
    def site(self):
        return self.unit.site

    def clean(self):
        errors = {}
        if self.response_time_exceeds_safety_time():
            errors["required_response_time_s"] = _(
                "The required response time must be shorter than the process safety time."
            )
        if self.demand_mode == choices.DemandMode.LOW and self.target_pfd_avg is not None:
            from calcs.engine.sil import sil_from_pfd

            implied = sil_from_pfd(self.target_pfd_avg)
            if implied and self.target_sil and implied != self.target_sil:
                errors["target_sil"] = _(
                    "A required PFDavg of %(pfd)g lies in SIL %(sil)d, not SIL %(given)d."
                ) % {"pfd": self.target_pfd_avg, "sil": implied, "given": self.target_sil}
        if self.demand_mode != choices.DemandMode.LOW and self.target_pfh_per_hour is None:
            errors["target_pfh_per_hour"] = _(
                "High-demand and continuous SIFs need a required PFH."
            )
        if errors:
            raise ValidationError(errors)

    def response_time_exceeds_safety_time(self) -> bool:
        return (
            self.process_safety_time_s is not None
            and self.required_response_time_s is not None
            and self.required_response_time_s >= self.process_safety_time_s
        )


class Subsystem(models.Model):
    """One part of a SIF in series with the others: sensing, logic solving or final elements."""

    sif = models.ForeignKey(SafetyFunction, on_delete=models.CASCADE,
                            related_name="subsystems")
    role = models.CharField(_("role"), max_length=10, choices=choices.SubsystemRole.choices)
    name = models.CharField(_("name"), max_length=100)
    voting = models.CharField(_("voting (MooN)"), max_length=8,
                              help_text=_("For example 1oo1, 1oo2, 2oo3, 1oo2D."))
    beta = models.FloatField(_("β (undetected common cause)"), default=0.0,
                             validators=probability)
    beta_d = models.FloatField(_("βD (detected common cause)"), default=0.0,
                               validators=probability)
    mttr_hours = models.FloatField(_("MTTR (h)"), default=8.0, validators=non_negative,
                                   help_text=_("Mean time to restore after a detected failure."))
    mrt_hours = models.FloatField(_("MRT (h)"), default=8.0, validators=non_negative,
                                  help_text=_("Mean repair time after a failure found by a test."))
    position = models.PositiveSmallIntegerField(_("order"), default=0)

    site_path = "sif__unit__site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords()

    class Meta:
        ordering = ["sif", "position", "id"]
        constraints = [_prob_check("beta"), _prob_check("beta_d"),
                       _nonneg_check("mttr_hours"), _nonneg_check("mrt_hours")]

    def __str__(self):
        return f"{self.sif.tag} / {self.name} ({self.voting})"

    def clean(self):
        from calcs.engine.errors import InputError
        from calcs.engine.voting import parse_voting

        try:
            parse_voting(self.voting)
        except InputError as exc:
            raise ValidationError({"voting": exc.message}) from exc


class Component(models.Model):
    """A field device (transmitter, logic solver, valve...) in one subsystem of a SIF.

    Rates left empty are taken from the device type.
    """

    subsystem = models.ForeignKey(Subsystem, on_delete=models.CASCADE,
                                  related_name="components")
    tag = models.CharField(_("device tag"), max_length=40, db_index=True)
    device_type = models.ForeignKey(DeviceType, on_delete=models.PROTECT,
                                    related_name="components")
    in_service_on = models.DateField(_("in service since"))
    lambda_du_per_hour = models.FloatField(_("λDU (per hour)"), null=True, blank=True,
                                           validators=plausible_rate)
    lambda_dd_per_hour = models.FloatField(_("λDD (per hour)"), null=True, blank=True,
                                           validators=plausible_rate)
    lambda_s_per_hour = models.FloatField(_("λS (per hour)"), null=True, blank=True,
                                          validators=non_negative)
    proof_test_coverage = models.FloatField(
        _("proof-test coverage"), default=1.0, validators=probability,
        help_text=_("Share of dangerous undetected failures a full proof test reveals."),
    )
    partial_test_coverage = models.FloatField(
        _("partial-test coverage"), default=0.0, validators=probability,
        help_text=_("Share of dangerous undetected failures a partial test reveals."),
    )
    mission_time_years = models.FloatField(
        _("mission time (years)"), default=20.0, validators=[MinValueValidator(0.1)],
        help_text=_("Until overhaul or replacement, when untested failures are removed."),
    )
    device_class = models.CharField(_("type A/B"), max_length=1, blank=True,
                                    choices=choices.DeviceClass.choices)
    systematic_capability = models.PositiveSmallIntegerField(
        _("systematic capability (SC)"), null=True, blank=True,
        validators=[MinValueValidator(1), MaxValueValidator(4)],
    )
    data_basis = models.CharField(_("basis of the data"), max_length=12,
                                  choices=choices.DataBasis.choices,
                                  default=choices.DataBasis.GENERIC)

    site_path = "subsystem__sif__unit__site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords()

    class Meta:
        ordering = ["subsystem", "tag"]
        constraints = [
            _prob_check("proof_test_coverage"), _prob_check("partial_test_coverage"),
            _nonneg_check("lambda_du_per_hour"), _nonneg_check("lambda_dd_per_hour"),
            _nonneg_check("lambda_s_per_hour"),
            models.CheckConstraint(condition=Q(partial_test_coverage__lte=models.F(
                "proof_test_coverage")), name="register_component_partial_le_full"),
        ]

    def __str__(self):
        return self.tag

    def clean(self):
        if (self.partial_test_coverage is not None and self.proof_test_coverage is not None
                and self.partial_test_coverage > self.proof_test_coverage):
                raise ValidationError({"partial_test_coverage": _(
                    "A partial test cannot reveal more than the full proof test "
                    "(%(full)g).") % {"full": self.proof_test_coverage}})
        if is_future(self.in_service_on):
            raise ValidationError({"in_service_on": _("The in-service date is in the future.")})

    # Effective data: own value, else the device type's.
    @property
    def lambda_du(self) -> float:
        return _own_or_type(self.lambda_du_per_hour, self.device_type.lambda_du_per_hour)

    @property
    def lambda_dd(self) -> float:
        return _own_or_type(self.lambda_dd_per_hour, self.device_type.lambda_dd_per_hour)

    @property
    def lambda_s(self) -> float:
        return _own_or_type(self.lambda_s_per_hour, self.device_type.lambda_s_per_hour)

    @property
    def effective_class(self) -> str:
        return self.device_class or self.device_type.device_class

    @property
    def effective_sc(self) -> int | None:
        return self.systematic_capability or self.device_type.systematic_capability


    @property
    def safe_failure_fraction(self) -> float:
        """SFF = (λS + λDD) / (λS + λDD + λDU); 0 when all rates are zero."""
        total = self.lambda_s + self.lambda_dd + self.lambda_du
        return (self.lambda_s + self.lambda_dd) / total if total else 0.0


def _own_or_type(own: float | None, from_type: float) -> float:
    return from_type if own is None else own


# ---------------------------------------------------------------------------------------
# Test plans
# ---------------------------------------------------------------------------------------


class TestPlan(models.Model):
    """A commitment to test a SIF (or chosen components) at an interval, with its procedure.

    ``next_due_on`` and ``cached_state`` are caches, kept by ``register.scheduling``;
    the state shown to people is always computed from the records.
    """

    __test__ = False  # not a pytest test class

    sif = models.ForeignKey(SafetyFunction, on_delete=models.CASCADE, related_name="plans")
    name = models.CharField(_("name"), max_length=200)
    kind = models.CharField(_("kind of test"), max_length=10, choices=[
        (choices.TestKind.FULL, choices.TestKind.FULL.label),
        (choices.TestKind.PARTIAL, choices.TestKind.PARTIAL.label),
    ], default=choices.TestKind.FULL)
    components = models.ManyToManyField(
        Component, blank=True, related_name="plans",
        help_text=_("Leave empty to test the whole SIF."),
    )
    interval_months = models.PositiveIntegerField(
        _("interval (months)"), validators=[MinValueValidator(1), MaxValueValidator(240)],
    )
    coverage = models.FloatField(_("coverage"), default=1.0, validators=probability,
                                 help_text=_("Share of dangerous undetected failures revealed."))
    demand_counts_as_test = models.BooleanField(
        _("a successful real demand counts as a test"), default=False,
        help_text=_("Only for the components the demand exercised."),
    )
    assignee = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.SET_NULL,
                                 null=True, blank=True, related_name="assigned_plans")
    # Caches (see class docstring).
    next_due_on = models.DateField(_("next due (cached)"), null=True, blank=True, editable=False)
    cached_state = models.CharField(max_length=12, choices=choices.PlanState.choices,
                                    default=choices.PlanState.NO_PLAN, editable=False)

    site_path = "sif__unit__site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords(m2m_fields=[components], excluded_fields=["next_due_on",
                                                                         "cached_state"])

    class Meta:
        ordering = ["sif", "name"]
        constraints = [_prob_check("coverage")]

    def __str__(self):
        return f"{self.sif.tag}: {self.name}"

    @property
    def interval_hours(self) -> float:
        return self.interval_months * HOURS_PER_MONTH


class TestStep(models.Model):
    """One step of a test procedure with its acceptance criterion."""

    __test__ = False

    plan = models.ForeignKey(TestPlan, on_delete=models.CASCADE, related_name="steps")
    position = models.PositiveSmallIntegerField(_("step"), default=1)
    instruction = models.TextField(_("instruction"))
    measured_quantity = models.CharField(_("measured quantity"), max_length=100, blank=True,
                                         help_text=_("For example trip value, closing time."))
    unit = models.CharField(_("unit"), max_length=20, blank=True)
    criterion = models.CharField(_("acceptance criterion"), max_length=16,
                                 choices=choices.CriterionKind.choices,
                                 default=choices.CriterionKind.NONE)
    target_value = models.FloatField(_("target value"), null=True, blank=True)
    tolerance = models.FloatField(_("tolerance (±)"), null=True, blank=True,
                                  validators=non_negative)
    limit = models.FloatField(_("limit"), null=True, blank=True)

    site_path = "plan__sif__unit__site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords()

    class Meta:
        ordering = ["plan", "position"]

    def __str__(self):
        return f"{self.position}. {self.instruction[:60]}"

    def clean(self):
        kind = self.criterion
        if kind == choices.CriterionKind.AROUND_SETPOINT and (
            self.target_value is None or self.tolerance is None
        ):
            raise ValidationError({"tolerance": _("A tolerance criterion needs a target "
                                                  "value and a tolerance.")})
        if kind in (choices.CriterionKind.AT_MOST, choices.CriterionKind.AT_LEAST) and (
            self.limit is None
        ):
            raise ValidationError({"limit": _("This criterion needs a limit.")})

    def judge(self, value: float | None) -> bool | None:
        """True if ``value`` meets the criterion, False if not, None when nothing to judge
        (the one rule, ``register.rules.judge_measurement``)."""
        from .rules import judge_measurement

        if value is None:
            return None
        return judge_measurement(self, value).within

    def describe_criterion(self) -> str:
        u = f" {self.unit}" if self.unit else ""
        if self.criterion == choices.CriterionKind.AROUND_SETPOINT:
            return f"{self.target_value:g} ± {self.tolerance:g}{u}"
        if self.criterion == choices.CriterionKind.AT_MOST:
            return f"≤ {self.limit:g}{u}"
        if self.criterion == choices.CriterionKind.AT_LEAST:
            return f"≥ {self.limit:g}{u}"
        return ""


# ---------------------------------------------------------------------------------------
# What happened in operation
# ---------------------------------------------------------------------------------------


class SignedRecordError(ValidationError):
    """Raised on any attempt to change a signed record."""


class TestRecord(models.Model):
    """A test done on a SIF: proof test, partial test, validation, sign-off or credited demand.

    Drafts may be edited. Once signed, the record is immutable: a correction is a new
    record whose ``supersedes`` points at it. The only change allowed after signing is
    the verifier's countersignature.
    """

    __test__ = False

    sif = models.ForeignKey(SafetyFunction, on_delete=models.PROTECT, related_name="tests")
    plan = models.ForeignKey(TestPlan, on_delete=models.PROTECT, related_name="records",
                             null=True, blank=True)
    kind = models.CharField(_("kind"), max_length=12, choices=choices.TestKind.choices)
    performed_at = models.DateTimeField(_("performed at"))
    performed_by = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.PROTECT,
                                     related_name="performed_tests")
    performed_by_name = models.CharField(_("performer (as signed)"), max_length=200,
                                         blank=True)
    verified_by = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.PROTECT,
                                    related_name="verified_tests", null=True, blank=True)
    verified_by_name = models.CharField(_("verifier (as signed)"), max_length=200, blank=True)
    status = models.CharField(_("status"), max_length=10, choices=choices.RecordStatus.choices,
                              default=choices.RecordStatus.DRAFT)
    signed_at = models.DateTimeField(_("signed at"), null=True, blank=True)
    verified_at = models.DateTimeField(_("verified at"), null=True, blank=True)
    supersedes = models.OneToOneField("self", on_delete=models.PROTECT, null=True, blank=True,
                                      related_name="superseded_by")
    correction_reason = models.TextField(_("reason for correction"), blank=True)
    remarks = models.TextField(_("remarks"), blank=True)
    client_key = models.CharField(
        _("client key"), max_length=100, null=True, blank=True,
        help_text=_("Idempotency key supplied by an external system."),
    )
    draft_version = models.PositiveIntegerField(default=1, editable=False)
    created_at = models.DateTimeField(auto_now_add=True)

    site_path = "sif__unit__site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords()

    SIGNED_FIELDS = ("sif_id", "plan_id", "kind", "performed_at", "performed_by_id",
                     "performed_by_name", "signed_at", "supersedes_id", "correction_reason",
                     "remarks", "client_key")

    class Meta:
        ordering = ["-performed_at", "-id"]
        indexes = [models.Index(fields=["sif", "performed_at"])]
        constraints = [
            models.UniqueConstraint(fields=["client_key"], condition=Q(client_key__isnull=False),
                                    name="register_test_client_key_unique"),
            models.CheckConstraint(
                condition=~Q(verified_by=models.F("performed_by")) | Q(verified_by__isnull=True),
                name="register_test_verifier_not_performer",
            ),
        ]

    def __str__(self):
        return f"{self.sif.tag} {self.get_kind_display()} {self.performed_at:%Y-%m-%d}"

    def get_absolute_url(self):
        return reverse("register:test_detail", args=[self.pk])

    @property
    def is_signed(self) -> bool:
        return self.status != choices.RecordStatus.DRAFT

    @property
    def is_current(self) -> bool:
        """False once a later record supersedes this one (one query if not prefetched)."""
        return not hasattr(self, "superseded_by")


    def clean(self):
        errors = {}
        if is_future(self.performed_at):
            errors["performed_at"] = _("The test date is in the future.")
        if self.performed_at and self.sif_id:
            started = _earliest_in_service(self)
            if started and self.kind not in (choices.TestKind.SIGN_OFF,
                                             choices.TestKind.VALIDATION) \
                    and self.performed_at.date() < started:
                errors["performed_at"] = _(
                    "The test is dated %(date)s, before the equipment entered service on "
                    "%(started)s."
                ) % {"date": self.performed_at.date(), "started": started}
        if self.plan_id and self.sif_id and self.plan.sif_id != self.sif_id:
            errors["plan"] = _("The test plan belongs to another SIF.")
        if self.verified_by_id and self.verified_by_id == self.performed_by_id:
            errors["verified_by"] = _("The verifier must be another person than the performer.")
        if self.supersedes_id:
            if not self.correction_reason.strip():
                errors["correction_reason"] = _("A correction needs a reason.")
            if self.supersedes.sif_id != self.sif_id:
                errors["supersedes"] = _("A correction must be for the same SIF.")
        if errors:
            raise ValidationError(errors)

    def save(self, *args, **kwargs):
        if self.pk:
            self._refuse_changes_after_signing()
        super().save(*args, **kwargs)

    def delete(self, *args, **kwargs):
        if self.pk and type(self).objects.filter(pk=self.pk).exclude(
                status=choices.RecordStatus.DRAFT).exists():
            raise SignedRecordError(_("A signed test record cannot be deleted."))
        return super().delete(*args, **kwargs)

    def _refuse_changes_after_signing(self):
        stored = type(self).objects.filter(pk=self.pk).values(
            "status", "verified_by_id", *self.SIGNED_FIELDS).first()
        if stored is None or stored["status"] == choices.RecordStatus.DRAFT:
            return
        changed = [f for f in self.SIGNED_FIELDS if stored[f] != getattr(self, f)]
        if stored["verified_by_id"] is not None and (
            self.verified_by_id != stored["verified_by_id"]
            or self.status != stored["status"]
        ):
            changed.append("verified_by")
        if changed:
            raise SignedRecordError(
                _("This record is signed and cannot be changed (%(fields)s). Record a "
                  "correction that supersedes it instead.") % {"fields": ", ".join(changed)}
            )


def _earliest_in_service(record: TestRecord) -> dt.date | None:
    if record.plan_id and record.plan.components.exists():
        qs = record.plan.components.all()
    else:
        qs = Component.objects.filter(subsystem__sif_id=record.sif_id)
    dates = [d for d in qs.values_list("in_service_on", flat=True) if d]
    if dates:
        return min(dates)
    return record.sif.in_service_on


class PartOfRecord(models.Model):
    """A row that belongs to a test record (result, measurement, attachment): once the
    record is signed it can be neither changed, added to, nor deleted; a correction
    supersedes the record instead. A database trigger enforces the same on PostgreSQL
    (migration 0005), so a raw SQL write cannot bypass it."""

    #: Path from this row to its test record's id.
    record_id_path = "record_id"

    class Meta:
        abstract = True

    def _record_signed(self) -> bool:
        """One query: is the record this row belongs to signed?"""
        if self.record_id_path == "result__record_id":
            if self.result_id is None:
                return False
            lookup = {"results__pk": self.result_id}
        elif self.record_id is None:
            return False
        else:
            lookup = {"pk": self.record_id}
        return TestRecord.objects.filter(**lookup).exclude(
            status=choices.RecordStatus.DRAFT).exists()

    def save(self, *args, **kwargs):
        if self._record_signed():
            raise SignedRecordError(_("The test record is signed: its results, measurements "
                                      "and attachments cannot be changed. Record a "
                                      "correction that supersedes it instead."))
        super().save(*args, **kwargs)

    def delete(self, *args, **kwargs):
        if self._record_signed():
            raise SignedRecordError(_("The test record is signed: its results, measurements "
                                      "and attachments cannot be deleted."))
        return super().delete(*args, **kwargs)


class ComponentResult(PartOfRecord):
    """As-found and as-left result of one component in one test, and any failure found."""

    record = models.ForeignKey(TestRecord, on_delete=models.CASCADE, related_name="results")
    component = models.ForeignKey(Component, on_delete=models.PROTECT, related_name="results")
    as_found = models.CharField(_("as found"), max_length=10, choices=choices.Verdict.choices)
    as_left = models.CharField(_("as left"), max_length=10, choices=choices.Verdict.choices)
    work_done = models.TextField(_("work done"), blank=True)
    failure_mode = models.CharField(_("failure found"), max_length=5, blank=True,
                                    choices=choices.FailureMode.choices)
    failure_description = models.TextField(_("failure description"), blank=True)

    site_path = "record__sif__unit__site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords()

    class Meta:
        ordering = ["record", "component__tag"]
        constraints = [
            models.UniqueConstraint(fields=["record", "component"],
                                    name="register_result_once_per_component"),
        ]
        indexes = [
            # Field failure statistics count dangerous undetected failures plant-wide
            # (calcs.adapter.device_type_stats); they are few, so a partial index suffices.
            models.Index(fields=["component"], condition=Q(failure_mode="du"),
                         name="register_result_du_idx"),
        ]

    def __str__(self):
        return f"{self.component} found {self.as_found}, left {self.as_left}"

    def clean(self):
        from .rules import result_problems  # the result rules and their messages

        errors = result_problems(
            as_found=self.as_found, as_left=self.as_left, failure_mode=self.failure_mode,
            failure_description=self.failure_description, work_done=self.work_done)
        if self.record_id and self.component_id and \
                self.component.subsystem.sif_id != self.record.sif_id:
            errors["component"] = _("The component belongs to another SIF.")
        if errors:
            raise ValidationError(errors)

    @property
    def found_dangerous_undetected(self) -> bool:
        return self.failure_mode == choices.FailureMode.DANGEROUS_UNDETECTED


class MeasuredValue(PartOfRecord):
    """A value measured during a test step (trip value, closing time...).

    ``within_criterion`` is the verdict of ``register.rules.judge_measurement`` on the
    step (and, for a timing step, the SIF's required response time); it is set on every
    save of a value with a step, so the stored flag is always the one rule's.
    """

    record_id_path = "result__record_id"

    result = models.ForeignKey(ComponentResult, on_delete=models.CASCADE,
                               related_name="measurements")
    step = models.ForeignKey(TestStep, on_delete=models.PROTECT, null=True, blank=True,
                             related_name="measurements")
    phase = models.CharField(_("phase"), max_length=10,
                             choices=[("found", _("As found")), ("left", _("As left"))])
    quantity = models.CharField(_("quantity"), max_length=100)
    value = models.FloatField(_("value"))
    unit = models.CharField(_("unit"), max_length=20, blank=True)
    within_criterion = models.BooleanField(_("meets criterion"), null=True)

    site_path = "result__record__sif__unit__site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords()

    class Meta:
        ordering = ["result", "step__position", "phase"]

    def __str__(self):
        return f"{self.quantity} {self.phase}: {self.value:g} {self.unit}"

    def judge(self):
        """The rule's :class:`register.rules.Judgement` of this value (needs a step)."""
        from .rules import is_timing_step, judge_measurement

        timed = self.result_id is not None and is_timing_step(self.step)
        return judge_measurement(self.step, self.value,
                                 sif=self.result.record.sif if timed else None)

    def save(self, *args, **kwargs):
        if self.step_id is not None:
            self.within_criterion = self.judge().within
        super().save(*args, **kwargs)


class Attachment(PartOfRecord):
    """A photo or file attached to a test record."""

    record = models.ForeignKey(TestRecord, on_delete=models.CASCADE, related_name="attachments")
    file = models.FileField(upload_to="attachments/%Y/%m/")
    original_name = models.CharField(max_length=200)
    content_type = models.CharField(max_length=100)
    size_bytes = models.PositiveIntegerField()
    sha256 = models.CharField(max_length=64)
    uploaded_by = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.PROTECT)
    uploaded_at = models.DateTimeField(auto_now_add=True)

    site_path = "record__sif__unit__site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords()

    def __str__(self):
        return self.original_name


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


class Notification(models.Model):
    """A message to a person about a state change; one per (subject, state, due cycle)."""

    recipient = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.CASCADE,
                                  related_name="ledger_notifications")
    site = models.ForeignKey(Site, on_delete=models.CASCADE, related_name="notifications")
    kind = models.CharField(max_length=15, choices=choices.NotificationKind.choices)
    subject_key = models.CharField(
        max_length=120,
        help_text=_("What changed and in which cycle, e.g. plan:12:overdue:2026-03-01."),
    )
    message = models.TextField()
    link = models.CharField(max_length=300, blank=True)
    created_at = models.DateTimeField(auto_now_add=True)
    emailed_at = models.DateTimeField(null=True, blank=True,
                                      help_text="When the mail server accepted the e-mail.")
    email_claimed_at = models.DateTimeField(
        null=True, blank=True, help_text="A sender is working on it since (a lease, so two "
                                         "workers never send the same e-mail).")
    email_attempts = models.PositiveSmallIntegerField(default=0)
    email_error = models.CharField(max_length=300, blank=True,
                                   help_text="Why the last attempt failed (retried later).")
    read_at = models.DateTimeField(null=True, blank=True)

    site_path = "site"
    objects = SiteScopedQuerySet.as_manager()

    class Meta:
        ordering = ["-created_at"]
        constraints = [
            models.UniqueConstraint(fields=["recipient", "subject_key"],
                                    name="register_notification_once"),
        ]

    def __str__(self):
        return self.message[:80]
from .models_audit import *  # noqa: E402, F403
