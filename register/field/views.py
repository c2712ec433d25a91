"""The field workflow: a technician's list of tests, guided test entry, signing and
countersigning, corrections, attachments. Every write goes through ``register.services``.
"""

from __future__ import annotations

import contextlib
import re

from django.contrib import messages
from django.contrib.auth.decorators import login_required
from django.core.exceptions import PermissionDenied, ValidationError
from django.core.paginator import Paginator
from django.db import transaction
from django.db.models import Count, Exists, F, OuterRef, Q, Value
from django.db.models.functions import Replace, Upper
from django.http import FileResponse, Http404
from django.shortcuts import get_object_or_404, redirect, render
from django.urls import reverse
from django.utils import timezone
from django.views.decorators.http import require_GET, require_POST

from register import choices, services
from register.audit.chain import attachment_altered
from register.calculations import calculations
from register.days import today
from register.field.forms import (
    ComponentForm,
    CorrectionForm,
    HeaderForm,
    PasswordForm,
    check_upload,
)
from register.models import Attachment, Component, TestPlan, TestRecord
from register.permissions import Action, can, can_somewhere, require
from register.rules import steps_for
from register.schedule.due import live_statuses, with_state

PER_PAGE = 20
TOKEN_RE = re.compile(r"^[0-9a-f]{32}$")


# ---------------------------------------------------------------------------------------
# Helpers
# ---------------------------------------------------------------------------------------


def _state_badge(state: str) -> dict:
    return {"label": choices.PlanState(state).label,
            "style": choices.PLAN_STATE_STYLE[choices.PlanState(state)]}


def _plan_status(plan: TestPlan | None):
    """The plan's live status (the rule's, ``live_statuses``: one query)."""
    if plan is None:
        return None
    st = live_statuses(TestPlan.objects.filter(pk=plan.pk))[plan.pk]
    return {"due_on": st.due_on, "days_overdue": st.days_overdue, **_state_badge(st.state)}


def _stored_plan_status(plan: TestPlan | None):
    """The plan's due date as last written by the rule: what the plan said before the
    record being signed, which has not changed anything yet (the plan was read by this
    request, and a signing refreshes it only once committed)."""
    if plan is None:
        return None
    return {"due_on": plan.next_due_on}


def _components(plan: TestPlan | None, sif) -> list[Component]:
    """The devices of the test: the ones the plan names, or every device of the SIF (one
    query: the SIF's devices, each marked when the plan names it)."""
    qs = Component.objects.filter(subsystem__sif=sif)
    if plan is not None:
        qs = qs | Component.objects.filter(plans=plan)
        qs = qs.annotate(named=Exists(TestPlan.components.through.objects.filter(
            testplan_id=plan.pk, component_id=OuterRef("pk"))))
    devices = list(qs.select_related("subsystem", "device_type").distinct()
                   .order_by("subsystem__position", "subsystem_id", "tag"))
    named = [c for c in devices if getattr(c, "named", False)]
    return named or devices


def _steps(plan: TestPlan | None):
    """The plan's steps: those with a measured quantity ask for values, the others are
    checks to confirm; ``rules.steps_for`` says which devices each one is asked of."""
    if plan is None:
        return []
    return list(plan.steps.select_related("applies_to_type").order_by("position"))


def _initial_from(record: TestRecord | None):
    if record is None:
        return {}, {}
    header = {
        "kind": record.kind,
        "performed_at": timezone.localtime(record.performed_at).strftime("%Y-%m-%dT%H:%M"),
        "remarks": record.remarks,
        "expected_version": record.draft_version,
    }
    per_component = {}
    for r in record.results.prefetch_related("measurements"):
        data = {"as_found": r.as_found, "as_left": r.as_left, "work_done": r.work_done,
                "failure_mode": r.failure_mode, "failure_description": r.failure_description}
        for mv in r.measurements.all():
            if mv.step_id:
                data[f"v{mv.step_id}_{mv.phase}"] = f"{mv.value:g}"
        per_component[r.component_id] = data
    return header, per_component


