"""A signed record is immutable all the way down: its results, measurements and
attachments, in the model layer and (on PostgreSQL) in the database itself."""

import datetime as dt

import pytest
from django.db import IntegrityError, InternalError, connection, transaction
from django.utils import timezone

from register import choices, services
from register.models import (
    Component,
    ComponentResult,
    MeasuredValue,
    SignedRecordError,
    TestRecord,
)
from tests import factories as f
from tests.conftest import need

pytestmark = pytest.mark.django_db


@pytest.fixture
def signed(db):
    s = f.site()
    u = f.unit(s)
    tech = f.user("tech-x", site=s, role=choices.Role.TECHNICIAN)
    sif = f.sif(u, in_service=dt.date(2022, 1, 1))
    comps = list(Component.objects.filter(subsystem__sif=sif))
    results = [services.ResultInput(
        component=c, as_found="fail" if i == 0 else "pass", as_left="pass",
        failure_mode="du" if i == 0 else "", failure_description="stuck" if i == 0 else "",
        work_done="freed" if i == 0 else "",
        measurements=[services.MeasurementInput("Closing time", 9.0, "found", "s", None)]
        if i == 0 else []) for i, c in enumerate(comps)]
    rec = services.save_draft(user=tech, sif=sif, kind=choices.TestKind.FULL, results=results,
                              performed_at=timezone.now() - dt.timedelta(days=3))
    return services.sign_record(rec, tech, f.PASSWORD)


def test_model_layer_refuses_changing_a_signed_result(signed):
    result = signed.results.get(failure_mode="du")
    result.as_found = "pass"
    with pytest.raises(SignedRecordError):
        result.save()
    with pytest.raises(SignedRecordError):
        result.delete()
    m = MeasuredValue.objects.filter(result=result).first()
    if m is not None:
        m.value = 1.0
        with pytest.raises(SignedRecordError):
            m.save()
    extra = ComponentResult(record=signed, component=result.component, as_found="pass",
                            as_left="pass")
    with pytest.raises(SignedRecordError):
        extra.save()
    assert signed.results.get(pk=result.pk).as_found == "fail"


def test_database_refuses_raw_changes_on_postgresql(signed):
    need(connection.vendor == "postgresql", "the database trigger exists on PostgreSQL only")
    result = signed.results.get(failure_mode="du")
    for sql, args in [
        ("UPDATE register_componentresult SET as_found = 'pass', failure_mode = '' "
         "WHERE id = %s", [result.pk]),
        ("DELETE FROM register_componentresult WHERE id = %s", [result.pk]),
        ("UPDATE register_testrecord SET performed_at = performed_at - interval '1 day' "
         "WHERE id = %s", [signed.pk]),
        ("UPDATE register_testrecord SET status = 'draft' WHERE id = %s", [signed.pk]),
        ("DELETE FROM register_testrecord WHERE id = %s", [signed.pk]),
    ]:
        with pytest.raises((IntegrityError, InternalError)), transaction.atomic(), \
                connection.cursor() as cur:
            cur.execute(sql, args)
    assert TestRecord.objects.get(pk=signed.pk).status == choices.RecordStatus.SIGNED
    assert signed.results.get(pk=result.pk).as_found == "fail"


def test_countersignature_is_still_allowed(signed):
    s = signed.sif.unit.site
    verifier = f.user("verifier-x", site=s, role=choices.Role.VERIFIER)
    services.verify_record(signed, verifier, f.PASSWORD)
    assert TestRecord.objects.get(pk=signed.pk).status == choices.RecordStatus.VERIFIED


def test_attachments_go_through_the_service_with_history(db, settings, tmp_path):
    from django.core.exceptions import PermissionDenied, ValidationError
    from django.core.files.uploadedfile import SimpleUploadedFile

    from register.audit import chain as audit
    from register.models import Attachment, ChainEntry

    settings.MEDIA_ROOT = tmp_path
    s = f.site()
    u = f.unit(s)
    tech = f.user("tech-att", site=s, role=choices.Role.TECHNICIAN)
    other = f.user("tech-att-2", site=s, role=choices.Role.TECHNICIAN)
    auditor = f.user("aud-att", site=s, role=choices.Role.AUDITOR)
    sif = f.sif(u, in_service=dt.date(2022, 1, 1))
    comp = Component.objects.filter(subsystem__sif=sif).first()
    draft = services.save_draft(
        user=tech, sif=sif, kind=choices.TestKind.FULL,
        performed_at=timezone.now() - dt.timedelta(days=1),
        results=[services.ResultInput(component=comp, as_found="pass", as_left="pass")])
    args = dict(file=SimpleUploadedFile("gauge.png", b"\x89PNG\r\n\x1a\n0000"),
                original_name="gauge.png", content_type="image/png", size_bytes=12,
                sha256="a" * 64)
    before = ChainEntry.objects.count()
    att = services.add_attachment(user=tech, record=draft, **args)
    assert att.history.get().history_user == tech
    assert ChainEntry.objects.count() == before + 1  # chained like every other write
    assert audit.verify_chain().chain_ok
    with pytest.raises(ValidationError):  # not the performer
        services.add_attachment(user=other, record=draft, **args)
    with pytest.raises(PermissionDenied):  # auditors never write
        services.add_attachment(user=auditor, record=draft, **args)
    services.sign_record(draft, tech, f.PASSWORD)
    with pytest.raises(ValidationError):  # a signed record takes no more files
        services.add_attachment(user=tech, record=draft, **args)
    assert Attachment.objects.filter(record=draft).count() == 1


def test_a_change_reads_the_same_on_the_page_and_in_the_pack(db):
    from register.changes import field_changes, row_of
    from register.lead.views import _history
    from register.models import Component

    s = f.site()
    lead = f.user("lead-diff", site=s, role=choices.Role.LEAD)
    sif = f.sif(f.unit(s), in_service=dt.date(2022, 1, 1))
    plan = sif.plans.first()
    services.update_design(plan, lead, reason="Longer run", reference="CR-9",
                           changes={"interval_months": 24})
    before, after = (row_of(h) for h in plan.history.order_by("history_id"))
    pack_text = "; ".join(field_changes(before, after))
    subs = list(sif.subsystems.values_list("pk", flat=True))
    comps = list(Component.objects.filter(subsystem__sif=sif).values_list("pk", flat=True))
    page = next(e for e in _history(sif, subs, comps) if e["reason"].startswith("[CR-9]"))
    assert "; ".join(page["changes"]) == pack_text
    assert f"interval_months: {before['interval_months']} → 24" in pack_text
