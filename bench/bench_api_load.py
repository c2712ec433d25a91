"""Load on the REST API: 50 concurrent clients post signed test results through the bulk
endpoint and read lists, against a real server process (gunicorn) and PostgreSQL.

Reports p50/p95 latency and throughput per kind of request, checks every accepted record
is stored exactly once, then times a bare psycopg read of the same rows (the first page of
test records with their component results) with the same number of threads, as a floor.

Run:  DATABASE_URL=postgres://postgres@127.0.0.1:5432/test \\
      .venv/bin/python bench/bench_api_load.py [--seconds 60] [--clients 50] \\
      [--sign-with grant|password]
It creates and drops its own database (``<name>_apiload``); the plant is invented.
"""

from __future__ import annotations

import argparse
import contextlib
import datetime as dt
import functools
import itertools
import os
import random
import socket
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import requests

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))


#: The invented maintenance-system users' password: the bulk endpoint asks for it.
BENCH_PASSWORD = "bench-signing-9"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@contextlib.contextmanager
def serve(database_url: str, workers: int = 4, threads: int = 8,
          settings_module: str = "config.settings.base"):
    """Run gunicorn on a free loopback port; yield its base URL. The test suite passes its
    own settings, so the server checks passwords with the suite's fast hasher."""
    port = free_port()
    var = Path(tempfile.mkdtemp(prefix="apiload-"))
    for sub in ("broker/queue", "broker/control", "broker/processed"):
        (var / sub).mkdir(parents=True, exist_ok=True)
    env = {**os.environ, "DATABASE_URL": database_url, "DJANGO_SETTINGS_MODULE":
           settings_module, "TEST_CELERY_EAGER": "false", "DEBUG": "false", "SIF_LEDGER_VAR_DIR": str(var),
           "CELERY_BROKER_URL": "filesystem://", "CELERY_TASK_ALWAYS_EAGER": "false",
           "DB_CONN_MAX_AGE": "60", "LOG_LEVEL": "WARNING"}
    log = open(var / "server.log", "w")  # noqa: SIM115 - the server writes to it until stopped
    proc = subprocess.Popen(
        [sys.executable, "-m", "gunicorn", "config.wsgi:application", "-b",
         f"127.0.0.1:{port}", "-w", str(workers), "-k", "gthread", "--threads", str(threads),
         "--timeout", "60"], cwd=ROOT, env=env, stdout=log, stderr=subprocess.STDOUT,
        start_new_session=True)
    base = f"http://127.0.0.1:{port}"
    try:
        deadline = time.time() + 30
        while time.time() < deadline:
            try:
                requests.get(base + "/api/", timeout=10)
                break
            except requests.RequestException:
                if proc.poll() is not None:
                    raise RuntimeError((var / "server.log").read_text()[-3000:]) from None
                time.sleep(0.2)
        yield base
    finally:
        stop(proc)
        log.close()


def stop(proc: subprocess.Popen, timeout: float = 10) -> None:
    """Stop a server or worker this bench started: terminate, then kill if it lingers."""
    proc.terminate()
    try:
        proc.wait(timeout=timeout)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()


def build_plant(n_sifs: int = 20, n_users: int = 10, code: str = "lakeside"):
    """An invented site with SIFs and technicians holding API tokens (Django configured);
    reused when a site with ``code`` is there already."""
    from django.contrib.auth import get_user_model
    from rest_framework.authtoken.models import Token

    from register import choices
    from register.models import Component, Membership, PlantUnit, SafetyFunction, Site
    from tests import factories as f

    site = Site.objects.filter(code=code).first()
    if site is not None:
        unit = PlantUnit.objects.get(site=site, code="C1")
        tokens = list(Token.objects.filter(user__memberships__site=site)
                      .order_by("user__username").values_list("key", flat=True))
        return tokens, [(s.pk, [c.pk for c in Component.objects.filter(subsystem__sif=s)])
                        for s in SafetyFunction.objects.filter(unit=unit)]
    site = Site.objects.create(code=code, name="Lakeside gas plant (invented)")
    unit = PlantUnit.objects.create(site=site, code="C1", name="Compression")
    for i in range(n_sifs):
        f.sif(unit, tag=f"SIF-C1-{i:03d}")
    tokens = []
    for i in range(n_users):
        u = get_user_model().objects.create_user(f"{code}-cmms{i}" if code != "lakeside"
                                                 else f"cmms{i}", password=BENCH_PASSWORD)
        Membership.objects.create(user=u, site=site, role=choices.Role.TECHNICIAN)
        tokens.append(Token.objects.create(user=u).key)
    targets = [(s.pk, [c.pk for c in Component.objects.filter(subsystem__sif=s)])
               for s in SafetyFunction.objects.filter(unit=unit)]
    return tokens, targets


