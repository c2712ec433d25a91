"""Shapes of the API's data. Serializers check types and which objects the user may name;
the rules of the register (signing, bypass overlap, deferral dates...) live in the models'
``clean()`` and in ``register.services``.
"""

from __future__ import annotations

import difflib
from collections.abc import Mapping

from django.db import models as db_models
from rest_framework import serializers

from register import choices
from register.calculations import calculations
from register.models import (
    Bypass,
    Component,
    ComponentResult,
    ConditionalModifier,
    Deferral,
    Demand,
    DeviceType,
    EvidencePack,
    HazardScenario,
    InitiatingCause,
    MeasuredValue,
    Notification,
    PlantUnit,
    ProtectionLayer,
    SafetyFunction,
    Site,
    Subsystem,
    TestPlan,
    TestRecord,
    TestStep,
)
from register.models.base import MAX_TEXT, plausible, plausible_date
from register.services.design import current_version


def unknown_key_message(key: str, known) -> str:
    """"Unknown field", with the nearest known name when one is close."""
    near = difflib.get_close_matches(str(key), list(known), n=1)
    hint = f" Did you mean “{near[0]}”?" if near else ""
    return f"Unknown field.{hint}"


class RefuseUnknown:
    """A request naming a field the serializer does not have is refused (400, keyed by the
    field, with the nearest known name) instead of being silently ignored."""

    def to_internal_value(self, data):
        if isinstance(data, Mapping):
            unknown = [k for k in data if k not in self.fields]
            if unknown:
                raise serializers.ValidationError(
                    {str(k): [unknown_key_message(k, self.fields)] for k in unknown})
        return super().to_internal_value(data)


class Strict(RefuseUnknown, serializers.Serializer):
    """A plain request serializer that refuses unknown fields."""


def text(**kwargs) -> serializers.CharField:
    """A free-text request field, at most MAX_TEXT characters."""
    return serializers.CharField(max_length=kwargs.pop("max_length", MAX_TEXT), **kwargs)


class VisiblePK(serializers.PrimaryKeyRelatedField):
    """A reference to an object the requesting user can see (others read as "not found")."""

    def get_queryset(self):
        qs = super().get_queryset()
        request = self.context.get("request")
        if hasattr(qs, "restrict"):
            return qs.restrict(request.user if request else None)
        return qs


class LedgerModelSerializer(RefuseUnknown, serializers.ModelSerializer):
    serializer_related_field = VisiblePK

    def build_standard_field(self, field_name, model_field):
        cls, kwargs = super().build_standard_field(field_name, model_field)
        if isinstance(model_field, db_models.TextField) and "max_length" not in kwargs \
                and not kwargs.get("read_only"):
            kwargs["max_length"] = MAX_TEXT
        return cls, kwargs


# --- Sites, units, library -------------------------------------------------------------


class SiteSerializer(LedgerModelSerializer):
    class Meta:
        model = Site
        fields = ["id", "code", "name", "due_soon_days", "escalate_share", "escalate_days",
                  "second_escalation_days", "rate_basis", "confidence_level", "prior_strength"]
        read_only_fields = fields


class UnitSerializer(LedgerModelSerializer):
    class Meta:
        model = PlantUnit
        fields = ["id", "site", "code", "name"]
        read_only_fields = fields


class DeviceTypeSerializer(LedgerModelSerializer):
    class Meta:
        model = DeviceType
        fields = ["id", "name", "role", "lambda_du_per_hour", "lambda_dd_per_hour",
                  "lambda_s_per_hour", "device_class", "systematic_capability", "source"]
        read_only_fields = fields


# --- Scenarios ----------------------------------------------------------------------------


class CauseSerializer(serializers.ModelSerializer):
    class Meta:
        model = InitiatingCause
        fields = ["id", "description", "frequency_per_year", "basis"]


class LayerSerializer(serializers.ModelSerializer):
    class Meta:
        model = ProtectionLayer
        fields = ["id", "description", "pfd", "basis"]


