"""The functional-safety lead's write pages: design changes under change control (with a
preview of the effect on the design PFDavg), deferral decisions, spreadsheet import."""

from __future__ import annotations

import base64
import json

from django.contrib import messages
from django.contrib.auth.decorators import login_required
from django.core.exceptions import PermissionDenied, ValidationError
from django.http import Http404
from django.shortcuts import get_object_or_404, redirect, render
from django.urls import reverse

from register import choices, services
from register.calculations import calculations
from register.lead import spreadsheet
from register.lead.forms import FORMS, ImportForm
from register.lead.views import list_url
from register.models import SafetyFunction, Site
from register.permissions import Action, can, require, site_id_of


def design_result(sif_id: int, kind: str | None = None, pk: int | None = None,
                  changes: dict | None = None):
    """Design result of a SIF as stored, or with ``changes`` applied in memory to one of
    its components, subsystems or plans (nothing is saved). Returns the engine's result,
    or the calculations().EngineError that stopped it."""
    d = calculations().load(SafetyFunction.objects.filter(pk=sif_id))[0]
    if kind:
        pool = {"component": [c.obj for c in d.all_components()],
                "subsystem": d.subsystems, "plan": d.plans}[kind]
        target = next(o for o in pool if o.pk == pk)
        for name, value in (changes or {}).items():
            if name != "components":  # the scope moves due dates, not the design figure
                setattr(target, name, value)
    try:
        return calculations().evaluate_design(d), calculations().target_pfd(d)
    except calculations().EngineError as exc:
        return exc, calculations().target_pfd(d)


def _plan_effect(plan, changes: dict) -> dict:
    """What a plan change does to the plan's current due date and state."""
    from register.days import today as site_today
    from register.schedule.due import live_statuses, status_with_change

    today = site_today(plan.sif.unit.site)
    effective = changes.get("effective_from") or today
    now = live_statuses(type(plan).objects.filter(pk=plan.pk))[plan.pk]
    then = status_with_change(plan, changes.get("interval_months", plan.interval_months),
                              effective, today, components=changes.get("components"))
    return {"effective_from": effective, "due_before": now.due_on, "due_after": then.due_on,
            "state_before": choices.plan_state_badge(now.state),
            "state_after": choices.plan_state_badge(then.state),
            "kept": now.due_on is not None and now.due_on < effective
            and now.due_on == then.due_on and then.days_overdue > 0}


def _fingerprint(changes: dict) -> str:
    return json.dumps({k: changes[k] for k in sorted(changes)}, default=str)


@login_required
def edit_design(request, kind, pk):
    if kind not in FORMS:
        raise Http404
    model, form_class = FORMS[kind]
    obj = get_object_or_404(model.objects.restrict(request.user), pk=pk)
    require(request.user, Action.EDIT_REGISTER, site_id_of(obj))
    sif_id = services._sif_id_of(obj)
    sif = SafetyFunction.objects.select_related("unit__site").get(pk=sif_id)
    before, target = design_result(sif_id)
    preview = None
    if request.method == "POST":
        form = form_class(request.POST, instance=model.objects.get(pk=pk))
        if form.is_valid():
            changes = {f: form.cleaned_data[f] for f in form_class._meta.fields}
            if "components" in changes:
                changes["components"] = sorted(c.pk for c in changes["components"])
            after, _ = design_result(sif_id, kind, pk, changes)
            fingerprint = _fingerprint(changes)
            confirmed = request.POST.get("previewed") == fingerprint
            if request.POST.get("action") == "save" and confirmed:
                try:
                    services.update_design(model.objects.get(pk=pk), request.user,
                                           reason=form.cleaned_data["reason"],
                                           reference=form.cleaned_data["reference"],
                                           changes=changes)
                except ValidationError as exc:
                    for field, msgs in exc.message_dict.items():
                        form.add_error(field if field in form.fields else None, msgs)
                else:
                    if not isinstance(after, Exception) and not isinstance(before, Exception):
                        messages.success(request, (
                            f"Change saved under {form.cleaned_data['reference']}. Design "
                            f"PFDavg {before.pfd_avg:.2e} → {after.pfd_avg:.2e}."))
                    else:
                        messages.success(request, "Change saved.")
                    return redirect(reverse("register:sif_detail", args=[sif_id]) + "#design")
            plan_effect = _plan_effect(obj, changes) if kind == "plan" else None
            preview = {"after": after, "fingerprint": fingerprint, "plan": plan_effect,
                       "after_error": str(after) if isinstance(after, Exception) else "",
                       "after_sil": None if isinstance(after, Exception)
                       else calculations().sil_from_pfd(after.pfd_avg),
                       "after_meets": None if isinstance(after, Exception) or not target
                       else after.pfd_avg <= target,
                       "stale": request.POST.get("action") == "save" and not confirmed}
    else:
        form = form_class(instance=obj)
    return render(request, "register/lead/edit_design.html", {
        "form": form, "obj": obj, "kind": kind, "sif": sif, "target": target,
        "before": None if isinstance(before, Exception) else before,
        "before_error": str(before) if isinstance(before, Exception) else "",
        "before_sil": None if isinstance(before, Exception) else calculations().sil_from_pfd(before.pfd_avg),
        "preview": preview,
    })


