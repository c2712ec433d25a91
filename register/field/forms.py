"""Forms of the field workflow: the test header, one result per component, attachments."""

from __future__ import annotations

import datetime as dt
import hashlib
import math
import re
import uuid

from django import forms
from django.conf import settings
from django.utils import timezone

from register import choices, rules
from register.models import MAX_TEXT, Component, MeasuredValue, SafetyFunction, TestStep

FIELD_KINDS = [choices.TestKind.FULL, choices.TestKind.PARTIAL, choices.TestKind.DEMAND]
DATETIME_FORMAT = "%Y-%m-%dT%H:%M"

VERDICT_CHOICES = list(choices.Verdict.choices)
FAILURE_CHOICES = list(choices.FailureMode.choices)


def parse_number(text: str) -> float:
    """A number typed in the field: accepts a decimal comma and surrounding spaces."""
    cleaned = (text or "").strip().replace(" ", "").replace(",", ".")
    value = float(cleaned)  # ValueError for anything else
    if not math.isfinite(value):
        raise ValueError(text)
    return value


def check_measured(value: float) -> None:
    """A measured value inside the stored value's own bounds (``MeasuredValue.value``);
    raises ValidationError saying which."""
    try:
        MeasuredValue._meta.get_field("value").run_validators(value)
    except forms.ValidationError as exc:
        raise forms.ValidationError([f"The value {m}" for m in exc.messages]) from None


class HeaderForm(forms.Form):
    kind = forms.ChoiceField(label="Kind of test", widget=forms.RadioSelect)
    performed_at = forms.DateTimeField(
        label="Date and time of the test", input_formats=[DATETIME_FORMAT, "%Y-%m-%d %H:%M"],
        widget=forms.DateTimeInput(attrs={"type": "datetime-local"}, format=DATETIME_FORMAT),
        error_messages={"invalid": "Enter the date and time, e.g. 2026-03-14 09:30."},
    )
    remarks = forms.CharField(label="Remarks (optional)", required=False, max_length=MAX_TEXT,
                              widget=forms.Textarea(attrs={"rows": 2}))
    form_token = forms.CharField(widget=forms.HiddenInput)
    expected_version = forms.IntegerField(widget=forms.HiddenInput, required=False)

    def __init__(self, *args, extra_kind: str | None = None, **kwargs):
        super().__init__(*args, **kwargs)
        kinds = [(k.value, k.label) for k in FIELD_KINDS]
        if extra_kind and extra_kind not in [k for k, _ in kinds]:
            kinds.append((extra_kind, choices.TestKind(extra_kind).label))
        self.fields["kind"].choices = kinds
        if not self.is_bound and "form_token" not in self.initial:
            self.initial["form_token"] = uuid.uuid4().hex
        if not self.is_bound and "performed_at" not in self.initial:
            self.initial["performed_at"] = timezone.localtime().strftime(DATETIME_FORMAT)

    def clean_performed_at(self):
        value = self.cleaned_data["performed_at"]
        if value > timezone.now() + dt.timedelta(minutes=5):
            raise forms.ValidationError("The test date is in the future.")
        return value