def _component_form(data, *, component, steps, components, sif, **kwargs):
    """The form of one device, asking only for the steps that apply to it (among the
    devices of the test, ``components``)."""
    return ComponentForm(data, component=component, sif=sif, **kwargs, steps=steps_for(
        component, steps, roles_present={c.subsystem.role for c in components},
        types_present={c.device_type_id for c in components}, sif=sif))


def _build_forms(request, *, sif, plan, record=None):
    signing = request.method == "POST" and request.POST.get("action") == "sign"
    data = request.POST if request.method == "POST" else None
    header_initial, comp_initial = _initial_from(record)
    header = HeaderForm(data, initial=header_initial or {"kind": plan.kind if plan else ""},
                        extra_kind=record.kind if record else None)
    steps = _steps(plan)
    components = _components(plan, sif)
    comp_forms = [
        _component_form(data, component=c, steps=steps, components=components, sif=sif,
                        signing=signing, initial=comp_initial.get(c.pk, {}))
        for c in components
    ]
    return header, comp_forms


def _result_inputs(comp_forms):
    used, results = [], []
    for form in comp_forms:
        d = form.cleaned_data
        if not d.get("as_found") and not d.get("as_left"):
            continue  # nothing entered for this device yet
        results.append(services.ResultInput(
            component=form.component, as_found=d["as_found"], as_left=d["as_left"],
            work_done=d.get("work_done", ""), failure_mode=d.get("failure_mode", ""),
            failure_description=d.get("failure_description", ""),
            measurements=[
                services.MeasurementInput(quantity=step.measured_quantity, value=value,
                                          phase=phase, unit=step.unit, step=step)
                for (step, phase), value in sorted(form.values.items(),
                                                   key=lambda kv: (kv[0][0].position, kv[0][1]))
            ],
        ))
        used.append(form)
    return used, results


_RESULT_KEY = re.compile(r"^results\[(\d+)\]\.(\w+)$")


def _apply_service_errors(exc: ValidationError, header, used_forms):
    if not hasattr(exc, "error_dict"):
        header.add_error(None, exc.messages)
        return
    for key, msgs in exc.message_dict.items():
        match = _RESULT_KEY.match(key)
        if match and int(match[1]) < len(used_forms):
            form = used_forms[int(match[1])]
            form.add_error(match[2] if match[2] in form.fields else None, msgs)
        elif key in header.fields:
            header.add_error(key, msgs)
        else:
            header.add_error(None, msgs)


def _refreshed_plan_status(record: TestRecord):
    """The plan's due date and state as the refresh after the signing's commit has just
    written them (``followup.after_test_change``, which runs first): one read of the
    plan's columns, no second computation from the records."""
    plan = record.plan
    if plan is None:
        return None
    due_on, state = with_state(TestPlan.objects.filter(pk=plan.pk),
                               as_of=today(record.sif.unit.site)).values_list(
        "next_due_on", "state").get()
    return {"due_on": due_on, **_state_badge(state)}


def _after_sign_message(record: TestRecord, before) -> str:
    """``record``: as ``sign_record`` returned it (its plan and SIF's site loaded); called
    once the signing has committed."""
    text = "Signed. The record is now read-only and waits for a verifier's countersignature."
    after = _refreshed_plan_status(record)
    if after and after["due_on"]:
        text += f" The next test of this plan is due {after['due_on']:%Y-%m-%d} ({after['label']})"
        if before and before["due_on"] and before["due_on"] != after["due_on"]:
            text += f"; it was due {before['due_on']:%Y-%m-%d}"
        text += "."
    return text


