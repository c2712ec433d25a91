"""Auditor pages: the change chain check, evidence packs, and a SIF as it stood on a date.

Every view checks the person's rights at the site concerned (``register.permissions``).
Auditors read and export only. The POSTs they may make are asking for an evidence pack
(an export, Action.EXPORT, which writes only the pack request itself) and asking for the
change chain to be verified in full (which writes only the chain's checkpoint); never a
register or test record. All other writes stay refused to auditors by the services.
"""

from __future__ import annotations

import datetime as dt

from django import forms
from django.contrib import messages
from django.contrib.auth.decorators import login_required
from django.core.exceptions import PermissionDenied, ValidationError
from django.http import FileResponse, Http404, JsonResponse
from django.shortcuts import get_object_or_404, redirect, render
from django.utils import timezone
from django.views.decorators.http import require_http_methods

from register import choices
from register.audit.chain import entries_for, verify_chain
from register.audit.evidence import pack_file, pack_request_errors, request_pack
from register.days import end_of_day
from register.days import today as site_today
from register.models import (
    Component,
    EvidencePack,
    PlantUnit,
    SafetyFunction,
    Site,
    Subsystem,
    TestPlan,
)
from register.permissions import Action, can, can_somewhere
from register.schedule.due import compute_statuses


def _export_sites(user):
    return Site.objects.restrict(user, Action.EXPORT).order_by("name")


# ---------------------------------------------------------------------------------------
# Change chain
# ---------------------------------------------------------------------------------------


def record_label(model_label: str) -> str:
    """A chain entry's record kind in plain words ("test record"), not the history
    table's name."""
    from django.apps import apps

    try:
        model = apps.get_model(model_label)
    except (LookupError, ValueError):
        return model_label
    model = getattr(model, "instance_type", model)
    return str(model._meta.verbose_name)


def _chain_reader(user):
    if not can_somewhere(user, Action.VIEW_CHAIN):
        raise PermissionDenied("The change chain is open to auditors and leads.")


@login_required
def chain(request):
    """Verify the chain from where the last check stopped and show the result with the
    newest entries."""
    user = request.user
    _chain_reader(user)
    result = verify_chain(incremental=True)
    recent = entries_for(user)
    for e in recent:
        e.record_label = record_label(e.model_label)
    return render(request, "register/audit/chain.html", {"result": result, "recent": recent})


@login_required
@require_http_methods(["POST"])
def chain_verify_full(request):
    """Recompute the whole chain from its first entry (writes only the checkpoint)."""
    _chain_reader(request.user)
    result = verify_chain(incremental=False)
    if result.ok:
        messages.success(request, f"The whole chain was verified from its first entry: "
                                  f"{result.entries} entries intact.")
    else:
        messages.error(request, f"The whole chain was verified from its first entry: broken at "
                                f"{result.first_break}")
    return redirect("audit:chain")


# ---------------------------------------------------------------------------------------
# Evidence packs
# ---------------------------------------------------------------------------------------


class PackForm(forms.Form):
    scope = forms.ChoiceField(choices=EvidencePack.Scope.choices, initial="site")
    site = forms.ModelChoiceField(queryset=Site.objects.none())
    unit = forms.ModelChoiceField(queryset=PlantUnit.objects.none(), required=False,
                                  help_text="For a unit pack.")
    sif = forms.ModelChoiceField(queryset=SafetyFunction.objects.none(), required=False,
                                 label="SIF", help_text="For a one-SIF pack.")
    period_start = forms.DateField(widget=forms.DateInput(attrs={"type": "date"},
                                                          format="%Y-%m-%d"))
    period_end = forms.DateField(widget=forms.DateInput(attrs={"type": "date"},
                                                        format="%Y-%m-%d"))

    def __init__(self, user, *args, **kwargs):
        super().__init__(*args, **kwargs)
        sites = _export_sites(user)
        self.fields["site"].queryset = sites
        if len(sites) == 1:
            self.fields["site"].initial = sites[0].pk
        self.fields["unit"].queryset = PlantUnit.objects.filter(site__in=sites)
        self.fields["sif"].queryset = SafetyFunction.objects.filter(
            unit__site__in=sites).select_related("unit")
        today = timezone.localdate()
        self.fields["period_end"].initial = today
        self.fields["period_start"].initial = today.replace(year=today.year - 1)

    def clean(self):
        data = super().clean()
        for name, message in pack_request_errors(
                scope=data.get("scope"), site=data.get("site"),
                period_start=data.get("period_start"), period_end=data.get("period_end"),
                unit=data.get("unit"), sif=data.get("sif")).items():
            self.add_error(name, message)
        return data


