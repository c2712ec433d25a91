"""Signed records of proof tests: results per device, measured values, attachments.

A signed record and every part of it are immutable; corrections supersede.
"""

from __future__ import annotations

import datetime as dt

from django.conf import settings
from django.core.exceptions import ValidationError
from django.db import models
from django.db.models import Exists, OuterRef, Prefetch, Q, prefetch_related_objects
from django.urls import reverse
from django.utils.translation import gettext_lazy as _
from simple_history.models import HistoricalRecords

from register import choices
from register.days import is_future
from register.models.base import (
    SiteScopedQuerySet,
    plausible,
    plausible_date,
)
from register.models.design import (
    Component,
    SafetyFunction,
    TestPlan,
    TestStep,
)

# ---------------------------------------------------------------------------------------
# What happened in operation
# ---------------------------------------------------------------------------------------


def in_force(prefix: str = "") -> Q:
    """The one rule for which test records count (due dates, achieved PFDavg, on-time
    rates, device-type statistics, exports): signed, and not replaced by a correction that
    has taken effect. A correction takes effect once it is signed, and once countersigned
    where the original was; until then the original stands everywhere and the correction
    counts for nothing. ``prefix`` is the lookup path to the record ("record__" from a
    result)."""
    p = prefix
    signed = ~Q(**{f"{p}status": choices.RecordStatus.DRAFT})
    replacing = TestRecord.objects.filter(supersedes_id=OuterRef(f"{p}pk")).exclude(
        status=choices.RecordStatus.DRAFT).filter(
        Q(status=choices.RecordStatus.VERIFIED)
        | ~Q(supersedes__status=choices.RecordStatus.VERIFIED))
    own_effect = (Q(**{f"{p}supersedes__isnull": True})
                  | Q(**{f"{p}status": choices.RecordStatus.VERIFIED})
                  | ~Q(**{f"{p}supersedes__status": choices.RecordStatus.VERIFIED}))
    return signed & ~Exists(replacing) & own_effect


class SignedRecordError(ValidationError):
    """Raised on any attempt to change a signed record."""


def references_in_hand(instance) -> set[str]:
    """Names of ``instance``'s references whose target is in hand: the related object is
    loaded (or was just saved) and is the one the reference names. Such a reference needs
    no existence query when the row is validated; the database's foreign key still guards
    it."""
    names = set()
    for f in instance._meta.concrete_fields:
        if not (f.many_to_one or f.one_to_one):
            continue
        value = getattr(instance, f.attname)
        if value is None or not f.is_cached(instance):
            continue
        target = f.get_cached_value(instance)
        if target is not None and not target._state.adding and target.pk == value:
            names.add(f.name)
    return names


class ChecksReferencesInHand(models.Model):
    """Validation asks the database only about references whose target is not in hand
    (:func:`references_in_hand`). Nothing else is skipped: the other checks of such a
    field (null, blank, choices) pass by construction for the key of a stored object."""

    class Meta:
        abstract = True

    def clean_fields(self, exclude=None):
        super().clean_fields(exclude=set(exclude or ()) | references_in_hand(self))


