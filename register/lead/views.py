"""Read pages of the register: plant overview, SIF list (with exports), SIF page, charts."""

from __future__ import annotations

import datetime as dt
from collections import defaultdict
from dataclasses import dataclass
from urllib.parse import urlencode

from django.contrib.auth.decorators import login_required
from django.core.paginator import Paginator
from django.db.models import BooleanField, Exists, ExpressionWrapper, OuterRef
from django.http import (
    FileResponse,
    Http404,
    HttpResponse,
    HttpResponseBadRequest,
    StreamingHttpResponse,
)
from django.shortcuts import get_object_or_404, render
from django.urls import reverse
from django.utils import timezone

from register import changes as changes_mod
from register import charts, choices, presenters
from register.calculations import calculations
from register.days import today as site_today
from register.lead import export
from register.lead.filters import DEMAND_FLAG_TEXT, ESCALATED_STATES, SifFilter, describe
from register.models import (
    Bypass,
    Component,
    Deferral,
    Demand,
    PlantUnit,
    SafetyFunction,
    Site,
    Subsystem,
    TestPlan,
    TestRecord,
    in_force,
    not_decommissioned,
)
from register.operations.page import sif_operations
from register.people import person_name
from register.permissions import Action, can, can_somewhere, require
from register.schedule.due import (
    LATE_STATES,
    on_time_rate,
    with_state,
)
from register.schedule.services import projected_effect

PlanState = choices.PlanState
PAGE_SIZE = 50


def list_url(**params) -> str:
    """Link to the register list filtered by ``params`` (the overview's links)."""
    clean = {k: v for k, v in params.items() if v not in (None, "")}
    return reverse("register:sif_list") + ("?" + urlencode(clean) if clean else "")


# ---------------------------------------------------------------------------------------
# Plant overview
# ---------------------------------------------------------------------------------------


@dataclass
class UnitRow:
    unit: PlantUnit | None
    site: Site
    sifs: int = 0
    meets: int = 0
    fails: int = 0
    unknown: int = 0
    due_soon: int = 0
    due_soon_days: int | None = None  # days until the nearest
    overdue: int = 0
    overdue_days: int = 0  # oldest, days past due
    escalated: int = 0
    escalated_days: int = 0
    bypasses: int = 0
    bypass_hours: float = 0.0  # longest open, hours
    deferrals: int = 0
    deferral_days: int = 0  # oldest request, days waiting
    demand_flags: int = 0
    repeat_offenders: int = 0  # components flagged in the latest assessments
    repeat_sifs: int = 0  # SIFs with at least one of them
    on_time_due: int = 0
    on_time_ok: int = 0

    @property
    def on_time_rate(self):
        return self.on_time_ok / self.on_time_due if self.on_time_due else None

    def link(self, **extra):
        base = {"unit": self.unit.pk} if self.unit else {"site": self.site.pk}
        return list_url(**base, **extra)

    def add(self, other: UnitRow):
        for name in ("sifs", "meets", "fails", "unknown", "due_soon", "overdue", "escalated",
                     "bypasses", "deferrals", "demand_flags", "repeat_offenders",
                     "repeat_sifs", "on_time_due", "on_time_ok"):
            setattr(self, name, getattr(self, name) + getattr(other, name))
        for name in ("overdue_days", "escalated_days", "bypass_hours", "deferral_days"):
            setattr(self, name, max(getattr(self, name), getattr(other, name)))
        if other.due_soon_days is not None:
            self.due_soon_days = min(x for x in (self.due_soon_days, other.due_soon_days)
                                     if x is not None)


