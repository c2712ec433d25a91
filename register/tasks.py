"""The register's Celery tasks, gathered here for Celery's autodiscovery; each lives with
the package whose work it runs."""

from register.audit.tasks import build_evidence_pack
from register.schedule.tasks import scan_task

__all__ = ["build_evidence_pack", "scan_task"]
