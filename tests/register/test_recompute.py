"""The recompute service: snapshots, triggers, bad records, bounded queries."""

import datetime as dt

import pytest
from django.db import connection
from django.test.utils import CaptureQueriesContext
from django.utils import timezone

from calcs.adapter import load, recompute_many
from calcs.engine import design as eng_design
from calcs.models import Assessment
from register import choices, services
from register.models import Bypass, Component, SafetyFunction
from tests import factories as f

pytestmark = pytest.mark.django_db


@pytest.fixture
def plant():
    s = f.site()
    u = f.unit(s)
    tech = f.user("tech", site=s, role=choices.Role.TECHNICIAN)
    lead = f.user("lead", site=s, role=choices.Role.LEAD)
    return s, u, tech, lead


_full_test = f.full_test


def test_assessment_keeps_design_achieved_and_flags(plant):
    s, u, tech, _ = plant
    sif = f.sif(u, in_service=dt.date(2021, 1, 1))
    (a,) = recompute_many(SafetyFunction.objects.filter(pk=sif.pk), trigger="test")
    design = eng_design.evaluate_sif(
        __import__("calcs.adapter", fromlist=["x"]).design_input(
            load(SafetyFunction.objects.filter(pk=sif.pk))[0]))
    assert a.design_pfd_avg == pytest.approx(design.pfd_avg)
    # Never tested since 2021: far beyond the 12-month interval, so the achieved PFDavg over
    # the last 12 months is well above the design value and the target is missed.
    assert a.achieved_pfd_avg > 2 * a.design_pfd_avg
    assert a.meets_target is False
    assert any("exceeds the required" in flag for flag in a.flags)
    assert Assessment.objects.filter(sif=sif).count() == 1


def test_a_test_found_failed_raises_the_achieved_pfd(plant):
    s, u, tech, _ = plant
    now = timezone.now()
    a_sif = f.sif(u, in_service=(now - dt.timedelta(days=800)).date())
    b_sif = f.sif(u, in_service=(now - dt.timedelta(days=800)).date())
    for sif in (a_sif, b_sif):
        _full_test(sif, tech, now - dt.timedelta(days=430))
    _full_test(a_sif, tech, now - dt.timedelta(days=60))
    valve = Component.objects.filter(subsystem__sif=b_sif, subsystem__role="final").first()
    _full_test(b_sif, tech, now - dt.timedelta(days=60), fail_tag=valve.tag)
    out = {x.sif_id: x for x in recompute_many(
        SafetyFunction.objects.filter(pk__in=[a_sif.pk, b_sif.pk]), trigger="t")}
    # The failure was hidden until found: the same history with a failure found is worse.
    assert out[b_sif.pk].achieved_pfd_avg > out[a_sif.pk].achieved_pfd_avg


def test_bad_records_are_flagged_and_never_stop_the_others(plant):
    s, u, tech, lead = plant
    good = f.sif(u, in_service=dt.date(2022, 1, 1))
    bad = f.sif(u, in_service=dt.date(2022, 1, 1))
    # Overlapping bypasses written around the service (a bulk write, as an import might).
    start = timezone.now() - dt.timedelta(days=20)
    Bypass.objects.bulk_create([
        Bypass(sif=bad, started_at=start, ended_at=start + dt.timedelta(hours=10),
               authorised_hours=8, reason="a", authorised_by=lead),
        Bypass(sif=bad, started_at=start + dt.timedelta(hours=5),
               ended_at=start + dt.timedelta(hours=20), authorised_hours=8, reason="b",
               authorised_by=lead)])
    broken = f.sif(u, in_service=dt.date(2022, 1, 1))
    broken.subsystems.first().components.all().delete()  # a subsystem with no devices
    out = {x.sif_id: x for x in recompute_many(SafetyFunction.objects.filter(unit=u),
                                               trigger="nightly")}
    assert out[good.pk].error == "" and out[good.pk].achieved_pfd_avg is not None
    assert any("overlap" in flag for flag in out[bad.pk].flags)
    assert out[bad.pk].detail["bypass_hours_12m"] == pytest.approx(20.0, abs=0.01)
    assert out[broken.pk].error and "no components" in out[broken.pk].error


