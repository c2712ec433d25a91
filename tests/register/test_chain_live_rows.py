"""verify_chain compares the live rows with their latest chained history and the stored
attachment files with their recorded SHA-256: changes made in SQL behind the application's
back are named by model, id and field."""

import datetime as dt
import hashlib

import pytest
from django.core.files.base import ContentFile
from django.utils import timezone

from register import choices, services
from register.audit import chain as audit
from register.audit.live import LIVE_CHECKED
from register.models import (
    Attachment,
    Bypass,
    Component,
    ComponentResult,
    Deferral,
    Demand,
    MeasuredValue,
    SafetyFunction,
    Subsystem,
    TestPlan,
    TestRecord,
)
from tests import factories as f
from tests.register.tamper import raw

pytestmark = pytest.mark.django_db

PNG = b"\x89PNG\r\n\x1a\n" + b"0" * 64


@pytest.fixture
def world(settings, tmp_path):
    """One of everything the live check covers, written through the services: a signed
    record with a result, a measurement and an attachment, a demand, a bypass, a deferral."""
    settings.MEDIA_ROOT = tmp_path
    s = f.site()
    sif = f.sif(f.unit(s))
    lead = f.user("lead", site=s, role=choices.Role.LEAD)
    tech = f.user("tech", site=s, role=choices.Role.TECHNICIAN)
    comp = Component.objects.filter(subsystem__sif=sif).first()
    now = timezone.now()
    rec = services.save_draft(
        user=tech, sif=sif, kind=choices.TestKind.FULL, performed_at=now - dt.timedelta(days=2),
        remarks="all good",
        results=[services.ResultInput(component=comp, as_found="pass", as_left="pass",
                                      measurements=[services.MeasurementInput(
                                          quantity="trip level", value=85.0, unit="%")])])
    services.add_attachment(user=tech, record=rec, file=ContentFile(PNG, name="gauge.png"),
                            original_name="gauge.png", content_type="image/png",
                            size_bytes=len(PNG), sha256=hashlib.sha256(PNG).hexdigest())
    services.sign_record(rec, tech, f.PASSWORD)
    services.record_demand(user=lead, sif=sif, occurred_at=now - dt.timedelta(days=5),
                           successful=True, description="High level trip")
    services.open_bypass(user=lead, sif=sif, started_at=now - dt.timedelta(hours=3),
                         authorised_hours=8, reason="Transmitter swap")
    Deferral.objects.create(plan=TestPlan.objects.get(sif=sif),
                            due_on=now.date() + dt.timedelta(days=10),
                            proposed_on=now.date() + dt.timedelta(days=60),
                            reason="Turnaround moved", requested_by=lead)
    return sif, TestRecord.objects.get(pk=rec.pk)


def _named(result):
    return {(b.model, b.object_id, b.field, b.kind) for b in result.live_breaks}


# model, a text or number column to change in SQL, the new value
TAMPER = [
    (TestRecord, "remarks", "rewritten"),
    (ComponentResult, "as_found", "fail"),
    (MeasuredValue, "value", 12.5),
    (Attachment, "original_name", "other.png"),
    (Demand, "description", "rewritten"),
    (Bypass, "reason", "rewritten"),
    (Deferral, "reason", "rewritten"),
    (SafetyFunction, "safe_state", "rewritten"),
    (Subsystem, "beta", 0.2),
    (Component, "tag", "XX-1"),
    (TestPlan, "interval_months", 99),
]


def test_the_table_covers_every_checked_model():
    assert {m._meta.label for m, _c, _v in TAMPER} == set(LIVE_CHECKED)


def test_an_intact_register_has_no_live_breaks(world):
    for incremental in (False, True):
        result = audit.verify_chain(incremental=incremental)
        assert result.ok and result.live_breaks == [] and result.live_breaks_total == 0, \
            result.summary()


@pytest.mark.parametrize(("model", "column", "value"), TAMPER,
                         ids=[m.__name__ for m, _c, _v in TAMPER])
def test_a_live_row_changed_in_sql_is_named(world, model, column, value):
    assert audit.verify_chain().ok
    obj = model.objects.order_by("pk").first()
    raw(f"UPDATE {model._meta.db_table} SET {column} = %s WHERE id = %s", [value, obj.pk])
    for incremental in (True, False):
        result = audit.verify_chain(incremental=incremental)
        assert not result.ok and result.chain_ok  # the chain holds; the table does not
        assert _named(result) == {(model._meta.label, str(obj.pk), column,
                                   "changed outside history")}
        assert str(value) in result.live_breaks[0].detail
        assert f"{model._meta.label} {obj.pk} field {column}" in result.summary()


