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