class ComponentForm(forms.Form):
    """As-found / as-left verdicts, values measured on the steps, work done, failure found.

    ``steps`` are the steps that apply to this component (``rules.steps_for``): a step with
    a measured quantity asks for values (``measured``), one without is a check to confirm
    (``checks``). Values are judged by ``register.rules`` only; the page shows that
    judgement live (htmx) or after submit, and :meth:`apply_proposals` preselects what it
    proposes (verdicts, failure mode, failure description).
    """

    as_found = forms.ChoiceField(label="As found", choices=VERDICT_CHOICES, required=False,
                                 widget=forms.RadioSelect)
    as_left = forms.ChoiceField(label="As left", choices=VERDICT_CHOICES, required=False,
                                widget=forms.RadioSelect)
    work_done = forms.CharField(label="Work done", required=False, max_length=MAX_TEXT,
                                widget=forms.Textarea(attrs={"rows": 2}))
    failure_mode = forms.ChoiceField(label="Failure found", required=False,
                                     choices=[("", "No failure")] + FAILURE_CHOICES,
                                     widget=forms.RadioSelect)
    failure_description = forms.CharField(label="Failure description", required=False,
                                          max_length=MAX_TEXT,
                                          widget=forms.Textarea(attrs={"rows": 3}))

    #: Name (after the prefix) of the hidden input listing the choices the page preselected
    #: from the judgement and the technician has not changed. Page state, not a result.
    PROPOSED = "proposed"
    PROPOSABLE = ("as_found", "as_left", "failure_mode")
    #: Name of the hidden input holding the mark of a failure description the page
    #: proposed (``rules.text_mark``). Page state, not a result.
    PROPOSED_TEXT = "proposed_text"

    def __init__(self, *args, component: Component, steps: list[TestStep],
                 sif: SafetyFunction, signing: bool = False, **kwargs):
        kwargs.setdefault("prefix", f"c{component.pk}")
        super().__init__(*args, **kwargs)
        self.component, self.sif, self.signing = component, sif, signing
        self.steps = [s for s in steps if s.measured_quantity]
        self.checks = [s for s in steps if not s.measured_quantity]
        self.proposal = rules.Proposal({}, set(self._marked()), {}, self._description_mark())
        for step in self.steps:
            for phase in ("found", "left"):
                self.fields[self.value_name(step, phase)] = forms.CharField(
                    required=False, label=f"{step.measured_quantity}, as {phase}",
                    widget=forms.TextInput(attrs={"inputmode": "decimal",
                                                  "autocomplete": "off"}))

    @staticmethod
    def value_name(step: TestStep, phase: str) -> str:
        return f"v{step.pk}_{phase}"

    # -- judging, for the page ----------------------------------------------------------
    def _marked(self) -> list[str]:
        raw = self.data.get(self.add_prefix(self.PROPOSED), "") if self.is_bound else ""
        return [f for f in raw.split(",") if f in self.PROPOSABLE]

    def _description_mark(self) -> str:
        raw = self.data.get(self.add_prefix(self.PROPOSED_TEXT), "") if self.is_bound else ""
        return raw if re.fullmatch(r"[0-9a-f]{16}", raw or "") else ""

    def _shown(self, step: TestStep, phase: str) -> tuple[float | None, rules.Judgement | None]:
        """The number in the box (typed or saved) and the rule's judgement of it."""
        raw = self[self.value_name(step, phase)].value()
        if raw in (None, ""):
            return None, None
        try:
            value = parse_number(str(raw))
        except ValueError:
            return None, rules.not_a_number(str(raw))
        try:
            check_measured(value)
        except forms.ValidationError as exc:
            return None, rules.Judgement(rules.NOT_JUDGED, " ".join(exc.messages),
                                         "Not plausible")
        return value, rules.judge_measurement(step, value, sif=self.sif)

    def judgement(self, step: TestStep, phase: str) -> rules.Judgement | None:
        """The rule's judgement of the value shown in the box (typed or saved), or None."""
        return self._shown(step, phase)[1]

    def measurement_rows(self):
        """For the template: one row per step with its two bound fields and judgements."""
        return [
            {"step": step, "criterion": rules.criterion_text(step, self.sif),
             "found": self[self.value_name(step, "found")],
             "left": self[self.value_name(step, "left")],
             "found_judgement": self.judgement(step, "found"),
             "left_judgement": self.judgement(step, "left")}
            for step in self.steps
        ]

    def live_params(self) -> str:
        """The inputs the live judging request sends (htmx ``hx-params``)."""
        names = [self.add_prefix(self.value_name(s, p)) for s in self.steps
                 for p in ("found", "left")]
        names += [self.add_prefix(n) for n in (*self.PROPOSABLE, self.PROPOSED,
                                               "failure_description", self.PROPOSED_TEXT)]
        return ",".join(names)

    def apply_proposals(self) -> rules.Proposal:
        """Preselect what the judgement proposes (``rules.propose``) in the displayed
        choices; nothing is saved. The technician can change every choice."""
        outside = {"found": False, "left": False}
        found_outside = []
        for step in self.steps:
            for phase in outside:
                value, judged = self._shown(step, phase)
                if judged and judged.outside:
                    outside[phase] = True
                    found_outside.append(rules.JudgedValue(step, phase, value, judged))
        current = {n: self[n].value() or "" for n in self.PROPOSABLE}
        self.proposal = rules.propose(
            outside_found=outside["found"], outside_left=outside["left"],
            marked=self._marked(), failure_description=self["failure_description"].value(),
            description_mark=self._description_mark(), found_outside=found_outside,
            **current)
        if self.proposal.changes and self.is_bound:
            self.data = self.data.copy()
            for name, value in self.proposal.changes.items():
                self.data[self.add_prefix(name)] = value
        return self.proposal

    def proposed_fields(self) -> list[dict]:
        """The choices the last :meth:`apply_proposals` changed, with their notes."""
        return [{"bf": self[name], "note": self.proposal.notes.get(name, "")}
                for name in self.PROPOSABLE if name in self.proposal.changes]

    def proposed_description(self) -> dict | None:
        """The failure description the last :meth:`apply_proposals` wrote or withdrew."""
        if "failure_description" not in self.proposal.changes:
            return None
        return {"bf": self["failure_description"],
                "note": self.proposal.notes.get("failure_description", "")}

    @property
    def proposed_marker(self) -> str:
        return ",".join(sorted(self.proposal.marked))

    @property
    def failure_open(self) -> bool:
        """Whether the page shows the failure section open: something failed, a failure or
        work is recorded, or one of its fields has an error."""
        section = ("failure_mode", "failure_description", "work_done")
        if choices.Verdict.FAIL in (self["as_found"].value(), self["as_left"].value()):
            return True
        if any(self[name].value() for name in section):
            return True
        return self.is_bound and any(name in self.errors for name in section)

    # -- validation ---------------------------------------------------------------------
    def has_entries(self) -> bool:
        data = self.cleaned_data
        return any(data.get(k) not in (None, "") for k in data)

    def clean(self):
        data = super().clean()
        values, judged = {}, []
        for step in self.steps:
            for phase in ("found", "left"):
                name = self.value_name(step, phase)
                raw = data.get(name, "")
                if raw in ("", None):
                    continue
                try:
                    value = parse_number(raw)
                except ValueError:
                    self.add_error(name, rules.not_a_number(raw).reason)
                    continue
                try:
                    check_measured(value)
                except forms.ValidationError as exc:
                    self.add_error(name, exc.messages)
                    continue
                values[(step, phase)] = value
                judged.append(rules.JudgedValue(
                    step, phase, value, rules.judge_measurement(step, value, sif=self.sif),
                    rules.criterion_text(step, self.sif)))
        self.values = values
        anything = any(v not in (None, "") for v in data.values())
        found, left = data.get("as_found"), data.get("as_left")
        if self.signing or anything:
            if not found:
                self.add_error("as_found", "Choose pass, fail or not tested.")
            if not left:
                self.add_error("as_left", "Choose pass, fail or not tested.")
        problems = rules.result_problems(
            as_found=found, as_left=left, failure_mode=data.get("failure_mode"),
            failure_description=data.get("failure_description"),
            work_done=data.get("work_done"), judged=judged, ahead=True)
        for name, message in problems.items():
            self.add_error(name, message)
        return data