class ModifierSerializer(serializers.ModelSerializer):
    class Meta:
        model = ConditionalModifier
        fields = ["id", "kind", "probability", "basis"]


class ScenarioSerializer(LedgerModelSerializer):
    causes = CauseSerializer(many=True, read_only=True)
    layers = LayerSerializer(many=True, read_only=True)
    modifiers = ModifierSerializer(many=True, read_only=True)

    class Meta:
        model = HazardScenario
        fields = ["id", "site", "unit", "reference", "title", "consequence", "category",
                  "tolerable_frequency_per_year", "causes", "layers", "modifiers"]
        read_only_fields = fields


# --- Design data (changed under change control) -------------------------------------------


class DesignSerializer(LedgerModelSerializer):
    """Design records: a write must say why and under which change request."""

    change_reason = serializers.CharField(write_only=True, max_length=500)
    change_reference = serializers.CharField(write_only=True, max_length=60)
    version = serializers.SerializerMethodField(help_text=(
        "The record's version: the id of its newest history row. A change (PUT or PATCH) "
        "sends it back as expected_version."))
    expected_version = serializers.IntegerField(
        write_only=True, required=False, min_value=1, max_value=2**62, help_text=(
            "Required on PUT and PATCH: the version the change is based on. When the record "
            "has changed since, nothing is written (409, with the current version)."))
    # The parent a record hangs under; set on create, never moved by an update.
    parent_field: str = ""

    def get_field_names(self, declared_fields, info):
        return [*super().get_field_names(declared_fields, info), "version",
                "expected_version"]

    def get_fields(self):
        fields = super().get_fields()
        if self.instance is not None and self.parent_field in fields:
            fields[self.parent_field].read_only = True
        return fields

    def get_version(self, obj) -> int | None:
        version = getattr(obj, "history_version", None)  # annotated by the list's query
        return version if version is not None else current_version(obj)

    def validate(self, attrs):
        # A partial update skips required fields; change control never is.
        missing = {name: ["This field is required."]
                   for name in ("change_reason", "change_reference") if name not in attrs}
        if self.instance is not None and "expected_version" not in attrs:
            missing["expected_version"] = [
                "Send the version this change is based on (the record's version field)."]
        if self.instance is None and "expected_version" in attrs:
            missing["expected_version"] = ["A new record has no version yet: leave it out."]
        if missing:
            raise serializers.ValidationError(missing)
        return super().validate(attrs)


class SifSerializer(DesignSerializer):
    parent_field = "unit"
    site = serializers.IntegerField(source="unit.site_id", read_only=True)

    class Meta:
        model = SafetyFunction
        fields = ["id", "unit", "site", "tag", "name", "safe_state", "demand_mode",
                  "scenarios", "target_pfd_avg", "target_pfh_per_hour", "target_sil",
                  "process_safety_time_s", "required_response_time_s", "trip_setpoint",
                  "setpoint_unit", "life_stage", "in_service_on", "owner",
                  "change_reason", "change_reference"]
        read_only_fields = ["scenarios", "owner"]
        validators = []  # uniqueness is checked by full_clean() in the service


class SubsystemSerializer(DesignSerializer):
    parent_field = "sif"

    class Meta:
        model = Subsystem
        fields = ["id", "sif", "role", "name", "voting", "beta", "beta_d", "mttr_hours",
                  "mrt_hours", "position", "change_reason", "change_reference"]


class ComponentSerializer(DesignSerializer):
    parent_field = "subsystem"
    sif = serializers.IntegerField(source="subsystem.sif_id", read_only=True)

    class Meta:
        model = Component
        fields = ["id", "subsystem", "sif", "tag", "device_type", "in_service_on",
                  "lambda_du_per_hour", "lambda_dd_per_hour", "lambda_s_per_hour",
                  "proof_test_coverage", "partial_test_coverage", "mission_time_years",
                  "device_class", "systematic_capability", "data_basis",
                  "change_reason", "change_reference"]
        validators = []


class TestStepSerializer(serializers.ModelSerializer):
    class Meta:
        model = TestStep
        fields = ["id", "position", "instruction", "measured_quantity", "unit", "criterion",
                  "target_value", "tolerance", "limit"]


