"""What happened in operation besides tests: demands, bypasses, deferrals, and the
findings (failures found) with their follow-up."""

from __future__ import annotations

import datetime as dt
import math

from django.conf import settings
from django.core.exceptions import ValidationError
from django.db import models
from django.db.models import Q
from django.utils.translation import gettext_lazy as _
from simple_history.models import HistoricalRecords

from register import choices
from register.days import is_future
from register.models.base import (
    SiteScopedQuerySet,
    free_text_errors,
    plausible,
    plausible_date,
)
from register.models.design import (
    Component,
    SafetyFunction,
    TestPlan,
)
from register.models.records import ComponentResult, TestRecord


class Demand(models.Model):
    """A real demand on the SIF (a real trip), successful or not."""

    sif = models.ForeignKey(SafetyFunction, on_delete=models.PROTECT, related_name="demands")
    occurred_at = models.DateTimeField(_("occurred at"), validators=plausible_date)
    successful = models.BooleanField(_("the SIF acted as required"))
    spurious = models.BooleanField(
        _("spurious trip (no real process demand)"), default=False,
    )
    description = models.TextField(_("description"))
    cause = models.CharField(
        _("cause"), max_length=15, choices=choices.DemandCause.choices,
        default=choices.DemandCause.NOT_RECORDED,
        help_text=_("What called for the trip (a real demand) or set it off (a spurious "
                    "trip)."))
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
        # /api/demands/ and the operations log in their default order
        indexes = [models.Index(fields=["occurred_at"], name="register_demand_list")]

    def __str__(self):
        return f"{self.sif.tag} demand {self.occurred_at:%Y-%m-%d}"

    def clean(self):
        if is_future(self.occurred_at):
            raise ValidationError({"occurred_at": _("The demand date is in the future.")})
        if self.spurious and not self.successful:
            raise ValidationError({"spurious": _("A spurious trip is a trip: mark it "
                                                 "successful.")})

    @property
    def kind(self) -> str:
        return choices.DemandKind.SPURIOUS if self.spurious else choices.DemandKind.REAL


#: The longest bypass that can be asked for or authorised at once, hours (30 days). A
#: longer one is a change to the plant, not a bypass (common practice, no source).
MAX_BYPASS_HOURS = 720.0


