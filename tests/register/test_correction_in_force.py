"""A correction counts only once it has taken effect: signed, and countersigned where the
original was. Until then the original stands for every figure (due dates, achieved
PFDavg, device-type failure counts, the API's "current" filter)."""

import datetime as dt

import pytest
from django.utils import timezone

from register import choices, services
from register.models import Component, SafetyFunction, TestPlan, TestRecord, in_force
from register.schedule import due
from tests import factories as f

pytestmark = pytest.mark.django_db


AS_OF = timezone.now()


def _figures(sif, valve):
    from calcs.adapter import device_type_stats, recompute_many

    plan = TestPlan.objects.get(sif=sif)
    today = timezone.localdate(AS_OF)
    status = due.compute_statuses([TestPlan.objects.select_related("sif__unit__site")
                                   .get(pk=plan.pk)], today)[plan.pk]
    (a,) = recompute_many(SafetyFunction.objects.filter(pk=sif.pk), trigger="test",
                          as_of=AS_OF)
    stats = device_type_stats(sif.unit.site_id, today)[valve.device_type_id].stats
    counting = list(TestRecord.objects.filter(in_force(), sif=sif).values_list("pk", flat=True))
    return {"due": status.due_on, "state": status.state, "achieved": a.achieved_pfd_avg,
            "failures": stats.failures, "counting": counting}


def test_a_correction_changes_no_figure_until_it_takes_effect(client):
    s = f.site()
    u = f.unit(s)
    tech = f.user("tech", site=s, role=choices.Role.TECHNICIAN)
    verifier = f.user("verifier", site=s, role=choices.Role.VERIFIER)
    sif = f.sif(u, in_service=dt.date(2022, 1, 1))
    valve = Component.objects.get(subsystem__sif=sif, subsystem__role="final")
    original = f.full_test(sif, tech, timezone.now() - dt.timedelta(days=300),
                           fail_tag=valve.tag)
    services.verify_record(TestRecord.objects.get(pk=original.pk), verifier, f.PASSWORD)
    before = _figures(sif, valve)
    assert before["failures"] == 1 and before["counting"] == [original.pk]

    # The correction as a draft: the plan would otherwise read "not yet due" from the
    # correction's date, or escalate as if never tested; the failure would vanish.
    correction = services.start_correction(TestRecord.objects.get(pk=original.pk), tech,
                                           "the valve result was entered on the wrong tag")
    services.save_draft(
        user=tech, sif=sif, kind=choices.TestKind.FULL, record=correction,
        performed_at=correction.performed_at, supersedes=original,
        correction_reason="the valve result was entered on the wrong tag",
        results=[services.ResultInput(component=c, as_found="pass", as_left="pass")
                 for c in Component.objects.filter(subsystem__sif=sif)])
    assert _figures(sif, valve) == before

    # Signed but not yet countersigned, while the original was: the original still stands.
    services.sign_record(TestRecord.objects.get(pk=correction.pk), tech, f.PASSWORD)
    assert _figures(sif, valve) == before

    client.force_login(tech)
    listed = client.get("/api/test-records/", {"sif": sif.pk, "current": "true"}).json()
    rows = listed["results"] if isinstance(listed, dict) else listed
    assert [r["id"] for r in rows] == [original.pk]

    # Countersigned: now the correction counts and the original does not.
    services.verify_record(TestRecord.objects.get(pk=correction.pk), verifier, f.PASSWORD)
    after = _figures(sif, valve)
    assert after["counting"] == [correction.pk]
    assert after["failures"] == 0
    assert after["achieved"] < before["achieved"]  # a DU failure no longer counted
    assert after["due"] == before["due"]  # same test date, same interval


def test_a_correction_of_an_unverified_record_counts_once_signed():
    s = f.site()
    u = f.unit(s)
    tech = f.user("tech", site=s, role=choices.Role.TECHNICIAN)
    sif = f.sif(u, in_service=dt.date(2022, 1, 1))
    valve = Component.objects.get(subsystem__sif=sif, subsystem__role="final")
    original = f.full_test(sif, tech, timezone.now() - dt.timedelta(days=100),
                           fail_tag=valve.tag)
    correction = services.start_correction(TestRecord.objects.get(pk=original.pk), tech,
                                           "wrong tag")
    assert list(TestRecord.objects.filter(in_force(), sif=sif)) == [original]
    services.sign_record(TestRecord.objects.get(pk=correction.pk), tech, f.PASSWORD)
    assert list(TestRecord.objects.filter(in_force(), sif=sif)) == [correction]
