"""A spreadsheet import too long to write within one request (more rows than
``settings.IMPORT_BACKGROUND_ROWS``): the checked file, who confirmed it, and the progress
and outcome of the background run (``register.lead.spreadsheet.run_import_job``)."""

from __future__ import annotations

from django.conf import settings
from django.db import models
from django.utils.translation import gettext_lazy as _

from register.models.base import SiteScopedQuerySet
from register.models.site import Site


class ImportJob(models.Model):
    class Status(models.TextChoices):
        QUEUED = "queued", _("Queued")
        RUNNING = "running", _("Being imported")
        DONE = "done", _("Imported")
        FAILED = "failed", _("Failed, nothing written")

    site = models.ForeignKey(Site, on_delete=models.PROTECT, related_name="import_jobs")
    user = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.PROTECT,
                             related_name="import_jobs")
    reference = models.CharField(_("change request"), max_length=100)
    file_name = models.CharField(_("file name"), max_length=255)
    file_data = models.BinaryField(_("the checked file"))
    status = models.CharField(_("status"), max_length=8, choices=Status.choices,
                              default=Status.QUEUED)
    rows_total = models.PositiveIntegerField(_("rows in the file"), default=0)
    rows_done = models.PositiveIntegerField(_("rows written"), default=0)
    message = models.TextField(_("message"), blank=True)
    #: The cell errors of a failed run, as text ("row 7, column beta (O): ...").
    errors = models.JSONField(_("errors"), default=list, blank=True)
    #: The counts of a finished run (``spreadsheet.plan_counts``).
    result = models.JSONField(_("result"), default=dict, blank=True)
    created_at = models.DateTimeField(_("confirmed at"), auto_now_add=True)
    started_at = models.DateTimeField(_("started at"), null=True, blank=True)
    finished_at = models.DateTimeField(_("finished at"), null=True, blank=True)

    site_path = "site"
    objects = SiteScopedQuerySet.as_manager()

    class Meta:
        ordering = ["-created_at", "-id"]
        constraints = [
            models.CheckConstraint(condition=models.Q(rows_done__lte=models.F("rows_total")),
                                   name="register_import_job_rows_done_le_total"),
        ]

    def __str__(self):
        return f"Import {self.pk} of {self.file_name} ({self.status})"

    @property
    def is_finished(self) -> bool:
        return self.status in (self.Status.DONE, self.Status.FAILED)

    @property
    def percent(self) -> int:
        return 100 if self.status == self.Status.DONE else (
            int(100 * self.rows_done / self.rows_total) if self.rows_total else 0)
