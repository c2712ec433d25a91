"""API views. Each write calls one function of ``register.services``; this module only
translates between HTTP and those functions.

Errors: a Django ``ValidationError`` from a service becomes 400 with messages keyed by field
(``non_field_errors`` for the record as a whole); ``PermissionDenied`` becomes 403; a change
to a signed test record becomes 409. Objects at sites where the user holds no role are
outside every queryset and answer 404.
"""

from __future__ import annotations

from django.core.exceptions import PermissionDenied
from django.core.exceptions import ValidationError as DjangoValidationError
from django.db import IntegrityError, transaction
from django.utils import timezone
from drf_spectacular.types import OpenApiTypes
from drf_spectacular.utils import (
    OpenApiResponse,
    extend_schema,
    extend_schema_view,
    inline_serializer,
)
from rest_framework import mixins, status, viewsets
from rest_framework import serializers as drf_serializers
from rest_framework.authtoken.views import ObtainAuthToken
from rest_framework.decorators import action
from rest_framework.exceptions import APIException
from rest_framework.exceptions import ValidationError as DRFValidationError
from rest_framework.permissions import IsAuthenticated
from rest_framework.response import Response
from rest_framework.throttling import ScopedRateThrottle
from rest_framework.views import APIView
from rest_framework.views import exception_handler as drf_exception_handler

from register import reauth, services
from register.accounts import tokens
from register.api import filters
from register.api import serializers as s
from register.api.permissions import LedgerPermission
from register.calculations import calculations
from register.lead.filters import SifFilter
from register.models import (
    Bypass,
    Component,
    Deferral,
    Demand,
    DeviceType,
    HazardScenario,
    Notification,
    PlantUnit,
    SafetyFunction,
    SignedRecordError,
    Site,
    Subsystem,
    TestPlan,
    TestRecord,
)
from register.permissions import Action
from register.schedule import services as schedule_services
from register.schedule.due import with_state
from register.schedule.scan import bypass_state_expression

NON_FIELD = "non_field_errors"


class Conflict(APIException):
    status_code = status.HTTP_409_CONFLICT
    default_detail = "The request conflicts with the stored state."
    default_code = "conflict"


def _messages(exc: DjangoValidationError) -> dict:
    if hasattr(exc, "error_dict"):
        return {(NON_FIELD if k == "__all__" else k): v for k, v in exc.message_dict.items()}
    return {NON_FIELD: exc.messages}


def exception_handler(exc, context):
    """DRF's handler, plus the register's own exceptions."""
    if isinstance(exc, SignedRecordError):
        exc = Conflict(detail={"detail": " ".join(exc.messages)})
    elif isinstance(exc, DjangoValidationError):
        exc = DRFValidationError(detail=_messages(exc))
    elif isinstance(exc, IntegrityError):
        exc = Conflict(detail={"detail": "This conflicts with a stored record (a duplicate "
                                         "or a change made at the same time)."})
    return drf_exception_handler(exc, context)


class ObtainToken(ObtainAuthToken):
    """Exchange a username and password for an API token (throttled per address; repeated
    failures lock the user name at that address, see ``register.accounts.signin``). A token
    lasts ``API_TOKEN_DAYS``; an expired one is replaced by a new one here."""

    throttle_classes = [ScopedRateThrottle]
    throttle_scope = "login"

    def get_serializer_context(self):
        # The sign-in limit marks the Django request, which its middleware answers.
        return {**super().get_serializer_context(), "request": self.request._request}

    @extend_schema(responses={
        200: inline_serializer("IssuedToken", {
            "token": drf_serializers.CharField(),
            "expires_at": drf_serializers.DateTimeField()}),
        400: OpenApiResponse(description="Wrong user name or password."),
        429: OpenApiResponse(description="Too many attempts: this user name is locked at "
                             "this address until the time given (detail, locked_until, "
                             "retry_after_seconds), or this address asks too often.")})
    def post(self, request, *args, **kwargs):
        serializer = self.get_serializer(data=request.data)
        if not serializer.is_valid():
            # Answered, not raised: a raised error would roll back the request's
            # transaction, and with it the failure the sign-in limit just counted.
            return Response(serializer.errors, status=status.HTTP_400_BAD_REQUEST)
        token = tokens.issue(serializer.validated_data["user"])
        return Response({"token": token.key, "expires_at": tokens.expires_at(token)})


