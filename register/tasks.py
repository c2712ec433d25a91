"""The register's Celery tasks, gathered here for Celery's autodiscovery; each lives with
the package whose work it runs."""

from register.audit.anchors import anchor_chain
from register.audit.tasks import build_evidence_pack
from register.inbox.tasks import send_notification_email
from register.lead.tasks import apply_import_job
from register.schedule.tasks import scan_task

__all__ = ["anchor_chain", "apply_import_job", "build_evidence_pack", "scan_task", "send_notification_email"]