def plant_overview(user, today: dt.date):
    now = timezone.now()
    units = list(PlantUnit.objects.restrict(user).select_related("site"))
    rows = {u.pk: UnitRow(u, u.site) for u in units}
    in_view = not_decommissioned(SafetyFunction.objects.restrict(user))
    sifs = list(in_view.values_list("pk", "unit_id"))
    # The newest assessment of each SIF as values, with only the part of its detail the
    # overview reads (the rates, for repeat offenders): decoding every detail whole and
    # building 5,000 model instances was a third of the page.
    latest = {sif_id: (meets, flags, rates) for sif_id, meets, flags, rates in
              calculations().Assessment.objects.latest_of(in_view.values("pk"))
              .values_list("sif_id", "meets_target", "flags", "detail__rates")}
    for sif_id, unit_id in sifs:
        row = rows[unit_id]
        row.sifs += 1
        meets, flags, rates = latest.get(sif_id, (None, [], None))
        # meets: the stored verdict, never recomputed here
        if meets is None:
            row.unknown += 1
        elif meets:
            row.meets += 1
        else:
            row.fails += 1
        if any(DEMAND_FLAG_TEXT in f for f in flags or []):
            row.demand_flags += 1
        offenders = presenters.repeat_offenders({"rates": rates})
        row.repeat_offenders += len(offenders)
        row.repeat_sifs += bool(offenders)
    plans = TestPlan.objects.restrict(user).filter(sif__life_stage=choices.LifeStage.IN_SERVICE)
    # SIFs are counted (once each, whatever the number of their plans), as the lists the
    # figures open count them: due soon, overdue (escalated included), escalated.
    per_sif: dict[int, list] = defaultdict(list)
    for sif_id, unit_id, state, due in with_state(plans).values_list(
            "sif_id", "sif__unit_id", "state", "next_due_on"):
        per_sif[sif_id].append((unit_id, state, due))
    for entries in per_sif.values():
        row = rows[entries[0][0]]
        soon = [due for _, state, due in entries if state == PlanState.DUE_SOON and due]
        late = [due for _, state, due in entries if state in LATE_STATES and due]
        escalated = [due for _, state, due in entries if state in ESCALATED_STATES and due]
        if soon:
            row.due_soon += 1
            left = min((due - today).days for due in soon)
            row.due_soon_days = left if row.due_soon_days is None else min(
                row.due_soon_days, left)
        if late:
            row.overdue += 1
            row.overdue_days = max(row.overdue_days, max((today - d).days for d in late))
        if escalated:
            row.escalated += 1
            row.escalated_days = max(row.escalated_days,
                                     max((today - d).days for d in escalated))
    for b in Bypass.objects.restrict(user).filter(ended_at__isnull=True).select_related("sif"):
        row = rows[b.sif.unit_id]
        row.bypasses += 1
        row.bypass_hours = max(row.bypass_hours, b.duration_hours(now))
    for unit_id, asked in Deferral.objects.restrict(user).filter(
            status=choices.DeferralStatus.PENDING).values_list("plan__sif__unit_id",
                                                               "requested_at"):
        rows[unit_id].deferrals += 1
        rows[unit_id].deferral_days = max(rows[unit_id].deferral_days, (now - asked).days)
    rate = on_time_rate(plans, today)
    plan_unit = dict(plans.values_list("pk", "sif__unit_id"))
    for plan_id, (due_n, ok_n) in rate.per_plan.items():
        rows[plan_unit[plan_id]].on_time_due += due_n
        rows[plan_unit[plan_id]].on_time_ok += ok_n

    sites = []
    for site in Site.objects.restrict(user):
        site_rows = [r for r in rows.values() if r.site.pk == site.pk]
        total = UnitRow(None, site)
        for r in site_rows:
            total.add(r)
        stats = calculations().device_type_stats(site.pk, today)
        types = sorted((ts for ts in stats.values() if ts.stats.exceeds_assumed),
                       key=lambda ts: ts.device_type.name)
        sites.append({"site": site, "rows": site_rows, "total": total, "types": [
            {"type": ts.device_type, "stats": ts.stats,
             "link": list_url(site=site.pk, device_type=ts.device_type.pk)}
            for ts in types]})
    return sites


@login_required
def home(request):
    today = timezone.localdate()
    return render(request, "register/lead/home.html", {
        "sites": plant_overview(request.user, today), "today": today})


# ---------------------------------------------------------------------------------------
# Register list and exports
# ---------------------------------------------------------------------------------------


_state_badge = choices.plan_state_badge


@login_required
def sif_list(request):
    f = SifFilter(request.GET, request=request)
    qs = f.qs
    page = Paginator(qs, PAGE_SIZE).get_page(request.GET.get("page"))
    for sif in page.object_list:
        sif.state_badge = _state_badge(sif.worst_state)
        sif.verdict_badge = presenters.verdict_badge(sif.latest_meets)
    params = request.GET.copy()
    params.pop("page", None)
    export_sites = [s for s in Site.objects.restrict(request.user)
                    if can(request.user, Action.EXPORT, s.pk)]
    return render(request, "register/lead/sif_list.html", {
        "filter": f, "page": page, "query": params.urlencode(), "showing": describe(f),
        "can_export": bool(export_sites),
        "can_import": any(can(request.user, Action.EDIT_REGISTER, s.pk)
                          for s in Site.objects.restrict(request.user)),
    })