class Bypass(models.Model):
    """A SIF, or part of it, deliberately disabled (maintenance, start-up) under authorisation.

    The bypass is recorded when it is put in place (``started_at``) by the person asking
    for it (``requested_by``); it stays *awaiting authorisation* until a lead of the site
    who is not the requester authorises it (``authorised_by``, ``authorised_at``), and ends
    when someone records its removal (``ended_at``, ``closed_by``). The time counts as
    bypass time from ``started_at`` whether authorised or not: the function is disabled
    either way.
    """

    sif = models.ForeignKey(SafetyFunction, on_delete=models.PROTECT, related_name="bypasses")
    component = models.ForeignKey(Component, on_delete=models.PROTECT, null=True, blank=True,
                                  related_name="bypasses",
                                  help_text=_("Leave empty when the whole SIF is bypassed."))
    started_at = models.DateTimeField(_("started at"), validators=plausible_date)
    ended_at = models.DateTimeField(_("ended at"), null=True, blank=True,
                                    validators=plausible_date)
    authorised_hours = models.FloatField(
        _("authorised duration (h)"),
        help_text=_("Asked for by the requester, authorised as asked; more than 0 and at "
                    "most 720 h."))
    reason = models.TextField(_("reason"), error_messages={
        "blank": _("Say why the SIF is bypassed.")})
    requested_by = models.ForeignKey(
        settings.AUTH_USER_MODEL, on_delete=models.PROTECT, related_name="requested_bypasses",
        null=True, blank=False,
        help_text=_("Who put the bypass in place and asked for it (empty only for rows "
                    "written in bulk)."))
    authorised_by = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.PROTECT,
                                      related_name="authorised_bypasses", null=True,
                                      blank=True)
    authorised_at = models.DateTimeField(_("authorised at"), null=True, blank=True)
    closed_by = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.PROTECT,
                                  related_name="closed_bypasses", null=True, blank=True)
    compensating_measures = models.TextField(_("compensating measures"), blank=True)
    measures_effective = models.BooleanField(
        _("compensating measures give equivalent protection"), default=False,
        help_text=_("If not, the bypassed time counts as the SIF being unavailable."),
    )
    # Derived on save from the start and the authorised time: when the bypass runs over
    # its authorisation, and when it is escalated (ESCALATION_FACTOR x the authorised time).
    authorised_until = models.DateTimeField(_("authorised until"), null=True, editable=False)
    escalates_at = models.DateTimeField(_("escalated from"), null=True, editable=False)
    #: What the scan last announced for this bypass (for its notifications only; the state
    #: shown anywhere is derived at read time: ``register.schedule.scan.bypass_state``).
    announced_state = models.CharField(max_length=10, choices=choices.BypassState.choices,
                                       default=choices.BypassState.OPEN, editable=False)

    ESCALATION_FACTOR = 2.0

    site_path = "sif__unit__site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords(excluded_fields=["announced_state"])

    class Meta:
        ordering = ["-started_at"]
        # /api/bypasses/ and the bypass lists in their default order
        indexes = [models.Index(fields=["started_at"], name="register_bypass_list")]
        verbose_name_plural = _("bypasses")
        constraints = [
            models.CheckConstraint(
                condition=Q(ended_at__isnull=True) | Q(ended_at__gte=models.F("started_at")),
                name="register_bypass_end_after_start",
            ),
            models.CheckConstraint(
                condition=Q(authorised_hours__gt=0) & Q(authorised_hours__lte=MAX_BYPASS_HOURS),
                name="register_bypass_authorised_hours_range",
            ),
            models.CheckConstraint(
                condition=Q(authorised_by__isnull=True) | Q(requested_by__isnull=True)
                | ~Q(authorised_by=models.F("requested_by")),
                name="register_bypass_authoriser_not_requester",
            ),
        ]

    def __str__(self):
        return f"{self.sif.tag} bypass from {self.started_at:%Y-%m-%d %H:%M}"

    def save(self, *args, **kwargs):
        if self.started_at is not None and self.authorised_hours is not None:
            hours = float(self.authorised_hours)
            if math.isfinite(hours):
                self.authorised_until = self.started_at + dt.timedelta(hours=hours)
                self.escalates_at = self.started_at + dt.timedelta(
                    hours=hours * self.ESCALATION_FACTOR)
        super().save(*args, **kwargs)

    def clean(self):
        errors = {}
        if self.started_at and self.ended_at and self.ended_at < self.started_at:
            errors["ended_at"] = _("The bypass cannot end before it starts.")
        if is_future(self.started_at):
            errors["started_at"] = _("The bypass start is in the future.")
        if is_future(self.ended_at):
            errors["ended_at"] = _("The bypass end is in the future.")
        hours = self.authorised_hours
        if hours is not None:
            if not isinstance(hours, (int, float)) or not math.isfinite(hours):
                errors["authorised_hours"] = _("Give the duration as a number of hours.")
            elif hours <= 0:
                errors["authorised_hours"] = _("The duration must be more than 0 h.")
            elif hours > MAX_BYPASS_HOURS:
                errors["authorised_hours"] = _(
                    "At most %(max)g h (30 days) can be authorised at once; a longer "
                    "bypass is a change to the plant.") % {"max": MAX_BYPASS_HOURS}
        if self.authorised_by_id is not None and self.authorised_by_id == self.requested_by_id:
            errors["authorised_by"] = _("The person who asked for a bypass cannot authorise "
                                        "it: another lead of the site authorises it.")
        if (self.authorised_by_id is None) != (self.authorised_at is None):
            errors["authorised_at"] = _("An authorisation names both who and when.")
        if self.component_id and self.sif_id and self.component.subsystem.sif_id != self.sif_id:
            errors["component"] = _("The component belongs to another SIF.")
        if errors:
            raise ValidationError(errors)

    def duration_hours(self, as_of: dt.datetime) -> float:
        end = self.ended_at or as_of
        return max(0.0, (end - self.started_at).total_seconds() / 3600.0)

    def ran_over(self, as_of: dt.datetime) -> bool:
        """True when the bypass lasted (or, still open, has lasted) longer than authorised."""
        return self.duration_hours(as_of) > self.authorised_hours

    @property
    def authorisation(self) -> str:
        """Authorised, awaiting authorisation (still in place) or ended without one."""
        if self.authorised_by_id is not None:
            return choices.BypassAuthorisation.AUTHORISED
        if self.ended_at is None:
            return choices.BypassAuthorisation.PENDING
        return choices.BypassAuthorisation.NONE


class Deferral(models.Model):
    """A request to postpone a due proof test, and the lead's decision on it."""

    plan = models.ForeignKey(TestPlan, on_delete=models.PROTECT, related_name="deferrals")
    due_on = models.DateField(_("due date being deferred"))
    proposed_on = models.DateField(_("proposed new date"), validators=plausible_date)
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
        validators=plausible("pfd"),
        help_text=_("As shown to the decider when the decision was made."),
    )

    site_path = "plan__sif__unit__site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords()

    class Meta:
        ordering = ["-requested_at"]
        # /api/deferrals/ and the deferral queue in their default order
        indexes = [models.Index(fields=["requested_at"], name="register_deferral_list"),
                   # the lead's deferral page: by status, newest request first
                   models.Index(fields=["status", "requested_at"],
                                name="register_deferral_queue")]
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
        errors = free_text_errors(self, "reason", "decision_note")
        if self.due_on and self.proposed_on and self.proposed_on <= self.due_on:
            errors["proposed_on"] = [_(
                "The proposed date must be after the current due date (%(due)s)."
            ) % {"due": self.due_on}]
        if errors:
            raise ValidationError(errors)




