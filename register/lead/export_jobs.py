"""Register exports too large for one request: more SIFs than EXPORT_BACKGROUND_SIFS.

The export's address (``/sifs/export.xlsx?...``, ``/sifs/list.csv?...``) then answers a
page that offers to prepare the file; its POST records an :class:`ExportJob` (which export,
format and the list's filter) and a Celery task (``register.export_job``, on the packs
queue) writes the same file the direct export streams, with the same filter over the SIFs
the asker may export, into the data folder, counting the SIFs written. The job's page
shows the progress and then offers the download, to the person who asked only (the file
may hold SIFs of several sites); the export right at every site in the file is checked
again when it is downloaded.
"""

from __future__ import annotations

import datetime as dt
import logging
import shutil
from collections.abc import Callable, Iterable, Iterator
from pathlib import Path
from types import SimpleNamespace

from django.conf import settings
from django.contrib.auth.decorators import login_required
from django.core.exceptions import PermissionDenied
from django.db import transaction
from django.http import FileResponse, Http404, JsonResponse, QueryDict
from django.shortcuts import render
from django.urls import reverse
from django.utils import timezone

from register import job_lease
from register.lead import export
from register.lead.filters import SifFilter
from register.models import ExportJob, SafetyFunction
from register.permissions import Action, can, can_somewhere

log = logging.getLogger(__name__)

#: The file name of each export (before the date and the format).
NAMES = {ExportJob.Kind.REGISTER: "sif-register", ExportJob.Kind.LIST: "sif-list"}
#: The SIFs written between two progress reports of a job.
PROGRESS_EVERY = 200


def export_filter(user, query: str | QueryDict) -> SifFilter:
    """The list's filter (``SifFilter``, the one filter rule) over the SIFs ``user`` may
    export (the gate's ``EXPORT`` right)."""
    data = query if isinstance(query, QueryDict) else QueryDict(query)
    return SifFilter(data, request=SimpleNamespace(user=user),
                     queryset=SafetyFunction.objects.restrict(user, Action.EXPORT))


def sif_count(f: SifFilter) -> int:
    return SafetyFunction.objects.filter(pk__in=f.qs.values("pk")).count()


def in_background(f: SifFilter) -> bool:
    """An export of more SIFs than EXPORT_BACKGROUND_SIFS is written by a job."""
    return sif_count(f) > settings.EXPORT_BACKGROUND_SIFS


def _counted(rows: Iterable, report: Callable[[int], None] | None,
             is_sif: Callable = lambda row: True) -> Iterator:
    """``rows`` unchanged, calling ``report(SIFs so far)`` every PROGRESS_EVERY SIFs."""
    if report is None:
        yield from rows
        return
    done = 0
    for row in rows:
        if is_sif(row):
            done += 1
            if done % PROGRESS_EVERY == 0:
                report(done)
        yield row


def writers(kind: str, f: SifFilter, report=None) -> tuple[Callable, Callable]:
    """(CSV chunks, open xlsx file) makers of the export ``kind`` for the filter's SIFs:
    the one place that says what each export holds, for the request and the job."""
    if kind == ExportJob.Kind.REGISTER:
        from register.lead import spreadsheet

        def rows():
            return _counted(spreadsheet.iter_export_table(f.qs), report,
                            lambda row: row[0] == "sif")

        return (lambda: spreadsheet.table_csv(rows()), lambda: spreadsheet.table_xlsx(rows()))
    if kind == ExportJob.Kind.LIST:
        return (lambda: export.people_csv(f, lambda rows: _counted(rows, report)),
                lambda: export.people_xlsx(f, lambda rows: _counted(rows, report)))
    raise ValueError(f"unknown export {kind!r}")


def file_name(kind: str, fmt: str, day) -> str:
    return f"{NAMES[kind]}-{day.isoformat()}.{fmt}"