class TestPlanSerializer(DesignSerializer):
    __test__ = False
    parent_field = "sif"
    steps = TestStepSerializer(many=True, read_only=True)
    state = serializers.CharField(read_only=True, help_text=(
        "The plan's state today on its site's calendar, derived when read from the due date "
        "and the site's thresholds."))

    class Meta:
        model = TestPlan
        fields = ["id", "sif", "name", "kind", "components", "interval_months", "coverage",
                  "demand_counts_as_test", "effective_from", "assignee", "next_due_on",
                  "state", "steps", "change_reason", "change_reference"]
        read_only_fields = ["components", "assignee", "next_due_on", "state"]


# --- Test records -----------------------------------------------------------------------


class MeasurementSerializer(serializers.ModelSerializer):
    class Meta:
        model = MeasuredValue
        fields = ["id", "step", "phase", "quantity", "value", "unit", "within_criterion"]


class ResultSerializer(serializers.ModelSerializer):
    component_tag = serializers.CharField(source="component.tag", read_only=True)
    measurements = MeasurementSerializer(many=True, read_only=True)

    class Meta:
        model = ComponentResult
        fields = ["id", "component", "component_tag", "as_found", "as_left", "work_done",
                  "failure_mode", "failure_description", "measurements"]


class TestRecordSerializer(serializers.ModelSerializer):
    __test__ = False
    sif_tag = serializers.CharField(source="sif.tag", read_only=True)
    site = serializers.IntegerField(source="sif.unit.site_id", read_only=True)
    superseded_by = serializers.SerializerMethodField()
    results = ResultSerializer(many=True, read_only=True)

    class Meta:
        model = TestRecord
        fields = ["id", "sif", "sif_tag", "site", "plan", "kind", "performed_at",
                  "performed_by", "performed_by_name", "verified_by", "verified_by_name",
                  "status", "signed_at", "verified_at", "supersedes", "superseded_by",
                  "correction_reason", "remarks", "client_key", "draft_version", "created_at",
                  "results"]
        read_only_fields = fields

    def get_superseded_by(self, obj) -> int | None:
        later = getattr(obj, "superseded_by", None)
        return later.pk if later else None


class MeasurementInputSerializer(Strict):
    quantity = serializers.CharField(max_length=100)
    value = serializers.FloatField(validators=plausible("process_value"))
    phase = serializers.ChoiceField(choices=["found", "left"], default="found")
    unit = serializers.CharField(max_length=20, required=False, allow_blank=True, default="")
    step = VisiblePK(queryset=TestStep.objects.all(), required=False, allow_null=True,
                     default=None)


class ResultInputSerializer(Strict):
    component = VisiblePK(queryset=Component.objects.all())
    as_found = serializers.ChoiceField(choices=choices.Verdict.choices)
    as_left = serializers.ChoiceField(choices=choices.Verdict.choices)
    work_done = text(required=False, allow_blank=True, default="")
    failure_mode = serializers.ChoiceField(choices=choices.FailureMode.choices, required=False,
                                           allow_blank=True, default="")
    failure_description = text(required=False, allow_blank=True, default="")
    measurements = MeasurementInputSerializer(many=True, required=False, default=list)


class TestRecordWriteSerializer(Strict):
    """A draft test record: header and component results (replaced as a whole on update)."""

    __test__ = False
    sif = VisiblePK(queryset=SafetyFunction.objects.all())
    plan = VisiblePK(queryset=TestPlan.objects.all(), required=False, allow_null=True,
                     default=None)
    kind = serializers.ChoiceField(choices=choices.TestKind.choices)
    performed_at = serializers.DateTimeField(validators=plausible_date)
    remarks = text(required=False, allow_blank=True, default="")
    client_key = serializers.CharField(max_length=100, required=False, allow_null=True,
                                       default=None)
    results = ResultInputSerializer(many=True)
    expected_version = serializers.IntegerField(required=False, allow_null=True, default=None,
                                                min_value=1, max_value=2**31 - 1)


