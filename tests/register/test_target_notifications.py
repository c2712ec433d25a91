"""A recompute's verdict change is written as an append-only row; a SIF whose verdict turns
to "does not meet target" is notified from it to its site's leads, once per change
(register.inbox.notices.notify_verdict_changes), and e-mailed once by its own task."""

from __future__ import annotations

import datetime as dt
import itertools

import pytest
from django.core import mail
from django.db import IntegrityError, connection, transaction
from django.test.utils import CaptureQueriesContext
from django.utils import timezone

from calcs.engine import verdict as eng_verdict
from calcs.models import Assessment
from register import choices
from register.inbox.delivery import send_pending_emails
from register.inbox.notices import notify_verdict_changes
from register.models import Notification, SafetyFunction
from register.models.notifications import AppendOnlyError, SifVerdictChange
from tests import factories as f
from tests.conftest import need

pytestmark = pytest.mark.django_db
_minutes = itertools.count(1)
TARGET = 5e-3
FAILED_REASON = "achieved PFDavg over the last 12 months 8.00e-03 is above the target 5.00e-03"


def _assess(sif, *, achieved=2e-3, projected=3e-3):
    """Store the next assessment of ``sif``, judged by the engine's verdict."""
    v = eng_verdict.judge(target_sil=2, target_pfd_avg=TARGET, design_pfd_avg=1e-3,
                          achieved_pfd_avg_12m=achieved, observed_unavailability_12m=1e-3,
                          projected_pfd_avg=projected, architectural_sil=2,
                          systematic_capability=3)
    at = timezone.now() + dt.timedelta(minutes=next(_minutes))
    return Assessment.objects.create(
        sif=sif, computed_at=at, as_of=at, inputs_digest="0" * 64, target_pfd_avg=TARGET,
        target_sil=2, design_pfd_avg=1e-3, achieved_pfd_avg=achieved,
        observed_unavailability=1e-3, projected_pfd_avg=projected, meets_target=v.meets,
        verdict=v.as_dict())


@pytest.fixture
def plant():
    site, other = f.site("marsh"), f.site("dune")
    leads = [f.user("marsh_lead1", site=site, role=choices.Role.LEAD, email="l1@x.invalid"),
             f.user("marsh_lead2", site=site, role=choices.Role.LEAD, email="l2@x.invalid")]
    tech = f.user("marsh_tech", site=site, role=choices.Role.TECHNICIAN)
    other_lead = f.user("dune_lead", site=other, role=choices.Role.LEAD)
    sif = f.sif(f.unit(site), tag="M-101", target_pfd=TARGET, owner=tech)
    far = f.sif(f.unit(other), tag="D-201", target_pfd=TARGET)
    return {"site": site, "leads": leads, "tech": tech, "other_lead": other_lead,
            "sif": sif, "far": far}


def _notes(sif):
    return Notification.objects.filter(kind=choices.NotificationKind.TARGET,
                                       subject_key__startswith=f"target:{sif.pk}:")


def test_turning_to_fail_notifies_each_lead_once(plant, django_capture_on_commit_callbacks):
    sif = plant["sif"]
    ok = _assess(sif)
    failing = _assess(sif, achieved=8e-3)
    assert failing.meets_target is False
    with django_capture_on_commit_callbacks(execute=True):
        assert notify_verdict_changes([(ok, failing)]) == 2
    assert len(mail.outbox) == 2  # each e-mailed by its own task after the commit
    notes = _notes(sif)
    assert {n.recipient for n in notes} == set(plant["leads"])  # not the technician owner
    for n in notes:
        assert n.site == plant["site"] and n.link.startswith(f"/sifs/{sif.pk}/")
        assert n.message.startswith("M-101 ")
        assert "Does not meet its target: " + FAILED_REASON in n.message
    # The same pairs again (a retried task) create nothing.
    assert notify_verdict_changes([(ok, failing)]) == 0
    # A second recompute with the same verdict creates nothing either.
    again = _assess(sif, achieved=9e-3)
    assert notify_verdict_changes([(failing, again)]) == 0
    assert _notes(sif).count() == 2
    # Meeting the target again, then failing again, is a new change.
    back = _assess(sif)
    assert notify_verdict_changes([(again, back)]) == 0
    fails_again = _assess(sif, achieved=8e-3)
    with django_capture_on_commit_callbacks(execute=True):
        assert notify_verdict_changes([(back, fails_again)]) == 2
    assert _notes(sif).count() == 4
    assert len(mail.outbox) == 4 and not _notes(sif).filter(emailed_at__isnull=True)
    assert send_pending_emails(older_than=dt.timedelta(0)) == 0  # the sweeper: never twice
    # One row per change of the verdict, both ways; none for the same verdict again.
    rows = SifVerdictChange.objects.filter(sif=sif).order_by("id")
    assert [(r.from_meets, r.to_meets, r.assessment_id) for r in rows] == [
        (True, False, failing.pk), (False, True, back.pk), (True, False, fails_again.pk)]
    assert FAILED_REASON in rows[0].summary
    notify_verdict_changes([(back, fails_again)])
    assert rows.count() == 3


def test_verdict_change_rows_are_append_only(plant):
    sif = plant["sif"]
    notify_verdict_changes([(_assess(sif), _assess(sif, achieved=8e-3))])
    row = SifVerdictChange.objects.get(sif=sif)
    with pytest.raises(AppendOnlyError):
        row.save()
    with pytest.raises(AppendOnlyError):
        SifVerdictChange.objects.filter(pk=row.pk).delete()
    need(connection.vendor == "postgresql", "the database trigger needs PostgreSQL")
    with pytest.raises(IntegrityError), transaction.atomic(), connection.cursor() as c:
        c.execute("UPDATE register_sifverdictchange SET to_meets = true WHERE id = %s",
                  [row.pk])
    assert SifVerdictChange.objects.get(pk=row.pk).to_meets is False


def test_first_assessment_or_one_not_shown_to_meet_before(plant):
    sif, far = plant["sif"], plant["far"]
    unknown = _assess(sif, projected=None)
    assert unknown.meets_target is None
    assert notify_verdict_changes([(None, unknown)]) == 0  # not a failure
    failing = _assess(sif, achieved=8e-3)
    first_far = _assess(far, achieved=8e-3)
    assert notify_verdict_changes([(unknown, failing), (None, first_far)]) == 3
    # Each site's own leads only.
    assert set(_notes(far).values_list("recipient__username", flat=True)) == {"dune_lead"}
    assert _notes(sif).count() == 2
    assert notify_verdict_changes([]) == 0
    # A decommissioned SIF protects nothing: no notification.
    old = f.sif(sif.unit, tag="M-OLD", target_pfd=TARGET)
    SafetyFunction.objects.filter(pk=old.pk).update(life_stage=choices.LifeStage.DECOMMISSIONED)
    assert notify_verdict_changes([(None, _assess(old, achieved=8e-3))]) == 0


def test_query_count_does_not_grow_with_the_number_of_sifs(plant):
    unit = plant["sif"].unit

    def queries(n):
        pairs = [(None, _assess(f.sif(unit), achieved=8e-3)) for _ in range(n)]
        with CaptureQueriesContext(connection) as ctx:
            assert notify_verdict_changes(pairs) == 2 * n
        return len(ctx.captured_queries)

    assert queries(2) == queries(12)
