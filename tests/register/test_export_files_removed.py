"""A background export's file is removed EXPORT_KEEP_DAYS after it was written: the job
then reads "file removed" with a message saying what to do, its page offers no download
and the download address answers 404; younger files stay."""

from __future__ import annotations

import datetime as dt

import pytest
from django.utils import timezone

from register import choices
from register.lead.export_jobs import exports_dir, job_file, remove_old_files
from register.lead.tasks import remove_old_exports
from register.models import ExportJob
from tests import factories as f

pytestmark = pytest.mark.django_db


def _done(user, days_ago: float, settings) -> ExportJob:
    job = ExportJob.objects.create(user=user, kind=ExportJob.Kind.LIST, fmt="csv",
                                   status=ExportJob.Status.DONE, sifs_total=3, sifs_done=3,
                                   message="3 SIFs written")
    path = exports_dir() / f"export-{job.pk}.csv"
    path.write_bytes(b"tag\nA\nB\nC\n")
    ExportJob.objects.filter(pk=job.pk).update(
        finished_at=timezone.now() - dt.timedelta(days=days_ago), result_size=10,
        result_path=str(path.relative_to(settings.VAR_DIR)))
    job.refresh_from_db()
    return job


def test_old_files_are_removed_and_their_jobs_say_so(client, settings, tmp_path):
    settings.VAR_DIR = tmp_path
    settings.EXPORT_KEEP_DAYS = 7
    site = f.site("xrm")
    lead = f.user("xrm-lead", site=site, role=choices.Role.LEAD)
    old, young = _done(lead, 7.5, settings), _done(lead, 6.5, settings)
    old_path = job_file(old)
    assert old_path is not None and old_path.exists()

    assert remove_old_exports() == [old.pk]
    old.refresh_from_db()
    young.refresh_from_db()
    assert not old_path.exists() and job_file(old) is None
    assert old.status == ExportJob.Status.REMOVED and old.is_finished
    written = timezone.localtime(timezone.now() - dt.timedelta(days=7.5)).date()
    assert old.result_path == "" and old.message.startswith(
        f"The file written on {written:%Y-%m-%d} was removed on "
        f"{timezone.localdate():%Y-%m-%d}: files are kept for 7 days.")
    assert job_file(young) is not None and young.status == ExportJob.Status.DONE

    client.force_login(lead)
    page = client.get(f"/sifs/export-jobs/{old.pk}/").content.decode()
    assert "Ask for the export again" in page and "Download the file" not in page
    assert "export-status.js" not in page  # finished: no polling
    assert client.get(f"/sifs/export-jobs/{old.pk}/download/").status_code == 404
    assert "Download the file" in client.get(f"/sifs/export-jobs/{young.pk}/").content.decode()
    assert remove_old_files() == []  # once


def test_beat_removes_old_export_files(settings):
    entry = settings.CELERY_BEAT_SCHEDULE["old-export-files"]
    assert entry["task"] == remove_old_exports.name