class PasswordSerializer(Strict):
    password = serializers.CharField(write_only=True, trim_whitespace=False, max_length=256)


class SigningGrantSerializer(serializers.Serializer):
    signing_grant = serializers.CharField(help_text="Send it as signing_grant in bulk "
                                                    "requests instead of the password.")
    expires_at = serializers.DateTimeField()
    lifetime_seconds = serializers.IntegerField()


class CorrectionSerializer(Strict):
    reason = serializers.CharField(max_length=5000)


# --- Bulk results from a maintenance system ----------------------------------------------


class BulkResultSerializer(Strict):
    component = serializers.IntegerField(required=False, min_value=1, max_value=2**62)
    component_tag = serializers.CharField(required=False, max_length=40)
    as_found = serializers.ChoiceField(choices=choices.Verdict.choices)
    as_left = serializers.ChoiceField(choices=choices.Verdict.choices)
    work_done = text(required=False, allow_blank=True, default="")
    failure_mode = serializers.ChoiceField(choices=choices.FailureMode.choices, required=False,
                                           allow_blank=True, default="")
    failure_description = text(required=False, allow_blank=True, default="")

    def validate(self, attrs):
        if not attrs.get("component") and not attrs.get("component_tag"):
            raise serializers.ValidationError({"component": "Give the component id or tag."})
        return attrs


class BulkItemSerializer(Strict):
    client_key = serializers.CharField(max_length=100)
    sif = serializers.IntegerField(required=False, min_value=1, max_value=2**62)
    sif_tag = serializers.CharField(required=False, max_length=40)
    site = serializers.CharField(required=False, max_length=30,
                                 help_text="Site code, when the tag alone is ambiguous.")
    plan = serializers.IntegerField(required=False, allow_null=True, min_value=1,
                                    max_value=2**62)
    kind = serializers.ChoiceField(choices=choices.TestKind.choices)
    performed_at = serializers.DateTimeField(validators=plausible_date)
    remarks = text(required=False, allow_blank=True, default="")
    results = BulkResultSerializer(many=True, allow_empty=False)

    def validate(self, attrs):
        if not attrs.get("sif") and not attrs.get("sif_tag"):
            raise serializers.ValidationError({"sif": "Give the SIF id or tag."})
        return attrs


class BulkEnvelopeSerializer(Strict):
    """The body of a bulk request: the performer's password, or a signing grant from
    ``POST /api/signing-grant/`` (every item is signed with it; exactly one of the two),
    and the items, each checked on its own by :class:`BulkItemSerializer`."""

    password = serializers.CharField(write_only=True, trim_whitespace=False, max_length=256,
                                     required=False)
    signing_grant = serializers.CharField(write_only=True, trim_whitespace=False,
                                          max_length=512, required=False)
    results = serializers.ListField(child=serializers.DictField(), allow_empty=False,
                                    max_length=500)

    def validate(self, attrs):
        if ("password" in attrs) == ("signing_grant" in attrs):
            raise serializers.ValidationError({"password": (
                "Send your password or a signing grant (POST /api/signing-grant/), one of "
                "the two: the results are signed with it.")})
        return attrs


class BulkRequestSerializer(BulkEnvelopeSerializer):
    """The same body as documented in the schema."""

    results = BulkItemSerializer(many=True, allow_empty=False, max_length=500)


class BulkItemOutcomeSerializer(serializers.Serializer):
    index = serializers.IntegerField()
    client_key = serializers.CharField()
    created = serializers.BooleanField()
    record = TestRecordSerializer()


class BulkResponseSerializer(serializers.Serializer):
    created = serializers.IntegerField()
    existing = serializers.IntegerField()
    items = BulkItemOutcomeSerializer(many=True)


# --- Operation: demands, bypasses, deferrals --------------------------------------------


class DemandSerializer(LedgerModelSerializer):
    class Meta:
        model = Demand
        fields = ["id", "sif", "occurred_at", "successful", "spurious", "cause", "description",
                  "components_exercised", "failed_components", "recorded_by", "findings"]
        read_only_fields = ["recorded_by", "findings"]
        extra_kwargs = {
            "components_exercised": {"help_text": "Devices that acted."},
            "failed_components": {"help_text": "Devices that failed to act: each opens a "
                                               "finding."},
        }


