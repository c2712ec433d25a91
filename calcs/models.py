"""Stored results of the calculation engine.

An assessment is a snapshot: what the engine said about one SIF at one moment, from
which inputs. Snapshots are kept so the trend of achieved PFDavg can be shown.
"""

from django.db import models
from django.utils.translation import gettext_lazy as _

from register.models import SiteScopedQuerySet


class Assessment(models.Model):
    """One recompute of one SIF: design, achieved and projected PFDavg, limits and flags."""

    sif = models.ForeignKey("register.SafetyFunction", on_delete=models.CASCADE,
                            related_name="assessments")
    computed_at = models.DateTimeField(_("computed at"), db_index=True)
    as_of = models.DateTimeField(_("evaluated as of"))
    inputs_digest = models.CharField(_("inputs digest (SHA-256)"), max_length=64)
    trigger = models.CharField(_("trigger"), max_length=40, blank=True)
    target_pfd_avg = models.FloatField(null=True)
    target_sil = models.PositiveSmallIntegerField(null=True)
    design_pfd_avg = models.FloatField(null=True)
    design_pfh_per_hour = models.FloatField(null=True)
    achieved_pfd_avg = models.FloatField(null=True)
    achieved_since_service_pfd_avg = models.FloatField(null=True)
    projected_pfd_avg = models.FloatField(null=True)
    observed_unavailability = models.FloatField(
        _("observed unavailability, last 12 months"), null=True,
        help_text=_("Share of the time the function could not act, estimated from the "
                    "failures found (onset after the last test that would have revealed "
                    "them), repairs and bypasses."))
    observed_since_service = models.FloatField(
        _("observed unavailability since in service"), null=True)
    verdict = models.JSONField(
        default=dict, help_text=_("Every criterion of 'meets target' with pass / fail / "
                                  "unknown and its reason (calcs.engine.verdict)."))
    achieved_sil = models.PositiveSmallIntegerField(null=True)
    architectural_sil = models.PositiveSmallIntegerField(null=True)
    systematic_sil = models.PositiveSmallIntegerField(null=True)
    meets_target = models.BooleanField(null=True)
    rate_basis = models.CharField(max_length=10, blank=True)
    flags = models.JSONField(default=list, help_text=_("Plain-language reasons."))
    detail = models.JSONField(default=dict, help_text=_("Per-subsystem figures and inputs."))
    error = models.TextField(blank=True)

    site_path = "sif__unit__site"
    objects = SiteScopedQuerySet.as_manager()

    class Meta:
        ordering = ["-computed_at", "-id"]
        indexes = [models.Index(fields=["sif", "-computed_at"])]
        get_latest_by = "computed_at"

    def __str__(self):
        return f"{self.sif_id} at {self.computed_at:%Y-%m-%d %H:%M}"
