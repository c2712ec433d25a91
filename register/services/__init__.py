"""Every write that matters, one function each.

Each service takes the acting user (and a reason where the record is controlled), checks
the right in ``register.permissions``, validates with ``full_clean()``, writes inside one
transaction, leaves a history entry attributed to the actor, and enqueues follow-up work
(due dates, recompute) only after the transaction commits. Forms, the API, the import and
the demo loader all write through here.
"""

from register.services.base import (
    Reauthenticated,
    _sif_id_of,
    check_references,
    confirm_password,
)
from register.services.design import (
    StaleVersionError,
    create_design,
    current_version,
    update_design,
    with_versions,
)
from register.services.operations import (
    authorise_bypass,
    close_bypass,
    open_bypass,
    record_demand,
)
from register.services.records import (
    KeyReusedError,
    MeasurementInput,
    ResultInput,
    StaleDraftError,
    add_attachment,
    discard_draft,
    save_draft,
    save_draft_once,
    sign_record,
    start_correction,
    verify_record,
)

__all__ = [
    "KeyReusedError",
    "MeasurementInput",
    "Reauthenticated",
    "ResultInput",
    "StaleDraftError",
    "StaleVersionError",
    "_sif_id_of",
    "add_attachment",
    "authorise_bypass",
    "check_references",
    "close_bypass",
    "confirm_password",
    "create_design",
    "current_version",
    "discard_draft",
    "open_bypass",
    "record_demand",
    "save_draft",
    "save_draft_once",
    "sign_record",
    "start_correction",
    "update_design",
    "verify_record",
    "with_versions",
]
