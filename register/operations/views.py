"""Operations pages, for the desk and the phone: the operations log (open bypasses, open
findings, recent demands, a SIF search), opening, authorising and closing a bypass,
logging a demand or spurious trip, and the findings with their follow-up.

The views read the forms, call the services (``register.services.operations`` for
bypasses and demands, ``register.operations.services`` for findings) and show their
messages; a refused entry is shown again with everything that was typed.
"""

from __future__ import annotations

import datetime as dt

from django.contrib import messages
from django.contrib.auth.decorators import login_required
from django.core.exceptions import PermissionDenied, ValidationError
from django.db.models import Q
from django.http import Http404
from django.shortcuts import get_object_or_404, redirect, render
from django.utils import timezone
from django.views.decorators.http import require_POST

from register import choices, services
from register.models import Bypass, Demand, Finding, SafetyFunction, not_decommissioned
from register.operations import forms as ops_forms
from register.operations import page
from register.operations import services as findings
from register.permissions import Action, can, require

RECENT_DEMAND_DAYS = 90
#: Where the demand form shows the service's messages (None: beside the devices).
DEMAND_ALIASES = {"spurious": "successful", "components_exercised": None,
                  "failed_components": None}
SEARCH_LIMIT = 20


def _errors(exc: ValidationError, form, aliases=None) -> list[str]:
    """Put a service's messages on the form: by field where the form has it (``aliases``
    maps a model's field to the form's), else on the form as a whole, so that no message
    is lost. Messages aliased to None are returned instead (shown where the form wants)."""
    aliases = aliases or {}
    if not hasattr(exc, "error_dict"):
        for m in exc.messages:
            form.add_error(None, m)
        return []
    kept = []
    for key, msgs in exc.message_dict.items():
        if key in aliases and aliases[key] is None:
            kept.extend(msgs)
            continue
        target = aliases.get(key, key)
        for m in msgs:
            form.add_error(target if target in form.fields else None, m)
    return kept


def _sif_for(user, pk) -> SafetyFunction:
    sif = (SafetyFunction.objects.restrict(user).select_related("unit__site", "owner")
           .filter(pk=pk).first())
    if sif is None:
        raise Http404("No such SIF at your sites.")
    return sif


def open_bypasses(user):
    """The bypasses in place now at the user's sites (no end recorded): the same set the
    overview counts as open bypasses."""
    return page.bypasses_with_people(Bypass.objects.restrict(user).filter(
        ended_at__isnull=True))


# ---------------------------------------------------------------------------------------
# The operations log
# ---------------------------------------------------------------------------------------


@login_required
def home(request):
    user, now = request.user, timezone.now()
    rows = [page.bypass_row(b, now) for b in open_bypasses(user).order_by("started_at")]
    rows.sort(key=lambda r: r["obj"].authorised_by_id is not None)  # awaiting first
    open_f = list(page.findings_with_links(findings.open_findings(user)))
    since = now - dt.timedelta(days=RECENT_DEMAND_DAYS)
    demands = [page.demand_row(x) for x in page.demands_with_devices(
        Demand.objects.restrict(user).filter(occurred_at__gte=since)).order_by(
        "-occurred_at")[:50]]
    q = request.GET.get("q", "").strip()
    found = []
    if q:
        found = list(not_decommissioned(SafetyFunction.objects.restrict(user))
                     .filter(Q(tag__icontains=q) | Q(name__icontains=q)
                             | Q(subsystems__components__tag__icontains=q))
                     .select_related("unit__site").distinct().order_by("tag")[:SEARCH_LIMIT])
        for sif in found:
            sif.may_bypass = can(user, Action.MANAGE_BYPASS, sif.unit.site_id)
            sif.may_log = can(user, Action.RECORD_DEMAND, sif.unit.site_id)
    return render(request, "register/operations/home.html", {
        "bypass_rows": rows, "pending": sum(1 for r in rows if not r["obj"].authorised_by_id),
        "finding_rows": [page.finding_row(f, now) for f in open_f[:10]],
        "open_findings": len(open_f), "demand_rows": demands, "recent_days": RECENT_DEMAND_DAYS,
        "q": q, "found": found})


# ---------------------------------------------------------------------------------------
# Bypasses
# ---------------------------------------------------------------------------------------