class Finding(models.Model):
    """A failure found and its follow-up, one per device and event: a dangerous failure in
    a signed test record (``result``) or a device that failed to act on a demand
    (``demand``). It has an owner, the corrective work, the date the retest is due, and is
    closed by a signed passing retest of the device (``retest``) or, by a lead, with a
    reason (``closure_note``). A correction of the record that found it carries the finding
    over to the correcting record, or withdraws it when the correction shows no failure.

    The rules (what opens a finding, what is a retest, who may close) are in
    ``register.operations.services``.
    """

    sif = models.ForeignKey(SafetyFunction, on_delete=models.PROTECT, related_name="findings")
    component = models.ForeignKey(Component, on_delete=models.PROTECT, related_name="findings")
    source = models.CharField(_("found by"), max_length=10,
                              choices=choices.FindingSource.choices)
    result = models.ForeignKey(ComponentResult, on_delete=models.PROTECT, null=True,
                               blank=True, related_name="findings",
                               help_text=_("The test result that found the failure."))
    demand = models.ForeignKey(Demand, on_delete=models.PROTECT, null=True, blank=True,
                               related_name="findings",
                               help_text=_("The demand or trip on which the device failed."))
    found_at = models.DateTimeField(_("found at"))
    failure_mode = models.CharField(_("failure"), max_length=5,
                                    choices=choices.FailureMode.choices)
    description = models.TextField(_("what was found"), blank=True)
    owner = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.PROTECT, null=True,
                              blank=True, related_name="owned_findings",
                              help_text=_("Who sees the follow-up through."))
    corrective_action = models.TextField(_("corrective work"), blank=True)
    retest_due_on = models.DateField(_("retest due by"), null=True, blank=True,
                                     validators=plausible_date)
    status = models.CharField(_("status"), max_length=10,
                              choices=choices.FindingStatus.choices,
                              default=choices.FindingStatus.OPEN)
    retest = models.ForeignKey(TestRecord, on_delete=models.PROTECT, null=True, blank=True,
                               related_name="retested_findings",
                               help_text=_("The signed passing retest that closed it."))
    closed_at = models.DateTimeField(_("closed at"), null=True, blank=True)
    closed_by = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.PROTECT,
                                  null=True, blank=True, related_name="closed_findings")
    closure_note = models.TextField(_("closure note"), blank=True)
    opened_at = models.DateTimeField(_("opened at"))

    site_path = "sif__unit__site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords()

    class Meta:
        ordering = ["-found_at", "-id"]
        constraints = [
            models.CheckConstraint(
                condition=(Q(result__isnull=False) & Q(demand__isnull=True))
                | (Q(result__isnull=True) & Q(demand__isnull=False)),
                name="register_finding_one_source"),
            models.UniqueConstraint(fields=["result"], condition=Q(result__isnull=False),
                                    name="register_finding_once_per_result"),
            models.UniqueConstraint(fields=["demand", "component"],
                                    condition=Q(demand__isnull=False),
                                    name="register_finding_once_per_demand_device"),
            models.CheckConstraint(
                condition=Q(status="open") | Q(closed_at__isnull=False),
                name="register_finding_closed_has_time"),
            models.CheckConstraint(
                condition=~Q(status="closed") | Q(retest__isnull=False) | ~Q(closure_note=""),
                name="register_finding_closed_has_evidence"),
        ]
        indexes = [models.Index(fields=["status", "found_at"]),
                   # the findings page and a SIF's findings in their default order
                   models.Index(fields=["found_at", "id"], name="register_finding_list")]

    def __str__(self):
        return f"{self.sif.tag} {self.component.tag} finding {self.found_at:%Y-%m-%d}"

    def clean(self):
        errors = {}
        if self.component_id and self.sif_id and self.component.subsystem.sif_id != self.sif_id:
            errors["component"] = _("The device belongs to another SIF.")
        if self.retest_due_on and self.found_at and \
                self.retest_due_on < self.found_at.date() - dt.timedelta(days=1):
            errors["retest_due_on"] = _("The retest cannot be due before the failure was "
                                        "found (%(day)s).") % {"day": self.found_at.date()}
        if self.status == choices.FindingStatus.CLOSED and self.retest_id is None \
                and not self.closure_note.strip():
            errors["closure_note"] = _("Without a signed passing retest, say why the finding "
                                       "is closed.")
        if errors:
            raise ValidationError(errors)

    @property
    def is_open(self) -> bool:
        return self.status == choices.FindingStatus.OPEN
