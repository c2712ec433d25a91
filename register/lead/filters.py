"""The one filter set for lists of SIFs: the register page, its exports and the API.

Every figure on the plant overview links to this list with the parameters that select
exactly the SIFs behind the figure, so the names below are part of the page's links.
"""

from __future__ import annotations

import django_filters as df
from django.db.models import Case, Exists, IntegerField, OuterRef, Q, Subquery, Value, When

from register import choices
from register.calculations import calculations
from register.days import today
from register.models import (
    Bypass,
    Component,
    Deferral,
    DeviceType,
    PlantUnit,
    SafetyFunction,
    Site,
    TestPlan,
    not_decommissioned,
)
from register.presenters import VERDICT_BADGE, sif_ids_with_repeat_offenders
from register.schedule.due import LATE_STATES, on_time_rate, with_state

PlanState = choices.PlanState
ESCALATED_STATES = [PlanState.ESCALATED, PlanState.ESCALATED_2]
DEMAND_FLAG_TEXT = "Observed demand rate"
ANY = "Any"
#: ``life_stage`` value for every SIF that is not decommissioned (the overview's SIFs).
CURRENT = "current"


def _yes_no():
    from django import forms

    return forms.Select(choices=[("", ANY), ("true", "Yes"), ("false", "No")])


def _plans_of_row():
    """The SIF's plans with their state for today (read time, ``schedule.due``)."""
    return with_state(TestPlan.objects.filter(sif_id=OuterRef("pk")))


def _rank():
    return Case(*[When(state=state, then=Value(rank))
                  for state, rank in choices.PLAN_STATE_RANK.items()],
                default=Value(0), output_field=IntegerField())


def _latest(field: str):
    # the one row flagged latest per SIF (partial unique index calcs_assess_one_latest):
    # an index probe per row, whatever the length of the history
    newest = calculations().Assessment.objects.filter(sif_id=OuterRef("pk"), latest=True)
    return Subquery(newest.values(field)[:1])


def annotate_register(qs):
    """Columns of the register list, as subqueries: one SQL query for a whole page."""
    plans = _plans_of_row()
    return qs.annotate(
        latest_id=_latest("id"),
        latest_meets=_latest("meets_target"),
        latest_design=_latest("design_pfd_avg"),
        latest_achieved=_latest("achieved_pfd_avg"),
        latest_projected=_latest("projected_pfd_avg"),
        latest_target=_latest("target_pfd_avg"),
        next_due=Subquery(plans.filter(next_due_on__isnull=False).order_by("next_due_on")
                          .values("next_due_on")[:1]),
        worst_state=Subquery(plans.annotate(rank=_rank()).order_by("-rank")
                             .values("state")[:1]),
        has_late=Exists(plans.filter(state__in=LATE_STATES)),
        has_escalated=Exists(plans.filter(state__in=ESCALATED_STATES)),
        has_due_soon=Exists(plans.filter(state=PlanState.DUE_SOON)),
        open_bypass=Exists(Bypass.objects.filter(sif_id=OuterRef("pk"), ended_at__isnull=True)),
    ).select_related("unit__site")


