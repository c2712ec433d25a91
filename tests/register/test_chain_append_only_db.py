"""On PostgreSQL the database refuses to change or delete a chain entry, even in raw SQL."""

import pytest
from django.db import IntegrityError, connection, transaction

from register.audit import chain as audit
from register.models import ChainEntry
from tests import factories as f
from tests.conftest import need

pytestmark = pytest.mark.django_db

T = ChainEntry._meta.db_table


@pytest.fixture
def entry():
    need(connection.vendor == "postgresql", "PostgreSQL not configured (set DATABASE_URL)")
    f.sif(f.unit(f.site()))
    return ChainEntry.objects.order_by("seq")[1]


@pytest.mark.parametrize("sql", [f"UPDATE {T} SET actor = 'someone else' WHERE seq = %s",
                                 f"UPDATE {T} SET entry_hash = repeat('0', 64) WHERE seq = %s",
                                 f"DELETE FROM {T} WHERE seq = %s"],
                         ids=["update actor", "update hash", "delete"])
def test_raw_update_and_delete_of_an_entry_are_refused(entry, sql):
    with pytest.raises(IntegrityError, match="append-only"), transaction.atomic(), \
            connection.cursor() as cur:
        cur.execute(sql, [entry.seq])
    after = ChainEntry.objects.get(seq=entry.seq)
    assert (after.actor, after.entry_hash) == (entry.actor, entry.entry_hash)
    assert audit.verify_chain().ok


def test_appending_stays_allowed(entry):
    before = ChainEntry.objects.count()
    f.sif(f.unit(f.site("second")))
    assert ChainEntry.objects.count() > before
    assert audit.verify_chain().ok