def _entry(request, *, sif, plan, record=None):
    """GET: show the entry form. POST: save the draft (and sign when asked)."""
    header, comp_forms = _build_forms(request, sif=sif, plan=plan, record=record)
    upload_errors: list[str] = []
    stale = False
    password_error = ""
    if request.method == "POST":
        token = request.POST.get("form_token", "")
        valid = header.is_valid()
        valid = all([form.is_valid() for form in comp_forms]) and valid  # noqa: C419 (validate every form)
        uploads = request.FILES.getlist("attachments")
        checked = []
        for upload in uploads:
            try:
                checked.append((upload, *check_upload(upload)))
            except ValidationError as exc:
                upload_errors.extend(exc.messages)
        action = request.POST.get("action", "save")
        if action == "sign" and not request.POST.get("password"):
            password_error = "Enter your password to sign."
        if valid and not upload_errors and not password_error:
            used, results = _result_inputs(comp_forms)
            if action == "sign" and not results:
                header.add_error(None, "Record at least one device before signing.")
            else:
                common = {"user": request.user, "sif": sif, "plan": plan,
                          "kind": header.cleaned_data["kind"],
                          "performed_at": header.cleaned_data["performed_at"],
                          "remarks": header.cleaned_data["remarks"], "results": results}
                try:
                    # The draft and its files are written together. Without files the
                    # services' own blocks suffice: a failed write leaves nothing.
                    with transaction.atomic() if checked else contextlib.nullcontext():
                        if record is None and TOKEN_RE.match(token):
                            # A form sent twice saves once (the one rule, also the API's).
                            saved, created = services.save_draft_once(client_key=token,
                                                                      **common)
                        else:
                            saved = services.save_draft(
                                **common, record=record,
                                expected_version=header.cleaned_data["expected_version"]
                                if record else None,
                                supersedes=record.supersedes if record else None,
                                correction_reason=record.correction_reason if record else "",
                                client_key=record.client_key if record else None)
                        created = saved.was_written
                        for upload, content_type, digest in (checked if created else ()):
                            services.add_attachment(
                                user=request.user, record=saved, file=upload,
                                original_name=upload.name, content_type=content_type,
                                size_bytes=upload.size, sha256=digest)
                except services.StaleDraftError as exc:
                    stale = True
                    header.add_error(None, exc.messages)
                except services.KeyReusedError:
                    header.add_error(None, "This form was already sent with other entries. "
                                           "Open the saved draft from your worklist.")
                except ValidationError as exc:
                    _apply_service_errors(exc, header, used)
                else:
                    if not created:
                        messages.info(request, "This test was already saved (the form was "
                                               "sent twice); nothing was duplicated.")
                        return redirect("field:record_detail" if saved.is_signed
                                        else "field:record_edit", pk=saved.pk)
                    if action != "sign":
                        messages.success(request, "Draft saved.")
                        return redirect("field:record_edit", pk=saved.pk)
                    before = _stored_plan_status(plan)
                    try:
                        signed = services.sign_record(saved, request.user,
                                                      request.POST["password"])
                    except ValidationError as exc:
                        messages.error(request, " ".join(exc.messages)
                                       + " Your entries are saved as a draft.")
                        return redirect(reverse("field:record_edit", args=[saved.pk]) + "#sign")
                    # After the commit and the refresh of the plan it triggers.
                    transaction.on_commit(lambda: messages.success(
                        request, _after_sign_message(signed, before)))
                    return redirect("field:record_detail", pk=signed.pk)
    if stale:
        record.refresh_from_db()
    expected_version = record.draft_version if record and (stale or request.method == "GET") \
        else request.POST.get("expected_version", "")
    attachments = list(record.attachments.all()) if record else []
    has_errors = bool(header.errors or upload_errors or password_error
                      or any(f.errors for f in comp_forms))
    if has_errors:
        for form in comp_forms:  # without JavaScript, the proposals show after submit
            form.apply_proposals()
    return render(request, "register/field/entry.html", {
        "sif": sif, "plan": plan, "record": record, "header": header,
        "comp_forms": comp_forms, "upload_errors": upload_errors,
        "password_error": password_error, "stale": stale,
        "expected_version": expected_version, "attachments": attachments,
        "plan_status": _plan_status(plan), "has_errors": has_errors,
        "max_mb": f"{_max_bytes() / 1048576:g}",
    }, status=400 if has_errors else 200)