class TestRecord(ChecksReferencesInHand):
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
    performed_at = models.DateTimeField(_("performed at"), validators=plausible_date)
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
        help_text=_("Idempotency key supplied by an external system; unique within a site."),
    )
    key_site = models.ForeignKey(
        "register.Site", on_delete=models.PROTECT, null=True, blank=True, editable=False,
        related_name="+", help_text=_("The site within which the client key is unique (set "
                                      "with the key: one site can neither see nor claim "
                                      "another's keys)."))
    draft_version = models.PositiveIntegerField(default=1, editable=False)
    created_at = models.DateTimeField(auto_now_add=True)

    site_path = "sif__unit__site"
    objects = SiteScopedQuerySet.as_manager()
    history = HistoricalRecords(excluded_fields=["key_site"])

    SIGNED_FIELDS = ("sif_id", "plan_id", "kind", "performed_at", "performed_by_id",
                     "performed_by_name", "signed_at", "supersedes_id", "correction_reason",
                     "remarks", "client_key")

    class Meta:
        ordering = ["-performed_at", "-id"]
        indexes = [models.Index(fields=["sif", "performed_at"]),
                   # /api/test-records/ and the record lists in their default order
                   models.Index(fields=["performed_at", "id"], name="register_record_list"),
                   # the countersign queue /field/verify/: signed records, oldest first
                   models.Index(fields=["signed_at", "id"], name="register_record_verify_queue",
                                condition=Q(status="signed"))]
        constraints = [
            models.UniqueConstraint(fields=["key_site", "client_key"],
                                    condition=Q(client_key__isnull=False),
                                    name="register_test_client_key_per_site"),
            models.CheckConstraint(
                condition=~Q(verified_by=models.F("performed_by")) | Q(verified_by__isnull=True),
                name="register_test_verifier_not_performer",
            ),
        ]

    #: The unique key rule (the database constraint), by name.
    KEY_CONSTRAINT = "register_test_client_key_per_site"
    #: Constraints ``clean`` states with its own message: validating them again would
    #: only cost a query (the database constraint still backs them).
    STATED_BY_CLEAN = frozenset({"register_test_verifier_not_performer"})

    def __str__(self):
        return f"{self.sif.tag} {self.get_kind_display()} {self.performed_at:%Y-%m-%d}"

    def get_constraints(self):
        """The constraints ``full_clean`` validates: those ``clean`` states are left out,
        and so is any named in ``_constraints_checked`` (set, for the next validation
        only, by a service that has just established it in the same transaction: the
        client key looked up and free, or a signing that changes no key field)."""
        skip = self.STATED_BY_CLEAN | set(self.__dict__.pop("_constraints_checked", ()))
        return [(cls, [c for c in constraints if c.name not in skip])
                for cls, constraints in super().get_constraints()]

    def results_with_components(self) -> list[ComponentResult]:
        """Its results with their devices: one query the first time, none after (the
        services of a signing share them)."""
        prefetch_related_objects([self], Prefetch(
            "results", queryset=ComponentResult.objects.select_related("component")))
        return list(self.results.all())

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
        # ``_draft_under_lock``: the service read this row as a draft under a row lock in
        # the running transaction, so the stored row cannot be signed; used once.
        if self.pk and not self.__dict__.pop("_draft_under_lock", False):
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
    """When the equipment of the test entered service: the earliest date of the devices
    the plan names, else of every device of the SIF, else the SIF's own (one query)."""
    comps = Component.objects.filter(subsystem__sif_id=record.sif_id)
    if record.plan_id:
        named = TestPlan.components.through.objects.filter(
            testplan_id=record.plan_id, component_id=OuterRef("pk"))
        comps = Component.objects.annotate(named=Exists(named)).filter(
            Q(subsystem__sif_id=record.sif_id) | Q(named=True))
        rows = list(comps.values_list("in_service_on", "named"))
        if any(is_named for _, is_named in rows):
            rows = [row for row in rows if row[1]]
        dates = [d for d, _ in rows if d]
    else:
        dates = [d for d in comps.values_list("in_service_on", flat=True) if d]
    if dates:
        return min(dates)
    return record.sif.in_service_on


class PartOfRecord(ChecksReferencesInHand):
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
        from register.rules import result_problems  # the result rules and their messages

        errors = result_problems(
            as_found=self.as_found, as_left=self.as_left, failure_mode=self.failure_mode,
            failure_description=self.failure_description, work_done=self.work_done)
        if self.record_id and self.component_id and \
                self.component.subsystem.sif_id != self.record.sif_id:
            errors["component"] = _("The component belongs to another SIF.")
        if errors:
            raise ValidationError(errors)


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
    value = models.FloatField(_("value"), validators=plausible("process_value"))
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
        from register.rules import is_timing_step, judge_measurement

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


