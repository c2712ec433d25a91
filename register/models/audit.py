"""Tamper-evident change chain and evidence packs.

``ChainEntry`` rows form a hash chain over every historical row django-simple-history
writes (see ``register.audit.chain``). They are append-only: there is no update or delete path
in the application. ``EvidencePack`` records a request for an evidence pack and where
its zip file lies once built (see ``register.audit.evidence``).
"""

from __future__ import annotations

from django.conf import settings
from django.db import models
from django.utils import timezone
from django.utils.translation import gettext_lazy as _

from register.dbwrap import flush_pending
from register.models.base import SiteScopedQuerySet
from register.models.design import SafetyFunction
from register.models.site import PlantUnit, Site

GENESIS_HASH = "0" * 64


class ChainAppendOnlyError(Exception):
    """Raised on any attempt to change or delete a chain entry."""


class ChainHead(models.Model):
    """One row: the newest entry of the chain. Locked by every append so that concurrent
    writers queue up and cannot fork the chain."""

    last_seq = models.PositiveBigIntegerField(default=0)
    last_hash = models.CharField(max_length=64, default=GENESIS_HASH)

    def __str__(self):
        return f"chain head #{self.last_seq} {self.last_hash[:12]}"


class _AppendOnlyQuerySet(models.QuerySet):
    """Entries cannot be changed or deleted; every read first appends the entries this
    transaction has pending (``register.audit.chain.flush``), so it sees its own."""

    def _flush_pending(self):
        flush_pending(self.db)

    def _fetch_all(self):
        if self._result_cache is None:
            self._flush_pending()
        super()._fetch_all()

    def count(self):
        self._flush_pending()
        return super().count()

    def exists(self):
        self._flush_pending()
        return super().exists()

    def aggregate(self, *args, **kwargs):
        self._flush_pending()
        return super().aggregate(*args, **kwargs)

    def iterator(self, chunk_size=None):
        self._flush_pending()
        return super().iterator(chunk_size=chunk_size)

    def update(self, **kwargs):
        raise ChainAppendOnlyError("Chain entries cannot be changed.")

    def delete(self):
        raise ChainAppendOnlyError("Chain entries cannot be deleted.")


class ChainEntry(models.Model):
    """One link of the chain: which historical row, its content hash, and the link hash."""

    ACTIONS = [("+", _("created")), ("~", _("changed")), ("-", _("deleted"))]
    #: How ``entry_hash`` was made: plain SHA-256 (entries appended before the chain was
    #: keyed) or HMAC-SHA256 with ``settings.CHAIN_KEY`` (``register.audit.chain``).
    SHA256, HMAC_SHA256 = 1, 2
    SCHEMES = [(SHA256, _("SHA-256 (before the chain was keyed)")),
               (HMAC_SHA256, _("HMAC-SHA256 with the chain key"))]

    seq = models.PositiveBigIntegerField(_("sequence"), unique=True)
    created_at = models.DateTimeField(_("appended at"))
    model_label = models.CharField(_("historical model"), max_length=100)
    object_id = models.CharField(_("object id"), max_length=64)
    history_id = models.BigIntegerField(_("history row id"))
    action = models.CharField(_("action"), max_length=1, choices=ACTIONS)
    actor = models.CharField(_("actor (name as recorded)"), max_length=200, blank=True)
    reason = models.CharField(_("reason"), max_length=200, blank=True)
    content_hash = models.CharField(_("content hash (SHA-256)"), max_length=64)
    prev_hash = models.CharField(_("previous entry hash"), max_length=64)
    entry_hash = models.CharField(_("entry hash (SHA-256)"), max_length=64)
    scheme = models.PositiveSmallIntegerField(_("hash scheme"), choices=SCHEMES,
                                              default=HMAC_SHA256)

    objects = _AppendOnlyQuerySet.as_manager()

    class Meta:
        ordering = ["seq"]
        verbose_name = _("change chain entry")
        verbose_name_plural = _("change chain entries")
        constraints = [
            models.UniqueConstraint(fields=["model_label", "history_id"],
                                    name="register_chain_one_entry_per_history_row"),
        ]
        # each object's newest entry (the live rows' comparison, register.audit.live)
        indexes = [models.Index(fields=["model_label", "object_id", "seq"],
                                name="register_chain_object_seq")]

    def __str__(self):
        return f"#{self.seq} {self.action} {self.model_label} {self.object_id}"

    def save(self, *args, **kwargs):
        if self.pk is not None or not self._state.adding:
            raise ChainAppendOnlyError("Chain entries cannot be changed.")
        kwargs["force_insert"] = True
        super().save(*args, **kwargs)

    def delete(self, *args, **kwargs):
        raise ChainAppendOnlyError("Chain entries cannot be deleted.")


