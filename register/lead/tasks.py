"""Celery task that writes a long spreadsheet import (``spreadsheet.run_import_job``)."""

from __future__ import annotations

from celery import shared_task


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


@shared_task(name="register.sweep_stopped_jobs", acks_late=True)
def sweep_stopped_jobs() -> dict:
    """Periodic: fail the background jobs that read "running" with no worker left on them
    (``register.job_lease.sweep``); returns their ids by kind."""
    from register.job_lease import sweep

    return sweep()


@shared_task(name="register.remove_old_exports", acks_late=True)
def remove_old_exports() -> list[int]:
    """Periodic: remove the background exports' files older than ``EXPORT_KEEP_DAYS``
    (``export_jobs.remove_old_files``); returns the jobs' ids."""
    from register.lead.export_jobs import remove_old_files

    return remove_old_files()
