"""The change chain: one entry per history row, verification, and tamper detection."""

import datetime as dt
import itertools

import pytest
from django.core.management import call_command
from django.core.management.base import CommandError
from django.db import connection
from django.utils import timezone

from register import choices, services
from register.audit import chain as audit
from register.models import (
    Bypass,
    ChainAppendOnlyError,
    ChainEntry,
    ChainHead,
    Component,
    TestRecord,
)
from tests import factories as f
from tests.register.tamper import raw

pytestmark = pytest.mark.django_db


def _history_row_count() -> int:
    return sum(m.objects.count() for m in audit.historical_models().values())


@pytest.fixture
def plant():
    s = f.site()
    u = f.unit(s)
    lead = f.user("lead", site=s, role=choices.Role.LEAD)
    tech = f.user("tech", site=s, role=choices.Role.TECHNICIAN)
    verifier = f.user("ver", site=s, role=choices.Role.VERIFIER)
    sif = f.sif(u)
    return s, sif, lead, tech, verifier


def _record(sif, tech, verifier):
    comp = Component.objects.filter(subsystem__sif=sif).first()
    rec = services.save_draft(
        user=tech, sif=sif, kind=choices.TestKind.FULL,
        performed_at=timezone.now() - dt.timedelta(days=3),
        results=[services.ResultInput(component=comp, as_found="pass", as_left="pass")],
        remarks="all good")
    services.sign_record(rec, tech, f.PASSWORD)
    services.verify_record(rec, verifier, f.PASSWORD)
    return TestRecord.objects.get(pk=rec.pk)


def test_every_service_write_leaves_exactly_one_entry_per_history_row(plant):
    _s, sif, lead, tech, verifier = plant
    before_entries = ChainEntry.objects.count()
    before_rows = _history_row_count()
    assert before_entries == before_rows > 0  # factory writes are chained too

    rec = _record(sif, tech, verifier)
    b = services.open_bypass(user=lead, sif=sif, started_at=timezone.now() - dt.timedelta(hours=2),
                             authorised_hours=4, reason="maintenance")
    services.close_bypass(b, lead)
    services.update_design(sif, lead, reason="Faster valve", reference="CR-1",
                           changes={"safe_state": "Inlet and outlet closed"})

    rows = {(label, r["history_id"]) for label, m in audit.historical_models().items()
            for r in m.objects.values("history_id")}
    entries = list(ChainEntry.objects.values_list("model_label", "history_id"))
    assert len(entries) == len(set(entries)) == len(rows)
    assert set(entries) == rows
    assert ChainEntry.objects.count() - before_entries == _history_row_count() - before_rows
    # Signature and countersignature are each one entry, with actor and reason.
    sigs = ChainEntry.objects.filter(model_label="register.HistoricalTestRecord",
                                     object_id=str(rec.pk)).order_by("seq")
    assert [e.reason for e in sigs][-2:] == ["signed by performer", "countersigned by verifier"]
    assert sigs.last().actor == "Ver"
    change = ChainEntry.objects.filter(model_label="register.HistoricalSafetyFunction").last()
    assert change.reason == "[CR-1] Faster valve" and change.action == "~"
    assert ChainEntry.objects.filter(model_label="register.HistoricalBypass",
                                     object_id=str(b.pk)).count() == 2
    # Links: each entry points at the previous one's hash; the head names the last.
    seqs = list(ChainEntry.objects.order_by("seq"))
    assert [e.seq for e in seqs] == list(range(1, len(seqs) + 1))
    for a, b2 in itertools.pairwise(seqs):
        assert b2.prev_hash == a.entry_hash
    head = ChainHead.objects.get()
    assert (head.last_seq, head.last_hash) == (seqs[-1].seq, seqs[-1].entry_hash)

    result = audit.verify_chain()
    assert result.ok, result.summary()
    assert result.head_hash == seqs[-1].entry_hash
    assert result.entries == len(seqs) == result.history_rows


def test_altering_a_history_row_is_detected_and_named(plant):
    _, sif, _, tech, verifier = plant
    rec = _record(sif, tech, verifier)
    Hist = TestRecord.history.model
    target = Hist.objects.filter(id=rec.pk).order_by("history_id").last()
    entry = ChainEntry.objects.get(model_label="register.HistoricalTestRecord",
                                   history_id=target.history_id)
    assert audit.verify_chain().ok
    Hist.objects.filter(history_id=target.history_id).update(remarks="changed afterwards")
    result = audit.verify_chain()
    assert not result.ok
    brk = result.first_break
    assert (brk.seq, brk.kind, brk.model, brk.object_id) == (
        entry.seq, "content changed", "register.HistoricalTestRecord", str(rec.pk))
    with pytest.raises(CommandError) as exc:
        call_command("verify_chain")
    assert exc.value.returncode == 1
    assert f"entry #{entry.seq}" in str(exc.value) and "content changed" in str(exc.value)


