"""A register export too large to write within one request (more SIFs than
``settings.EXPORT_BACKGROUND_SIFS``): who asked, what (which export, format and the list's
filter), and the progress and file of the background run
(``register.lead.export_jobs.run_export_job``)."""

from __future__ import annotations

from django.conf import settings
from django.db import models
from django.utils.translation import gettext_lazy as _


class ExportJob(models.Model):
    class Status(models.TextChoices):
        QUEUED = "queued", _("Queued")
        RUNNING = "running", _("Being written")
        DONE = "done", _("Ready")
        FAILED = "failed", _("Failed")
        #: Done, and its file since removed (``EXPORT_KEEP_DAYS`` after it was written).
        REMOVED = "removed", _("File removed")

    class Kind(models.TextChoices):
        REGISTER = "register", _("Register table (import format)")
        LIST = "list", _("Register list")

    user = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.PROTECT,
                             related_name="export_jobs")
    kind = models.CharField(_("export"), max_length=8, choices=Kind.choices)
    fmt = models.CharField(_("format"), max_length=4,
                           choices=[("csv", "CSV"), ("xlsx", "Excel workbook")])
    #: The list's filter as the export's address gave it (a query string).
    query = models.TextField(_("filter"), blank=True)
    status = models.CharField(_("status"), max_length=8, choices=Status.choices,
                              default=Status.QUEUED)
    sifs_total = models.PositiveIntegerField(_("SIFs to export"), default=0)
    sifs_done = models.PositiveIntegerField(_("SIFs written"), default=0)
    #: The sites whose SIFs the file holds: the export right is checked at each of them
    #: again when the file is downloaded.
    site_ids = models.JSONField(_("sites in the file"), default=list, blank=True)
    message = models.TextField(_("message"), blank=True)
    result_path = models.CharField(_("file (relative to the data folder)"), max_length=300,
                                   blank=True)
    result_size = models.PositiveBigIntegerField(_("file size (bytes)"), null=True,
                                                 blank=True)
    created_at = models.DateTimeField(_("asked at"), auto_now_add=True)
    started_at = models.DateTimeField(_("started at"), null=True, blank=True)
    finished_at = models.DateTimeField(_("finished at"), null=True, blank=True)

    class Meta:
        ordering = ["-created_at", "-id"]
        verbose_name = _("export job")
        constraints = [
            models.CheckConstraint(condition=models.Q(sifs_done__lte=models.F("sifs_total")),
                                   name="register_export_job_done_le_total"),
        ]

    def __str__(self):
        return f"Export {self.pk} ({self.kind}.{self.fmt}, {self.status})"

    @property
    def is_finished(self) -> bool:
        return self.status in (self.Status.DONE, self.Status.FAILED, self.Status.REMOVED)

    @property
    def percent(self) -> int:
        return 100 if self.status == self.Status.DONE else (
            int(100 * self.sifs_done / self.sifs_total) if self.sifs_total else 0)