class Grants:
    """One signing grant per token (``POST /api/signing-grant/``, one password check),
    renewed a minute before it expires, as a maintenance system would hold it."""

    def __init__(self, base: str):
        self.base, self.lock, self.held, self.latency = base, threading.Lock(), {}, []

    def body(self, token: str) -> dict:
        with self.lock:  # one request per token, the other clients of the token wait
            grant, renew_at = self.held.get(token, (None, 0.0))
            if grant is None or time.time() >= renew_at:
                t0 = time.perf_counter()
                r = requests.post(self.base + "/api/signing-grant/",
                                  json={"password": BENCH_PASSWORD}, timeout=60,
                                  headers={"Authorization": f"Token {token}"})
                self.latency.append((time.perf_counter() - t0) * 1000)
                r.raise_for_status()
                got = r.json()
                grant = got["signing_grant"]
                self.held[token] = (grant, time.time() + max(
                    got["lifetime_seconds"] - 60, got["lifetime_seconds"] / 2))
        return {"signing_grant": grant}


def drive(base: str, tokens: list[str], targets: list, seconds: float, clients: int = 50,
          prefix: str = "", sign_with: str = "grant"):
    """Clients alternate: post two results (sometimes re-sending the last batch), read the
    test-record list, read the SIF list. Returns latencies, accepted keys and failures.
    ``prefix`` starts every client key (a new one per run keeps runs apart); a client that
    dies, or is still running a minute and a half after the end, counts as a failure.
    ``sign_with``: ``"grant"`` (each token's signing grant, fetched before the clock
    starts) or ``"password"`` (the password in every bulk request)."""
    grants = Grants(base) if sign_with == "grant" else None
    if grants is not None:
        for token in tokens:
            grants.body(token)
    stop = time.time() + seconds
    lock = threading.Lock()
    lat = {"bulk": [], "records": [], "sifs": []}
    accepted, failures, counter = set(), [], itertools.count()

    def client(n: int):
        rng = random.Random(n)
        session = requests.Session()
        token = tokens[n % len(tokens)]
        session.headers["Authorization"] = f"Token {token}"
        last, turn = None, n
        while time.time() < stop:
            turn += 1
            step = turn % 3
            if step == 0:
                if last is not None and rng.random() < 0.2:
                    batch = last  # a retry: must create nothing
                else:
                    batch = []
                    for _ in range(2):
                        sif, comps = rng.choice(targets)
                        key = f"{prefix}c{n}-{next(counter)}"
                        when = dt.datetime.now(dt.UTC) - dt.timedelta(
                            minutes=rng.randint(10, 100000))
                        batch.append({"client_key": key, "sif": sif, "kind": "full",
                                      "performed_at": when.isoformat(),
                                      "results": [{"component": c, "as_found": "pass",
                                                   "as_left": "pass"} for c in comps]})
                    last = batch
                kind, t0 = "bulk", time.perf_counter()
                signed = (grants.body(token) if grants is not None
                          else {"password": BENCH_PASSWORD})
                call = functools.partial(session.post, base + "/api/test-results/bulk/",
                                         json={**signed, "results": batch}, timeout=60)
            else:
                kind = "records" if step == 1 else "sifs"
                t0 = time.perf_counter()
                call = functools.partial(
                    session.get, base + f"/api/{'test-records' if step == 1 else 'sifs'}/",
                    timeout=60)
            try:
                r = call()
                keys = ([i["client_key"] for i in r.json()["items"]]
                        if kind == "bulk" and r.status_code in (200, 201) else [])
            except Exception as exc:  # a timeout, a dropped connection, a body that is not JSON
                with lock:
                    lat[kind].append((time.perf_counter() - t0) * 1000)
                    failures.append((kind, type(exc).__name__, str(exc)[:300]))
                continue
            ms = (time.perf_counter() - t0) * 1000
            with lock:
                lat[kind].append(ms)
                if r.status_code not in (200, 201):
                    failures.append((kind, r.status_code, r.text[:300]))
                accepted.update(keys)

    def guarded(n: int):
        try:
            client(n)
        except Exception as exc:  # a client that dies counts as a failure, never silently
            with lock:
                failures.append(("client", type(exc).__name__, str(exc)[:300]))

    threads = [threading.Thread(target=guarded, args=(n,)) for n in range(clients)]
    t0 = time.time()
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=max(0.0, stop + 90 - time.time()))
    with lock:
        failures.extend(("client", "hung", "still running after the end")
                        for t in threads if t.is_alive())
    return {"latency": lat, "accepted": accepted, "failures": failures,
            "elapsed": time.time() - t0, "grants": grants.latency if grants else []}