# --- Base classes ---------------------------------------------------------------------


class LedgerViewSet(viewsets.GenericViewSet):
    permission_classes = [LedgerPermission]
    write_rights: dict[str, str] = {}

    def get_queryset(self):
        return super().get_queryset().restrict(self.request.user)

    def created(self, obj, code=status.HTTP_201_CREATED):
        return Response(self.get_serializer(obj).data, status=code)


class ReadViewSet(mixins.ListModelMixin, mixins.RetrieveModelMixin, LedgerViewSet):
    pass


def _change_control(data: dict) -> tuple[str, str, dict]:
    data = dict(data)
    return data.pop("change_reason"), data.pop("change_reference"), data


class DesignViewSet(mixins.CreateModelMixin, mixins.UpdateModelMixin, ReadViewSet):
    """Design records: created and changed only through ``services.update_design``."""

    write_rights = {"create": Action.EDIT_REGISTER, "update": Action.EDIT_REGISTER,
                    "partial_update": Action.EDIT_REGISTER}

    def get_queryset(self):
        return services.with_versions(super().get_queryset())

    def perform_create(self, serializer):
        reason, reference, data = _change_control(serializer.validated_data)
        parent = serializer.parent_field
        model = self.get_queryset().model
        instance = model(**{parent: data.pop(parent)})
        serializer.instance = services.update_design(
            instance, self.request.user, reason=reason, reference=reference, changes=data)

    def perform_update(self, serializer):
        reason, reference, data = _change_control(serializer.validated_data)
        expected = data.pop("expected_version")
        instance = services.update_design(
            serializer.instance, self.request.user, reason=reason, reference=reference,
            changes=data, expected_version=expected)
        instance.__dict__.pop("history_version", None)  # read the new version
        serializer.instance = instance

    def update(self, request, *args, **kwargs):
        try:
            return super().update(request, *args, **kwargs)
        except services.StaleVersionError as exc:  # nothing was written
            return Response({"detail": str(exc), "expected_version": [str(exc)],
                             "version": exc.current}, status=status.HTTP_409_CONFLICT)


# --- Read-only lists ------------------------------------------------------------------------


class SiteViewSet(ReadViewSet):
    queryset = Site.objects.all()
    serializer_class = s.SiteSerializer


class UnitViewSet(ReadViewSet):
    queryset = PlantUnit.objects.all()
    serializer_class = s.UnitSerializer
    filterset_class = filters.UnitFilter


class DeviceTypeViewSet(mixins.ListModelMixin, mixins.RetrieveModelMixin,
                        viewsets.GenericViewSet):
    """The device library is shared by all sites; anyone signed in may read it."""

    queryset = DeviceType.objects.all()
    serializer_class = s.DeviceTypeSerializer
    permission_classes = [IsAuthenticated]
    filterset_fields = ["role", "device_class"]


class ScenarioViewSet(ReadViewSet):
    queryset = HazardScenario.objects.select_related("site", "unit").prefetch_related(
        "causes", "layers", "modifiers")
    serializer_class = s.ScenarioSerializer
    filterset_class = filters.ScenarioFilter


class AssessmentViewSet(ReadViewSet):
    queryset = calculations().Assessment.objects.all()
    serializer_class = s.AssessmentSerializer
    filterset_class = filters.AssessmentFilter


# --- Design data -------------------------------------------------------------------------


class SifViewSet(DesignViewSet):
    queryset = SafetyFunction.objects.select_related("unit").prefetch_related("scenarios")
    serializer_class = s.SifSerializer
    filterset_class = SifFilter


class SubsystemViewSet(DesignViewSet):
    queryset = Subsystem.objects.select_related("sif__unit")
    serializer_class = s.SubsystemSerializer
    filterset_class = filters.SubsystemFilter


