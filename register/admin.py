"""Django admin: set up sites, units, people and the device library; read the rest.

Everything that moves a figure (design data, plans, test records, demands, bypasses,
deferrals) is changed only through the register's pages and services, which record a
reason and a change reference, validate, and recompute; the admin shows those records
read-only with their change history.
"""

from django.contrib import admin
from simple_history.admin import SimpleHistoryAdmin

from register import models as m
from register.permissions import Action, restrict


class SiteScopedAdmin:
    """A staff member who is not a superuser sees only the rows of the sites where they
    hold a role (the one gate, ``register.permissions.restrict``)."""

    admin_action = Action.VIEW

    def get_queryset(self, request):
        qs = super().get_queryset(request)
        if hasattr(qs.model, "site_path"):
            return restrict(qs, request.user, self.admin_action)
        return qs


class HistoryAdmin(SiteScopedAdmin, SimpleHistoryAdmin):
    """Every register model keeps a change history, viewable from its admin page."""


class ReadOnlyMixin:
    """View and history only: writes go through register.services."""

    def has_add_permission(self, request, obj=None):
        return False

    def has_change_permission(self, request, obj=None):
        return False

    def has_delete_permission(self, request, obj=None):
        return False


class ReadOnlyAdmin(ReadOnlyMixin, HistoryAdmin):
    pass


class ReadOnlyInline(ReadOnlyMixin, admin.TabularInline):
    extra = 0


@admin.register(m.Site)
class SiteAdmin(HistoryAdmin):
    list_display = ("code", "name", "due_soon_days", "escalate_share", "rate_basis")
    search_fields = ("code", "name")


@admin.register(m.PlantUnit)
class PlantUnitAdmin(HistoryAdmin):
    list_display = ("code", "name", "site")
    list_filter = ("site",)
    search_fields = ("code", "name")


@admin.register(m.Membership)
class MembershipAdmin(HistoryAdmin):
    list_display = ("user", "site", "role")
    list_filter = ("site", "role")
    search_fields = ("user__username", "user__first_name", "user__last_name")


@admin.register(m.DeviceType)
class DeviceTypeAdmin(HistoryAdmin):
    list_display = ("name", "role", "lambda_du_per_hour", "lambda_dd_per_hour",
                    "device_class", "systematic_capability", "source")
    list_filter = ("role", "device_class")
    search_fields = ("name", "source")


class CauseInline(ReadOnlyInline):
    model = m.InitiatingCause
    extra = 0


class LayerInline(ReadOnlyInline):
    model = m.ProtectionLayer
    extra = 0


class ModifierInline(ReadOnlyInline):
    model = m.ConditionalModifier
    extra = 0


@admin.register(m.HazardScenario)
class HazardScenarioAdmin(ReadOnlyAdmin):
    list_display = ("reference", "title", "site", "unit", "category",
                    "tolerable_frequency_per_year")
    list_filter = ("site", "unit", "category")
    search_fields = ("reference", "title", "consequence")
    inlines = [CauseInline, LayerInline, ModifierInline]


class SubsystemInline(ReadOnlyInline):
    model = m.Subsystem
    extra = 0
    show_change_link = True


class PlanInline(ReadOnlyInline):
    model = m.TestPlan
    extra = 0
    fields = ("name", "kind", "interval_months", "coverage", "effective_from", "next_due_on")
    readonly_fields = ("next_due_on",)
    show_change_link = True


@admin.register(m.SafetyFunction)
class SafetyFunctionAdmin(ReadOnlyAdmin):
    list_display = ("tag", "name", "unit", "target_sil", "demand_mode", "life_stage", "owner")
    list_filter = ("unit__site", "unit", "target_sil", "demand_mode", "life_stage")
    search_fields = ("tag", "name", "subsystems__components__tag")
    filter_horizontal = ("scenarios",)
    inlines = [SubsystemInline, PlanInline]
    list_select_related = ("unit", "owner")


