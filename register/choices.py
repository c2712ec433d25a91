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
    WITHDRAWN = "withdrawn", _("Withdrawn (test done)")


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
    DUE_SOON = "due_soon", _("Proof test due soon")
    OVERDUE = "overdue", _("Proof test overdue")
    ESCALATED = "escalated", _("Overdue proof test escalated")
    ESCALATED_2 = "escalated_2", _("Overdue proof test escalated, second level")
    BYPASS_STATE = "bypass_state", _("Bypass over its authorised time")
    BYPASS_REQUESTED = "bypass_requested", _("Bypass awaiting authorisation")
    TARGET = "target", _("SIF no longer meets its target")
    FAILURE_FOUND = "failure_found", _("Dangerous failure found")
    COUNTERSIGN = "countersign", _("Waiting for countersignature")
    DEFERRAL_REQUESTED = "deferral_requested", _("Deferral requested")
    DEFERRAL = "deferral", _("Deferral decided")
    DEFERRAL_WITHDRAWN = "deferral_withdrawn", _("Deferral withdrawn")


class ChangeCause(models.TextChoices):
    """What made a test plan's state change (``PlanStateChange.cause``)."""

    SCAN = "scan", _("Date passed (periodic scan)")
    RECORD = "record", _("Test record signed or corrected")
    DEMAND = "demand", _("Real demand recorded")
    DEFERRAL = "deferral", _("Deferral decided")
    PLAN = "plan", _("Test plan changed")


# ---------------------------------------------------------------------------------------
# Operation: bypass authorisation, demand causes, findings
# ---------------------------------------------------------------------------------------


def badge_of(choice_class, styles: dict, value: str) -> dict:
    """Label and badge style of ``value`` of a choice class whose styles are ``styles``."""
    st = choice_class(value)
    return {"label": st.label, "style": styles[st]}


class BypassAuthorisation(models.TextChoices):
    """Whether a bypass has been authorised. Derived from ``Bypass.authorised_by``."""

    PENDING = "pending", _("Awaiting authorisation")
    AUTHORISED = "authorised", _("Authorised")
    NONE = "none", _("Ended without authorisation")


BYPASS_AUTHORISATION_STYLE = {
    BypassAuthorisation.PENDING: "badge-late",
    BypassAuthorisation.AUTHORISED: "badge-ok",
    BypassAuthorisation.NONE: "badge-fail",
}


def bypass_authorisation_badge(state: str) -> dict:
    return badge_of(BypassAuthorisation, BYPASS_AUTHORISATION_STYLE, state)


class DemandKind(models.TextChoices):
    """What a trip was: the process called for it, or it came without a process demand."""

    REAL = "real", _("Real demand (the process called for the trip)")
    SPURIOUS = "spurious", _("Spurious trip (no process demand)")


class DemandCause(models.TextChoices):
    """What caused a demand or a spurious trip (one list, for the demand and trip rates)."""

    PROCESS_UPSET = "process_upset", _("Process upset")
    EQUIPMENT = "equipment", _("Failure of other plant equipment or the control system")
    OPERATOR = "operator", _("Operator action or error")
    EXTERNAL = "external", _("External event (utilities, weather)")
    INSTRUMENT = "instrument", _("Fault of a SIF device (transmitter, wiring, valve)")
    MAINTENANCE = "maintenance", _("Maintenance or testing activity")
    UNKNOWN = "unknown", _("Not known yet")
    NOT_RECORDED = "not_recorded", _("Not recorded")


class DeviceOutcome(models.TextChoices):
    """What one device did on a demand or trip."""

    ACTED = "acted", _("Acted")
    FAILED = "failed", _("Failed to act")
    NOT_INVOLVED = "none", _("Not involved / not known")


class FindingSource(models.TextChoices):
    TEST = "test", _("Test record")
    DEMAND = "demand", _("Real demand or trip")


class FindingStatus(models.TextChoices):
    OPEN = "open", _("Open")
    CLOSED = "closed", _("Closed")
    WITHDRAWN = "withdrawn", _("Withdrawn (record corrected)")


FINDING_STATUS_STYLE = {
    FindingStatus.OPEN: "badge-late",
    FindingStatus.CLOSED: "badge-ok",
    FindingStatus.WITHDRAWN: "badge-neutral",
}


def finding_status_badge(status: str) -> dict:
    return badge_of(FindingStatus, FINDING_STATUS_STYLE, status)