def queue_export(user, kind: str, fmt: str, query: str) -> ExportJob:
    """Record the job (the caller has checked the right and the filter) and start it once
    the request commits."""
    job = ExportJob.objects.create(user=user, kind=kind, fmt=fmt, query=query)

    def start():
        from register.lead.tasks import send_export_job

        send_export_job(job.pk)

    transaction.on_commit(start)
    return job


def exports_dir() -> Path:
    path = Path(settings.VAR_DIR) / "exports"
    path.mkdir(parents=True, exist_ok=True)
    return path


def run_export_job(job_id: int) -> ExportJob:
    """Write a queued job's file, keeping the SIFs written and the outcome on the row,
    under the job's lease (``register.job_lease``). A job finished, or being written by
    another worker, is left alone; one left "running" by a worker that is gone is written
    again."""
    return job_lease.run_claimed("export", ExportJob, job_id, _write_export_job,
                                 message="Writing the file")


def _write_export_job(job_id: int) -> ExportJob:
    job = ExportJob.objects.select_related("user").get(pk=job_id)
    path = exports_dir() / f"export-{job.pk}.{job.fmt}"
    part = path.with_suffix(".part")
    try:
        if not job.user.is_active:
            raise PermissionDenied("the account that asked is no longer active")
        f = export_filter(job.user, job.query)
        if not f.form.is_valid():
            raise ValueError("the list's filters are no longer valid: "
                             + f.form.errors.as_text())
        ids = SafetyFunction.objects.filter(pk__in=f.qs.values("pk"))
        sites = sorted(set(ids.values_list("unit__site_id", flat=True)))
        ExportJob.objects.filter(pk=job.pk).update(sifs_total=ids.count(), site_ids=sites)

        def report(done: int):
            ExportJob.objects.filter(pk=job.pk).update(sifs_done=done)

        csv_chunks, xlsx = writers(job.kind, f, report)
        with part.open("wb") as out:
            if job.fmt == "csv":
                for chunk in csv_chunks():
                    out.write(chunk)
            else:
                with xlsx() as src:
                    shutil.copyfileobj(src, out, 1 << 20)
        part.replace(path)
    except Exception as exc:
        log.exception("export job %s failed", job.pk)
        part.unlink(missing_ok=True)
        ExportJob.objects.filter(pk=job.pk).update(
            status=ExportJob.Status.FAILED, finished_at=timezone.now(),
            message=f"The export stopped: {exc}.")
        return ExportJob.objects.get(pk=job.pk)
    job.refresh_from_db()
    ExportJob.objects.filter(pk=job.pk).update(
        status=ExportJob.Status.DONE, sifs_done=job.sifs_total, finished_at=timezone.now(),
        result_path=str(path.relative_to(Path(settings.VAR_DIR))),
        result_size=path.stat().st_size,
        message=f"{job.sifs_total} SIF{'s' if job.sifs_total != 1 else ''} written")
    job.refresh_from_db()
    return job


def remove_old_files(now=None) -> list[int]:
    """Remove the files of the jobs written more than ``EXPORT_KEEP_DAYS`` ago (an
    export is a copy of the register on one day, not a record to keep); each such job
    then reads "file removed", with a message saying when and what to do. Returns their
    ids."""
    now = now or timezone.now()
    cutoff = now - dt.timedelta(days=settings.EXPORT_KEEP_DAYS)
    removed = []
    for job in ExportJob.objects.filter(status=ExportJob.Status.DONE, finished_at__lt=cutoff):
        path = job_file(job)
        if path is not None:
            path.unlink(missing_ok=True)
        if ExportJob.objects.filter(pk=job.pk, status=ExportJob.Status.DONE).update(
                status=ExportJob.Status.REMOVED, result_path="",
                message=f"The file written on {timezone.localtime(job.finished_at):%Y-%m-%d} "
                        f"was removed on {timezone.localtime(now):%Y-%m-%d}: files are kept "
                        f"for {settings.EXPORT_KEEP_DAYS} days. Ask for the export again "
                        "for today's register."):
            removed.append(job.pk)
    return removed