class ComponentInline(ReadOnlyInline):
    model = m.Component
    extra = 0
    fields = ("tag", "device_type", "in_service_on", "lambda_du_per_hour",
              "proof_test_coverage", "partial_test_coverage", "data_basis")
    show_change_link = True


@admin.register(m.Subsystem)
class SubsystemAdmin(ReadOnlyAdmin):
    list_display = ("__str__", "role", "voting", "beta", "beta_d", "mttr_hours")
    list_filter = ("role", "voting")
    search_fields = ("sif__tag", "name")
    inlines = [ComponentInline]


@admin.register(m.Component)
class ComponentAdmin(ReadOnlyAdmin):
    list_display = ("tag", "device_type", "subsystem", "in_service_on", "data_basis")
    list_filter = ("device_type", "data_basis", "subsystem__role")
    search_fields = ("tag", "subsystem__sif__tag")
    list_select_related = ("device_type", "subsystem__sif")


class StepInline(ReadOnlyInline):
    model = m.TestStep
    extra = 0


@admin.register(m.TestPlan)
class TestPlanAdmin(ReadOnlyAdmin):
    list_display = ("__str__", "kind", "interval_months", "coverage", "effective_from",
                    "next_due_on")
    list_filter = ("kind", "sif__unit")
    search_fields = ("sif__tag", "name", "components__tag")
    filter_horizontal = ("components",)
    readonly_fields = ("next_due_on", "due_soon_on", "escalated_on", "escalated_2_on")
    inlines = [StepInline]


class ResultInline(ReadOnlyInline):
    model = m.ComponentResult
    extra = 0


class AttachmentInline(ReadOnlyInline):
    model = m.Attachment
    extra = 0
    readonly_fields = ("original_name", "content_type", "size_bytes", "sha256", "uploaded_by")


@admin.register(m.TestRecord)
class TestRecordAdmin(ReadOnlyAdmin):
    """Signed records are read-only here as everywhere: corrections supersede them."""

    list_display = ("__str__", "kind", "status", "performed_by", "verified_by", "performed_at")
    list_filter = ("kind", "status", "sif__unit")
    search_fields = ("sif__tag", "results__component__tag", "remarks")
    date_hierarchy = "performed_at"
    inlines = [ResultInline, AttachmentInline]
    list_select_related = ("sif", "performed_by", "verified_by")


@admin.register(m.Demand)
class DemandAdmin(ReadOnlyAdmin):
    list_display = ("sif", "occurred_at", "successful", "spurious")
    list_filter = ("successful", "spurious", "sif__unit")
    search_fields = ("sif__tag", "description")


@admin.register(m.Bypass)
class BypassAdmin(ReadOnlyAdmin):
    list_display = ("sif", "component", "started_at", "ended_at", "authorised_hours",
                    "authorised_by", "measures_effective")
    list_filter = ("measures_effective", "sif__unit")
    search_fields = ("sif__tag", "reason")


@admin.register(m.Deferral)
class DeferralAdmin(ReadOnlyAdmin):
    list_display = ("plan", "due_on", "proposed_on", "status", "requested_by", "decided_by")
    list_filter = ("status",)
    search_fields = ("plan__sif__tag", "reason")


@admin.register(m.Notification)
class NotificationAdmin(SiteScopedAdmin, admin.ModelAdmin):
    list_display = ("created_at", "recipient", "kind", "message", "read_at")
    list_filter = ("kind", "site")




@admin.register(m.ChainEntry)
class ChainEntryAdmin(ReadOnlyMixin, admin.ModelAdmin):
    """The whole chain, for superusers; everyone else reads their sites' part of it on the
    chain page (``register.audit.chain.entries_for``)."""

    def has_view_permission(self, request, obj=None):
        return request.user.is_superuser

    def has_module_permission(self, request):
        return request.user.is_superuser

    list_display = ("seq", "created_at", "model_label", "object_id", "action", "actor",
                    "reason", "entry_hash")
    list_filter = ("model_label", "action")
    search_fields = ("object_id", "actor", "reason", "entry_hash")