def _max_bytes():
    from django.conf import settings

    return settings.ATTACHMENT_MAX_BYTES


# ---------------------------------------------------------------------------------------
# The field search
# ---------------------------------------------------------------------------------------

SEPARATORS = ("-", " ", "_", "/", ".")
SEPARATORS_RE = re.compile(r"[-\s_/.]+")
MAX_TERMS = 6


def search_terms(text: str) -> list[str]:
    """The words of a search; a word of separators only ("-") is dropped."""
    return [w for w in text.split() if SEPARATORS_RE.sub("", w)][:MAX_TERMS]


def _compact(expression):
    """A tag in capitals without its separators: "xv101", "XV 101" and "XV-101" alike."""
    for sep in SEPARATORS:
        expression = Replace(expression, Value(sep), Value(""))
    return Upper(expression)


def _tag_q(field: str, compact: str, term: str) -> Q:
    """``field`` (a tag), or its ``compact`` annotation, holds ``term``."""
    return Q(**{f"{field}__icontains": term}) | Q(**{
        f"{compact}__contains": SEPARATORS_RE.sub("", term).upper()})


def _devices_matching(qs, terms: list[str]):
    """The components of ``qs`` whose tag holds any of ``terms``."""
    match = Q()
    for term in terms:
        match |= _tag_q("tag", "tag_compact", term)
    return qs.annotate(tag_compact=_compact(F("tag"))).filter(match)


def matching_plans(plans, terms: list[str]):
    """The plans a technician's search finds. Every word must be found in one of: the
    SIF's tag or name (the name holds the equipment, e.g. "desalter V-1001"), the code or
    name of its unit, or the tag of a device of the test (the devices the plan names, or
    every device of the SIF when it names none). Tags also match without separators
    ("lt101a" finds LT-101A); case never matters."""
    if not terms:
        return plans
    through = TestPlan.components.through.objects
    any_named = through.values("testplan_id")
    plans = plans.annotate(sif_tag_compact=_compact(F("sif__tag")))
    for term in terms:
        devices = _devices_matching(Component.objects.all(), [term])
        plans = plans.filter(
            _tag_q("sif__tag", "sif_tag_compact", term) | Q(sif__name__icontains=term)
            | Q(sif__unit__code__icontains=term) | Q(sif__unit__name__icontains=term)
            | Q(pk__in=through.filter(component__in=devices.values("pk"))
                .values("testplan_id"))
            | (Q(sif_id__in=devices.values("subsystem__sif_id")) & ~Q(pk__in=any_named)))
    return plans


# ---------------------------------------------------------------------------------------
# Views
# ---------------------------------------------------------------------------------------


@login_required
def worklist(request):
    user = request.user
    if not can_somewhere(user, Action.RECORD_TEST):
        if can_somewhere(user, Action.VERIFY_TEST):
            return redirect("field:verify_queue")
        raise PermissionDenied("Only technicians and leads record tests.")
    plans = TestPlan.objects.restrict(user, Action.RECORD_TEST).filter(
        sif__life_stage=choices.LifeStage.IN_SERVICE)
    q = request.GET.get("q", "").strip()[:60]
    terms = search_terms(q)
    plans = matching_plans(plans, terms)
    plans = plans.select_related("sif__unit").order_by(
        F("next_due_on").asc(nulls_last=True), "sif__tag", "name")
    page = Paginator(plans, PER_PAGE).get_page(request.GET.get("page"))
    ids = [p.pk for p in page]
    statuses = live_statuses(TestPlan.objects.filter(pk__in=ids))
    matched: dict[int, list[str]] = {}
    if terms and ids:
        for sif_id, tag in _devices_matching(Component.objects.filter(
                subsystem__sif_id__in={p.sif_id for p in page}), terms).values_list(
                "subsystem__sif_id", "tag").order_by("subsystem__sif_id", "tag")[:200]:
            matched.setdefault(sif_id, []).append(tag)
    rows = []
    for plan in page:
        st = statuses.get(plan.pk)
        rows.append({"plan": plan, "due_on": st.due_on if st else None,
                     "days_overdue": st.days_overdue if st else 0,
                     **_state_badge(st.state if st else choices.PlanState.NO_PLAN),
                     "matched": matched.get(plan.sif_id, [])})
    drafts = TestRecord.objects.filter(performed_by=user, status=choices.RecordStatus.DRAFT
                                       ).select_related("sif", "plan")[:10]
    return render(request, "register/field/worklist.html", {
        "rows": rows, "page": page, "q": q, "drafts": drafts,
    })


