"""Choice lists of the register. Each state carries its label and badge style once, here.

Badge styles are names of CSS classes in ``static/css/ledger.css``; every badge also
shows its text, so a state is readable in black and white.
"""

from django.db import models
from django.utils.translation import gettext_lazy as _


class Role(models.TextChoices):
    LEAD = "lead", _("Functional-safety lead")
    TECHNICIAN = "technician", _("Technician")
    VERIFIER = "verifier", _("Verifier")
    AUDITOR = "auditor", _("Auditor")


class ConsequenceCategory(models.TextChoices):
    PEOPLE = "people", _("People")
    ENVIRONMENT = "environment", _("Environment")
    ASSET = "asset", _("Asset")


class ModifierKind(models.TextChoices):
    IGNITION = "ignition", _("Probability of ignition")
    OCCUPANCY = "occupancy", _("Probability a person is present")
    TIME_AT_RISK = "time_at_risk", _("Share of time at risk")
    OTHER = "other", _("Other conditional modifier")


class DemandMode(models.TextChoices):
    LOW = "low", _("Low demand")
    HIGH = "high", _("High demand")
    CONTINUOUS = "continuous", _("Continuous")


class LifeStage(models.TextChoices):
    DESIGN = "design", _("In design")
    IN_SERVICE = "in_service", _("In service")
    DECOMMISSIONED = "decommissioned", _("Decommissioned")


class SubsystemRole(models.TextChoices):
    SENSING = "sensing", _("Sensing")
    LOGIC = "logic", _("Logic solving")
    FINAL = "final", _("Final elements")


class DeviceClass(models.TextChoices):
    """IEC 61508-2 device complexity: type A (simple) or type B (complex)."""

    A = "A", _("Type A")
    B = "B", _("Type B")


class DataBasis(models.TextChoices):
    CERTIFICATE = "certificate", _("Certificate / safety manual")
    PRIOR_USE = "prior_use", _("Prior use (site history)")
    GENERIC = "generic", _("Generic data source")


class RateBasis(models.TextChoices):
    """Which failure rate the achieved PFDavg uses (a site setting)."""

    FIELD = "field", _("Field: each device's own record, updated from its type's plant-wide rate")
    DESIGN = "design", _("Design rate")
    BAYES = "bayes", _("Design rate updated by field data (Bayesian mean)")
    UPPER = "upper", _("Field data upper confidence bound")


class TestKind(models.TextChoices):
    SIGN_OFF = "sign_off", _("SIL verification sign-off (before installation)")
    VALIDATION = "validation", _("Validation at commissioning")
    FULL = "full", _("Full proof test")
    PARTIAL = "partial", _("Partial test")
    DEMAND = "demand", _("Real demand credited as a test")


class RecordStatus(models.TextChoices):
    DRAFT = "draft", _("Draft")
    SIGNED = "signed", _("Signed, awaiting verifier")
    VERIFIED = "verified", _("Signed and verified")


class Verdict(models.TextChoices):
    PASS = "pass", _("Pass")
    FAIL = "fail", _("Fail")
    NOT_TESTED = "not_tested", _("Not tested")


class FailureMode(models.TextChoices):
    DANGEROUS_UNDETECTED = "du", _("Dangerous, undetected (found by this test)")
    DANGEROUS_DETECTED = "dd", _("Dangerous, detected by diagnostics")
    SAFE = "safe", _("Safe failure")


class CriterionKind(models.TextChoices):
    NONE = "none", _("Observation only")
    AROUND_SETPOINT = "around_setpoint", _("Within a tolerance of a target value")
    AT_MOST = "at_most", _("At most a limit")
    AT_LEAST = "at_least", _("At least a limit")


class DeferralStatus(models.TextChoices):
    PENDING = "pending", _("Awaiting decision")
    APPROVED = "approved", _("Approved")
    REJECTED = "rejected", _("Rejected")


class PlanState(models.TextChoices):
    """Where a test plan stands against its due date. Computed; stored only as a cache."""

    ON_TRACK = "on_track", _("Not yet due")
    DUE_SOON = "due_soon", _("Due soon")
    OVERDUE = "overdue", _("Overdue")
    ESCALATED = "escalated", _("Escalated")
    ESCALATED_2 = "escalated_2", _("Escalated, second level")
    NO_PLAN = "no_plan", _("Not scheduled")


PLAN_STATE_STYLE = {
    PlanState.ON_TRACK: "badge-ok",
    PlanState.DUE_SOON: "badge-soon",
    PlanState.OVERDUE: "badge-late",
    PlanState.ESCALATED: "badge-alarm",
    PlanState.ESCALATED_2: "badge-alarm2",
    PlanState.NO_PLAN: "badge-neutral",
}

# Order of severity, used for sorting and for "worst state of a SIF".
PLAN_STATE_RANK = {
    PlanState.NO_PLAN: 0,
    PlanState.ON_TRACK: 1,
    PlanState.DUE_SOON: 2,
    PlanState.OVERDUE: 3,
    PlanState.ESCALATED: 4,
    PlanState.ESCALATED_2: 5,
}


class BypassState(models.TextChoices):
    OPEN = "open", _("Open, within authorised time")
    OVERDUE = "overdue", _("Open past authorised time")
    ESCALATED = "escalated", _("Open far past authorised time")
    CLOSED = "closed", _("Closed")


BYPASS_STATE_STYLE = {
    BypassState.OPEN: "badge-soon",
    BypassState.OVERDUE: "badge-late",
    BypassState.ESCALATED: "badge-alarm",
    BypassState.CLOSED: "badge-neutral",
}


def plan_state_badge(state: str | None) -> dict:
    """Label and badge style of a plan state (no state: not scheduled)."""
    st = PlanState(state or PlanState.NO_PLAN)
    return {"label": st.label, "style": PLAN_STATE_STYLE[st]}


def bypass_state_badge(state: str) -> dict:
    st = BypassState(state)
    return {"label": st.label, "style": BYPASS_STATE_STYLE[st]}


class NotificationKind(models.TextChoices):
    PLAN_STATE = "plan_state", _("Test plan state changed")
    BYPASS_STATE = "bypass_state", _("Bypass state changed")
    DEFERRAL = "deferral", _("Deferral decision")
    TARGET = "target", _("SIF no longer meets its target")
