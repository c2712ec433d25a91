"""Filters of the API lists. SIFs use the register's own filter set (``register.lead.filters``)."""

from __future__ import annotations

import django_filters as df

from register import choices
from register.calculations import calculations
from register.models import (
    Bypass,
    Component,
    Deferral,
    Demand,
    HazardScenario,
    Notification,
    PlantUnit,
    Subsystem,
    TestPlan,
    TestRecord,
    in_force,
)


class UnitFilter(df.FilterSet):
    class Meta:
        model = PlantUnit
        fields = {"site": ["exact"], "code": ["exact"]}


class ScenarioFilter(df.FilterSet):
    class Meta:
        model = HazardScenario
        fields = {"site": ["exact"], "unit": ["exact"], "category": ["exact"],
                  "reference": ["exact"]}


class SubsystemFilter(df.FilterSet):
    class Meta:
        model = Subsystem
        fields = {"sif": ["exact"], "role": ["exact"]}


class ComponentFilter(df.FilterSet):
    sif = df.NumberFilter(field_name="subsystem__sif")
    tag = df.CharFilter(field_name="tag", lookup_expr="icontains")

    class Meta:
        model = Component
        fields = ["subsystem", "device_type", "data_basis"]


class TestPlanFilter(df.FilterSet):
    __test__ = False
    state = df.ChoiceFilter(field_name="state", choices=choices.PlanState.choices,
                            label="State today (derived when read)")

    class Meta:
        model = TestPlan
        fields = {"sif": ["exact"], "kind": ["exact"], "next_due_on": ["lte", "gte"]}


class TestRecordFilter(df.FilterSet):
    __test__ = False
    site = df.NumberFilter(field_name="sif__unit__site")
    performed_after = df.IsoDateTimeFilter(field_name="performed_at", lookup_expr="gte")
    performed_before = df.IsoDateTimeFilter(field_name="performed_at", lookup_expr="lt")
    current = df.BooleanFilter(method="filter_current",
                               label="In force: signed and not replaced by a correction in "
                                     "effect")
    client_key = df.CharFilter()

    class Meta:
        model = TestRecord
        fields = ["sif", "plan", "kind", "status", "performed_by"]

    def filter_current(self, queryset, name, value):
        return queryset.filter(in_force()) if value else queryset.exclude(in_force())


class DemandFilter(df.FilterSet):
    occurred_after = df.IsoDateTimeFilter(field_name="occurred_at", lookup_expr="gte")
    occurred_before = df.IsoDateTimeFilter(field_name="occurred_at", lookup_expr="lt")

    class Meta:
        model = Demand
        fields = ["sif", "successful", "spurious"]


class BypassFilter(df.FilterSet):
    open = df.BooleanFilter(field_name="ended_at", lookup_expr="isnull", label="Still open")
    state = df.ChoiceFilter(field_name="state", choices=choices.BypassState.choices,
                            label="State now (derived when read)")

    class Meta:
        model = Bypass
        fields = ["sif", "component"]


class DeferralFilter(df.FilterSet):
    sif = df.NumberFilter(field_name="plan__sif")

    class Meta:
        model = Deferral
        fields = ["plan", "status"]


class AssessmentFilter(df.FilterSet):
    computed_after = df.IsoDateTimeFilter(field_name="computed_at", lookup_expr="gte")

    class Meta:
        model = calculations().Assessment
        fields = ["sif", "meets_target"]


class NotificationFilter(df.FilterSet):
    unread = df.BooleanFilter(field_name="read_at", lookup_expr="isnull")
    kind = df.ChoiceFilter(choices=choices.NotificationKind.choices)

    class Meta:
        model = Notification
        fields = ["site", "kind"]
