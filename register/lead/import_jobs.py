"""The page of a long spreadsheet import written in the background, and its status for
the page's polling script (``static/js/import-status.js``)."""

from __future__ import annotations

from django.contrib.auth.decorators import login_required
from django.http import Http404, JsonResponse
from django.shortcuts import render

from register.lead.views import list_url
from register.models import ImportJob
from register.permissions import Action, can


def _job_for(user, pk: int) -> ImportJob:
    """The job, for its owner and the leads of its site; 404 for anyone else (the job's
    existence is not told)."""
    job = ImportJob.objects.select_related("site", "user").filter(pk=pk).first()
    if job is None or not (job.user_id == user.pk
                           or can(user, Action.EDIT_REGISTER, job.site_id)):
        raise Http404("No such import.")
    return job


@login_required
def import_job(request, pk):
    job = _job_for(request.user, pk)
    return render(request, "register/lead/import_job.html",
                  {"job": job, "list_url": list_url(site=job.site_id)})


@login_required
def import_job_status(request, pk):
    job = _job_for(request.user, pk)
    return JsonResponse({"id": job.pk, "status": job.status, "rows_done": job.rows_done,
                         "rows_total": job.rows_total, "percent": job.percent,
                         "message": job.message, "errors": job.errors, "result": job.result,
                         "finished": job.is_finished})
