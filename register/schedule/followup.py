"""Follow-up work after a write: refresh the due-date caches and recompute the SIF.

Both run only after the surrounding transaction commits, so a rolled-back write leaves
no trace and a task never reads uncommitted rows. ``suspended()`` lets bulk loaders
(import, demo) switch this off and refresh once at the end.
"""

from __future__ import annotations

import contextlib
import contextvars

from celery import current_app
from django.db import transaction

_suspended = contextvars.ContextVar("followup_suspended", default=False)


@contextlib.contextmanager
def suspended():
    token = _suspended.set(True)
    try:
        yield
    finally:
        _suspended.reset(token)


def after_test_change(sif_id: int) -> None:
    """A test, demand, bypass or design change touched this SIF.

    Several changes to the same SIF in one transaction (a bulk post, a sign then a
    verify) lead to one refresh after the commit.
    """
    if _suspended.get():
        return
    connection = transaction.get_connection()
    state = getattr(connection, "_ledger_pending", None)
    if state is not None and connection.in_atomic_block and any(
            entry[1] is state[1] for entry in connection.run_on_commit):
        state[0].add(sif_id)  # a refresh is already registered for this transaction
        return
    pending = {sif_id}

    def run():
        if getattr(connection, "_ledger_pending", None) is state_now:
            connection._ledger_pending = None
        for pending_id in sorted(pending):
            _refresh_sif(pending_id)

    state_now = (pending, run)
    connection._ledger_pending = state_now
    transaction.on_commit(run)


def after_plan_change(plan_id: int) -> None:
    if _suspended.get():
        return
    from register.models import TestPlan

    def run():
        sif_id = TestPlan.objects.filter(pk=plan_id).values_list("sif_id", flat=True).first()
        if sif_id:
            _refresh_sif(sif_id)

    transaction.on_commit(run)


def _refresh_sif(sif_id: int) -> None:
    from register.models import TestPlan
    from register.schedule.due import refresh_plans

    refresh_plans(TestPlan.objects.filter(sif_id=sif_id))
    # The register reaches the calculations by task name only (register.calculations).
    current_app.tasks["calcs.recompute_sif"].delay(sif_id, "record changed")
    from register.schedule.services import withdraw_done_deferrals  # a test done: moot requests

    withdraw_done_deferrals(sif_id)