def _export_filter(request, fmt):
    """The list's filter (``SifFilter``, the one filter rule) over the SIFs the user may
    export (the gate's ``EXPORT`` right); 403 without that right anywhere, 404 for an
    unknown format, 400 for filter values the form refuses (nothing is exported)."""
    if fmt not in ("csv", "xlsx"):
        raise Http404
    from register.lead.export_jobs import export_filter

    if not can_somewhere(request.user, Action.EXPORT):
        require(request.user, Action.EXPORT, -1)
    f = export_filter(request.user, request.GET)
    if not f.form.is_valid():
        return f, HttpResponseBadRequest(
            "The list's filters are not valid: " + f.form.errors.as_text(),
            content_type="text/plain; charset=utf-8")
    return f, None


def _file_response(fmt, name, csv_chunks=None, xlsx=None):
    from register.lead.export_jobs import file_name

    filename = file_name(name, fmt, timezone.localdate())
    if fmt == "csv":
        resp = StreamingHttpResponse(csv_chunks(), content_type=export.CSV_TYPE)
        resp["Content-Disposition"] = f'attachment; filename="{filename}"'
        return resp
    return FileResponse(xlsx(), as_attachment=True, filename=filename,
                        content_type=export.XLSX_TYPE)


def _export(request, fmt, kind):
    """An export of the list's SIFs: streamed, or above EXPORT_BACKGROUND_SIFS a page that
    offers a background job (its POST starts one: ``register.lead.export_jobs``)."""
    from register.lead import export_jobs

    f, refused = _export_filter(request, fmt)
    if refused:
        return refused
    if request.method == "POST":
        return export_jobs.start(request, kind, fmt)
    if export_jobs.in_background(f):
        return export_jobs.offer(request, f, kind, fmt)
    return _file_response(fmt, kind, *export_jobs.writers(kind, f))


@login_required
def sif_export(request, fmt):
    """The register table of the listed SIFs in the import's format (round trip)."""
    return _export(request, fmt, "register")


@login_required
def sif_list_export(request, fmt):
    """The register list as the page shows it, for people to read (same filter, order)."""
    return _export(request, fmt, "list")


# ---------------------------------------------------------------------------------------
# SIF page
# ---------------------------------------------------------------------------------------


def _history(sif: SafetyFunction, sub_ids, comp_ids, limit=60):
    """Change history of the SIF and its hardware and plans, newest first, with the diff."""
    sources = [
        ("SIF", SafetyFunction.history.filter(id=sif.pk)),
        ("Subsystem", Subsystem.history.filter(sif_id=sif.pk)),
        ("Component", Component.history.filter(id__in=comp_ids)),
        ("Test plan", TestPlan.history.filter(sif_id=sif.pk)),
    ]
    entries = []
    for label, qs in sources:
        records = list(qs.select_related("history_user").order_by("id", "history_date",
                                                                    "history_id"))
        previous = {}
        for rec in records:
            row = changes_mod.row_of(rec)
            prev = previous.get(rec.id)
            changes = changes_mod.field_changes(prev, row) if prev is not None else []
            previous[rec.id] = row
            name = getattr(rec, "tag", None) or getattr(rec, "name", "")
            entries.append({"when": rec.history_date, "what": f"{label} {name}",
                            "kind": rec.get_history_type_display(),
                            "who": person_name(rec.history_user, "—"), "reason": rec.history_change_reason or "",
                            "changes": changes})
    entries.sort(key=lambda e: e["when"], reverse=True)
    return entries[:limit]


