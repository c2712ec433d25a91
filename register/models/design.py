"""The design of each safety function: device types, subsystems, components, test plans."""

from __future__ import annotations

from django.conf import settings
from django.core.exceptions import ValidationError
from django.core.validators import MaxValueValidator, MinValueValidator
from django.db import models
from django.db.models import Q
from django.urls import reverse
from django.utils.translation import gettext_lazy as _
from simple_history.models import HistoricalRecords

from register import choices
from register.calculations import calculations
from register.days import is_future
from register.models.base import (
    SiteScopedQuerySet,
    _nonneg_check,
    _prob_check,
    plausible,
    plausible_date,
    plausible_rate,
    probability,
)
from register.models.hazard import (
    HazardScenario,
)
from register.models.site import (
    PlantUnit,
)

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
                                          validators=plausible("safe_rate_per_hour"))
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
        validators=plausible("target_pfd"),
        help_text=_("Low demand. Leave empty to take it from the strictest LOPA scenario."),
    )
    target_pfh_per_hour = models.FloatField(
        _("required PFH (per hour)"), null=True, blank=True,
        validators=plausible("target_pfh_per_hour"),
        help_text=_("High demand / continuous mode."),
    )
    target_sil = models.PositiveSmallIntegerField(
        _("target SIL"), validators=[MinValueValidator(1), MaxValueValidator(4)],
        help_text=_("The SIL the target falls in (checked against the target on save)."),
    )
    process_safety_time_s = models.FloatField(_("process safety time (s)"), null=True,
                                              blank=True, validators=plausible("seconds"))
    required_response_time_s = models.FloatField(_("required response time (s)"), null=True,
                                                  blank=True, validators=plausible("seconds"))
    trip_setpoint = models.FloatField(_("trip setpoint"), null=True, blank=True,
                                      validators=plausible("process_value"))
    setpoint_unit = models.CharField(_("setpoint unit"), max_length=20, blank=True)
    life_stage = models.CharField(_("life stage"), max_length=15,
                                  choices=choices.LifeStage.choices,
                                  default=choices.LifeStage.IN_SERVICE)
    in_service_on = models.DateField(_("in service since"), null=True, blank=True,
                                     validators=plausible_date)
    owner = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.SET_NULL, null=True,
                              blank=True, related_name="owned_sifs")

    site_path = "unit__site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords(m2m_fields=[scenarios])

    class Meta:
        ordering = ["tag"]
        verbose_name = _("safety instrumented function")
        # /api/sifs/ in its default order (by tag)
        indexes = [models.Index(fields=["tag", "id"], name="register_sif_list")]
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
            from register.calculations import calculations

            implied = calculations().sil_from_pfd(self.target_pfd_avg)
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
    mttr_hours = models.FloatField(_("MTTR (h)"), default=8.0,
                                   validators=plausible("repair_hours"),
                                   help_text=_("Mean time to restore after a detected failure."))
    mrt_hours = models.FloatField(_("MRT (h)"), default=8.0,
                                  validators=plausible("repair_hours"),
                                  help_text=_("Mean repair time after a failure found by a test."))
    position = models.PositiveSmallIntegerField(_("order"), default=0)

    site_path = "sif__unit__site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords()

    class Meta:
        ordering = ["sif", "position", "id"]
        # /api/subsystems/ and the SIF page's subsystems in their default order
        indexes = [models.Index(fields=["sif", "position", "id"],
                                name="register_subsystem_list")]
        constraints = [_prob_check("beta"), _prob_check("beta_d"),
                       _nonneg_check("mttr_hours"), _nonneg_check("mrt_hours")]

    def __str__(self):
        return f"{self.sif.tag} / {self.name} ({self.voting})"

    def clean(self):
        from register.calculations import calculations

        try:
            calculations().parse_voting(self.voting)
        except calculations().InputError as exc:
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
    in_service_on = models.DateField(_("in service since"), validators=plausible_date)
    lambda_du_per_hour = models.FloatField(_("λDU (per hour)"), null=True, blank=True,
                                           validators=plausible_rate)
    lambda_dd_per_hour = models.FloatField(_("λDD (per hour)"), null=True, blank=True,
                                           validators=plausible_rate)
    lambda_s_per_hour = models.FloatField(_("λS (per hour)"), null=True, blank=True,
                                          validators=plausible("safe_rate_per_hour"))
    proof_test_coverage = models.FloatField(
        _("proof-test coverage"), default=1.0, validators=probability,
        help_text=_("Share of dangerous undetected failures a full proof test reveals."),
    )
    partial_test_coverage = models.FloatField(
        _("partial-test coverage"), default=0.0, validators=probability,
        help_text=_("Share of dangerous undetected failures a partial test reveals."),
    )
    mission_time_years = models.FloatField(
        _("mission time (years)"), default=20.0, validators=plausible("mission_time_years"),
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
        # /api/components/ and the devices of a SIF in their default order
        indexes = [models.Index(fields=["subsystem", "tag"], name="register_component_list")]
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



def _own_or_type(own: float | None, from_type: float) -> float:
    return from_type if own is None else own


# ---------------------------------------------------------------------------------------
# Test plans
# ---------------------------------------------------------------------------------------


class TestPlan(models.Model):
    """A commitment to test a SIF (or chosen components) at an interval, with its procedure.

    A change of interval, coverage or scope takes effect from ``effective_from`` (empty:
    from the start) and applies only to due dates that had not yet fallen by then; the plan
    in force on any past date is read from the plan's history (``register.schedule.due``).

    The ``*_on`` columns below are written only by ``register.schedule.due.refresh_plans``
    from the records: the current due date and the dates on which the plan's state next
    turns (due soon, overdue the day after ``next_due_on``, escalated, second level). The
    state shown anywhere is derived from them at read time for the reader's date
    (``register.schedule.due.with_state``), never stored.
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
    effective_from = models.DateField(
        _("in force from"), null=True, blank=True, validators=plausible_date,
        help_text=_("The day this interval, coverage and scope take effect (default: the day "
                    "the change is approved). Due dates that fell before it stay as they were."),
    )
    # Derived from the records by register.schedule.due.refresh_plans (class docstring).
    next_due_on = models.DateField(_("next due"), null=True, blank=True, editable=False)
    due_soon_on = models.DateField(_("due soon from"), null=True, blank=True, editable=False)
    escalated_on = models.DateField(_("escalated from"), null=True, blank=True, editable=False)
    escalated_2_on = models.DateField(_("second escalation from"), null=True, blank=True,
                                      editable=False)
    next_change_on = models.DateField(
        _("state next changes on"), null=True, blank=True, editable=False, db_index=True,
        help_text=_("The next date on which the derived state turns or a later version of the "
                    "plan takes effect: the scan looks only at plans whose date has come."),
    )

    site_path = "sif__unit__site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords(m2m_fields=[components], excluded_fields=[
        "next_due_on", "due_soon_on", "escalated_on", "escalated_2_on", "next_change_on"])

    class Meta:
        ordering = ["sif", "name"]
        constraints = [_prob_check("coverage")]
        indexes = [
            # /api/test-plans/ and the SIF page's plans in their default order
            models.Index(fields=["sif", "name"], name="register_plan_list"),
            # the technician's worklist /field/: next due first (ascending, empty last)
            models.Index(fields=["next_due_on"], name="register_plan_worklist"),
        ]

    def __str__(self):
        return f"{self.sif.tag}: {self.name}"

    #: Written only by ``register.schedule.due.refresh_plans`` (bulk_update): an ordinary
    #: save of a plan loaded earlier must not put back the values it was loaded with.
    DERIVED_FIELDS = ("next_due_on", "due_soon_on", "escalated_on", "escalated_2_on",
                      "next_change_on")

    def save(self, *args, **kwargs):
        if self.pk is not None and not self._state.adding and kwargs.get("update_fields") is None:
            kwargs["update_fields"] = [f.name for f in self._meta.concrete_fields
                                       if not f.primary_key and f.name not in self.DERIVED_FIELDS]
        super().save(*args, **kwargs)

    @property
    def interval_hours(self) -> float:
        return self.interval_months * calculations().HOURS_PER_MONTH


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
    target_value = models.FloatField(_("target value"), null=True, blank=True,
                                     validators=plausible("process_value"))
    tolerance = models.FloatField(_("tolerance (±)"), null=True, blank=True,
                                  validators=plausible("tolerance"))
    limit = models.FloatField(_("limit"), null=True, blank=True,
                              validators=plausible("process_value"))
    # Which devices of the test are asked this step (register.rules.steps_for).
    applies_to_role = models.CharField(
        _("asked of (role)"), max_length=10, choices=choices.SubsystemRole.choices,
        blank=True, default="",
        help_text=_("The devices this step is asked of: sensors, logic solver or final "
                    "elements. Empty, with no device type: read from what the step measures, "
                    "else every device."))
    applies_to_type = models.ForeignKey(
        DeviceType, on_delete=models.PROTECT, null=True, blank=True, related_name="+",
        verbose_name=_("asked of (device type)"),
        help_text=_("Optional: only devices of this type are asked this step."))

    site_path = "plan__sif__unit__site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords()

    class Meta:
        ordering = ["plan", "position"]
        # the test entry form's steps of a plan, in order
        indexes = [models.Index(fields=["plan", "position"], name="register_step_order")]

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
        if self.applies_to_role and self.applies_to_type_id is not None \
                and self.applies_to_type.role != self.applies_to_role:
            raise ValidationError({"applies_to_type": _(
                "A step asked of the %(role)s cannot name a device type used for "
                "%(type_role)s: change the role or the type.") % {
                    "role": self.get_applies_to_role_display().lower(),
                    "type_role": self.applies_to_type.get_role_display().lower()}})

    def judge(self, value: float | None) -> bool | None:
        """True if ``value`` meets the criterion, False if not, None when nothing to judge
        (the one rule, ``register.rules.judge_measurement``)."""
        from register.rules import judge_measurement

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


def not_decommissioned(qs):
    """The SIFs the plant overview counts against their target: in design or in service.
    The ``meets`` and ``repeat_offender`` filters select among these, so each overview
    figure equals the length of the list its link opens."""
    return qs.exclude(life_stage=choices.LifeStage.DECOMMISSIONED)