def test_query_count_does_not_grow_with_the_number_of_sifs(plant):
    s, u, tech, _ = plant
    for _ in range(2):
        sif = f.sif(u, in_service=dt.date(2022, 1, 1))
        _full_test(sif, tech, timezone.now() - dt.timedelta(days=100))
    with CaptureQueriesContext(connection) as small:
        recompute_many(SafetyFunction.objects.filter(unit=u), trigger="t")
    for _ in range(12):
        sif = f.sif(u, in_service=dt.date(2022, 1, 1))
        _full_test(sif, tech, timezone.now() - dt.timedelta(days=100))
    with CaptureQueriesContext(connection) as large:
        recompute_many(SafetyFunction.objects.filter(unit=u), trigger="t")
    assert len(large) == len(small)


def test_rate_basis_upper_bound_raises_achieved_pfd(plant):
    s, u, tech, _ = plant
    sif = f.sif(u, in_service=dt.date(2023, 1, 1))
    _full_test(sif, tech, timezone.now() - dt.timedelta(days=100))
    design = recompute_many(SafetyFunction.objects.filter(pk=sif.pk), trigger="t")[0]
    s.rate_basis = choices.RateBasis.UPPER
    s.save()
    upper = recompute_many(SafetyFunction.objects.filter(pk=sif.pk), trigger="t")[0]
    # Little service time and no failures: the 70 % upper bound is far above the library rate.
    assert upper.achieved_pfd_avg > design.achieved_pfd_avg
    assert upper.rate_basis == "upper"


def test_cached_field_statistics_follow_a_new_failure(plant):
    from calcs.adapter import device_type_stats

    s, u, tech, _ = plant
    sif = f.sif(u, in_service=dt.date(2022, 1, 1))
    today = timezone.localdate()
    valve = Component.objects.filter(subsystem__sif=sif, subsystem__role="final").first()
    before = device_type_stats(s.pk, today)[valve.device_type_id].stats.failures
    assert device_type_stats(s.pk, today)[valve.device_type_id].stats.failures == before
    _full_test(sif, tech, timezone.now() - dt.timedelta(days=3), fail_tag=valve.tag)
    assert device_type_stats(s.pk, today)[valve.device_type_id].stats.failures == before + 1


def test_a_demand_record_lowers_the_achieved_pfd_only_where_credited(plant):
    from register.models import TestPlan

    s, u, tech, _ = plant
    sif = f.sif(u, in_service=(timezone.now() - dt.timedelta(days=700)).date())
    results = [services.ResultInput(component=c, as_found="pass", as_left="pass")
               for c in Component.objects.filter(subsystem__sif=sif)]
    rec = services.save_draft(user=tech, sif=sif, kind=choices.TestKind.DEMAND,
                              results=results,
                              performed_at=timezone.now() - dt.timedelta(days=200))
    services.sign_record(rec, tech, f.PASSWORD)
    qs = SafetyFunction.objects.filter(pk=sif.pk)
    not_credited = recompute_many(qs, trigger="t")[0].achieved_pfd_avg
    TestPlan.objects.filter(sif=sif).update(demand_counts_as_test=True)
    credited = recompute_many(qs, trigger="t")[0].achieved_pfd_avg
    assert credited < not_credited


def test_cached_field_statistics_follow_a_signed_draft_and_a_correction(plant):
    from calcs.adapter import device_type_stats
    from register.models import TestRecord

    s, u, tech, _ = plant
    sif = f.sif(u, in_service=dt.date(2022, 1, 1))
    today = timezone.localdate()
    valve = Component.objects.filter(subsystem__sif=sif, subsystem__role="final").first()

    def failures():
        return device_type_stats(s.pk, today)[valve.device_type_id].stats.failures

    results = [services.ResultInput(component=valve, as_found="fail", as_left="pass",
                                    failure_mode="du", failure_description="stuck",
                                    work_done="freed")]
    draft = services.save_draft(user=tech, sif=sif, kind=choices.TestKind.FULL,
                                results=results,
                                performed_at=timezone.now() - dt.timedelta(days=2))
    assert failures() == 0  # drafts do not count
    services.sign_record(draft, tech, f.PASSWORD)
    assert failures() == 1
    correction = services.start_correction(TestRecord.objects.get(pk=draft.pk), tech,
                                           "valve was fine, wrong device")
    correction_results = [services.ResultInput(component=valve, as_found="pass",
                                               as_left="pass")]
    services.save_draft(user=tech, sif=sif, kind=choices.TestKind.FULL,
                        results=correction_results, record=correction,
                        performed_at=correction.performed_at, supersedes=draft,
                        correction_reason="valve was fine, wrong device")
    services.sign_record(correction, tech, f.PASSWORD)
    assert failures() == 0  # the superseded record no longer counts
