"""Celery tasks of the lead's background jobs: long imports (``spreadsheet.run_import_job``)
and exports (``export_jobs.run_export_job``), and the periodic care of those jobs."""

from __future__ import annotations

import datetime as dt

from celery import shared_task
from django.conf import settings
from django.utils import timezone


@shared_task(name="register.import_job", acks_late=True)
def apply_import_job(job_id: int) -> dict:
    """Write the job's checked file; status and progress are kept on the ImportJob row."""
    from register.lead.spreadsheet import run_import_job

    job = run_import_job(job_id)
    return {"job": job.pk, "status": job.status, "rows_done": job.rows_done}


@shared_task(name="register.export_job", acks_late=True)
def write_export_job(job_id: int) -> dict:
    """Write the job's export file; status and progress are kept on the ExportJob row."""
    from register.lead.export_jobs import run_export_job

    job = run_export_job(job_id)
    return {"job": job.pk, "status": job.status, "sifs_done": job.sifs_done}


def send_import_job(job_id: int) -> None:
    """Hand an import job to the workers (default queue)."""
    apply_import_job.delay(job_id)


def send_export_job(job_id: int) -> None:
    """Hand an export job to the workers (the packs queue: a long file never delays the
    scan or the recompute)."""
    write_export_job.apply_async((job_id,), queue=settings.PACKS_QUEUE)


def resend_queued(now: dt.datetime | None = None) -> dict[str, list[int]]:
    """Send again the import and export jobs still queued ``JOB_RESEND_MINUTES`` after
    they were asked for: their message may be lost (the broker down when the request
    committed, or restarted without its queue). Sending one twice does no harm: a job is
    written once (``register.job_lease.run_claimed``). Returns their ids by kind."""
    from register.models import ExportJob, ImportJob

    cutoff = (now or timezone.now()) - dt.timedelta(minutes=settings.JOB_RESEND_MINUTES)
    out = {}
    for kind, model, send in (("import", ImportJob, send_import_job),
                              ("export", ExportJob, send_export_job)):
        out[kind] = list(model.objects.filter(status=model.Status.QUEUED,
                                              created_at__lt=cutoff).values_list("pk", flat=True))
        for pk in out[kind]:
            send(pk)
    return out


@shared_task(name="register.sweep_stopped_jobs", acks_late=True)
def sweep_stopped_jobs() -> dict:
    """Periodic: fail the background jobs that read "running" with no worker left on them
    (``register.job_lease.sweep``), then send again those still queued long after they
    were asked for (``resend_queued``); returns their ids by kind."""
    from register.job_lease import sweep

    return {"failed": sweep(), "resent": resend_queued()}


@shared_task(name="register.remove_old_exports", acks_late=True)
def remove_old_exports() -> list[int]:
    """Periodic: remove the background exports' files older than ``EXPORT_KEEP_DAYS``
    (``export_jobs.remove_old_files``); returns the jobs' ids."""
    from register.lead.export_jobs import remove_old_files

    return remove_old_files()