SESSION_KEY = "register_import"


@login_required
def import_sheet(request):
    sites = [s for s in Site.objects.restrict(request.user)
             if can(request.user, Action.EDIT_REGISTER, s.pk)]
    if not sites:
        raise PermissionDenied("Only a functional-safety lead imports into the register.")
    site_qs = Site.objects.filter(pk__in=[s.pk for s in sites])
    context = {"plan": None, "file_error": ""}
    if request.method == "POST" and request.POST.get("step") == "confirm":
        stored = request.session.get(SESSION_KEY)
        if not stored:
            messages.error(request, "Nothing to import: check a file first.")
            return redirect("register:import")
        site = get_object_or_404(site_qs, pk=stored["site"])
        data = base64.b64decode(stored["data"])
        rows = spreadsheet.read_table(stored["name"], data)
        background = spreadsheet.runs_in_background(rows)
        try:
            if background:  # a long file: the same checks here, the writing in a job
                job = spreadsheet.queue_import(site, stored["name"], data, request.user,
                                               stored["reference"],
                                               request.POST.get("password", ""))
            else:
                plan = spreadsheet.apply_import(site, rows, request.user,
                                                stored["reference"],
                                                request.POST.get("password", ""))
        except ValidationError as exc:  # the password: the checked file stays ready
            context.update(plan=spreadsheet.plan_import(site, rows), site=site,
                           name=stored["name"], password_error=" ".join(exc.messages))
            form = ImportForm(sites=site_qs)
        except spreadsheet.ImportFailed as exc:
            context.update(plan=spreadsheet.ImportPlan(errors=exc.errors), site=site,
                           name=stored["name"])
            form = ImportForm(sites=site_qs)
        else:
            del request.session[SESSION_KEY]
            if background:
                return redirect("register:import_job", job.pk)
            messages.success(request, spreadsheet.summary_text(stored["name"], plan.changes))
            return redirect(list_url(site=site.pk))
    elif request.method == "POST":
        form = ImportForm(request.POST, request.FILES, sites=site_qs)
        if form.is_valid():
            upload = form.cleaned_data["file"]
            data = upload.read()
            site = form.cleaned_data["site"]
            try:
                rows = spreadsheet.read_table(upload.name, data)
            except spreadsheet.FileError as exc:
                context["file_error"] = str(exc)
            else:
                plan = spreadsheet.plan_import(site, rows)
                context.update(plan=plan, site=site, name=upload.name,
                               background=spreadsheet.runs_in_background(rows))
                if not plan.errors:
                    request.session[SESSION_KEY] = {
                        "site": site.pk, "name": upload.name,
                        "data": base64.b64encode(data).decode(),
                        "reference": form.cleaned_data["reference"]}
                else:
                    request.session.pop(SESSION_KEY, None)
    else:
        form = ImportForm(sites=site_qs)
    context["form"] = form
    context["status_style"] = {"create": "badge-ok", "change": "badge-soon",
                               "unchanged": "badge-neutral"}
    context["columns"] = spreadsheet.COLUMNS
    context["record_kinds"] = choices.TestKind.values
    return render(request, "register/lead/import.html", context,
                  status=400 if context.get("password_error") else 200)