def _visible_packs(user):
    return EvidencePack.objects.restrict(user, Action.EXPORT).select_related(
        "site", "unit", "sif", "requested_by")


@login_required
@require_http_methods(["GET", "POST"])
def packs(request):
    user = request.user
    if not _export_sites(user).exists():
        raise PermissionDenied("Evidence packs are for auditors, verifiers and leads.")
    form = PackForm(user, request.POST or None)
    if request.method == "POST" and form.is_valid():
        d = form.cleaned_data
        try:
            pack = request_pack(user, scope=d["scope"], site=d["site"], unit=d["unit"],
                                sif=d["sif"], period_start=d["period_start"],
                                period_end=d["period_end"])
        except ValidationError as exc:
            for name, msgs in exc.message_dict.items():
                form.add_error(name if name in form.fields else None, msgs)
        else:
            pack.refresh_from_db(fields=["status"])
            messages.success(request, "The pack is ready." if pack.status == EvidencePack.Status.DONE else (
                "The pack was asked for; this page shows its progress. You can leave it and "
                "come back: the pack stays listed under evidence packs."))
            return redirect("audit:pack_detail", pack.pk)
    rows = _visible_packs(user)[:100]
    return render(request, "register/audit/packs.html", {"form": form, "rows": rows})


def _pack_for(user, pk) -> EvidencePack:
    pack = get_object_or_404(EvidencePack.objects.select_related(
        "site", "unit", "sif", "requested_by"), pk=pk)
    if not can(user, Action.EXPORT, pack.site_id):
        raise PermissionDenied("You may not see packs of this site.")
    return pack


@login_required
def pack_detail(request, pk):
    pack = _pack_for(request.user, pk)
    return render(request, "register/audit/pack_detail.html", {"pack": pack})


@login_required
def pack_status(request, pk):
    pack = _pack_for(request.user, pk)
    return JsonResponse({"id": pack.pk, "status": pack.status, "progress": pack.progress,
                         "stage": pack.stage, "error": pack.error,
                         "finished": pack.is_finished})


@login_required
def pack_download(request, pk):
    pack = _pack_for(request.user, pk)
    path = pack_file(pack)
    if path is None:
        raise Http404("The pack is not ready, or its file is missing.")
    name = f"evidence-pack-{pack.pk}-{pack.site.code}-{pack.period_start}-{pack.period_end}.zip"
    return FileResponse(path.open("rb"), as_attachment=True, filename=name,
                        content_type="application/zip")


# ---------------------------------------------------------------------------------------
# A SIF as it stood on a date
# ---------------------------------------------------------------------------------------


