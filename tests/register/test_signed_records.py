"""Signed records are immutable; corrections supersede them and both stay visible."""

import datetime as dt

import pytest
from django.core.exceptions import PermissionDenied, ValidationError
from django.utils import timezone

from register import choices, services
from register.models import Component, SignedRecordError, TestRecord
from tests import factories as f

pytestmark = pytest.mark.django_db


@pytest.fixture
def signed():
    s = f.site()
    u = f.unit(s)
    tech = f.user("tech", site=s, role=choices.Role.TECHNICIAN)
    verifier = f.user("ver", site=s, role=choices.Role.VERIFIER)
    sif = f.sif(u)
    comp = Component.objects.filter(subsystem__sif=sif).first()
    rec = services.save_draft(
        user=tech, sif=sif, kind=choices.TestKind.FULL,
        performed_at=timezone.now() - dt.timedelta(days=3),
        results=[services.ResultInput(component=comp, as_found="pass", as_left="pass")])
    services.sign_record(rec, tech, f.PASSWORD)
    return rec, tech, verifier


def test_wrong_password_leaves_the_draft_unsigned(signed):
    rec, tech, _ = signed
    other = services.save_draft(user=tech, sif=rec.sif, kind=choices.TestKind.PARTIAL,
                                performed_at=rec.performed_at, results=[
                                    services.ResultInput(component=rec.results.first().component,
                                                         as_found="pass", as_left="pass")])
    with pytest.raises(ValidationError):
        services.sign_record(other, tech, "wrong")
    other.refresh_from_db()
    assert other.status == choices.RecordStatus.DRAFT


def test_signed_record_cannot_be_changed_or_deleted(signed):
    rec, *_ = signed
    rec.refresh_from_db()
    rec.remarks = "edited later"
    with pytest.raises(SignedRecordError):
        rec.save()
    with pytest.raises(SignedRecordError):
        rec.delete()
    assert TestRecord.objects.get(pk=rec.pk).remarks == ""


def test_performer_cannot_countersign_own_record(signed):
    rec, tech, _ = signed
    Membership = type(tech.memberships.first())
    Membership.objects.create(user=tech, site=rec.sif.unit.site, role=choices.Role.VERIFIER)
    tech = type(tech).objects.get(pk=tech.pk)  # roles are cached per user object
    with pytest.raises(ValidationError) as exc:
        services.verify_record(rec, tech, f.PASSWORD)
    assert "verified_by" in exc.value.message_dict


def test_verifier_countersigns_then_the_record_is_frozen(signed):
    rec, tech, verifier = signed
    services.verify_record(rec, verifier, f.PASSWORD)
    rec.refresh_from_db()
    assert rec.status == choices.RecordStatus.VERIFIED and rec.verified_by == verifier
    rec.verified_by = tech
    with pytest.raises(SignedRecordError):
        rec.save()


def test_correction_supersedes_and_both_stay(signed):
    rec, tech, verifier = signed
    with pytest.raises(ValidationError):
        services.start_correction(rec, tech, "  ")
    new = services.start_correction(rec, tech, "Wrong date typed")
    assert new.supersedes == rec and new.status == choices.RecordStatus.DRAFT
    assert TestRecord.objects.filter(pk__in=[rec.pk, new.pk]).count() == 2
    rec.refresh_from_db()
    assert not rec.is_current
    with pytest.raises(ValidationError):
        services.start_correction(rec, tech, "again")


def test_other_site_user_cannot_record(signed):
    rec, *_ = signed
    outsider_site = f.site()
    outsider = f.user("out", site=outsider_site, role=choices.Role.TECHNICIAN)
    with pytest.raises(PermissionDenied):
        services.save_draft(user=outsider, sif=rec.sif, kind=choices.TestKind.FULL,
                            performed_at=rec.performed_at, results=[])


def test_history_names_the_actor_and_reason(signed):
    rec, tech, _ = signed
    last = rec.history.order_by("-history_date").first()
    assert last.history_user == tech
    assert last.history_change_reason == "signed by performer"