def test_raw_sql_change_and_history_row_deletion_are_detected(plant):
    _, sif, _, tech, verifier = plant
    _record(sif, tech, verifier)
    Hist = Component.history.model
    h = Hist.objects.order_by("history_id").first()
    entry = ChainEntry.objects.get(model_label="register.HistoricalComponent",
                                   history_id=h.history_id)
    with connection.cursor() as cur:
        cur.execute(f"UPDATE {Hist._meta.db_table} SET lambda_du_per_hour = 1e-9 "
                    "WHERE history_id = %s", [h.history_id])
    brk = audit.verify_chain().first_break
    assert (brk.seq, brk.kind) == (entry.seq, "content changed")
    with connection.cursor() as cur:
        cur.execute(f"DELETE FROM {Hist._meta.db_table} WHERE history_id = %s",
                    [h.history_id])
    brk = audit.verify_chain().first_break
    assert (brk.seq, brk.kind, brk.history_id) == (entry.seq, "history row deleted",
                                                   h.history_id)


def test_chain_entries_have_no_update_or_delete_path(plant):
    e = ChainEntry.objects.first()
    e.reason = "rewritten"
    with pytest.raises(ChainAppendOnlyError):
        e.save()
    with pytest.raises(ChainAppendOnlyError):
        e.delete()
    with pytest.raises(ChainAppendOnlyError):
        ChainEntry.objects.filter(pk=e.pk).delete()
    with pytest.raises(ChainAppendOnlyError):
        ChainEntry.objects.filter(pk=e.pk).update(reason="x")
    assert ChainEntry.objects.get(pk=e.pk).reason != "rewritten"


def _raw(sql, params):
    """As the database owner, past the append-only trigger (PostgreSQL)."""
    raw(sql.format(t=ChainEntry._meta.db_table), params)


def test_deleting_a_chain_entry_is_detected(plant):
    _, sif, _, tech, verifier = plant
    _record(sif, tech, verifier)
    middle = ChainEntry.objects.order_by("seq")[3]
    _raw("DELETE FROM {t} WHERE seq = %s", [middle.seq])
    brk = audit.verify_chain().first_break
    assert brk.kind == "entry missing" and brk.seq == middle.seq
    with pytest.raises(CommandError) as exc:
        call_command("verify_chain")
    assert exc.value.returncode == 1 and f"#{middle.seq}" in str(exc.value)


def test_deleting_the_last_entry_and_altering_an_entry_are_detected(plant):
    _, sif, _, tech, verifier = plant
    _record(sif, tech, verifier)
    last = ChainEntry.objects.order_by("seq").last()
    _raw("DELETE FROM {t} WHERE seq = %s", [last.seq])
    brk = audit.verify_chain().first_break
    assert brk.kind == "entry missing" and brk.seq == last.seq


def test_altering_an_entry_is_detected(plant):
    _, sif, _, tech, verifier = plant
    _record(sif, tech, verifier)
    e = ChainEntry.objects.order_by("seq")[2]
    _raw("UPDATE {t} SET actor = %s WHERE seq = %s", ["someone else", e.seq])
    brk = audit.verify_chain().first_break
    assert (brk.seq, brk.kind) == (e.seq, "entry altered")


def test_verify_command_passes_on_an_intact_chain(plant, capsys):
    call_command("verify_chain")
    assert "Chain intact" in capsys.readouterr().out


def test_unchained_history_rows_are_reported(plant):
    _, sif, lead, _, _ = plant
    # A history row written without the signal (as bulk tools could) has no entry.
    Bypass.history.model.objects.create(
        id=999, sif_id=sif.pk, started_at=timezone.now(), authorised_hours=1, reason="x",
        authorised_by_id=lead.pk, measures_effective=False, history_type="+",
        history_date=timezone.now())
    brk = audit.verify_chain().first_break
    assert brk.kind == "entry missing" and brk.model == "register.HistoricalBypass"
    assert brk.object_id == "999"


def test_rows_chained_before_a_column_was_added_still_verify():
    """A history table that gained a column after its rows were chained: the row hashes
    as it did without the column while the column holds the value every older row got;
    once someone changes that column, the old hash no longer matches."""
    from register.audit.chain import _as_chained_before, content_hash

    old = {"history_id": 1, "id": 3, "code": "north", "name": "North works"}
    now = {**old, "time_zone": "UTC"}
    before = _as_chained_before("register.HistoricalSite", now)
    assert before == old and content_hash(before) == content_hash(old)
    assert content_hash(now) != content_hash(old)
    assert _as_chained_before("register.HistoricalSite", {**old, "time_zone": "Asia/Tokyo"}) \
        is None
    assert _as_chained_before("register.HistoricalTestRecord", {**old}) is None
