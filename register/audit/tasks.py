"""Celery task that builds an evidence pack (see ``register.audit.evidence``)."""

from celery import shared_task


@shared_task(name="register.evidence_pack", acks_late=True)
def build_evidence_pack(pack_id: int) -> dict:
    """Build the pack; status and progress are kept on the EvidencePack row."""
    from register.audit.evidence.build import run

    pack = run(pack_id)
    return {"pack": pack.pk, "status": pack.status, "sha256": pack.result_sha256}