@login_required
def start(request, plan_id):
    plan = get_object_or_404(TestPlan.objects.restrict(request.user).select_related(
        "sif__unit__site"), pk=plan_id)
    require(request.user, Action.RECORD_TEST, plan.sif.unit.site_id)
    return _entry(request, sif=plan.sif, plan=plan)


@login_required
@require_GET
def judge(request, plan_id, component_id):
    """The server's judgement of one device's typed values, as htmx out-of-band fragments:
    each value's verdict and reason, and the choices the judgement preselects. Nothing is
    saved. The same right as recording the test at the plan's site."""
    plan = get_object_or_404(TestPlan.objects.restrict(request.user).select_related(
        "sif__unit__site"), pk=plan_id)
    require(request.user, Action.RECORD_TEST, plan.sif.unit.site_id)
    components = _components(plan, plan.sif)
    component = next((c for c in components if c.pk == component_id), None)
    if component is None:
        raise Http404("This device is not part of the test.")
    form = _component_form(request.GET, component=component, steps=_steps(plan),
                           components=components, sif=plan.sif)
    form.apply_proposals()
    response = render(request, "register/field/_judged.html", {"cf": form})
    response["Cache-Control"] = "private, no-store"
    return response


@login_required
def record_edit(request, pk):
    record = get_object_or_404(TestRecord.objects.restrict(request.user).select_related(
        "sif__unit__site", "plan", "supersedes"), pk=pk)
    require(request.user, Action.RECORD_TEST, record.sif.unit.site_id)
    if record.is_signed:
        messages.info(request, "This record is signed and read-only. Record a correction to "
                               "change it.")
        return redirect("field:record_detail", pk=record.pk)
    if record.performed_by_id != request.user.pk:
        raise PermissionDenied("Only the person who started this draft can change it.")
    return _entry(request, sif=record.sif, plan=record.plan, record=record)


@login_required
@require_POST
def record_discard(request, pk):
    record = get_object_or_404(TestRecord.objects.restrict(request.user).select_related(
        "sif__unit__site"), pk=pk)
    try:
        services.discard_draft(record, request.user)
    except ValidationError as exc:
        messages.error(request, " ".join(exc.messages))
        return redirect("field:record_detail", pk=record.pk)
    messages.success(request, f"Draft of {record.sif.tag} discarded.")
    return redirect("field:worklist")


def _detail_context(request, record, correction_form=None):
    results = list(record.results.select_related("component__subsystem").prefetch_related(
        "measurements__step"))
    superseded_by = TestRecord.objects.filter(supersedes=record).first()
    user = request.user
    site_id = record.sif.unit.site_id
    assessment = calculations().latest_assessments([record.sif_id]).get(record.sif_id)
    return {
        "record": record, "results": results, "superseded_by": superseded_by,
        "attachments": list(record.attachments.all()),
        "plan_status": _plan_status(record.plan) if record.is_signed else None,
        "assessment": assessment,
        "can_verify": record.status == choices.RecordStatus.SIGNED
        and can(user, Action.VERIFY_TEST, site_id) and record.performed_by_id != user.pk,
        "own_record": record.performed_by_id == user.pk,
        "can_edit": not record.is_signed and record.performed_by_id == user.pk
        and can(user, Action.RECORD_TEST, site_id),
        "can_correct": record.is_signed and superseded_by is None
        and can(user, Action.RECORD_TEST, site_id),
        "correction_form": correction_form or CorrectionForm(),
        "password_form": PasswordForm(),
    }