class SifFilter(df.FilterSet):
    # Yes / No / Any (no filter) for the boolean filters.
    q = df.CharFilter(method="search", label="SIF or component tag")
    site = df.ModelChoiceFilter(field_name="unit__site", queryset=Site.objects.none(),
                                label="Site", empty_label=ANY)
    unit = df.ModelChoiceFilter(queryset=PlantUnit.objects.none(), empty_label=ANY)
    target_sil = df.ChoiceFilter(label="Target SIL", empty_label=ANY, choices=[(i, f"SIL {i}") for i in (1, 2, 3, 4)])
    life_stage = df.ChoiceFilter(empty_label=ANY, method="by_life_stage", choices=[
        (CURRENT, "In design or in service"), *choices.LifeStage.choices])
    meets = df.ChoiceFilter(label="Verdict (latest calculation)", empty_label=ANY,
                            method="filter_meets", choices=[
                                ("yes", VERDICT_BADGE[True].label.capitalize()),
                                ("no", VERDICT_BADGE[False].label.capitalize()),
                                ("unknown", VERDICT_BADGE[None].label.capitalize()
                                 + " (or not calculated)")])
    repeat_offender = df.BooleanFilter(
        widget=_yes_no(), method="by_repeat_offender",
        label="Repeat offender (a component far above its type)")
    device_type = df.ModelChoiceFilter(queryset=DeviceType.objects.all(), method="by_type",
                                       field_name="subsystems__components__device_type",
                                       label="Device type", empty_label=ANY)
    plan_state = df.ChoiceFilter(label="Test state", method="by_plan_state", empty_label=ANY,
                                 choices=[
        ("due_soon", "Due soon"), ("overdue", "Overdue or escalated"),
        ("escalated", "Escalated")])
    overdue = df.BooleanFilter(widget=_yes_no(), label="Overdue test", method="by_overdue")
    open_bypass = df.BooleanFilter(widget=_yes_no(), label="Open bypass", method="by_bypass")
    pending_deferral = df.BooleanFilter(widget=_yes_no(),
                                        label="Deferral awaiting decision",
                                        method="by_deferral")
    demand_flag = df.BooleanFilter(widget=_yes_no(),
                                   label="Demands more frequent than LOPA assumed",
                                   method="by_demand_flag")
    late_12m = df.BooleanFilter(widget=_yes_no(),
                                label="A test done late or missed in the last 12 months",
                                method="by_late_12m")
    sort = df.OrderingFilter(fields=(
        ("tag", "tag"), ("unit__code", "unit"), ("target_sil", "sil"),
        ("latest_achieved", "achieved"), ("latest_design", "design"),
        ("next_due", "due"),
    ), field_labels={"tag": "Tag", "unit__code": "Unit", "target_sil": "Required SIL",
                     "latest_achieved": "Achieved PFDavg", "latest_design": "Design PFDavg",
                     "next_due": "Next due date"}, label="Sort by", empty_label="Unit and tag")

    class Meta:
        model = SafetyFunction
        fields = ("q", "site", "unit", "target_sil", "life_stage",)

    def __init__(self, data=None, queryset=None, *, request=None, prefix=None):
        user = request.user if request else None
        if queryset is None:
            queryset = SafetyFunction.objects.restrict(user)
        super().__init__(data, queryset, request=request, prefix=prefix)
        self.filters["site"].queryset = Site.objects.restrict(user)
        self.filters["unit"].queryset = PlantUnit.objects.restrict(user).select_related("site")

    @property
    def qs(self):
        if not hasattr(self, "_qs"):
            base = annotate_register(self.queryset.all())
            self.queryset = base
            qs = super().qs
            if not getattr(self.form, "cleaned_data", {}).get("sort"):
                qs = qs.order_by("unit__site__name", "unit__code", "tag")
            self._qs = qs
        return self._qs

    def search(self, qs, name, value):
        value = value.strip()
        if not value:
            return qs
        comp = Component.objects.filter(subsystem__sif_id=OuterRef("pk"),
                                        tag__icontains=value)
        return qs.filter(Q(tag__icontains=value) | Q(name__icontains=value) | Exists(comp))

    def filter_meets(self, qs, name, value):
        """The stored verdict of the latest assessment (``meets_target``); a SIF with no
        assessment is "not shown to meet". Decommissioned SIFs are left out."""
        lookup = {"yes": {"latest_meets": True}, "no": {"latest_meets": False},
                  "unknown": {"latest_meets__isnull": True}}.get(value)
        if lookup is None:
            return qs
        return not_decommissioned(qs).filter(**lookup)

    def by_repeat_offender(self, qs, name, value):
        """SIFs (not decommissioned) whose latest assessment flags a component as a repeat
        offender (``detail["rates"]``)."""
        if value is None:
            return qs
        ids = sif_ids_with_repeat_offenders(
            not_decommissioned(self.queryset).filter(latest_id__isnull=False)
            .values("latest_id"))
        return not_decommissioned(qs).filter(pk__in=ids) if value else qs.exclude(pk__in=ids)

    def by_life_stage(self, qs, name, value):
        if not value:
            return qs
        if value == CURRENT:
            return not_decommissioned(qs)
        return qs.filter(life_stage=value)

    def by_type(self, qs, name, value):
        if not value:
            return qs
        return qs.filter(Exists(Component.objects.filter(subsystem__sif_id=OuterRef("pk"),
                                                         device_type=value)))

    def by_plan_state(self, qs, name, value):
        states = {"due_soon": [PlanState.DUE_SOON], "overdue": LATE_STATES,
                  "escalated": ESCALATED_STATES}.get(value)
        if not states:
            return qs
        # the SIFs in service with at least one such plan (as the overview counts them)
        return qs.filter(life_stage=choices.LifeStage.IN_SERVICE).filter(
            Exists(_plans_of_row().filter(state__in=states)))

    def by_overdue(self, qs, name, value):
        exists = Exists(_plans_of_row().filter(state__in=LATE_STATES,
                                               sif__life_stage=choices.LifeStage.IN_SERVICE))
        if value is None:
            return qs
        return qs.filter(exists) if value else qs.exclude(exists)

    def by_bypass(self, qs, name, value):
        if value is None:
            return qs
        return qs.filter(open_bypass=value)

    def by_deferral(self, qs, name, value):
        exists = Exists(Deferral.objects.filter(plan__sif_id=OuterRef("pk"),
                                                status=choices.DeferralStatus.PENDING))
        if value is None:
            return qs
        return qs.filter(exists) if value else qs.exclude(exists)

    def by_demand_flag(self, qs, name, value):
        if value is None:
            return qs
        flagged = calculations().Assessment.objects.filter(pk=OuterRef("latest_id"),
                                            flags__icontains=DEMAND_FLAG_TEXT)
        return qs.filter(Exists(flagged)) if value else qs.exclude(Exists(flagged))

    def by_late_12m(self, qs, name, value):
        if value is None:
            return qs
        plans = TestPlan.objects.filter(sif__in=self.queryset.values("pk"))
        late = on_time_rate(plans, today()).late_sif_ids
        return qs.filter(pk__in=late) if value else qs.exclude(pk__in=late)


def describe(f: SifFilter) -> list[str]:
    """What a filtered list shows, in words, one line per active filter (the list's
    heading, so a figure of the overview and the list it opens say the same thing)."""
    form = f.form
    if not form.is_valid():
        return []
    lines = []
    for name, field in form.fields.items():
        value = form.cleaned_data.get(name)
        if name in ("sort",) or value in (None, "", [], ()):
            continue
        if hasattr(field, "choices") and not hasattr(value, "pk"):
            shown = dict(field.choices).get(value, value)
            if shown in ("true", True):
                shown = "yes"
            elif shown in ("false", False):
                shown = "no"
        else:
            shown = value
        lines.append(f"{field.label}: {shown}")
    return lines