def psycopg_reads(dsn: str, seconds: float, clients: int = 50) -> list[float]:
    """The same rows as the first page of /api/test-records/, read with bare SQL."""
    import psycopg

    sql_records = ("SELECT r.id, r.sif_id, r.plan_id, r.kind, r.performed_at, r.status, "
                   "r.performed_by_name, r.client_key FROM register_testrecord r "
                   "ORDER BY r.performed_at DESC, r.id DESC LIMIT 50")
    sql_results = ("SELECT cr.record_id, cr.component_id, c.tag, cr.as_found, cr.as_left "
                   "FROM register_componentresult cr JOIN register_component c "
                   "ON c.id = cr.component_id WHERE cr.record_id = ANY(%s)")
    stop = time.time() + seconds
    lat, lock = [], threading.Lock()

    def worker():
        with psycopg.connect(dsn) as conn:
            while time.time() < stop:
                t0 = time.perf_counter()
                with conn.cursor() as cur:
                    rows = cur.execute(sql_records).fetchall()
                    cur.execute(sql_results, ([r[0] for r in rows],)).fetchall()
                conn.commit()
                with lock:
                    lat.append((time.perf_counter() - t0) * 1000)

    threads = [threading.Thread(target=worker) for _ in range(clients)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    return lat


def summary(name: str, values: list[float], seconds: float) -> str:
    if not values:
        return f"{name:28s} no requests"
    q = statistics.quantiles(values, n=100) if len(values) > 1 else values * 99
    return (f"{name:28s} n={len(values):6d}  p50={q[49]:7.1f} ms  p95={q[94]:7.1f} ms  "
            f"{len(values) / seconds:7.1f}/s")


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--seconds", type=float, default=60)
    parser.add_argument("--clients", type=int, default=50)
    parser.add_argument("--settings", default="config.settings.base",
                        help="settings of the bench and its server; config.settings.test "
                             "uses a fast password hasher, to see the rest of a bulk request")
    parser.add_argument("--sign-with", choices=("grant", "password"), default="grant",
                        help="sign bulk results with each token's signing grant (default) "
                             "or with the password in every request")
    args = parser.parse_args()
    url = os.environ.get("DATABASE_URL", "")
    if not url.startswith("postgres"):
        sys.exit("Set DATABASE_URL to a PostgreSQL server (this bench needs PostgreSQL).")
    import psycopg

    admin = url
    bench_db = url.rsplit("/", 1)[1] + "_apiload"
    bench_url = url.rsplit("/", 1)[0] + "/" + bench_db
    with psycopg.connect(admin, autocommit=True) as conn:
        conn.execute(f'DROP DATABASE IF EXISTS "{bench_db}"')
        conn.execute(f'CREATE DATABASE "{bench_db}"')
    try:
        os.environ["DATABASE_URL"] = bench_url
        os.environ["DJANGO_SETTINGS_MODULE"] = args.settings
        os.environ.setdefault("SIF_LEDGER_VAR_DIR", tempfile.mkdtemp(prefix="apiload-var-"))
        import django

        django.setup()
        from django.core.management import call_command

        call_command("migrate", verbosity=0)
        from register.schedule import followup

        with followup.suspended():
            tokens, targets = build_plant()
        with serve(bench_url, settings_module=args.settings) as base:
            out = drive(base, tokens, targets, args.seconds, args.clients,
                        sign_with=args.sign_with)
        from register.models import TestRecord

        stored = TestRecord.objects.filter(client_key__isnull=False)
        dupes = stored.count() - stored.values("client_key").distinct().count()
        stored_keys = set(stored.values_list("client_key", flat=True))
        missing = len(out["accepted"] - stored_keys)
        unacknowledged = len(stored_keys - out["accepted"])
        secs = out["elapsed"]
        print(f"API under load: {args.clients} clients for {secs:.0f} s (gunicorn 4x8 "
              f"threads, PostgreSQL), signed with the {args.sign_with}")
        if out["grants"]:
            print(f"  signing grants: {len(out['grants'])}, before the clock, "
                  f"{statistics.mean(out['grants']):.0f} ms each on average")
        for kind in ("bulk", "records", "sifs"):
            print(summary(f"  {kind}", out["latency"][kind], secs))
        total = sum(len(v) for v in out["latency"].values())
        print(f"  all requests: {total / secs:.1f}/s; accepted records {len(out['accepted'])},"
              f" stored {stored.count()}, duplicates {dupes}, missing {missing}, "
              f"stored without acknowledgement {unacknowledged}, "
              f"failures {len(out['failures'])}")
        for kind, status, text in out["failures"][:5]:
            print(f"    failure: {kind} {status} {text[:120]}")
        read_secs = min(args.seconds, 20)
        lat = psycopg_reads(bench_url, read_secs, args.clients)
        print(summary("  bare psycopg same rows", lat, read_secs))
        from django.db import connections

        connections.close_all()
    finally:
        with psycopg.connect(admin, autocommit=True) as conn:
            conn.execute(f'DROP DATABASE IF EXISTS "{bench_db}" WITH (FORCE)')


if __name__ == "__main__":
    main()
