"""Deferral requests: ask to postpone a due proof test, seeing its projected effect first;
the site's functional-safety lead (never the requester) decides on the decide page.

The rules (dates, who decides, the projection and what is stored) are in
``register.schedule.services``; these views read the form, call them and show the result.
"""

import datetime as dt

from django.contrib import messages
from django.contrib.auth.decorators import login_required
from django.core.exceptions import PermissionDenied, ValidationError
from django.http import Http404
from django.shortcuts import get_object_or_404, redirect, render
from django.utils.http import url_has_allowed_host_and_scheme

from register import choices, presenters
from register.calculations import calculations
from register.models import Deferral, TestPlan
from register.people import person_name
from register.permissions import Action, can
from register.schedule import services as schedule_services
from register.schedule.due import status_of

REQUEST_TEMPLATE = "register/schedule/request.html"
DECIDE_TEMPLATE = "register/schedule/decide.html"


def _plan_for(user, pk) -> TestPlan:
    plan = TestPlan.objects.restrict(user).select_related("sif__unit__site").filter(pk=pk).first()
    if plan is None:
        raise Http404("No such test plan at your sites.")
    return plan


REQUEST_FIELDS = ("proposed_on", "reason")
DECIDE_FIELDS = ("decision", "decision_note", "decided_by", "proposed_on", "password")


def _errors(exc: ValidationError, fields) -> tuple[dict, list]:
    """(errors by field the form shows, every other message) of a service's
    ValidationError, so that no message is lost."""
    if not hasattr(exc, "error_dict"):
        return {}, exc.messages
    by_field, general = {}, []
    for key, messages_ in exc.message_dict.items():
        if key in fields:
            by_field[key] = messages_
        else:
            general.extend(messages_)
    return by_field, general


def _status_view(status) -> dict:
    badge = choices.plan_state_badge(status.state)
    return {"due_on": status.due_on, "days_overdue": status.days_overdue,
            "deferred": status.deferred, "label": badge["label"], "style": badge["style"],
            "late": status.days_overdue > 0}


@login_required
def request_deferral(request, plan_id):
    plan = _plan_for(request.user, plan_id)
    site_id = plan.sif.unit.site_id
    if not can(request.user, Action.REQUEST_DEFERRAL, site_id):
        raise PermissionDenied("Only technicians and the lead of this site can ask for a "
                               "deferral.")
    today = schedule_services.today_at(plan)
    status = status_of(plan, today)
    ctx = {"plan": plan, "status": _status_view(status), "errors": {}, "general_errors": [],
           "values": request.POST or {}, "earliest": today + dt.timedelta(days=1),
           "latest": schedule_services.latest_proposal(plan, today)}
    if request.method != "POST":
        return render(request, REQUEST_TEMPLATE, ctx)
    try:
        proposed = dt.date.fromisoformat(request.POST.get("proposed_on", "").strip())
    except ValueError:
        ctx["errors"]["proposed_on"] = ["Enter the proposed date as YYYY-MM-DD."]
        return render(request, REQUEST_TEMPLATE, ctx, status=400)
    try:
        schedule_services.check_proposed_on(plan, proposed, today)
    except ValidationError as exc:
        ctx["errors"], ctx["general_errors"] = _errors(exc, REQUEST_FIELDS)
        return render(request, REQUEST_TEMPLATE, ctx, status=400)
    ctx["projection"] = schedule_services.projected_effect(plan, proposed, status=status)
    if "preview" in request.POST:
        return render(request, REQUEST_TEMPLATE, ctx)
    try:
        schedule_services.request_deferral(user=request.user, plan=plan, proposed_on=proposed,
                                           reason=request.POST.get("reason", ""))
    except ValidationError as exc:
        ctx["errors"], ctx["general_errors"] = _errors(exc, REQUEST_FIELDS)
        return render(request, REQUEST_TEMPLATE, ctx, status=400)
    messages.success(request, "Deferral requested; the site's functional-safety lead "
                              "decides.")
    return redirect("deferrals:list")


@login_required
def deferral_list(request):
    rows = (Deferral.objects.restrict(request.user)
            .select_related("plan__sif__unit__site", "requested_by", "decided_by")
            .order_by("status", "-requested_at")[:200])
    return render(request, "register/schedule/deferrals.html", {"rows": rows})


def _decide_context(deferral: Deferral, user) -> dict:
    """Everything the decider sees: the request, how late the test already is, the SIF's
    current figures (latest stored assessment) and the projected effect."""
    plan = deferral.plan
    today = schedule_services.today_at(plan)
    status = status_of(plan, today)
    pending = deferral.status == choices.DeferralStatus.PENDING
    ctx = {"deferral": deferral, "plan": plan, "sif": plan.sif, "pending": pending,
           "status": _status_view(status), "errors": {}, "general_errors": [],
           "values": {}, "requester": person_name(deferral.requested_by),
           "decider": person_name(deferral.decided_by),
           "own_request": deferral.requested_by_id == user.pk}
    assessment = calculations().latest_assessments([plan.sif_id]).get(plan.sif_id)
    if assessment is not None:
        ctx["assessment"] = assessment
        ctx["verdict_badge"] = presenters.verdict_badge(assessment.meets_target)
        ctx["verdict_summary"] = presenters.verdict_summary(assessment)
    if pending:
        try:
            schedule_services.check_proposed_on(plan, deferral.proposed_on, today)
        except ValidationError as exc:
            ctx["date_error"] = " ".join(exc.messages)
        else:
            ctx["projection"] = schedule_services.projected_effect(
                plan, deferral.proposed_on, status=status)
    return ctx


@login_required
def decide(request, pk):
    deferral = get_object_or_404(Deferral.objects.restrict(request.user).select_related(
        "plan__sif__unit__site", "requested_by", "decided_by"), pk=pk)
    if not can(request.user, Action.DECIDE_DEFERRAL, deferral.plan.sif.unit.site_id):
        raise PermissionDenied("Only the site's functional-safety lead decides deferrals.")
    if request.method != "POST":
        return render(request, DECIDE_TEMPLATE, _decide_context(deferral, request.user))
    decision = request.POST.get("decision", "")
    note = request.POST.get("note", "")
    try:
        if decision not in ("approve", "reject"):
            raise ValidationError({"decision": "Choose Approve or Reject."})
        schedule_services.decide_deferral(deferral, request.user,
                                          request.POST.get("password", ""),
                                          approve=decision == "approve", note=note)
    except ValidationError as exc:
        deferral.refresh_from_db()
        ctx = _decide_context(deferral, request.user)
        ctx["errors"], ctx["general_errors"] = _errors(exc, DECIDE_FIELDS)
        ctx["values"] = {"note": note, "decision": decision}
        return render(request, DECIDE_TEMPLATE, ctx, status=400)
    messages.success(request, f"Deferral {'approved' if decision == 'approve' else 'rejected'}.")
    back = request.POST.get("next", "")
    if back and url_has_allowed_host_and_scheme(back, allowed_hosts={request.get_host()}):
        return redirect(back)
    return redirect("deferrals:list")