@login_required
def bypass_new(request, sif_id):
    sif = _sif_for(request.user, sif_id)
    if not can(request.user, Action.MANAGE_BYPASS, sif.unit.site_id):
        raise PermissionDenied("Only technicians and leads of this site open bypasses.")
    site = sif.unit.site
    if request.method != "POST":
        form = ops_forms.BypassForm(sif=sif, initial={
            "started_at": ops_forms.now_input(site), "component": ""})
        return render(request, "register/operations/bypass_new.html",
                      {"sif": sif, "form": form})
    form = ops_forms.BypassForm(request.POST, sif=sif)
    if form.is_valid():
        d = form.cleaned_data
        try:
            bypass = services.open_bypass(
                user=request.user, sif=sif, component=d["component"],
                started_at=d["started_at"], authorised_hours=d["authorised_hours"],
                reason=d["reason"], compensating_measures=d["compensating_measures"],
                measures_effective=d["measures_effective"])
        except ValidationError as exc:
            _errors(exc, form)
        else:
            messages.success(request, f"Bypass of {sif.tag} recorded; it is awaiting "
                                      "authorisation by a lead of the site.")
            return redirect("operations:bypass", bypass.pk)
    return render(request, "register/operations/bypass_new.html",
                  {"sif": sif, "form": form}, status=400)


def _bypass_for(user, pk) -> Bypass:
    return get_object_or_404(page.bypasses_with_people(Bypass.objects.restrict(user)), pk=pk)


def _bypass_page(request, bypass, *, authorise_errors=None, close_form=None, status=200):
    user, now = request.user, timezone.now()
    site = bypass.sif.unit.site
    close_form = close_form or ops_forms.CloseBypassForm(
        sif=bypass.sif, initial={"ended_at": ops_forms.now_input(site)})
    history = list(Bypass.history.filter(id=bypass.pk).select_related("history_user")
                   .order_by("history_date", "history_id"))
    return render(request, "register/operations/bypass.html", {
        "b": page.bypass_row(bypass, now), "sif": bypass.sif, "history": history,
        "may_authorise": (can(user, Action.AUTHORISE_BYPASS, site.pk)
                          and bypass.authorisation == choices.BypassAuthorisation.PENDING),
        "own_request": bypass.requested_by_id == user.pk,
        "may_close": can(user, Action.MANAGE_BYPASS, site.pk) and bypass.ended_at is None,
        "authorise_errors": authorise_errors or [], "close_form": close_form}, status=status)


@login_required
def bypass_detail(request, pk):
    return _bypass_page(request, _bypass_for(request.user, pk))


@login_required
@require_POST
def bypass_authorise(request, pk):
    bypass = _bypass_for(request.user, pk)
    require(request.user, Action.AUTHORISE_BYPASS, bypass.sif.unit.site_id)
    if request.POST.get("confirm") != "yes":
        return _bypass_page(request, bypass, status=400, authorise_errors=[
            "Confirm that you have checked the reason, the compensating measures and the "
            "duration."])
    try:
        services.authorise_bypass(bypass, request.user, request.POST.get("password", ""))
    except ValidationError as exc:
        return _bypass_page(request, _bypass_for(request.user, pk), status=400,
                            authorise_errors=exc.messages)
    messages.success(request, f"Bypass of {bypass.sif.tag} authorised.")
    return redirect("operations:bypass", pk)


@login_required
@require_POST
def bypass_close(request, pk):
    bypass = _bypass_for(request.user, pk)
    require(request.user, Action.MANAGE_BYPASS, bypass.sif.unit.site_id)
    form = ops_forms.CloseBypassForm(request.POST, sif=bypass.sif)
    if form.is_valid():
        try:
            services.close_bypass(bypass, request.user, ended_at=form.cleaned_data["ended_at"])
        except ValidationError as exc:
            _errors(exc, form)
        else:
            messages.success(request, f"Bypass of {bypass.sif.tag} closed.")
            return redirect("operations:bypass", pk)
    return _bypass_page(request, _bypass_for(request.user, pk), close_form=form, status=400)


# ---------------------------------------------------------------------------------------
# Demands and spurious trips
# ---------------------------------------------------------------------------------------