@login_required
def sif_detail(request, pk):
    sif = get_object_or_404(SafetyFunction.objects.restrict(request.user)
                            .select_related("unit__site", "owner"), pk=pk)
    site_id = sif.unit.site_id
    now = timezone.now()
    today = site_today(sif.unit.site)
    d = calculations().load(SafetyFunction.objects.filter(pk=sif.pk))[0]
    lopa, lopa_error = None, ""
    if d.scenarios:
        try:
            lopa = calculations().lopa_for_scenarios(d.scenarios)
        except calculations().EngineError as exc:
            lopa_error = str(exc)
    design, design_error = None, ""
    try:
        design = calculations().evaluate_design(d)
    except calculations().EngineError as exc:
        design_error = str(exc)
    subsystems = []
    sub_results = {r.name: r for r in design.subsystems} if design else {}
    for sub in d.subsystems:
        full, partial = calculations().plan_intervals(d, sub)
        subsystems.append({"obj": sub, "components": [c.obj for c in d.components[sub.pk]],
                           "full_months": round(full / calculations().HOURS_PER_MONTH, 1) if full else None,
                           "partial_months": round(partial / calculations().HOURS_PER_MONTH, 1) if partial else None,
                           "result": sub_results.get(sub.name)})
    assessment = calculations().latest_assessments([sif.pk]).get(sif.pk)
    target = calculations().target_pfd(d)
    band = calculations().sil_band(sif.target_sil) if sif.target_sil else None

    records = (TestRecord.objects.filter(sif=sif).exclude(status=choices.RecordStatus.DRAFT)
               .annotate(counts=ExpressionWrapper(in_force(), output_field=BooleanField()),
                         is_superseded=Exists(TestRecord.objects.filter(
                             supersedes_id=OuterRef("pk"))))
               .select_related("plan").order_by("-performed_at"))
    may_decide = can(request.user, Action.DECIDE_DEFERRAL, site_id)
    deferrals = []
    for df_ in Deferral.objects.filter(plan__sif=sif).select_related(
            "plan", "requested_by", "decided_by"):
        item = {"obj": df_}
        if df_.status == choices.DeferralStatus.PENDING and may_decide:
            item["projection"] = projected_effect(df_.plan, df_.proposed_on, as_of=now)
        deferrals.append(item)
    plans = []
    from register.schedule.due import compute_statuses

    statuses = compute_statuses(TestPlan.objects.filter(sif=sif), today)
    for plan in d.plans:
        st = statuses.get(plan.pk)
        plans.append({"obj": plan, "status": st, "badge": _state_badge(st.state if st else None)})
    comp_ids = [c.obj.pk for c in d.all_components()]
    return render(request, "register/lead/sif_detail.html", {
        "sif": sif, "lopa": lopa, "lopa_error": lopa_error, "design": design,
        "design_error": design_error, "subsystems": subsystems, "assessment": assessment,
        "verdict": presenters.assessment_view(assessment),
        "target": target, "band": band, "records": records,
        **sif_operations(request.user, sif, d, now),
        "deferrals": deferrals, "plans": plans,
        "history": _history(sif, [s.pk for s in d.subsystems], comp_ids),
        "can_edit": can(request.user, Action.EDIT_REGISTER, site_id),
        "may_decide": may_decide,
    })


@login_required
def sif_chart(request, pk, which):
    sif = get_object_or_404(SafetyFunction.objects.restrict(request.user)
                            .select_related("unit__site"), pk=pk)
    if which not in ("pfd", "trend"):
        raise Http404
    latest = calculations().latest_assessments([sif.pk]).get(sif.pk)

    def draw():
        d = calculations().load(SafetyFunction.objects.filter(pk=sif.pk))[0]
        target = calculations().target_pfd(d)
        if which == "pfd":
            end = timezone.now()
            start = end - dt.timedelta(days=5 * 365)
            try:
                times, values = calculations().pfd_series_for(sif, start, end, points=400)
            except calculations().EngineError:
                times, values = [], []
            episodes = presenters.observed_episodes(latest.detail if latest else None)
            return charts.pfd_chart(times, values, target, sif.tag, episodes=episodes)
        points = calculations().Assessment.objects.trend_points(sif.pk, 500)
        return charts.trend_chart(points, target, sif.tag)

    # The PFD(t) window ends today; the trend grows with every stored assessment.
    svg = charts.cached_chart(which, latest.inputs_digest if latest else None, draw,
                              charts.CHART_SIZE, sif.tag,
                              timezone.now().date() if which == "pfd" else getattr(
                                  latest, "pk", None))
    resp = HttpResponse(svg, content_type="image/svg+xml")
    resp["Cache-Control"] = "private, max-age=60"
    return resp


@login_required
def test_detail(request, pk):
    record = get_object_or_404(TestRecord.objects.restrict(request.user).select_related(
        "sif", "plan"), pk=pk)
    results = record.results.select_related("component")
    return render(request, "register/lead/test_detail.html", {"record": record,
                                                          "results": results})


__all__ = [
    "Demand",
    "home",
    "sif_chart",
    "sif_detail",
    "sif_export",
    "sif_list",
    "sif_list_export",
    "test_detail",
]
