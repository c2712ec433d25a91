"""Forms of the field workflow: the test header, one result per component, attachments."""

from __future__ import annotations

import datetime as dt
import hashlib
import math
import uuid

from django import forms
from django.conf import settings
from django.utils import timezone

from . import choices
from .models import Component, SafetyFunction, TestStep

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


def is_timing_step(step: TestStep) -> bool:
    return step.unit.strip().lower() in ("s", "sec", "seconds") and \
        "time" in step.measured_quantity.lower()


def judge(step: TestStep, sif: SafetyFunction, value: float) -> bool | None:
    """The step's own criterion, and for a timing step also the SIF's required response time."""
    verdict = step.judge(value)
    if is_timing_step(step) and sif.required_response_time_s is not None:
        within_time = value <= sif.required_response_time_s
        verdict = within_time if verdict is None else (verdict and within_time)
    return verdict


def criterion_text(step: TestStep, sif: SafetyFunction) -> str:
    parts = [step.describe_criterion()] if step.describe_criterion() else []
    if is_timing_step(step) and sif.required_response_time_s is not None:
        parts.append(f"SIF response ≤ {sif.required_response_time_s:g} s")
    return "; ".join(parts)


class HeaderForm(forms.Form):
    kind = forms.ChoiceField(label="Kind of test", widget=forms.RadioSelect)
    performed_at = forms.DateTimeField(
        label="Date and time of the test", input_formats=[DATETIME_FORMAT, "%Y-%m-%d %H:%M"],
        widget=forms.DateTimeInput(attrs={"type": "datetime-local"}, format=DATETIME_FORMAT),
        error_messages={"invalid": "Enter the date and time, e.g. 2026-03-14 09:30."},
    )
    remarks = forms.CharField(label="Remarks (optional)", required=False,
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
    """As-found / as-left verdicts, values measured on the steps, work done, failure found."""

    as_found = forms.ChoiceField(label="As found", choices=VERDICT_CHOICES, required=False,
                                 widget=forms.RadioSelect)
    as_left = forms.ChoiceField(label="As left", choices=VERDICT_CHOICES, required=False,
                                widget=forms.RadioSelect)
    work_done = forms.CharField(label="Work done", required=False,
                                widget=forms.Textarea(attrs={"rows": 2}))
    failure_mode = forms.ChoiceField(label="Failure found", required=False,
                                     choices=[("", "No failure")] + FAILURE_CHOICES,
                                     widget=forms.RadioSelect)
    failure_description = forms.CharField(label="Failure description", required=False,
                                          widget=forms.Textarea(attrs={"rows": 2}))

    def __init__(self, *args, component: Component, steps: list[TestStep],
                 sif: SafetyFunction, signing: bool = False, **kwargs):
        kwargs.setdefault("prefix", f"c{component.pk}")
        super().__init__(*args, **kwargs)
        self.component, self.steps, self.sif, self.signing = component, steps, sif, signing
        for step in steps:
            for phase in ("found", "left"):
                self.fields[self.value_name(step, phase)] = forms.CharField(
                    required=False, label=f"{step.measured_quantity}, as {phase}",
                    widget=forms.TextInput(attrs={"inputmode": "decimal",
                                                  "autocomplete": "off"}))

    @staticmethod
    def value_name(step: TestStep, phase: str) -> str:
        return f"v{step.pk}_{phase}"

    def measurement_rows(self):
        """For the template: one row per step with its two bound fields."""
        return [
            {"step": step, "criterion": criterion_text(step, self.sif),
             "max_time": self.sif.required_response_time_s if is_timing_step(step) else None,
             "found": self[self.value_name(step, "found")],
             "left": self[self.value_name(step, "left")]}
            for step in self.steps
        ]

    def has_entries(self) -> bool:
        data = self.cleaned_data
        return any(data.get(k) not in (None, "") for k in data)

    def clean(self):
        data = super().clean()
        values = {}
        for step in self.steps:
            for phase in ("found", "left"):
                name = self.value_name(step, phase)
                raw = data.get(name, "")
                if raw in ("", None):
                    continue
                try:
                    values[(step, phase)] = parse_number(raw)
                except ValueError:
                    self.add_error(name, f"“{raw}” is not a number. Type digits, e.g. 12.5.")
        self.values = values
        anything = any(v not in (None, "") for v in data.values())
        found, left = data.get("as_found"), data.get("as_left")
        if self.signing or anything:
            if not found:
                self.add_error("as_found", "Choose pass, fail or not tested.")
            if not left:
                self.add_error("as_left", "Choose pass, fail or not tested.")
        for (step, phase), value in values.items():
            ok = judge(step, self.sif, value)
            verdict = found if phase == "found" else left
            if ok is False and verdict == choices.Verdict.PASS:
                self.add_error(
                    f"as_{phase}",
                    f"The {step.measured_quantity.lower()} as {phase} ({value:g} {step.unit}) "
                    f"is outside {criterion_text(step, self.sif)}: mark it fail, or correct "
                    "the value.")
        if found == choices.Verdict.FAIL and not data.get("failure_mode"):
            self.add_error("failure_mode", "Classify the failure found (DU, DD or safe).")
        if (found == choices.Verdict.FAIL or data.get("failure_mode")) and \
                not data.get("failure_description", "").strip():
            self.add_error("failure_description", "Describe the failure found.")
        if left == choices.Verdict.FAIL and not data.get("work_done", "").strip():
            self.add_error("work_done", "A device left failed needs a note of what was done "
                                        "and what follows (bypass, work order).")
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
    reason = forms.CharField(label="Reason for the correction",
                             widget=forms.Textarea(attrs={"rows": 2}),
                             error_messages={"required": "A correction needs a reason."})


class PasswordForm(forms.Form):
    password = forms.CharField(label="Your password", widget=forms.PasswordInput(
        attrs={"autocomplete": "current-password"}),
        error_messages={"required": "Enter your password to sign."})
