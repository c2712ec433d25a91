"""Forms of the operations pages. They read and parse what was typed (dates and times in
the site's time zone, hours as a finite number, one outcome per device); the rules of a
bypass, a demand and a finding are the services' and the models'."""

from __future__ import annotations

import datetime as dt
import math

from django import forms
from django.core.exceptions import ValidationError
from django.utils import timezone

from register import choices
from register.days import zone_of
from register.models import MAX_TEXT, Component, Membership, SafetyFunction

LOCAL_FORMAT = "%Y-%m-%dT%H:%M"


def local_input(moment: dt.datetime | None, site) -> str:
    """A moment as the value of a ``datetime-local`` input on the site's clock."""
    return moment.astimezone(zone_of(site)).strftime(LOCAL_FORMAT) if moment else ""


def parse_local(text: str, site, label: str) -> dt.datetime:
    """A ``datetime-local`` value (site clock) as an aware moment."""
    text = (text or "").strip().replace(" ", "T")
    for fmt in (LOCAL_FORMAT, LOCAL_FORMAT + ":%S"):
        try:
            return dt.datetime.strptime(text, fmt).replace(tzinfo=zone_of(site))
        except ValueError:
            continue
    raise ValidationError(f"Enter {label} as a date and time (YYYY-MM-DD HH:MM).")


def parse_hours(text: str) -> float:
    """A finite number of hours (the range is the model's rule)."""
    text = (text or "").strip().replace(",", ".")
    try:
        value = float(text)
    except ValueError:
        raise ValidationError("Give the expected duration as a number of hours, e.g. 8.") \
            from None
    if not math.isfinite(value):
        raise ValidationError("Give the expected duration as a number of hours, e.g. 8.")
    return value


def sif_devices(sif: SafetyFunction) -> list[Component]:
    return list(Component.objects.filter(subsystem__sif=sif).select_related("subsystem")
                .order_by("subsystem__position", "subsystem_id", "tag"))


class _SiteForm(forms.Form):
    def __init__(self, *args, sif: SafetyFunction, **kwargs):
        self.sif = sif
        self.site = sif.unit.site
        super().__init__(*args, **kwargs)

    def _moment(self, name: str, label: str) -> dt.datetime:
        return parse_local(self.data.get(name, ""), self.site, label)


class BypassForm(_SiteForm):
    component = forms.ChoiceField(label="What is bypassed", required=False,
                                  widget=forms.RadioSelect)
    started_at = forms.CharField(label="Put in place at")
    authorised_hours = forms.CharField(label="Expected duration (hours)")
    reason = forms.CharField(label="Reason", widget=forms.Textarea(attrs={"rows": 3}),
                             required=False, max_length=MAX_TEXT)
    compensating_measures = forms.CharField(label="Compensating measures", required=False,
                                            max_length=MAX_TEXT,
                                            widget=forms.Textarea(attrs={"rows": 3}))
    measures_effective = forms.BooleanField(
        label="The compensating measures give protection equivalent to the SIF",
        required=False)

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self.devices = sif_devices(self.sif)
        self.fields["component"].choices = [("", f"The whole of {self.sif.tag}")] + [
            (str(c.pk), f"{c.tag} only ({c.subsystem.name}, {c.subsystem.voting})")
            for c in self.devices]

    def clean_started_at(self):
        return self._moment("started_at", "when the bypass was put in place")

    def clean_authorised_hours(self):
        return parse_hours(self.cleaned_data["authorised_hours"])

    def clean_component(self):
        value = self.cleaned_data.get("component") or ""
        if not value:
            return None
        return next(c for c in self.devices if str(c.pk) == value)


class CloseBypassForm(_SiteForm):
    ended_at = forms.CharField(label="Removed at")

    def clean_ended_at(self):
        return self._moment("ended_at", "when the bypass was removed")


