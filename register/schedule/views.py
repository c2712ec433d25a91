"""Deferral requests: ask to postpone a due proof test, seeing its projected effect first.

The projection (PFDavg to the proposed date vs on the due date, against the target) comes
from ``calcs.adapter.deferral_projection``; the decision itself is taken by the site's
functional-safety lead on the SIF page or here, through ``services.decide_deferral``.
"""

import datetime as dt

from django.contrib import messages
from django.contrib.auth.decorators import login_required
from django.core.exceptions import PermissionDenied, ValidationError
from django.http import Http404
from django.shortcuts import get_object_or_404, redirect, render
from django.utils import timezone
from django.utils.http import url_has_allowed_host_and_scheme

from register import choices
from register.calculations import calculations
from register.models import Deferral, TestPlan
from register.permissions import Action, can
from register.schedule import services as schedule_services
from register.schedule.due import status_of


def _plan_for(user, pk) -> TestPlan:
    plan = TestPlan.objects.restrict(user).select_related("sif__unit__site").filter(pk=pk).first()
    if plan is None:
        raise Http404("No such test plan at your sites.")
    return plan


def _projection(plan, proposed_on):
    try:
        cmp, target = calculations().deferral_projection(plan, proposed_on)
    except (calculations().EngineError, ValueError) as exc:
        return {"error": str(exc)}
    return {"on_due": cmp.on_due_date.pfd_avg, "deferred": cmp.deferred.pfd_avg,
            "increase": cmp.relative_increase, "target": target,
            "horizon_end": cmp.deferred.window_end,
            "meets": target is None or cmp.deferred.pfd_avg <= target}


@login_required
def request_deferral(request, plan_id):
    plan = _plan_for(request.user, plan_id)
    site_id = plan.sif.unit.site_id
    if not can(request.user, Action.REQUEST_DEFERRAL, site_id):
        raise PermissionDenied("Only technicians and the lead of this site can ask for a "
                               "deferral.")
    status = status_of(plan, timezone.localdate())
    ctx = {"plan": plan, "status": status, "errors": {}, "values": request.POST or {}}
    if request.method == "POST":
        try:
            proposed = dt.date.fromisoformat(request.POST.get("proposed_on", ""))
        except ValueError:
            ctx["errors"]["proposed_on"] = ["Enter the proposed date as YYYY-MM-DD."]
            return render(request, "register/schedule/request.html", ctx, status=400)
        ctx["projection"] = _projection(plan, proposed)
        if "preview" in request.POST:
            return render(request, "register/schedule/request.html", ctx)
        try:
            schedule_services.request_deferral(user=request.user, plan=plan, proposed_on=proposed,
                                      reason=request.POST.get("reason", ""))
        except ValidationError as exc:
            errors = dict(getattr(exc, "message_dict", {}))
            ctx["general_errors"] = errors.pop("__all__", None) or (
                [] if errors else exc.messages)
            ctx["errors"] = errors
            return render(request, "register/schedule/request.html", ctx, status=400)
        messages.success(request, "Deferral requested; the site's functional-safety lead "
                                  "decides.")
        return redirect("deferrals:list")
    return render(request, "register/schedule/request.html", ctx)


@login_required
def deferral_list(request):
    rows = (Deferral.objects.restrict(request.user)
            .select_related("plan__sif__unit__site", "requested_by", "decided_by")
            .order_by("status", "-requested_at")[:200])
    return render(request, "register/schedule/deferrals.html", {"rows": rows})


@login_required
def decide(request, pk):
    deferral = get_object_or_404(Deferral.objects.restrict(request.user)
                                 .select_related("plan__sif__unit__site"), pk=pk)
    if not can(request.user, Action.DECIDE_DEFERRAL, deferral.plan.sif.unit.site_id):
        raise PermissionDenied("Only the site's functional-safety lead decides deferrals.")
    projection = _projection(deferral.plan, deferral.proposed_on)
    if request.method == "POST":
        approve = request.POST.get("decision") == "approve"
        try:
            schedule_services.decide_deferral(deferral, request.user, approve=approve,
                                     note=request.POST.get("note", ""),
                                     projected_pfd_avg=projection.get("deferred"))
        except ValidationError as exc:
            messages.error(request, " ".join(exc.messages))
            return render(request, "register/schedule/decide.html",
                          {"deferral": deferral, "projection": projection}, status=400)
        messages.success(request, f"Deferral {'approved' if approve else 'rejected'}.")
        back = request.POST.get("next", "")
        if back and url_has_allowed_host_and_scheme(back, allowed_hosts={request.get_host()}):
            return redirect(back)
        return redirect("deferrals:list")
    return render(request, "register/schedule/decide.html",
                  {"deferral": deferral, "projection": projection,
                   "pending": deferral.status == choices.DeferralStatus.PENDING})