@login_required
def demand_new(request, sif_id):
    sif = _sif_for(request.user, sif_id)
    if not can(request.user, Action.RECORD_DEMAND, sif.unit.site_id):
        raise PermissionDenied("Only technicians and leads of this site record demands.")
    site = sif.unit.site
    if request.method != "POST":
        form = ops_forms.DemandForm(sif=sif, initial={"occurred_at": ops_forms.now_input(site)})
        return render(request, "register/operations/demand_new.html",
                      {"sif": sif, "form": form})
    form = ops_forms.DemandForm(request.POST, sif=sif)
    if form.is_valid():
        d = form.cleaned_data
        try:
            demand = services.record_demand(
                user=request.user, sif=sif, occurred_at=d["occurred_at"],
                successful=d["successful"], spurious=d["spurious"], cause=d["cause"],
                description=d["description"], components_exercised=d["components_exercised"],
                failed_components=d["failed_components"])
        except ValidationError as exc:
            form.device_errors = _errors(exc, form, DEMAND_ALIASES)
        else:
            opened = demand.findings.count()
            what = "Spurious trip" if demand.spurious else "Demand"
            messages.success(request, f"{what} on {sif.tag} recorded." + (
                f" {opened} finding{'s' if opened != 1 else ''} opened for the device"
                f"{'s' if opened != 1 else ''} that failed to act." if opened else ""))
            return redirect(f"{sif.get_absolute_url()}#demands")
    return render(request, "register/operations/demand_new.html",
                  {"sif": sif, "form": form}, status=400)


# ---------------------------------------------------------------------------------------
# Findings
# ---------------------------------------------------------------------------------------


@login_required
def finding_list(request):
    show_all = request.GET.get("show") == "all"
    qs = (Finding.objects.restrict(request.user) if show_all
          else findings.open_findings(request.user))
    rows = list(page.findings_with_links(qs).order_by("found_at", "id")[:500])
    now = timezone.now()
    return render(request, "register/operations/findings.html", {
        "rows": [page.finding_row(f, now) for f in rows], "show_all": show_all})


def _finding_for(user, pk) -> Finding:
    return get_object_or_404(page.findings_with_links(Finding.objects.restrict(user)), pk=pk)


def _finding_page(request, finding, *, form=None, close_form=None, status=200):
    user = request.user
    site = finding.sif.unit.site
    candidates = findings.retest_candidates(finding) if finding.is_open else []
    form = form or ops_forms.FindingForm(finding=finding, initial={
        "owner": str(finding.owner_id or ""), "corrective_action": finding.corrective_action,
        "retest_due_on": finding.retest_due_on})
    close_form = close_form or ops_forms.CloseFindingForm(candidates=candidates)
    history = list(Finding.history.filter(id=finding.pk).select_related("history_user")
                   .order_by("history_date", "history_id"))
    return render(request, "register/operations/finding.html", {
        "f": page.finding_row(finding, timezone.now()), "sif": finding.sif, "form": form,
        "close_form": close_form, "candidates": candidates, "history": history,
        "may_manage": finding.is_open and can(user, Action.MANAGE_FINDING, site.pk),
        "may_close_by_reason": can(user, Action.CLOSE_FINDING_WITHOUT_RETEST, site.pk),
        "retest_kinds": " or ".join(str(choices.TestKind(k).label).lower()
                                    for k in sorted(findings.retest_kinds(finding)))},
        status=status)


@login_required
def finding_detail(request, pk):
    return _finding_page(request, _finding_for(request.user, pk))


@login_required
@require_POST
def finding_update(request, pk):
    finding = _finding_for(request.user, pk)
    require(request.user, Action.MANAGE_FINDING, finding.sif.unit.site_id)
    form = ops_forms.FindingForm(request.POST, finding=finding)
    if form.is_valid():
        d = form.cleaned_data
        try:
            changed = findings.update_finding(
                finding, request.user, owner=d["owner"],
                corrective_action=d["corrective_action"], retest_due_on=d["retest_due_on"])
        except ValidationError as exc:
            _errors(exc, form)
        else:
            messages.success(request, "Finding updated." if changed else "Nothing changed.")
            return redirect("operations:finding", pk)
    return _finding_page(request, _finding_for(request.user, pk), form=form, status=400)


@login_required
@require_POST
def finding_close(request, pk):
    finding = _finding_for(request.user, pk)
    require(request.user, Action.MANAGE_FINDING, finding.sif.unit.site_id)
    candidates = findings.retest_candidates(finding) if finding.is_open else []
    form = ops_forms.CloseFindingForm(request.POST, candidates=candidates)
    if form.is_valid():
        d = form.cleaned_data
        try:
            findings.close_finding(finding, request.user, retest=d["retest"],
                                   reason=d["reason"])
        except ValidationError as exc:
            _errors(exc, form, {"closure_note": "reason"})
        else:
            messages.success(request, "Finding closed.")
            return redirect("operations:finding", pk)
    return _finding_page(request, _finding_for(request.user, pk), close_form=form, status=400)
