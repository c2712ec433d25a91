"""Forms of the lead's pages: design changes under change control, deferral decisions,
spreadsheet import."""

from __future__ import annotations

from django import forms

from register.models import Component, Site, Subsystem, TestPlan


class ChangeControlMixin(forms.Form):
    reason = forms.CharField(label="Reason for the change", max_length=300,
                             widget=forms.TextInput(attrs={"autocomplete": "off"}))
    reference = forms.CharField(label="Change request reference", max_length=40,
                                help_text="The number of the approved change request.",
                                widget=forms.TextInput(attrs={"autocomplete": "off"}))

    def clean(self):
        data = super().clean()
        for name in ("reason", "reference"):
            if name in data and not data[name].strip():
                self.add_error(name, "Required for any design change.")
        return data


class ComponentChangeForm(ChangeControlMixin, forms.ModelForm):
    class Meta:
        model = Component
        fields = ("lambda_du_per_hour", "lambda_dd_per_hour", "lambda_s_per_hour",
                  "proof_test_coverage", "partial_test_coverage",)


class SubsystemChangeForm(ChangeControlMixin, forms.ModelForm):
    class Meta:
        model = Subsystem
        fields = ("voting", "beta", "beta_d",)
        labels = {"beta": "Common cause factor β (undetected failures)",
                  "beta_d": "Common cause factor βD (detected failures)"}


class PlanChangeForm(ChangeControlMixin, forms.ModelForm):
    class Meta:
        model = TestPlan
        fields = ("interval_months", "coverage", "components", "effective_from")
        widgets = {"effective_from": forms.DateInput(attrs={"type": "date"}),
                   "components": forms.CheckboxSelectMultiple}
        labels = {"components": "Devices the plan tests"}
        help_texts = {"effective_from": "Empty: from today. Due dates that have already "
                                        "fallen stay under the plan then in force.",
                      "components": "None ticked: the whole SIF."}

    def clean_coverage(self):
        value = self.cleaned_data.get("coverage")
        return self.instance.coverage if value is None else value

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self.initial["effective_from"] = None  # a new change: from today unless given
        sif_id = self.instance.sif_id if self.instance and self.instance.pk else None
        self.fields["components"].queryset = Component.objects.filter(
            subsystem__sif_id=sif_id).select_related("subsystem").order_by(
            "subsystem__position", "tag")
        self.fields["components"].required = False
        self.fields["coverage"].required = False
        self.fields["coverage"].help_text = (
            "Share of dangerous undetected failures the procedure reveals (0 to 1). Tests "
            "done from the in-force date reveal this share, each device at most its own "
            "proof-test coverage; tests done before keep theirs. Empty: unchanged.")
        self.fields["components"].label_from_instance = lambda c: (
            f"{c.tag} · {c.subsystem.get_role_display().lower()}")


FORMS = {"component": (Component, ComponentChangeForm),
         "subsystem": (Subsystem, SubsystemChangeForm),
         "plan": (TestPlan, PlanChangeForm)}


class ImportForm(forms.Form):
    site = forms.ModelChoiceField(queryset=Site.objects.none())
    file = forms.FileField(label="Spreadsheet (.xlsx or .csv)")
    reference = forms.CharField(label="Change request reference", max_length=40)

    def __init__(self, *args, sites=None, **kwargs):
        super().__init__(*args, **kwargs)
        self.fields["site"].queryset = sites if sites is not None else Site.objects.none()
        if sites is not None and len(sites) == 1:
            self.fields["site"].initial = sites[0].pk

    def clean_file(self):
        f = self.cleaned_data["file"]
        if not f.name.lower().endswith((".xlsx", ".csv")):
            raise forms.ValidationError("Give a .xlsx or .csv file.")
        if f.size > 10 * 1024 * 1024:
            raise forms.ValidationError("The file is larger than 10 MB.")
        return f