def sif_as_of_data(sif: SafetyFunction, day: dt.date) -> dict:
    """The SIF, its hardware, test states and PFDavg as they stood at the end of ``day``."""
    from register.calculations import calculations

    end = end_of_day(day, sif.unit.site)
    # The newest history row on or before the date (a deleted SIF shows as "-").
    then = (SafetyFunction.history.filter(id=sif.pk, history_date__lte=end)
            .order_by("-history_date", "-history_id").first())
    if then is not None and then.history_type == "-":
        then = None
    subs = list(Subsystem.history.as_of(end).filter(sif_id=sif.pk).order_by("position", "id"))
    comps = list(Component.history.as_of(end).filter(
        subsystem_id__in=[s.pk for s in subs]).order_by("tag"))
    # The plans recorded by then, as they stood (interval of the version in force then).
    then_plans = {p.id: p for p in TestPlan.history.as_of(end).filter(sif_id=sif.pk)}
    plans = TestPlan.objects.filter(pk__in=then_plans)
    statuses = [{"plan": then_plans[pid], "status": st, "badge": choices.plan_state_badge(st.state)}
                for pid, st in sorted(compute_statuses(plans, day).items(),
                                      key=lambda kv: then_plans[kv[0]].name)]
    stored = calculations().Assessment.objects.filter(sif=sif, as_of__lte=end).order_by("-as_of", "-id").first()
    computed, computed_error = None, ""
    try:
        d = calculations().load(SafetyFunction.objects.filter(pk=sif.pk))[0]
        _cut(d, end)
        _as_recorded(d, then, subs, comps, then_plans)
        stats = calculations().device_type_stats(sif.unit.site_id, day)
        computed = calculations().assess(d, end, calculations().rate_table(sif.unit.site, stats, as_of=day), stats,
                                  trigger="as-of view (not stored)")
        if computed.error:
            computed_error = computed.error
    except (calculations().EngineError, IndexError, ValueError) as exc:
        computed_error = str(exc)
    return {"then": then, "subsystems": subs, "components": comps, "statuses": statuses,
            "stored": stored, "computed": computed, "computed_error": computed_error,
            "end": end}


def _copy_fields(target, historical) -> None:
    for f in type(target)._meta.concrete_fields:
        if f.primary_key or f.name in ("next_due_on", "due_soon_on", "escalated_on",
                                       "escalated_2_on", "next_change_on"):
            continue
        if hasattr(historical, f.attname):
            setattr(target, f.attname, getattr(historical, f.attname))


def _as_recorded(d, then, subs, comps, plans) -> None:
    """Give the loaded SIF the design data it had on the date (in memory only): the SIF's,
    its subsystems', components' and plans' values from their history rows."""
    if then is not None:
        _copy_fields(d.sif, then)
    by_id = {s.pk: s for s in subs}
    d.subsystems = [s for s in d.subsystems if s.pk in by_id]
    for s in d.subsystems:
        _copy_fields(s, by_id[s.pk])
    comp_by_id = {c.pk: c for c in comps}
    for sub_id in list(d.components):
        if sub_id not in by_id:
            del d.components[sub_id]
            continue
        d.components[sub_id] = [c for c in d.components[sub_id] if c.obj.pk in comp_by_id]
        for c in d.components[sub_id]:
            _copy_fields(c.obj, comp_by_id[c.obj.pk])
    d.plans = [p for p in d.plans if p.pk in plans]
    for p in d.plans:
        _copy_fields(p, plans[p.pk])


def _cut(d, end):
    """Drop from loaded data everything recorded after ``end`` (in memory only)."""
    for cd in d.all_components():
        cd.events = [e for e in cd.events if e.at <= end]
    d.bypasses = [b for b in d.bypasses if b.started_at <= end]
    for b in d.bypasses:
        if b.ended_at and b.ended_at > end:
            b.ended_at = None
    d.demands = [x for x in d.demands if x.occurred_at <= end]
    for sub_id, comps in list(d.components.items()):
        d.components[sub_id] = [c for c in comps if c.obj.in_service_on <= end.date()]


@login_required
def sif_as_of(request, pk):
    sif = get_object_or_404(SafetyFunction.objects.select_related("unit__site"), pk=pk)
    if not can(request.user, Action.VIEW, sif.unit.site_id):
        raise PermissionDenied("You have no role at this SIF's site.")
    raw = request.GET.get("date", "")
    day, error = None, ""
    if raw:
        try:
            day = dt.date.fromisoformat(raw)
        except ValueError:
            error = "Give the date as YYYY-MM-DD."
        else:
            if day > site_today(sif.unit.site):
                day, error = None, "The date is in the future."
    ctx = {"sif": sif, "date": raw, "error": error, "day": day}
    if day:
        ctx.update(sif_as_of_data(sif, day))
    return render(request, "register/audit/sif_as_of.html", ctx)
