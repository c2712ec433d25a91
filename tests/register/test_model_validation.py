"""Model validation: bad values are refused with a message naming the field, and nothing
is saved half-way."""

import datetime as dt

import pytest
from django.core.exceptions import ValidationError
from django.db import IntegrityError, transaction
from django.utils import timezone

from register import choices, services
from register.models import (
    Bypass,
    Component,
    ConditionalModifier,
    InitiatingCause,
    ProtectionLayer,
    Subsystem,
    TestRecord,
)
from tests import factories as f

pytestmark = pytest.mark.django_db


@pytest.fixture
def plant():
    s = f.site()
    u = f.unit(s)
    tech = f.user("tech", site=s, role=choices.Role.TECHNICIAN)
    lead = f.user("lead", site=s, role=choices.Role.LEAD)
    sif = f.sif(u, in_service=dt.date(2021, 6, 1))
    return s, u, sif, tech, lead


def errors_of(obj):
    with pytest.raises(ValidationError) as exc:
        obj.full_clean()
    return exc.value.message_dict


@pytest.mark.parametrize("value", [-0.1, 1.5])
def test_probabilities_outside_0_1_are_refused(plant, value):
    s, u, sif, *_ = plant
    sc = f.scenario(s)
    assert "pfd" in errors_of(ProtectionLayer(scenario=sc, description="x", pfd=value))
    assert "probability" in errors_of(
        ConditionalModifier(scenario=sc, kind="ignition", probability=value))
    sub = sif.subsystems.first()
    sub.beta = value
    assert "beta" in errors_of(sub)


def test_probability_constraint_backs_up_bulk_writes(plant):
    sif = plant[2]
    with pytest.raises(IntegrityError), transaction.atomic():
        Subsystem.objects.filter(sif=sif).update(beta=2.0)


def test_negative_rates_and_frequencies_are_refused(plant):
    s, u, sif, *_ = plant
    comp = Component.objects.filter(subsystem__sif=sif).first()
    comp.lambda_du_per_hour = -1e-7
    assert "lambda_du_per_hour" in errors_of(comp)
    sc = f.scenario(s)
    assert "frequency_per_year" in errors_of(
        InitiatingCause(scenario=sc, description="x", frequency_per_year=-0.1))


def test_unknown_voting_is_refused_with_its_reason(plant):
    sub = plant[2].subsystems.first()
    sub.voting = "3oo2"
    msg = errors_of(sub)["voting"][0]
    assert "3oo2" in msg and "exceed" in msg


def test_partial_coverage_above_full_coverage_is_refused(plant):
    comp = Component.objects.filter(subsystem__sif=plant[2]).first()
    comp.proof_test_coverage, comp.partial_test_coverage = 0.6, 0.8
    assert "partial_test_coverage" in errors_of(comp)


def _result(sif):
    comp = Component.objects.filter(subsystem__sif=sif).first()
    return [services.ResultInput(component=comp, as_found="pass", as_left="pass")]


def test_test_dated_before_in_service_is_refused(plant):
    s, u, sif, tech, _ = plant
    with pytest.raises(ValidationError) as exc:
        services.save_draft(user=tech, sif=sif, kind=choices.TestKind.FULL,
                            performed_at=dt.datetime(2021, 5, 1, tzinfo=dt.UTC),
                            results=_result(sif))
    assert "before the equipment entered service" in str(exc.value.message_dict["performed_at"])
    assert TestRecord.objects.count() == 0


def test_test_dated_in_the_future_is_refused(plant):
    s, u, sif, tech, _ = plant
    with pytest.raises(ValidationError) as exc:
        services.save_draft(user=tech, sif=sif, kind=choices.TestKind.FULL,
                            performed_at=timezone.now() + dt.timedelta(days=2),
                            results=_result(sif))
    assert "future" in str(exc.value.message_dict["performed_at"])
    assert TestRecord.objects.count() == 0


def test_bypass_ending_before_it_starts_is_refused(plant):
    s, u, sif, tech, lead = plant
    start = timezone.now() - dt.timedelta(days=2)
    b = Bypass(sif=sif, started_at=start, ended_at=start - dt.timedelta(hours=1),
               authorised_hours=8, reason="maintenance", authorised_by=lead)
    assert "ended_at" in errors_of(b)
    with pytest.raises(IntegrityError), transaction.atomic():
        b.save()


def test_a_failed_result_needs_its_failure_classified(plant):
    s, u, sif, tech, _ = plant
    comp = Component.objects.filter(subsystem__sif=sif).first()
    with pytest.raises(ValidationError) as exc:
        services.save_draft(
            user=tech, sif=sif, kind=choices.TestKind.FULL,
            performed_at=timezone.now() - dt.timedelta(days=1),
            results=[services.ResultInput(component=comp, as_found="fail", as_left="pass")])
    assert "results[0].failure_mode" in exc.value.message_dict
    # nothing half-saved: the record was rolled back with its results
    assert TestRecord.objects.count() == 0


def test_target_sil_must_match_required_pfd(plant):
    sif = plant[2]
    sif.target_pfd_avg, sif.target_sil = 5e-4, 2  # 5E-4 lies in SIL 3
    assert "target_sil" in errors_of(sif)


def test_response_time_must_be_within_process_safety_time(plant):
    sif = plant[2]
    sif.process_safety_time_s, sif.required_response_time_s = 10, 12
    assert "required_response_time_s" in errors_of(sif)


def test_an_implausible_failure_rate_is_refused_by_the_model(db):
    # the same rule as the command and the import (calcs.engine.units.check_rate): 500 is
    # almost always FIT written without its unit
    from django.core.exceptions import ValidationError

    dtype = f.device_type(lambda_du_per_hour=500)
    with pytest.raises(ValidationError) as exc:
        dtype.full_clean()
    assert "implausible" in str(exc.value.message_dict["lambda_du_per_hour"])
    dtype.lambda_du_per_hour = 5e-7
    dtype.full_clean()
