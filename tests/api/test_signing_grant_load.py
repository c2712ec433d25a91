"""Many clients of one maintenance system post bulk results at the same moment with one
signing grant, through a real server (gunicorn) and PostgreSQL: each result is stored
exactly once, signed, and a batch re-sent by all is stored once."""

from __future__ import annotations

import datetime as dt
import threading

import pytest
import requests
from django.db import connection
from django.utils import timezone

from register import choices
from register.models import TestRecord
from tests.conftest import need
from tests.integration.test_load import _database_url

GRANT, BULK = "/api/signing-grant/", "/api/test-results/bulk/"


@pytest.mark.services
@pytest.mark.xdist_group("services")
@pytest.mark.django_db(transaction=True)
def test_concurrent_bulk_posts_with_one_grant_store_each_result_once():
    """24 clients of one maintenance system post at the same moment with one grant: each
    sends a new batch of its own and re-sends a batch shared by all (a retry storm). Every
    new result is stored once, signed; the shared batch is stored once and every other
    client is told it exists."""
    need(connection.vendor == "postgresql", "PostgreSQL not configured (set DATABASE_URL)")
    from bench.bench_api_load import BENCH_PASSWORD, build_plant, serve

    tokens, targets = build_plant(n_sifs=4, n_users=1, code="grantplant")
    sif, comps = targets[0]

    clients, when = 24, timezone.now() - dt.timedelta(hours=1)
    batches = {key: [{"client_key": key, "sif": sif, "kind": "full",
                      "performed_at": (when - dt.timedelta(minutes=i)).isoformat(),
                      "results": [{"component": c, "as_found": "pass", "as_left": "pass"}
                                  for c in comps]}]
               for i, key in enumerate(["shared"] + [f"own-{n}" for n in range(clients)])}
    with serve(_database_url(), workers=2, threads=8,
               settings_module="config.settings.test") as base:
        auth = {"Authorization": f"Token {tokens[0]}"}
        r = requests.post(base + GRANT, json={"password": BENCH_PASSWORD}, headers=auth,
                          timeout=60)
        assert r.status_code == 200, r.text
        grant = r.json()["signing_grant"]
        start, out, lock = threading.Barrier(clients), [], threading.Lock()

        def client(n):
            start.wait()
            got = []
            for key in (f"own-{n}", "shared"):
                resp = requests.post(base + BULK, json={"signing_grant": grant,
                                                        "results": batches[key]},
                                     headers=auth, timeout=60)
                got.append((key, resp.status_code,
                            resp.json()["created"] if resp.status_code in (200, 201)
                            else resp.text[:200]))
            with lock:
                out.extend(got)

        threads = [threading.Thread(target=client, args=(n,)) for n in range(clients)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(timeout=120)
    assert not any(t.is_alive() for t in threads)
    assert len(out) == 2 * clients
    assert all(code in (200, 201) for _, code, _ in out), [o for o in out if o[1] >= 300]
    assert all(created == 1 for key, _, created in out if key != "shared")
    assert sum(created for key, _, created in out if key == "shared") == 1
    stored = list(TestRecord.objects.filter(client_key__isnull=False)
                  .values_list("client_key", "status"))
    assert sorted(k for k, _ in stored) == sorted([f"own-{n}" for n in range(clients)]
                                                  + ["shared"])
    assert {s for _, s in stored} == {choices.RecordStatus.SIGNED}