class ComponentViewSet(DesignViewSet):
    queryset = Component.objects.select_related("subsystem__sif__unit", "device_type")
    serializer_class = s.ComponentSerializer
    filterset_class = filters.ComponentFilter


class TestPlanViewSet(DesignViewSet):
    __test__ = False
    queryset = TestPlan.objects.select_related("sif__unit").prefetch_related("components",
                                                                            "steps")
    serializer_class = s.TestPlanSerializer

    def get_queryset(self):
        return with_state(super().get_queryset())
    filterset_class = filters.TestPlanFilter


# --- Test records -----------------------------------------------------------------------

SIGNED_MESSAGE = ("This record is signed and cannot be changed or deleted. Start a "
                  "correction (POST /api/test-records/{id}/correction/) instead.")


def _result_inputs(results: list[dict]) -> list[services.ResultInput]:
    return [
        services.ResultInput(
            component=r["component"], as_found=r["as_found"], as_left=r["as_left"],
            work_done=r.get("work_done", ""), failure_mode=r.get("failure_mode", ""),
            failure_description=r.get("failure_description", ""),
            measurements=[services.MeasurementInput(**m) for m in r.get("measurements", [])],
        )
        for r in results
    ]


@extend_schema_view(
    create=extend_schema(request=s.TestRecordWriteSerializer,
                         responses={201: s.TestRecordSerializer}),
    update=extend_schema(request=s.TestRecordWriteSerializer,
                         responses={200: s.TestRecordSerializer,
                                    409: OpenApiResponse(description="Record is signed")}),
    partial_update=extend_schema(request=s.TestRecordWriteSerializer,
                                 responses={200: s.TestRecordSerializer,
                                            409: OpenApiResponse(description="Record is "
                                                                             "signed")}),
    destroy=extend_schema(responses={204: None,
                                     409: OpenApiResponse(description="Record is signed")}),
)
class TestRecordViewSet(mixins.CreateModelMixin, mixins.UpdateModelMixin,
                        mixins.DestroyModelMixin, ReadViewSet):
    """Test records. Drafts are created and edited here; signing freezes them for good."""

    __test__ = False
    queryset = TestRecord.objects.select_related(
        "sif__unit", "superseded_by").prefetch_related("results__component",
                                                       "results__measurements")
    serializer_class = s.TestRecordSerializer
    filterset_class = filters.TestRecordFilter
    write_rights = {"create": Action.RECORD_TEST, "update": Action.RECORD_TEST,
                    "partial_update": Action.RECORD_TEST, "destroy": Action.RECORD_TEST,
                    "sign": Action.RECORD_TEST, "correction": Action.RECORD_TEST,
                    "verify": Action.VERIFY_TEST}

    def _reload(self, record):
        return self.get_queryset().get(pk=record.pk)

    def _write(self, request, record=None, partial=False):
        ser = s.TestRecordWriteSerializer(data=request.data, context=self.get_serializer_context(),
                                          partial=partial)
        ser.is_valid(raise_exception=True)
        data = ser.validated_data
        if record is not None and partial:
            current = {
                "sif": record.sif, "plan": record.plan, "kind": record.kind,
                "performed_at": record.performed_at, "remarks": record.remarks,
                "client_key": record.client_key,
            }
            data = {**current, **data}
            if "results" not in data:
                data["results"] = [
                    {"component": r.component, "as_found": r.as_found, "as_left": r.as_left,
                     "work_done": r.work_done, "failure_mode": r.failure_mode,
                     "failure_description": r.failure_description,
                     "measurements": [dict(quantity=m.quantity, value=m.value, phase=m.phase,
                                           unit=m.unit, step=m.step)
                                      for m in r.measurements.all()]}
                    for r in record.results.all()]
        return services.save_draft(
            user=request.user, sif=data["sif"], kind=data["kind"],
            performed_at=data["performed_at"], results=_result_inputs(data["results"]),
            plan=data.get("plan"), remarks=data.get("remarks", ""), record=record,
            expected_version=data.get("expected_version"),
            supersedes=record.supersedes if record else None,
            correction_reason=record.correction_reason if record else "",
            client_key=data.get("client_key"))

    def create(self, request, *args, **kwargs):
        return self.created(self._reload(self._write(request)))

    def update(self, request, *args, **kwargs):
        record = self.get_object()
        if record.is_signed:
            raise Conflict(detail={"detail": SIGNED_MESSAGE.format(id=record.pk)})
        saved = self._write(request, record, partial=kwargs.get("partial", False))
        return Response(self.get_serializer(self._reload(saved)).data)

    def destroy(self, request, *args, **kwargs):
        record = self.get_object()
        if record.is_signed:
            raise Conflict(detail={"detail": SIGNED_MESSAGE.format(id=record.pk)})
        services.discard_draft(record, request.user)
        return Response(status=status.HTTP_204_NO_CONTENT)

    @extend_schema(request=s.PasswordSerializer, responses={200: s.TestRecordSerializer})
    @action(detail=True, methods=["post"])
    def sign(self, request, pk=None):
        """The performer signs the draft with their password; it cannot change afterwards."""
        record = self.get_object()
        ser = s.PasswordSerializer(data=request.data)
        ser.is_valid(raise_exception=True)
        services.sign_record(record, request.user, ser.validated_data["password"])
        return Response(self.get_serializer(self._reload(record)).data)

    @extend_schema(request=s.PasswordSerializer, responses={200: s.TestRecordSerializer})
    @action(detail=True, methods=["post"])
    def verify(self, request, pk=None):
        """A verifier other than the performer countersigns a signed record."""
        record = self.get_object()
        ser = s.PasswordSerializer(data=request.data)
        ser.is_valid(raise_exception=True)
        services.verify_record(record, request.user, ser.validated_data["password"])
        return Response(self.get_serializer(self._reload(record)).data)

    @extend_schema(request=s.CorrectionSerializer, responses={201: s.TestRecordSerializer})
    @action(detail=True, methods=["post"])
    def correction(self, request, pk=None):
        """Start a correction: a new draft that will supersede this signed record."""
        record = self.get_object()
        ser = s.CorrectionSerializer(data=request.data)
        ser.is_valid(raise_exception=True)
        draft = services.start_correction(record, request.user, ser.validated_data["reason"])
        return self.created(self._reload(draft))


