"""The change chain's entries of a transaction are appended together just before it
commits: the head is locked once, for that moment only, so one writer's open transaction
does not hold up another's; a rolled-back transaction leaves no entry."""

import threading

import pytest
from django.db import connection, transaction
from django.test.utils import CaptureQueriesContext

from register.audit.chain import verify_chain
from register.changes import attribute
from register.models import ChainEntry, SafetyFunction
from tests import factories as f

pytestmark = pytest.mark.django_db(transaction=True)


def _rename(sif_pk, name):
    sif = SafetyFunction.objects.get(pk=sif_pk)
    sif.name = name
    attribute(sif, None, "renamed").save()


def test_one_lock_and_one_insert_for_all_rows_of_a_transaction():
    unit = f.unit(f.site())
    sifs = [f.sif(unit) for _ in range(4)]
    before = ChainEntry.objects.count()
    with CaptureQueriesContext(connection) as ctx, transaction.atomic():
        for s in sifs:
            _rename(s.pk, f"Renamed {s.pk}")
    sql = [q["sql"] for q in ctx.captured_queries]
    if connection.vendor == "postgresql":
        assert sum("FOR UPDATE" in q and "register_chainhead" in q for q in sql) == 1
    assert sum(q.startswith("UPDATE") and "register_chainhead" in q for q in sql) == 1
    assert sum(q.startswith("INSERT") and "register_chainentry" in q for q in sql) == 1
    assert ChainEntry.objects.count() == before + 4
    assert verify_chain().ok


def test_a_rolled_back_transaction_leaves_no_entry():
    sif = f.sif(f.unit(f.site()))
    before = ChainEntry.objects.count()
    with pytest.raises(RuntimeError), transaction.atomic():
        _rename(sif.pk, "never")
        raise RuntimeError
    assert ChainEntry.objects.count() == before
    _rename(sif.pk, "kept")  # autocommit: appended at once
    assert ChainEntry.objects.count() == before + 1
    assert verify_chain().ok


def test_an_open_transaction_does_not_hold_up_another_writer():
    if connection.vendor != "postgresql":
        pytest.skip("SQLite takes one write lock for the whole database")
    unit = f.unit(f.site())
    slow, quick = f.sif(unit), f.sif(unit)
    wrote, release, done = threading.Event(), threading.Event(), threading.Event()

    def long_transaction():
        try:
            with transaction.atomic():
                _rename(slow.pk, "slow change")  # a history row written, entry pending
                wrote.set()
                release.wait(30)
        finally:
            connection.close()

    t = threading.Thread(target=long_transaction)
    t.start()
    assert wrote.wait(30)

    def other_writer():
        try:
            with transaction.atomic():
                _rename(quick.pk, "quick change")
            done.set()
        finally:
            connection.close()

    other = threading.Thread(target=other_writer)
    other.start()
    # Before: the first transaction held the head from its first change to its end.
    assert done.wait(10), "the second writer waited for the first transaction"
    release.set()
    t.join(30)
    other.join(30)
    labels = list(ChainEntry.objects.filter(model_label="register.HistoricalSafetyFunction")
                  .order_by("-seq").values_list("object_id", flat=True)[:2])
    assert labels == [str(slow.pk), str(quick.pk)]  # in the order they committed
    assert verify_chain().ok


def test_entries_appended_inside_a_savepoint_rolled_back_are_appended_again():
    sif, other = f.sif(f.unit(f.site())), None
    before = ChainEntry.objects.count()
    with transaction.atomic():
        _rename(sif.pk, "kept change")  # pending
        with pytest.raises(RuntimeError), transaction.atomic():
            other = f.sif(sif.unit)  # rows of a part that will fail
            assert ChainEntry.objects.count() > before  # a read appends what is pending
            raise RuntimeError
    assert not SafetyFunction.objects.filter(pk=other.pk).exists()
    mine = ChainEntry.objects.filter(model_label="register.HistoricalSafetyFunction",
                                     object_id=str(sif.pk))
    assert mine.count() == 2  # created, then renamed: the rename's entry was not lost
    assert ChainEntry.objects.count() == before + 1
    result = verify_chain()
    assert result.ok, result.first_break
