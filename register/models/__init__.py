"""The register's models, by aggregate: sites and people (``site``), hazard scenarios
(``hazard``), the design of each SIF (``design``), signed test records (``records``),
operation (``operations``), notifications (``notifications``) and the change chain and
evidence packs (``audit``). Shared validators and querysets are in ``base``.

Every model is importable from here; migrations name the validators by this path.
"""
from register.models.audit import (
    GENESIS_HASH,
    ChainAppendOnlyError,
    ChainCheckpoint,
    ChainEntry,
    ChainHead,
    EvidencePack,
    _AppendOnlyQuerySet,
)
from register.models.base import (
    MAX_TEXT,
    SiteScopedQuerySet,
    _plausible_rate,
    non_negative,
    plausible_rate,
    positive_frequency,
    probability,
)
from register.models.design import (
    Component,
    DeviceType,
    SafetyFunction,
    Subsystem,
    TestPlan,
    TestStep,
    not_decommissioned,
)
from register.models.exports import (
    ExportJob,
)
from register.models.hazard import (
    ConditionalModifier,
    HazardScenario,
    InitiatingCause,
    ProtectionLayer,
)
from register.models.imports import (
    ImportJob,
)
from register.models.notifications import (
    Notification,
)
from register.models.operations import (
    MAX_BYPASS_HOURS,
    Bypass,
    Deferral,
    Demand,
    Finding,
)
from register.models.records import (
    Attachment,
    ComponentResult,
    MeasuredValue,
    PartOfRecord,
    SignedRecordError,
    TestRecord,
    in_force,
)
from register.models.site import (
    Membership,
    PlantUnit,
    Site,
)

__all__ = [
    "GENESIS_HASH",
    "MAX_BYPASS_HOURS",
    "MAX_TEXT",
    "Attachment",
    "Bypass",
    "ChainAppendOnlyError",
    "ChainCheckpoint",
    "ChainEntry",
    "ChainHead",
    "Component",
    "ComponentResult",
    "ConditionalModifier",
    "Deferral",
    "Demand",
    "DeviceType",
    "EvidencePack",
    "ExportJob",
    "Finding",
    "HazardScenario",
    "ImportJob",
    "InitiatingCause",
    "MeasuredValue",
    "Membership",
    "Notification",
    "PartOfRecord",
    "PlantUnit",
    "ProtectionLayer",
    "SafetyFunction",
    "SignedRecordError",
    "Site",
    "SiteScopedQuerySet",
    "Subsystem",
    "TestPlan",
    "TestRecord",
    "TestStep",
    "_AppendOnlyQuerySet",
    "_plausible_rate",
    "in_force",
    "non_negative",
    "not_decommissioned",
    "plausible_rate",
    "positive_frequency",
    "probability",
]