# --- Demands, bypasses, deferrals --------------------------------------------------------


class DemandViewSet(mixins.CreateModelMixin, ReadViewSet):
    queryset = Demand.objects.select_related("sif").prefetch_related(
        "components_exercised", "failed_components", "findings")
    serializer_class = s.DemandSerializer
    filterset_class = filters.DemandFilter
    write_rights = {"create": Action.RECORD_DEMAND}

    def perform_create(self, serializer):
        serializer.instance = services.record_demand(user=self.request.user,
                                                     **serializer.validated_data)


class BypassViewSet(mixins.CreateModelMixin, ReadViewSet):
    queryset = Bypass.objects.select_related("sif")
    serializer_class = s.BypassSerializer

    def get_queryset(self):
        return super().get_queryset().annotate(state=bypass_state_expression(timezone.now()))
    filterset_class = filters.BypassFilter
    write_rights = {"create": Action.MANAGE_BYPASS, "close": Action.MANAGE_BYPASS,
                    "authorise": Action.AUTHORISE_BYPASS}

    def perform_create(self, serializer):
        serializer.instance = services.open_bypass(user=self.request.user,
                                                   **serializer.validated_data)

    @extend_schema(request=s.CloseBypassSerializer, responses={200: s.BypassSerializer})
    @action(detail=True, methods=["post"])
    def close(self, request, pk=None):
        """End the bypass (now, or at the time given)."""
        bypass = self.get_object()
        ser = s.CloseBypassSerializer(data=request.data)
        ser.is_valid(raise_exception=True)
        bypass = services.close_bypass(bypass, request.user, ser.validated_data["ended_at"])
        return Response(self.get_serializer(self.get_queryset().get(pk=bypass.pk)).data)

    @extend_schema(request=s.PasswordSerializer, responses={200: s.BypassSerializer})
    @action(detail=True, methods=["post"])
    def authorise(self, request, pk=None):
        """A lead of the site, never the requester, authorises the bypass (now) with their
        password."""
        bypass = self.get_object()
        ser = s.PasswordSerializer(data=request.data)
        ser.is_valid(raise_exception=True)
        bypass = services.authorise_bypass(bypass, request.user,
                                           ser.validated_data["password"])
        return Response(self.get_serializer(self.get_queryset().get(pk=bypass.pk)).data)


