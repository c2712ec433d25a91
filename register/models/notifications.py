"""Notifications to people, and their e-mail delivery state."""

from __future__ import annotations

from django.conf import settings
from django.db import models
from django.utils.translation import gettext_lazy as _

from register import choices
from register.models.base import (
    SiteScopedQuerySet,
)
from register.models.site import (
    Site,
)


class Notification(models.Model):
    """A message to a person about a state change; one per (subject, state, due cycle)."""

    recipient = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.CASCADE,
                                  related_name="ledger_notifications")
    site = models.ForeignKey(Site, on_delete=models.CASCADE, related_name="notifications")
    kind = models.CharField(max_length=20, choices=choices.NotificationKind.choices)
    subject_key = models.CharField(
        max_length=120,
        help_text=_("What changed and in which cycle, e.g. plan:12:overdue:2026-03-01."),
    )
    subject = models.CharField(
        max_length=200, blank=True,
        help_text=_("The headline, whole: the e-mail's subject and the inbox's title."))
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
        # /api/notifications/ and the inbox in their default order
        indexes = [models.Index(fields=["created_at"], name="register_notice_list"),
                   # one person's inbox /inbox/, newest first
                   models.Index(fields=["recipient", "created_at", "id"],
                                name="register_notice_inbox")]
        constraints = [
            models.UniqueConstraint(fields=["recipient", "subject_key"],
                                    name="register_notification_once"),
        ]

    def __str__(self):
        return self.message[:80]


# ---------------------------------------------------------------------------------------
# State changes: append-only rows, the source of the notifications
# ---------------------------------------------------------------------------------------


class AppendOnlyError(Exception):
    """Raised on any attempt to change or delete a state-change row."""


class _AppendOnlyQuerySet(SiteScopedQuerySet):
    def update(self, **kwargs):
        raise AppendOnlyError("State-change rows cannot be changed.")

    def delete(self):
        raise AppendOnlyError("State-change rows cannot be deleted.")


class _AppendOnly(models.Model):
    """Rows that are written once and never changed or deleted (on PostgreSQL a trigger,
    migration 0010, refuses the same in the database)."""

    class Meta:
        abstract = True

    def save(self, *args, **kwargs):
        if self.pk is not None or not self._state.adding:
            raise AppendOnlyError("State-change rows cannot be changed.")
        kwargs["force_insert"] = True
        super().save(*args, **kwargs)

    def delete(self, *args, **kwargs):
        raise AppendOnlyError("State-change rows cannot be deleted.")


class PlanStateChange(_AppendOnly):
    """One change of a test plan's state or due cycle: from what, to what, when, why.

    Written by ``register.schedule.scan.record_transitions`` (the scan, and the refresh
    after a signed test, a demand, a deferral decision or a plan change). Unique per
    (plan, due date, new state), so a second scan or a scan after a killed worker never
    writes a change twice; notifications are created from these rows.
    """

    plan = models.ForeignKey("register.TestPlan", on_delete=models.PROTECT,
                             related_name="state_changes")
    from_state = models.CharField(
        _("from state"), max_length=12, choices=choices.PlanState.choices, blank=True,
        help_text=_("Empty for the first row of a plan (its state when first followed)."))
    to_state = models.CharField(_("to state"), max_length=12,
                                choices=choices.PlanState.choices)
    due_on = models.DateField(_("due date"), null=True, blank=True,
                              help_text=_("The due date the new state refers to."))
    from_due_on = models.DateField(_("previous due date"), null=True, blank=True)
    at = models.DateTimeField(_("recorded at"))
    cause = models.CharField(_("cause"), max_length=12, choices=choices.ChangeCause.choices)

    site_path = "plan__sif__unit__site"
    objects = _AppendOnlyQuerySet.as_manager()

    class Meta:
        ordering = ["-at", "-id"]
        verbose_name = _("test plan state change")
        constraints = [
            models.UniqueConstraint(fields=["plan", "due_on", "to_state"],
                                    nulls_distinct=False,
                                    name="register_plan_state_change_once"),
        ]
        indexes = [models.Index(fields=["plan", "-id"], name="register_psc_plan_last")]

    def __str__(self):
        return f"plan {self.plan_id}: {self.from_state or '-'} -> {self.to_state} ({self.at:%Y-%m-%d})"


class SifVerdictChange(_AppendOnly):
    """One change of a SIF's stored verdict (meets its target or not), made by a
    recompute; unique per (SIF, new assessment). Written by
    ``register.inbox.notices.notify_verdict_changes``."""

    sif = models.ForeignKey("register.SafetyFunction", on_delete=models.PROTECT,
                            related_name="verdict_changes")
    assessment_id = models.BigIntegerField(_("assessment that made the change"))
    previous_assessment_id = models.BigIntegerField(_("previous assessment"), null=True,
                                                    blank=True)
    from_meets = models.BooleanField(_("met the target before"), null=True)
    to_meets = models.BooleanField(_("meets the target now"), null=True)
    at = models.DateTimeField(_("computed at"))
    summary = models.CharField(_("verdict summary"), max_length=500, blank=True)

    site_path = "sif__unit__site"
    objects = _AppendOnlyQuerySet.as_manager()

    class Meta:
        ordering = ["-at", "-id"]
        verbose_name = _("SIF verdict change")
        constraints = [
            models.UniqueConstraint(fields=["sif", "assessment_id"],
                                    name="register_verdict_change_once"),
        ]

    def __str__(self):
        return f"SIF {self.sif_id}: meets {self.from_meets} -> {self.to_meets}"