ALLOWED_UPLOADS = {
    # extension: (content type, magic-number check)
    ".jpg": ("image/jpeg", lambda h: h.startswith(b"\xff\xd8\xff")),
    ".jpeg": ("image/jpeg", lambda h: h.startswith(b"\xff\xd8\xff")),
    ".png": ("image/png", lambda h: h.startswith(b"\x89PNG\r\n\x1a\n")),
    ".gif": ("image/gif", lambda h: h[:6] in (b"GIF87a", b"GIF89a")),
    ".webp": ("image/webp", lambda h: h[:4] == b"RIFF" and h[8:12] == b"WEBP"),
    ".heic": ("image/heic", lambda h: h[4:8] == b"ftyp"),
    ".pdf": ("application/pdf", lambda h: h.startswith(b"%PDF-")),
}


def check_upload(upload) -> tuple[str, str]:
    """Return (content type, sha256) of an accepted upload; raise ValidationError otherwise."""
    name = upload.name or ""
    ext = "." + name.rsplit(".", 1)[-1].lower() if "." in name else ""
    if ext not in ALLOWED_UPLOADS:
        raise forms.ValidationError(
            f"“{name}” is not a photo or PDF. Allowed: JPEG, PNG, GIF, WebP, HEIC, PDF.")
    limit = settings.ATTACHMENT_MAX_BYTES
    if upload.size > limit:
        raise forms.ValidationError(
            f"“{name}” is {upload.size / 1048576:.1f} MB; the limit is "
            f"{limit / 1048576:.1f} MB.")
    upload.seek(0)
    head = upload.read(16)
    content_type, looks_right = ALLOWED_UPLOADS[ext]
    if not looks_right(head):
        raise forms.ValidationError(f"“{name}” does not contain what its name says ({ext}).")
    digest = hashlib.sha256()
    upload.seek(0)
    for chunk in upload.chunks():
        digest.update(chunk)
    upload.seek(0)
    return content_type, digest.hexdigest()


class CorrectionForm(forms.Form):
    reason = forms.CharField(label="Reason for the correction", max_length=MAX_TEXT,
                             widget=forms.Textarea(attrs={"rows": 2}),
                             error_messages={"required": "A correction needs a reason."})


class PasswordForm(forms.Form):
    password = forms.CharField(label="Your password", widget=forms.PasswordInput(
        attrs={"autocomplete": "current-password"}),
        error_messages={"required": "Enter your password to sign."})