class DeferralViewSet(mixins.CreateModelMixin, ReadViewSet):
    queryset = Deferral.objects.select_related("plan__sif__unit")
    serializer_class = s.DeferralSerializer
    filterset_class = filters.DeferralFilter
    write_rights = {"create": Action.REQUEST_DEFERRAL, "decide": Action.DECIDE_DEFERRAL}

    def perform_create(self, serializer):
        d = serializer.validated_data  # the due date and the projection are the server's
        serializer.instance = schedule_services.request_deferral(
            user=self.request.user, plan=d["plan"], proposed_on=d["proposed_on"],
            reason=d["reason"])

    @extend_schema(request=s.DecideSerializer, responses={200: s.DeferralSerializer})
    @action(detail=True, methods=["post"])
    def decide(self, request, pk=None):
        """The site's functional-safety lead approves or rejects the deferral."""
        deferral = self.get_object()
        ser = s.DecideSerializer(data=request.data)
        ser.is_valid(raise_exception=True)
        d = ser.validated_data
        deferral = schedule_services.decide_deferral(deferral, request.user, d["password"],
                                                     approve=d["approve"], note=d["note"])
        return Response(self.get_serializer(deferral).data)


class EvidencePackViewSet(mixins.CreateModelMixin, ReadViewSet):
    """Evidence packs of the sites where the user may export (auditors, verifiers, leads).

    Creating one asks for a pack; it is built in the background (poll ``status`` and
    ``progress``), then ``download/`` returns the zip.
    """

    serializer_class = s.EvidencePackSerializer
    write_rights = {"create": Action.EXPORT}

    def get_queryset(self):
        from register.models import EvidencePack

        return (EvidencePack.objects.restrict(self.request.user, Action.EXPORT)
                .select_related("site", "unit", "sif", "requested_by"))

    def perform_create(self, serializer):
        from register.audit.evidence import request_pack

        d = serializer.validated_data
        serializer.instance = request_pack(
            self.request.user, scope=d["scope"], site=d["site"], unit=d.get("unit"),
            sif=d.get("sif"), period_start=d["period_start"], period_end=d["period_end"])

    @extend_schema(responses={(200, "application/zip"): OpenApiTypes.BINARY})
    @action(detail=True, methods=["get"])
    def download(self, request, pk=None):
        from django.http import FileResponse, Http404

        from register.audit.evidence import pack_file

        pack = self.get_object()
        path = pack_file(pack)
        if path is None:
            raise Http404("The pack is not ready, or its file is missing.")
        return FileResponse(path.open("rb"), as_attachment=True,
                            filename=f"evidence-pack-{pack.pk}.zip",
                            content_type="application/zip")


class NotificationViewSet(mixins.ListModelMixin, mixins.RetrieveModelMixin,
                          viewsets.GenericViewSet):
    """The signed-in person's own notifications. Marking one read changes no register data."""

    queryset = Notification.objects.all()
    serializer_class = s.NotificationSerializer
    permission_classes = [IsAuthenticated]
    filterset_class = filters.NotificationFilter

    def get_queryset(self):
        user = self.request.user
        if not user.is_authenticated:
            return Notification.objects.none()
        return Notification.objects.filter(recipient=user)

    @extend_schema(request=None, responses={200: s.NotificationSerializer})
    @action(detail=True, methods=["post"])
    def read(self, request, pk=None):
        note = self.get_object()
        if note.read_at is None:
            note.read_at = timezone.now()
            note.save(update_fields=["read_at"])
        return Response(self.get_serializer(note).data)


# --- Bulk results from a maintenance system ----------------------------------------------


