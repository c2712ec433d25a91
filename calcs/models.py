"""Stored results of the calculation engine.

An assessment is a snapshot: what the engine said about one SIF at one moment, from
which inputs. Snapshots are kept so the trend of achieved PFDavg can be shown.

A new snapshot is stored when the inputs change, when the verdict changes, or as a
heartbeat once the newest one is a week old; in between, a recompute replaces the newest
snapshot (same inputs, a later evaluation date). The newest snapshot of each SIF
carries ``latest`` (at most one per SIF, a partial unique index), so every "latest
assessment" read is an index lookup whatever the length of the history.
"""

from django.db import models, transaction
from django.db.models import Q
from django.utils.translation import gettext_lazy as _

from register.models import SiteScopedQuerySet


class AssessmentQuerySet(SiteScopedQuerySet):
    def latest_of(self, sif_ids):
        """The newest assessment of each of these SIFs (partial index on ``latest``)."""
        return self.filter(sif_id__in=sif_ids, latest=True)

    def trend_points(self, sif_id: int, points: int = 500, fields=("computed_at",
                     "achieved_pfd_avg", "design_pfd_avg")) -> list[tuple]:
        """At most ``points`` snapshots of one SIF spread evenly over its whole life,
        always with the newest, oldest first (index on sif, -computed_at)."""
        ids = list(self.filter(sif_id=sif_id).order_by("-computed_at", "-id")
                   .values_list("id", flat=True))
        if len(ids) > points:
            step = len(ids) / points
            ids = [ids[int(i * step)] for i in range(points)]
        return list(self.filter(pk__in=ids).order_by("computed_at", "id").values_list(*fields))


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
    latest = models.BooleanField(
        _("newest of its SIF"), default=False, editable=False,
        help_text=_("Set on the newest assessment of each SIF only."))

    site_path = "sif__unit__site"
    objects = AssessmentQuerySet.as_manager()

    class Meta:
        ordering = ["-computed_at", "-id"]
        indexes = [
            # one SIF's history, newest first: SIF page, trend chart, as-of view
            # (/api/assessments/ in its default order uses the index on computed_at)
            models.Index(fields=["sif", "-computed_at"]),
        ]
        constraints = [
            # overview, register list, notifications: the newest per SIF (latest_of)
            models.UniqueConstraint(fields=["sif"], condition=Q(latest=True),
                                    name="calcs_assess_one_latest"),
        ]
        get_latest_by = "computed_at"

    def save(self, *args, **kwargs):
        """A row saved on its own (not by the recompute's bulk write) becomes the SIF's
        newest when nothing later is stored."""
        if not self._state.adding or self.latest:
            return super().save(*args, **kwargs)
        with transaction.atomic():
            others = Assessment.objects.filter(sif_id=self.sif_id)
            if not others.filter(computed_at__gt=self.computed_at).exists():
                others.filter(latest=True).update(latest=False)
                self.latest = True
            return super().save(*args, **kwargs)

    def __str__(self):
        return f"{self.sif_id} at {self.computed_at:%Y-%m-%d %H:%M}"
