"""50 concurrent clients against a real gunicorn process and PostgreSQL (short version of
bench/bench_api_load.py): no server error, every accepted record stored exactly once."""

import pytest
from django.db import connection

from bench.bench_api_load import build_plant, drive, serve
from register.models import TestRecord
from tests.conftest import need

pytestmark = [pytest.mark.services, pytest.mark.django_db(transaction=True)]


def _database_url() -> str:
    s = connection.settings_dict
    auth = s["USER"] + (f":{s['PASSWORD']}" if s.get("PASSWORD") else "")
    return f"postgres://{auth}@{s['HOST'] or '127.0.0.1'}:{s['PORT'] or 5432}/{s['NAME']}"


def test_fifty_clients_bulk_and_lists_without_loss_or_duplicates():
    need(connection.vendor == "postgresql", "PostgreSQL not configured (set DATABASE_URL)")
    tokens, targets = build_plant(n_sifs=10, n_users=10)
    # the suite's settings: users made here carry the suite's (fast) password hashes, and
    # every bulk request re-checks the password
    with serve(_database_url(), workers=3, threads=8,
               settings_module="config.settings.test") as base:
        out = drive(base, tokens, targets, seconds=10, clients=50)
    assert not out["failures"], out["failures"][:5]
    assert len(out["latency"]["bulk"]) > 20 and len(out["latency"]["records"]) > 20
    stored = list(TestRecord.objects.filter(client_key__isnull=False)
                  .values_list("client_key", flat=True))
    assert len(stored) == len(set(stored))
    assert set(stored) == out["accepted"]
    assert all(s == "signed" for s in TestRecord.objects.filter(
        client_key__in=out["accepted"]).values_list("status", flat=True))