class BulkError(Exception):
    def __init__(self, errors: list[dict], code: int):
        self.errors, self.code = errors, code


def _err(index: int, field: str, messages) -> dict:
    if isinstance(messages, str):
        messages = [messages]
    return {"index": index, "field": field, "messages": [str(m) for m in messages]}


def _flatten(index: int, detail, prefix="") -> list[dict]:
    """DRF's nested error detail as a flat list naming item index and field path."""
    out = []
    if isinstance(detail, dict):
        for key, value in detail.items():
            out += _flatten(index, value, f"{prefix}.{key}" if prefix else str(key))
    elif isinstance(detail, list) and detail and not isinstance(detail[0], str):
        for i, value in enumerate(detail):
            if value:
                out += _flatten(index, value, f"{prefix}[{i}]")
    else:
        out.append(_err(index, prefix or NON_FIELD, detail))
    return out


def _credential(request) -> str:
    """What a signing grant is bound to: the request's API token, or its session."""
    if request.auth is not None and getattr(request.auth, "key", None):
        return f"token:{request.auth.key}"
    return f"session:{request.session.session_key or ''}"


class SigningGrant(APIView):
    """Re-enter the password once to sign for ``SIGNING_GRANT_MINUTES``.

    ``POST {"password": ...}`` answers ``{"signing_grant", "expires_at",
    "lifetime_seconds"}``. The grant signs bulk results (``signing_grant`` instead of
    ``password``) for this user with this token (or session) only, until it expires or the
    password changes. A wrong password counts towards the same lock as any other
    re-entered password (400 keyed ``password``)."""

    permission_classes = [LedgerPermission]
    write_rights = {"post": Action.RECORD_TEST}

    def initial(self, request, *args, **kwargs):
        self.action = request.method.lower()
        super().initial(request, *args, **kwargs)

    @extend_schema(request=s.PasswordSerializer, responses={
        200: s.SigningGrantSerializer,
        400: OpenApiResponse(description="Missing or wrong password, or too many wrong "
                                         "ones in a row.")})
    def post(self, request):
        ser = s.PasswordSerializer(data=request.data)
        ser.is_valid(raise_exception=True)
        grant, expires = reauth.issue_grant(request.user, ser.validated_data["password"],
                                            _credential(request))
        return Response({"signing_grant": grant, "expires_at": expires,
                         "lifetime_seconds": int(reauth.grant_lifetime().total_seconds())})