class BypassSerializer(LedgerModelSerializer):
    state = serializers.CharField(read_only=True, help_text="The state now, derived when read.")

    class Meta:
        model = Bypass
        fields = ["id", "sif", "component", "started_at", "ended_at", "authorised_hours",
                  "reason", "requested_by", "authorised_by", "authorised_at", "closed_by",
                  "compensating_measures", "measures_effective", "state"]
        # The requester is the caller; the authoriser is set by ``authorise`` only, by a
        # lead of the site who is not the requester.
        read_only_fields = ["ended_at", "requested_by", "authorised_by", "authorised_at",
                            "closed_by", "state"]


class CloseBypassSerializer(Strict):
    ended_at = serializers.DateTimeField(required=False, allow_null=True, default=None,
                                         validators=plausible_date)


class DeferralSerializer(LedgerModelSerializer):
    due_on = serializers.DateField(read_only=True, help_text=(
        "The due date being deferred: the plan's current due date, set by the server."))
    # the service's rule (after today, at most one plan interval ahead) is stricter than
    # the general date window and explains itself; the model still checks the window
    proposed_on = serializers.DateField()

    class Meta:
        model = Deferral
        fields = ["id", "plan", "due_on", "proposed_on", "reason", "requested_by",
                  "requested_at", "status", "decided_by", "decided_at", "decision_note",
                  "projected_pfd_avg"]
        read_only_fields = ["requested_by", "requested_at", "status", "decided_by",
                            "decided_at", "decision_note", "projected_pfd_avg"]
        validators = []


class DecideSerializer(Strict):
    approve = serializers.BooleanField()
    password = serializers.CharField(write_only=True, trim_whitespace=False, max_length=256,
                                     help_text="The decider's password, asked again.")
    projected_pfd_avg = serializers.FloatField(read_only=True, help_text=(
        "Computed by the server when the decision is recorded; a value sent is ignored."))
    note = text(required=False, allow_blank=True, default="")


# --- Read only ----------------------------------------------------------------------------


class AssessmentSerializer(serializers.ModelSerializer):
    class Meta:
        model = calculations().Assessment
        fields = ["id", "sif", "computed_at", "as_of", "inputs_digest", "trigger",
                  "target_pfd_avg", "target_sil", "design_pfd_avg", "design_pfh_per_hour",
                  "achieved_pfd_avg", "achieved_since_service_pfd_avg", "projected_pfd_avg",
                  "observed_unavailability", "observed_since_service",
                  "achieved_sil", "architectural_sil", "systematic_sil", "meets_target",
                  "verdict", "rate_basis", "flags", "detail", "error"]
        read_only_fields = fields


class NotificationSerializer(serializers.ModelSerializer):
    class Meta:
        model = Notification
        fields = ["id", "site", "kind", "subject_key", "message", "link", "created_at",
                  "read_at"]
        read_only_fields = fields


# --- Evidence packs ----------------------------------------------------------------------


class EvidencePackSerializer(LedgerModelSerializer):
    """A pack request and its progress. ``download`` is set once the zip is ready."""

    download = serializers.SerializerMethodField()

    class Meta:
        model = EvidencePack
        fields = ["id", "scope", "site", "unit", "sif", "period_start", "period_end",
                  "requested_by", "status", "progress", "stage", "error", "result_sha256",
                  "result_size", "chain_head_seq", "chain_head_hash", "chain_ok",
                  "created_at", "finished_at", "download"]
        read_only_fields = ["requested_by", "status", "progress", "stage", "error",
                            "result_sha256", "result_size", "chain_head_seq",
                            "chain_head_hash", "chain_ok", "created_at", "finished_at"]

    def get_download(self, pack) -> str | None:
        if pack.status != pack.Status.DONE:
            return None
        return f"/api/evidence-packs/{pack.pk}/download/"