def test_the_component_result_of_a_signed_record_changed_in_sql(world):
    _sif, rec = world
    res = ComponentResult.objects.get(record=rec)
    raw("UPDATE register_componentresult SET as_found = 'fail', failure_mode = 'du' "
        "WHERE id = %s", [res.pk])
    result = audit.verify_chain()
    assert _named(result) == {
        ("register.ComponentResult", str(res.pk), "as_found", "changed outside history"),
        ("register.ComponentResult", str(res.pk), "failure_mode", "changed outside history")}
    assert result.live_breaks_total == 2


def test_a_signed_record_deleted_in_sql_is_named(world):
    _sif, rec = world
    res = ComponentResult.objects.get(record=rec)
    mv = MeasuredValue.objects.get(result=res)
    att = Attachment.objects.get(record=rec)
    raw("DELETE FROM register_measuredvalue WHERE id = %s", [mv.pk])
    raw("DELETE FROM register_attachment WHERE id = %s", [att.pk])
    raw("DELETE FROM register_componentresult WHERE id = %s", [res.pk])
    raw("DELETE FROM register_testrecord WHERE id = %s", [rec.pk])
    result = audit.verify_chain(incremental=True)
    assert result.chain_ok and not result.ok
    gone = "deleted outside history"
    assert _named(result) == {("register.TestRecord", str(rec.pk), None, gone),
                              ("register.ComponentResult", str(res.pk), None, gone),
                              ("register.MeasuredValue", str(mv.pk), None, gone),
                              ("register.Attachment", str(att.pk), None, gone)}


def test_a_draft_deleted_through_the_application_is_not_a_break(world):
    sif, _rec = world
    tech = TestRecord.objects.first().performed_by
    comp = Component.objects.filter(subsystem__sif=sif).first()
    draft = services.save_draft(user=tech, sif=sif, kind=choices.TestKind.FULL,
                                performed_at=timezone.now() - dt.timedelta(days=1),
                                results=[services.ResultInput(component=comp, as_found="pass",
                                                              as_left="pass")])
    services.discard_draft(draft, tech)
    assert not TestRecord.objects.filter(pk=draft.pk).exists()
    assert audit.verify_chain().ok


def test_a_row_inserted_in_sql_is_named(world):
    sif, _rec = world
    sub = Subsystem.objects.filter(sif=sif).first()
    cols = [fld.column for fld in Subsystem._meta.concrete_fields if not fld.primary_key]
    new_id = Subsystem.objects.order_by("-pk").first().pk + 100
    raw(f"INSERT INTO register_subsystem (id, {', '.join(cols)}) SELECT %s, "
        f"{', '.join(cols)} FROM register_subsystem WHERE id = %s", [new_id, sub.pk])
    assert _named(audit.verify_chain()) == {
        ("register.Subsystem", str(new_id), None, "not in history")}


def test_an_overwritten_attachment_file_is_named(world):
    _sif, rec = world
    att = Attachment.objects.get(record=rec)
    assert audit.verify_chain().ok
    # From the checkpoint, a file uploaded before it is checked by its size.
    with open(att.file.path, "wb") as fh:
        fh.write(PNG[:10])
    part = audit.verify_chain(incremental=True)
    assert not part.full and _named(part) == {
        ("register.Attachment", str(att.pk), "file", "file altered")}
    assert "10 bytes" in part.live_breaks[0].detail
    # Same size, other bytes: only hashing shows it, which the full check does.
    with open(att.file.path, "wb") as fh:
        fh.write(b"\x89PNG\r\n\x1a\n" + b"1" * 64)
    assert audit.verify_chain(incremental=True).ok
    full = audit.verify_chain()
    assert _named(full) == {("register.Attachment", str(att.pk), "file", "file altered")}
    assert att.sha256 in full.live_breaks[0].detail


def test_a_missing_attachment_file_is_named(world):
    _sif, rec = world
    att = Attachment.objects.get(record=rec)
    att.file.storage.delete(att.file.name)
    result = audit.verify_chain()
    assert _named(result) == {("register.Attachment", str(att.pk), "file", "file altered")}
    assert "missing" in result.live_breaks[0].detail


def test_the_chain_page_names_a_changed_live_row(world, client):
    _sif, rec = world
    lead = f.user("lead2", site=rec.sif.unit.site, role=choices.Role.LEAD)
    raw("UPDATE register_testrecord SET remarks = 'rewritten' WHERE id = %s", [rec.pk])
    client.force_login(lead)
    body = client.get("/audit/chain/").content.decode()
    assert "Live rows differ from their history" in body
    assert "register.TestRecord" in body and f"<td>{rec.pk}</td><td>remarks</td>" in body