class BulkTestResults(APIView):
    """Signed test results from a maintenance system, all or nothing.

    The body is ``{"password": ..., "results": [items]}``, or ``{"signing_grant": ...,
    "results": [items]}`` with a grant from :class:`SigningGrant`. The token's user is the
    performer of every item and signs each with the password, checked once per request
    (a missing or wrong one: 400 keyed ``password``, nothing written), or with the grant
    (an expired, revoked or foreign one: 400 keyed ``signing_grant``). Each item carries
    a ``client_key``; sending the same key again with the same content returns the stored
    record (200, nothing written), with other content 409. One bad item rejects the whole
    request; the errors name the item index and the field.
    """

    permission_classes = [LedgerPermission]
    write_rights = {"post": Action.RECORD_TEST}

    def initial(self, request, *args, **kwargs):
        self.action = request.method.lower()
        super().initial(request, *args, **kwargs)

    @extend_schema(request=s.BulkRequestSerializer,
                   responses={200: s.BulkResponseSerializer, 201: s.BulkResponseSerializer})
    def post(self, request):
        if isinstance(request.data, list):
            raise DRFValidationError({"password": [
                'Send {"password": ..., "results": [...]}: the results are signed with your '
                "password."]})
        envelope = s.BulkEnvelopeSerializer(data=request.data)
        envelope.is_valid(raise_exception=True)
        data = envelope.validated_data
        if "signing_grant" in data:
            proof = reauth.redeem_grant(request.user, data["signing_grant"],
                                        _credential(request))
        else:
            proof = services.confirm_password(request.user, data["password"])
        items, errors = [], []
        for index, raw in enumerate(envelope.validated_data["results"]):
            ser = s.BulkItemSerializer(data=raw)
            if ser.is_valid():
                items.append(ser.validated_data)
            else:
                items.append(None)
                errors += _flatten(index, ser.errors)
        keys = [i["client_key"] for i in items if i]
        for index, item in enumerate(items):
            if item and keys.count(item["client_key"]) > 1:
                errors.append(_err(index, "client_key", "This key appears twice in the "
                                                        "request."))
        if errors:
            return self._fail(errors, status.HTTP_400_BAD_REQUEST)
        try:
            return self._store(request.user, items, proof)
        except BulkError as exc:
            return self._fail(exc.errors, exc.code)

    def _fail(self, errors, code):
        return Response({"detail": "Nothing was written.", "errors": errors}, status=code)

    def _resolve(self, user, index, item):
        errors = []
        sifs = SafetyFunction.objects.restrict(user).select_related("unit")
        if item.get("sif"):
            sif = sifs.filter(pk=item["sif"]).first()
        else:
            found = sifs.filter(tag=item["sif_tag"])
            if item.get("site"):
                found = found.filter(unit__site__code=item["site"])
            found = list(found[:2])
            if len(found) > 1:
                raise BulkError([_err(index, "sif_tag", "This tag exists at several sites; "
                                                         "give the site code.")], 400)
            sif = found[0] if found else None
        if sif is None:
            raise BulkError([_err(index, "sif", "No such SIF at your sites.")], 400)
        plan = None
        if item.get("plan"):
            plan = TestPlan.objects.filter(pk=item["plan"], sif=sif).first()
            if plan is None:
                errors.append(_err(index, "plan", "No such test plan for this SIF."))
        comps = {c.pk: c for c in Component.objects.filter(subsystem__sif=sif)}
        by_tag = {c.tag: c for c in comps.values()}
        results = []
        for j, r in enumerate(item["results"]):
            comp = comps.get(r["component"]) if r.get("component") else by_tag.get(
                r.get("component_tag"))
            if comp is None:
                errors.append(_err(index, f"results[{j}].component",
                                   "No such component in this SIF."))
                continue
            results.append({**r, "component": comp})
        if errors:
            raise BulkError(errors, 400)
        return sif, plan, results

    @transaction.atomic
    def _store(self, user, items, proof):
        errors, outcome, denied = [], [], False
        for index, item in enumerate(items):
            try:
                sif, plan, results = self._resolve(user, index, item)
            except BulkError as exc:
                errors += exc.errors
                continue
            try:
                with transaction.atomic():
                    record, created = services.save_draft_once(
                        client_key=item["client_key"], user=user, sif=sif, plan=plan,
                        kind=item["kind"], performed_at=item["performed_at"],
                        remarks=item.get("remarks", ""), results=_result_inputs(results))
                    if created:
                        services.sign_record(record, user, proof)
            except services.KeyReusedError as exc:
                raise BulkError([_err(index, "client_key", exc.messages)], 409) from None
            except DjangoValidationError as exc:
                for field, msgs in _messages(exc).items():
                    errors.append(_err(index, field, msgs))
                continue
            except PermissionDenied as exc:
                denied = True
                errors.append(_err(index, "sif", str(exc)))
                continue
            outcome.append((index, item["client_key"], created, record.pk))
        if errors:
            raise BulkError(errors, status.HTTP_403_FORBIDDEN if denied
                            else status.HTTP_400_BAD_REQUEST)
        records = TestRecord.objects.select_related("sif__unit", "superseded_by") \
            .prefetch_related("results__component", "results__measurements") \
            .in_bulk([pk for *_, pk in outcome])
        created = sum(1 for o in outcome if o[2])
        # one serializer for all the records: its fields are built once, not per record
        shown = s.TestRecordSerializer([records[pk] for *_, pk in outcome], many=True).data
        body = {
            "created": created, "existing": len(outcome) - created,
            "items": [{"index": i, "client_key": k, "created": c, "record": record}
                      for (i, k, c, _), record in zip(outcome, shown, strict=True)],
        }
        return Response(body, status=status.HTTP_201_CREATED if created else status.HTTP_200_OK)