class ChainCheckpoint(models.Model):
    """One row: how far the chain was last verified, so a check need only go on from there.

    ``seq``/``entry_hash`` name the newest entry the last intact verification reached (the
    next check starts at that entry and first confirms it still hashes to ``entry_hash``);
    ``full_verified_at`` is when the whole chain was last recomputed from its first entry
    (``register.audit.chain.verify_chain``). Written only by verification (and once by the
    migration that keyed the chain)."""

    seq = models.PositiveBigIntegerField(_("verified up to entry"), default=0)
    entry_hash = models.CharField(_("hash of that entry"), max_length=64, default=GENESIS_HASH)
    verified_at = models.DateTimeField(_("last verified at"), null=True, blank=True)
    full_verified_at = models.DateTimeField(_("last verified in full at"), null=True,
                                            blank=True)
    full_verified_seq = models.PositiveBigIntegerField(_("entries at the last full check"),
                                                       null=True, blank=True)
    full_verified_ok = models.BooleanField(_("intact at the last full check"), null=True)
    #: Entries up to this one were appended before the chain was keyed (plain SHA-256);
    #: every later one must be keyed. Set once, by the migration that keyed the chain.
    unkeyed_until = models.PositiveBigIntegerField(_("unkeyed entries up to"), default=0)
    #: HMAC of this row's values with the chain key: without the key, the checkpoint can
    #: be neither moved nor widened to accept unkeyed entries.
    seal = models.CharField(_("seal"), max_length=64, blank=True)

    class Meta:
        verbose_name = _("change chain checkpoint")

    def __str__(self):
        return f"chain verified up to #{self.seq}"


class EvidencePackQuerySet(SiteScopedQuerySet):
    def fail(self, error: str, stage: str = "Failed") -> int:
        """Mark these packs failed with ``error`` and ``stage`` (the pack page shows
        them), those finished excepted; returns the rows changed."""
        return self.exclude(status=EvidencePack.Status.DONE).update(
            status=EvidencePack.Status.FAILED, error=error, stage=stage,
            finished_at=timezone.now())


class EvidencePack(models.Model):
    """A request for an evidence pack (one SIF, a unit or a site, over a period)."""

    class Scope(models.TextChoices):
        SIF = "sif", _("One SIF")
        UNIT = "unit", _("A unit")
        SITE = "site", _("The whole site")

    class Status(models.TextChoices):
        QUEUED = "queued", _("Queued")
        RUNNING = "running", _("Being built")
        DONE = "done", _("Ready")
        FAILED = "failed", _("Failed")

    scope = models.CharField(_("scope"), max_length=4, choices=Scope.choices)
    site = models.ForeignKey(Site, on_delete=models.PROTECT, related_name="evidence_packs")
    unit = models.ForeignKey(PlantUnit, on_delete=models.PROTECT, null=True, blank=True,
                             related_name="evidence_packs")
    sif = models.ForeignKey(SafetyFunction, on_delete=models.PROTECT, null=True, blank=True,
                            related_name="evidence_packs")
    period_start = models.DateField(_("period start"))
    period_end = models.DateField(_("period end"))
    requested_by = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.PROTECT,
                                     related_name="evidence_packs")
    status = models.CharField(_("status"), max_length=8, choices=Status.choices,
                              default=Status.QUEUED)
    progress = models.PositiveSmallIntegerField(_("progress (%)"), default=0)
    stage = models.CharField(_("current step"), max_length=200, blank=True)
    error = models.TextField(_("error"), blank=True)
    result_path = models.CharField(_("zip file (relative to the data folder)"),
                                   max_length=300, blank=True)
    result_sha256 = models.CharField(_("zip SHA-256"), max_length=64, blank=True)
    result_size = models.PositiveBigIntegerField(_("zip size (bytes)"), null=True, blank=True)
    chain_head_hash = models.CharField(_("chain head at generation"), max_length=64,
                                       blank=True)
    chain_head_seq = models.PositiveBigIntegerField(null=True, blank=True)
    chain_ok = models.BooleanField(_("chain verified at generation"), null=True)
    created_at = models.DateTimeField(_("requested at"), auto_now_add=True)
    started_at = models.DateTimeField(null=True, blank=True)
    finished_at = models.DateTimeField(_("finished at"), null=True, blank=True)

    site_path = "site"
    objects = EvidencePackQuerySet.as_manager()

    class Meta:
        ordering = ["-created_at", "-id"]
        # /api/evidence-packs/ and the auditor's list of packs in their default order
        indexes = [models.Index(fields=["created_at", "id"], name="register_pack_list")]
        constraints = [
            models.CheckConstraint(condition=models.Q(period_end__gte=models.F("period_start")),
                                   name="register_pack_period_order"),
        ]

    def __str__(self):
        return f"Evidence pack {self.pk}: {self.scope_label} {self.period_start}..{self.period_end}"

    @property
    def scope_label(self) -> str:
        if self.scope == self.Scope.SIF and self.sif_id:
            return f"SIF {self.sif.tag}"
        if self.scope == self.Scope.UNIT and self.unit_id:
            return f"unit {self.unit.code} {self.unit.name}"
        return f"site {self.site.name}"

    @property
    def is_finished(self) -> bool:
        return self.status in (self.Status.DONE, self.Status.FAILED)