def _record_for(request, pk):
    return get_object_or_404(TestRecord.objects.restrict(request.user).select_related(
        "sif__unit__site", "plan", "supersedes", "performed_by", "verified_by"), pk=pk)


@login_required
def record_detail(request, pk):
    record = _record_for(request, pk)
    return render(request, "register/field/record_detail.html",
                  _detail_context(request, record))


@login_required
@require_POST
def record_verify(request, pk):
    record = _record_for(request, pk)
    require(request.user, Action.VERIFY_TEST, record.sif.unit.site_id)
    if record.status == choices.RecordStatus.VERIFIED and record.verified_by_id == request.user.pk:
        messages.info(request, "You have already countersigned this record.")
        return redirect("field:record_detail", pk=record.pk)
    form = PasswordForm(request.POST)
    if not form.is_valid():
        messages.error(request, "Enter your password to countersign.")
        return redirect("field:record_detail", pk=record.pk)
    try:
        services.verify_record(record, request.user, form.cleaned_data["password"])
    except ValidationError as exc:
        messages.error(request, " ".join(exc.messages))
        return redirect("field:record_detail", pk=record.pk)
    messages.success(request, "Countersigned. The record is verified.")
    return redirect("field:record_detail", pk=record.pk)


@login_required
@require_POST
def record_correct(request, pk):
    record = _record_for(request, pk)
    require(request.user, Action.RECORD_TEST, record.sif.unit.site_id)
    form = CorrectionForm(request.POST)
    if form.is_valid():
        try:
            draft = services.start_correction(record, request.user, form.cleaned_data["reason"])
        except ValidationError as exc:
            messages.error(request, " ".join(exc.messages))
            return redirect("field:record_detail", pk=record.pk)
        messages.success(request, "Correction started: change what was wrong, then sign. The "
                                  "original stays visible and is marked as superseded.")
        return redirect("field:record_edit", pk=draft.pk)
    return render(request, "register/field/record_detail.html",
                  _detail_context(request, record, correction_form=form), status=400)


@login_required
def verify_queue(request):
    user = request.user
    if not can_somewhere(user, Action.VERIFY_TEST):
        raise PermissionDenied("Only verifiers and leads countersign tests.")
    records = (
        TestRecord.objects.restrict(user, Action.VERIFY_TEST)
        .filter(status=choices.RecordStatus.SIGNED)
        .select_related("sif", "plan")
        .annotate(failures=Count("results", filter=Q(results__as_found=choices.Verdict.FAIL)))
        .order_by("signed_at", "id")
    )
    page = Paginator(records, PER_PAGE).get_page(request.GET.get("page"))
    return render(request, "register/field/verify_queue.html", {"page": page})


@login_required
def attachment_download(request, pk):
    att = get_object_or_404(Attachment.objects.restrict(request.user), pk=pk)
    try:
        handle = att.file.open("rb")
    except FileNotFoundError as exc:
        raise Http404("The file is missing from storage.") from exc
    altered = attachment_altered(att)
    if altered:
        handle.close()
        return render(request, "register/audit/attachment_altered.html",
                      {"att": att, "why": altered}, status=410)
    response = FileResponse(handle, as_attachment=True, filename=att.original_name,
                            content_type=att.content_type or "application/octet-stream")
    response["X-Content-Type-Options"] = "nosniff"
    response["Content-Security-Policy"] = "default-src 'none'; sandbox"
    response["Cache-Control"] = "private, no-store"
    return response