class DemandForm(_SiteForm):
    kind = forms.ChoiceField(label="What happened", choices=choices.DemandKind.choices,
                             widget=forms.RadioSelect,
                             error_messages={"required": "Say whether it was a real demand "
                                                         "or a spurious trip."})
    occurred_at = forms.CharField(label="When")
    successful = forms.ChoiceField(
        label="Did the SIF take the plant to its safe state?", required=False,
        choices=[("yes", "Yes"), ("no", "No")], widget=forms.RadioSelect)
    cause = forms.ChoiceField(
        label="Cause", choices=[("", "Choose the cause")] + [
            c for c in choices.DemandCause.choices if c[0] != choices.DemandCause.NOT_RECORDED],
        error_messages={"required": "Choose the cause (or “Not known yet”)."})
    description = forms.CharField(label="What happened, in a few words", max_length=MAX_TEXT,
                                  widget=forms.Textarea(attrs={"rows": 3}),
                                  error_messages={"required": "Describe what happened."})

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self.devices = sif_devices(self.sif)
        for c in self.devices:
            self.fields[f"dev-{c.pk}"] = forms.ChoiceField(
                label=c.tag, choices=choices.DeviceOutcome.choices, widget=forms.RadioSelect,
                initial=choices.DeviceOutcome.NOT_INVOLVED, required=False)

    def clean_occurred_at(self):
        return self._moment("occurred_at", "when it happened")

    def clean(self):
        data = super().clean()
        spurious = data.get("kind") == choices.DemandKind.SPURIOUS
        answer = data.get("successful") or ""
        if not answer and not spurious and data.get("kind"):
            self.add_error("successful", "Say whether the SIF took the plant to its safe "
                                         "state.")
        data["successful"] = answer != "no" if (answer or spurious) else None
        data["spurious"] = spurious
        acted, failed = [], []
        for c in self.devices:
            outcome = data.get(f"dev-{c.pk}") or choices.DeviceOutcome.NOT_INVOLVED
            if outcome == choices.DeviceOutcome.ACTED:
                acted.append(c)
            elif outcome == choices.DeviceOutcome.FAILED:
                failed.append(c)
        data["components_exercised"], data["failed_components"] = acted, failed
        return data

    def device_fields(self):
        return [(c, self[f"dev-{c.pk}"]) for c in self.devices]


def site_people(site_id: int, roles=(choices.Role.LEAD, choices.Role.TECHNICIAN)):
    """Active people holding one of ``roles`` at the site, by name."""
    users = {m.user.pk: m.user for m in Membership.objects.filter(
        site_id=site_id, role__in=roles, user__is_active=True).select_related("user")}
    return sorted(users.values(), key=lambda u: (u.get_full_name() or u.username).lower())


class FindingForm(forms.Form):
    owner = forms.ChoiceField(label="Owner")
    corrective_action = forms.CharField(label="Corrective work", required=False,
                                        max_length=MAX_TEXT,
                                        widget=forms.Textarea(attrs={"rows": 3}))
    retest_due_on = forms.DateField(label="Retest due by", required=False,
                                    widget=forms.DateInput(attrs={"type": "date"}),
                                    error_messages={"invalid": "Enter the date as "
                                                               "YYYY-MM-DD."})

    def __init__(self, *args, finding, **kwargs):
        super().__init__(*args, **kwargs)
        self.people = site_people(finding.sif.unit.site_id)
        self.fields["owner"].choices = [("", "Choose")] + [
            (str(u.pk), u.get_full_name() or u.username) for u in self.people]

    def clean_owner(self):
        value = self.cleaned_data.get("owner")
        return next((u for u in self.people if str(u.pk) == value), None)


class CloseFindingForm(forms.Form):
    retest = forms.ChoiceField(label="Signed passing retest", required=False)
    reason = forms.CharField(label="Or: why it is closed without a retest", required=False,
                             max_length=MAX_TEXT,
                             widget=forms.Textarea(attrs={"rows": 3}))

    def __init__(self, *args, candidates, **kwargs):
        super().__init__(*args, **kwargs)
        self.candidates = candidates
        self.fields["retest"].choices = [("", "No retest")] + [
            (str(r.pk), f"{r.performed_at:%Y-%m-%d} {r.get_kind_display()} #{r.pk}")
            for r in candidates]

    def clean_retest(self):
        value = self.cleaned_data.get("retest")
        return next((r for r in self.candidates if str(r.pk) == value), None)


def now_input(site) -> str:
    return local_input(timezone.now(), site)