def job_file(job: ExportJob) -> Path | None:
    """The finished file of a job, or None while it is not ready or if it is missing."""
    if job.status != ExportJob.Status.DONE or not job.result_path:
        return None
    root = Path(settings.VAR_DIR).resolve()
    path = (root / job.result_path).resolve()
    return path if root in path.parents and path.exists() else None


# ---------------------------------------------------------------------------------------
# Pages
# ---------------------------------------------------------------------------------------


def _for_a_page(request) -> bool:
    """True when the asker reads pages (a browser names text/html in its Accept header); a
    script (no Accept, ``*/*``, ``text/csv``...) is answered in JSON with a status that is
    not 200, so the offer page is never saved as if it were the file."""
    return "text/html" in request.headers.get("Accept", "")


def offer(request, f: SifFilter, kind: str, fmt: str):
    """The answer of an export address above the limit: a page offering the job; to a
    script, 409 with what to do (POST the same address to start the job)."""
    count, limit = sif_count(f), settings.EXPORT_BACKGROUND_SIFS
    if not _for_a_page(request):
        return JsonResponse({
            "detail": f"This export holds {count} SIFs, more than the {limit} written in "
                      "one request. POST to the same address to have the file written by "
                      "a background job; the answer gives the job's status and download "
                      "addresses.",
            "sifs": count, "limit": limit, "start": request.get_full_path()}, status=409)
    return render(request, "register/lead/export_offer.html", {
        "count": count, "limit": limit, "kind": ExportJob.Kind(kind).label, "fmt": fmt,
        "action": request.get_full_path()})


def start(request, kind: str, fmt: str):
    """The offer's POST: the job, and on to its page (a script: 202 with its addresses)."""
    from django.shortcuts import redirect

    job = queue_export(request.user, kind, fmt, request.GET.urlencode())
    if not _for_a_page(request):
        page = reverse("register:export_job", args=[job.pk])
        resp = JsonResponse({
            "job": job.pk, "status": job.status, "page": page,
            "status_url": reverse("register:export_job_status", args=[job.pk]),
            "download_url": reverse("register:export_job_download", args=[job.pk])},
            status=202)
        resp["Location"] = page
        return resp
    return redirect("register:export_job", job.pk)


def _job_for(user, pk: int) -> ExportJob:
    """The job, for the person who asked; 404 for anyone else (its existence is not
    told)."""
    job = ExportJob.objects.filter(pk=pk, user_id=user.pk).first()
    if job is None:
        raise Http404("No such export.")
    return job


@login_required
def export_job(request, pk):
    job = _job_for(request.user, pk)
    back = reverse("register:sif_list") + (f"?{job.query}" if job.query else "")
    return render(request, "register/lead/export_job.html", {"job": job, "list_url": back})


@login_required
def export_job_status(request, pk):
    job = _job_for(request.user, pk)
    return JsonResponse({"id": job.pk, "status": job.status, "sifs_done": job.sifs_done,
                         "sifs_total": job.sifs_total, "percent": job.percent,
                         "message": job.message, "finished": job.is_finished})


@login_required
def export_job_download(request, pk):
    job = _job_for(request.user, pk)
    refused = [s for s in job.site_ids if not can(request.user, Action.EXPORT, s)]
    if refused or not can_somewhere(request.user, Action.EXPORT):
        raise PermissionDenied("You no longer have the export right at every site in "
                               "this file.")
    path = job_file(job)
    if path is None:
        raise Http404("The file is not ready, or it is missing.")
    content_type = export.CSV_TYPE if job.fmt == "csv" else export.XLSX_TYPE
    return FileResponse(path.open("rb"), as_attachment=True, content_type=content_type,
                        filename=file_name(job.kind, job.fmt, timezone.localdate(
                            job.finished_at)))

