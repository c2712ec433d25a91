"""Every figure of the project against its floor, in one run and one table.

Builds (or reuses) the scale plant ``scale<N>`` in the database of DATABASE_URL (PostgreSQL;
``manage.py make_scale_plant`` plus ``--history-days`` older assessments per SIF, as
bench/bench_scale.py does), then measures each row interleaved: the project's step, then
its floor (a bare psycopg 3 read of the rows that figure needs), repeated ``--repeat``
times; the table shows the MEDIAN of the repeats for both, the project's queries, the
floor's queries and the ratio project/floor. A row that fails prints its error and the
table goes on.

    DATABASE_URL=postgres://postgres@127.0.0.1:5432/h5_bench \\
    CELERY_BROKER_URL=redis://127.0.0.1:6379/13 SIF_LEDGER_VAR_DIR=/tmp/var_bench \\
        .venv/bin/python bench/bench_all.py [--sifs 5000] [--history-days 365] [--repeat 3]
        [--clients 50] [--api-seconds 20] [--only ROW ...] [--skip ROW ...] [--age-days N]

``--age-days N``: after the table's runs, the plant is aged by N more daily assessments per
SIF (bench_scale.age_plant: a simulated N nights, each storing a new assessment) and the
page rows (overview, list, SIF page, trend chart, worklist) are measured again beside
their first figures: a page that does not grow with history shows the same time and the
same queries.

Rows (names for --only/--skip): recompute, after-sign, web-sign, scan, overview, list,
sif-page, trend, worklist, csv, xlsx, api, pack, workers. ``pack`` (a 500-SIF site over
3 years, built the way bench/bench_evidence.py builds it) and ``workers`` (real
``celery -A config worker`` processes, 1 then 2, on the Redis database of
CELERY_BROKER_URL, sent the nightly chunks) are slow and run only when named in --only.
The web rows run in process through Django's test client (tasks eager, so the sign
request includes its after-commit recompute); the api row drives a real gunicorn server
over HTTP (bench/bench_api_load.py: p50 of the bulk posts against the p50 of the bare
read of the same rows with as many threads, plus p95, rate, lost, duplicated, failures).
"""

from __future__ import annotations

import argparse
import contextlib
import datetime as dt
import io
import os
import re
import statistics
import subprocess
import sys
import tempfile
import threading
import time
import traceback
import uuid
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
os.environ.setdefault("DJANGO_SETTINGS_MODULE", "config.settings.base")

ROWS = ["recompute", "after-sign", "web-sign", "scan", "overview", "list", "sif-page",
        "trend", "worklist", "csv", "xlsx", "api", "pack", "workers"]
SLOW = {"pack", "workers"}
#: The rows measured again on the aged plant (--age-days), shown as "<row>, aged".
AGED_ROWS = ["overview", "list", "sif-page", "trend", "worklist"]
AGED = "@aged"
TECH_PASSWORD = "bench-tech-7"


def rss_bytes() -> int:
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")


@contextlib.contextmanager
def peak_rss_growth(out: list):
    """Sample the process's resident size every 20 ms; append peak minus start (bytes)."""
    start, peak, done = rss_bytes(), [rss_bytes()], threading.Event()

    def sample():
        while not done.wait(0.02):
            peak[0] = max(peak[0], rss_bytes())

    th = threading.Thread(target=sample, daemon=True)
    th.start()
    try:
        yield
    finally:
        done.set()
        th.join()
        out.append(max(peak[0], rss_bytes()) - start)


def selects(ctx) -> list[str]:
    """The SELECT statements a step ran (a server-side cursor's DECLARE unwrapped)."""
    out = []
    for q in ctx.captured_queries:
        sql = q["sql"]
        if sql.startswith("DECLARE ") and " FOR " in sql:
            sql = sql.split(" FOR ", 1)[1]
        if sql.lstrip().upper().startswith("SELECT"):
            out.append(sql)
    return out


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sifs", type=int, default=5000)
    parser.add_argument("--history-days", type=int, default=365)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--clients", type=int, default=50)
    parser.add_argument("--api-seconds", type=float, default=20)
    parser.add_argument("--age-days", type=int, default=0,
                        help="then add this many more daily assessments to every SIF and "
                             "measure the page rows again")
    parser.add_argument("--only", nargs="*", choices=ROWS, default=None)
    parser.add_argument("--skip", nargs="*", choices=ROWS, default=[])
    args = parser.parse_args(argv)
    url = os.environ.get("DATABASE_URL", "")
    if not url.startswith("postgres"):
        sys.exit("Set DATABASE_URL to a PostgreSQL database of your own.")
    wanted = [r for r in ROWS if (r in args.only if args.only is not None else r not in SLOW)
              and r not in args.skip]
    os.environ.setdefault("SIF_LEDGER_VAR_DIR", tempfile.mkdtemp(prefix="bench-all-"))
    broker = os.environ.get("CELERY_BROKER_URL", "")
    os.environ["CELERY_BROKER_URL"] = "filesystem://"  # in process: tasks run eagerly
    os.environ["CELERY_TASK_ALWAYS_EAGER"] = "true"
    for sub in ("broker/queue", "broker/control", "broker/processed"):
        (Path(os.environ["SIF_LEDGER_VAR_DIR"]) / sub).mkdir(parents=True, exist_ok=True)
    import django

    django.setup()
    from django.db import connection
    from django.test import Client
    from django.test.utils import CaptureQueriesContext
    from django.utils import timezone

    from bench.bench_scale import (
        INPUT_ROWS,
        LAST_CREDIT,
        PLANS,
        age_plant,
        bare_connection,
        prepare_plant,
    )
    from calcs.adapter import recompute_many
    from register import choices, services
    from register.models import Component, SafetyFunction, TestPlan
    from register.schedule import followup
    from register.schedule.scan import scan

    t = time.perf_counter()
    p = prepare_plant(args.sifs, args.history_days)
    print(f"plant ready in {time.perf_counter() - t:.0f} s")
    site, qs, sif, lead, tech, latest = (p["site"], p["qs"], p["sif"], p["lead"], p["tech"],
                                         p["latest"])
    tech.set_password(TECH_PASSWORD)
    tech.save(update_fields=["password"])
    bare = bare_connection()
    plant, one = f"u.site_id = {site.pk}", f"s.id = {sif.pk}"

    def floor(*sqls, where=None):
        with bare.cursor() as cur:
            for sql in sqls:
                cur.execute(sql.format(sifs=where) if where else sql)
                cur.fetchall()
        bare.commit()
        return len(sqls)

    lead_client, tech_client = Client(), Client()
    lead_client.force_login(lead)
    tech_client.force_login(tech)

    def page(client, path, stream=False):
        def run():
            resp = client.get(path)
            assert resp.status_code == 200, (path, resp.status_code)
            if resp.streaming:
                b"".join(resp.streaming_content)
        return run

    def sign_in_process():
        with followup.suspended():
            rec = services.save_draft(
                user=tech, sif=sif, kind=choices.TestKind.PARTIAL,
                performed_at=timezone.now() - dt.timedelta(minutes=5),
                results=[services.ResultInput(component=c, as_found="pass", as_left="pass")
                         for c in Component.objects.filter(subsystem__sif=sif)])
            services.sign_record(rec, tech, None, check_password=False)

    plan = TestPlan.objects.filter(sif=sif).order_by("pk").first()
    comps = list(Component.objects.filter(subsystem__sif=sif).order_by("pk"))

    def web_sign():
        when = timezone.localtime() - dt.timedelta(minutes=3)
        data = {"form_token": uuid.uuid4().hex, "kind": "partial", "remarks": "",
                "performed_at": when.strftime("%Y-%m-%dT%H:%M"), "action": "sign",
                "password": TECH_PASSWORD}
        for c in comps:
            data[f"c{c.pk}-as_found"] = "pass"
            data[f"c{c.pk}-as_left"] = "pass"
        resp = tech_client.post(f"/field/plans/{plan.pk}/start/", data)
        assert resp.status_code == 302 and "/records/" in resp.url, (
            resp.status_code, resp.content.decode()[:500])

    as_of = [timezone.now()]
    memory: list[int] = []

    def recompute_all():
        as_of[0] += dt.timedelta(days=1)  # a new night: every SIF is evaluated again
        with peak_rss_growth(memory):
            recompute_many(qs, trigger="bench", as_of=as_of[0])

    today = timezone.localdate()
    overdue = f" AND p.next_due_on < '{today.isoformat()}'"
    export_sql: dict[str, list[str]] = {}

    from django.conf import settings

    # Above EXPORT_BACKGROUND_SIFS an export is written by a background job with the same
    # writer; the rows time that writer in the request (the limit lifted for them).
    settings.EXPORT_BACKGROUND_SIFS = 10**9

    def export(path):
        def run():
            with CaptureQueriesContext(connection) as ctx:
                page(lead_client, path)()
            export_sql[path] = selects(ctx)
        return run

    # name: (label, project step, preparation before it (not timed), floor)
    steps = {
        "recompute": ("recompute all SIFs", recompute_all, None,
                      lambda: floor(*INPUT_ROWS, where=plant)),
        "after-sign": ("one SIF after a signed test",
                       lambda: recompute_many(SafetyFunction.objects.filter(pk=sif.pk),
                                              trigger="bench"),
                       sign_in_process, lambda: floor(*INPUT_ROWS, where=one)),
        "web-sign": ("sign + after-commit (web)", web_sign, None,
                     lambda: floor(PLANS, *INPUT_ROWS, where=one)),
        "scan": ("due-date scan", lambda: scan(timezone.localdate(), notify=False), None,
                 lambda: floor(PLANS, LAST_CREDIT, where=plant)),
        "overview": ("plant overview", page(lead_client, "/"), None,
                     lambda: floor(p["overview_latest"], PLANS, where=plant)),
        "list": ("register list SIL 2 overdue",
                 page(lead_client, "/sifs/?target_sil=2&overdue=true"), None,
                 lambda: floor(latest + " LIMIT 50", PLANS + overdue,
                               where=plant + " AND s.target_sil = 2")),
        "sif-page": ("SIF page, long history", page(lead_client, f"/sifs/{sif.pk}/"), None,
                     lambda: floor(*INPUT_ROWS, latest, where=one)),
        "trend": ("trend chart, long history",
                  page(lead_client, f"/sifs/{sif.pk}/chart/trend.svg"), None,
                  lambda: floor("SELECT computed_at, achieved_pfd_avg, design_pfd_avg FROM "
                                "calcs_assessment a JOIN register_safetyfunction s ON "
                                "s.id = a.sif_id WHERE {sifs} ORDER BY computed_at DESC "
                                "LIMIT 500", where=one)),
        "worklist": ("technician worklist", page(tech_client, "/field/"), None,
                     lambda: floor(PLANS, where=plant)),
        "csv": ("CSV export, all SIFs", export("/sifs/export.csv"), None,
                lambda: floor(*export_sql.get("/sifs/export.csv", []))),
        "xlsx": ("xlsx export, all SIFs", export("/sifs/export.xlsx"), None,
                 lambda: floor(*export_sql.get("/sifs/export.xlsx", []))),
    }
    results: dict[str, dict] = {}
    notes: dict[str, str] = {}

    def measure(keys: list[str], suffix: str = "") -> None:
        timed = {k: {"took": [], "fl": [], "q": 0, "nf": 0} for k in keys}
        for _ in range(args.repeat):  # interleaved: each row's project step, then its floor
            for key in list(timed):
                label, run, prepare, bare_read = steps[key]
                try:
                    if prepare:
                        prepare()
                    with CaptureQueriesContext(connection) as q:
                        t = time.perf_counter()
                        run()
                        took = time.perf_counter() - t
                    t = time.perf_counter()
                    n_floor = bare_read()
                    fl = time.perf_counter() - t
                except Exception as exc:
                    notes[key + suffix] = f"FAILED: {type(exc).__name__}: {str(exc)[:300]}"
                    traceback.print_exc(limit=3)
                    del timed[key]
                    with contextlib.suppress(Exception):
                        bare.rollback()
                    continue
                row = timed[key]
                row["took"].append(took)
                row["fl"].append(fl)
                row["q"], row["nf"] = len(q), n_floor
        for key, row in timed.items():
            results[key + suffix] = {"took": statistics.median(row["took"]), "q": row["q"],
                                     "fl": statistics.median(row["fl"]), "nf": row["nf"]}

    measure([k for k in steps if k in wanted])
    aged = [k for k in AGED_ROWS if k in wanted]
    if args.age_days and aged:
        age_plant(site, args.age_days)
        measure(aged, AGED)
    if "recompute" in results and memory:
        notes["recompute"] = (f"peak RSS growth {statistics.median(memory) / 2**20:.0f} MiB "
                              f"(median of {len(memory)})")
    bare.close()
    if "api" in wanted:
        try:
            results["api"], notes["api"] = api_row(args.clients, args.api_seconds)
        except Exception as exc:
            notes["api"] = f"FAILED: {type(exc).__name__}: {str(exc)[:300]}"
            traceback.print_exc(limit=3)
    if "pack" in wanted:
        try:
            results["pack"], notes["pack"] = pack_row()
        except Exception as exc:
            notes["pack"] = f"FAILED: {type(exc).__name__}: {str(exc)[:300]}"
            traceback.print_exc(limit=3)
    if "workers" in wanted:
        for n in (1, 2):
            key = f"workers-{n}"
            try:
                results[key], notes[key] = workers_row(n, broker)
            except Exception as exc:
                notes[key] = f"FAILED: {type(exc).__name__}: {str(exc)[:300]}"
                traceback.print_exc(limit=3)
    labels = {k: v[0] for k, v in steps.items()}
    labels.update({"api": f"API bulk, {args.clients} clients (p50)",
                   "pack": "evidence pack 500 SIFs, 3 y",
                   "workers-1": "recompute, 1 Celery worker", "workers-2":
                   "recompute, 2 Celery workers"})
    print(f"\n{qs.count()} SIFs, {args.history_days} days of history (aged rows: "
          f"{args.age_days} more); median of "
          f"{args.repeat} interleaved runs (api, pack, workers: one run)")
    print(f"{'row':32} {'project':>11} {'queries':>8} {'floor':>11} {'queries':>8} "
          f"{'ratio':>8}")
    for key in AGED_ROWS:
        labels[key + AGED] = f"  same, {args.age_days} days older"
    order = [x for k in ROWS if k != "workers" for x in (k, k + AGED)] + [
        "workers-1", "workers-2"]
    for key in order:
        if key not in results and key not in notes:
            continue
        if key in results:
            r = results[key]
            q = "-" if r["q"] is None else str(r["q"])
            ratio = r["took"] / r["fl"] if r["fl"] else float("inf")
            print(f"{labels[key]:32} {r['took'] * 1000:8.0f} ms {q:>8} "
                  f"{r['fl'] * 1000:8.1f} ms {r['nf']:8d} {ratio:7.1f}x")
        if key in notes:
            print(f"{'':32}   {notes[key]}")
    return 0


def api_row(clients: int, seconds: float):
    """The API under load (bench/bench_api_load.py) on this database."""
    from django.conf import settings
    from django.db import connections

    from bench.bench_api_load import build_plant, drive, psycopg_reads, serve
    from register.models import TestRecord

    with followup_suspended():
        tokens, targets = build_plant(code="apiload")
    db = settings.DATABASES["default"]
    url = (f"postgres://{db['USER']}{':' + db['PASSWORD'] if db['PASSWORD'] else ''}@"
           f"{db['HOST'] or '127.0.0.1'}:{db['PORT'] or 5432}/{db['NAME']}")
    prefix = f"b{uuid.uuid4().hex[:8]}-"
    connections.close_all()
    with serve(url) as base:
        out = drive(base, tokens, targets, seconds, clients, prefix=prefix)
    stored = TestRecord.objects.filter(client_key__startswith=prefix)
    n_stored = stored.count()
    dupes = n_stored - stored.values("client_key").distinct().count()
    keys = set(stored.values_list("client_key", flat=True))
    lost = len(out["accepted"] - keys)
    unacked = len(keys - out["accepted"])
    bulk = out["latency"]["bulk"]
    floor_lat = psycopg_reads(url, min(seconds, 10), clients)
    secs = out["elapsed"]

    def q(values, i):
        return statistics.quantiles(values, n=100)[i] if len(values) > 1 else (
            values[0] if values else float("nan"))
    total = sum(len(v) for v in out["latency"].values())
    note = (f"bulk p95 {q(bulk, 94):.0f} ms, {len(bulk) / secs:.1f} bulk/s, all "
            f"{total / secs:.1f} req/s; accepted {len(out['accepted'])}, lost {lost}, "
            f"duplicated {dupes}, stored unacknowledged {unacked}, failures "
            f"{len(out['failures'])}; floor p95 {q(floor_lat, 94):.1f} ms")
    for kind, status, text in out["failures"][:3]:
        note += f"\n{'':35}failure: {kind} {status} {str(text)[:100]}"
    return {"took": q(bulk, 49) / 1000, "q": None, "fl": q(floor_lat, 49) / 1000,
            "nf": 2}, note


@contextlib.contextmanager
def followup_suspended():
    from register.schedule import followup

    with followup.suspended():
        yield


def pack_row():
    """bench/bench_evidence.py's pack (site ``packbench``, 500 SIFs, 3 years) on this
    database; the floor reads that site's input rows and assessments."""
    from bench import bench_evidence
    from bench.bench_scale import INPUT_ROWS, bare_connection
    from register.models import Site

    argv = sys.argv
    sys.argv = ["bench_evidence.py", "--sifs", "500", "--years", "3", "--code", "packbench",
                "--keep-assessments"]
    buf = io.StringIO()
    try:
        with contextlib.redirect_stdout(buf):
            t = time.perf_counter()
            rc = bench_evidence.main()
            took = time.perf_counter() - t
    finally:
        sys.argv = argv
    text = buf.getvalue()
    if rc:
        raise RuntimeError(text[-500:])
    line = next((x for x in text.splitlines() if x.startswith("pack for")), text[-200:])
    pack_s = float(line.split(": ", 1)[1].split(" s,")[0]) if line.startswith("pack") else took
    site = Site.objects.get(code="packbench")
    sqls = [*INPUT_ROWS, "SELECT a.* FROM calcs_assessment a JOIN register_safetyfunction s "
            "ON s.id = a.sif_id JOIN register_plantunit u ON u.id = s.unit_id WHERE {sifs}"]
    with bare_connection() as bare, bare.cursor() as cur:
        t = time.perf_counter()
        for sql in sqls:
            cur.execute(sql.format(sifs=f"u.site_id = {site.pk}"))
            cur.fetchall()
        fl = time.perf_counter() - t
    queries = line.split(" s, ", 1)[1].split(" queries")[0] if " queries" in line else "-"
    return {"took": pack_s, "q": int(queries) if queries.isdigit() else None, "fl": fl,
            "nf": len(sqls)}, line


def workers_row(n: int, broker: str):
    """``n`` real Celery worker processes on the calcs queue (own Redis db from
    CELERY_BROKER_URL); the nightly chunks sent; time until every SIF in service has its
    new assessment. The floor reads every SIF's input rows."""
    from django.conf import settings

    from bench.bench_api_load import stop
    from bench.bench_scale import INPUT_ROWS, bare_connection
    from register import choices
    from register.models import SafetyFunction

    if not broker.startswith("redis://"):
        raise RuntimeError("set CELERY_BROKER_URL to your own Redis database for this row")
    env = {**os.environ, "CELERY_BROKER_URL": broker, "CELERY_TASK_ALWAYS_EAGER": "false",
           "LOG_LEVEL": "INFO"}
    logf = Path(tempfile.mkstemp(prefix=f"bench-worker{n}-", suffix=".log")[1])
    log = open(logf, "w")  # noqa: SIM115 - the workers write to it until stopped
    proc = subprocess.Popen(
        [sys.executable, "-m", "celery", "-A", "config", "worker", "-Q",
         f"celery,{settings.CALCS_QUEUE}", "-c", str(n), "--loglevel=INFO",
         "--without-gossip", "--without-mingle", "--without-heartbeat", "-n",
         f"bench{n}-{uuid.uuid4().hex[:6]}@%h"], cwd=ROOT, env=env, stdout=log,
        stderr=subprocess.STDOUT, start_new_session=True)
    try:
        deadline = time.time() + 120
        while " ready." not in logf.read_text():
            if proc.poll() is not None or time.time() > deadline:
                raise RuntimeError("worker did not start: " + logf.read_text()[-800:])
            time.sleep(0.2)
        expected = SafetyFunction.objects.filter(
            life_stage=choices.LifeStage.IN_SERVICE).count()
        # A SIF whose inputs did not change stores no new assessment (digest skip), so the
        # end is read off the worker's log: the nightly task says how many chunks it sent,
        # and each chunk logs its success.
        # The night's chunks as the nightly task sends them, each run on a day of its own
        # (a SIF already evaluated on that day with the same inputs is not evaluated again).
        send = subprocess.run(
            [sys.executable, "-c", "import django, time, datetime as dt; django.setup(); "
             "from django.utils import timezone; from calcs.tasks import nightly_chunks; "
             f"g = nightly_chunks(timezone.now() + dt.timedelta(days={10 + 7 * n})); "
             "t = time.time(); g.apply_async(); print(t, len(g.tasks))"], cwd=ROOT, env=env,
            capture_output=True, text=True, timeout=120, check=True)
        t0, sent = send.stdout.strip().splitlines()[-1].split()
        t0, chunks = float(t0), [None, sent]
        chunk = re.compile(r"Task calcs\.recompute_chunk\[[^\]]+\] succeeded")
        while True:
            text = logf.read_text()
            done = len(chunk.findall(text))
            if done >= int(chunks[1]):
                took = time.time() - t0
                break
            if proc.poll() is not None or time.time() - t0 > 3600 or "ERROR" in text:
                raise RuntimeError(f"{done} chunks done after {time.time() - t0:.0f} s: "
                                   + text[-800:])
            time.sleep(0.1)
    finally:
        stop(proc, timeout=30)
        log.close()
    with bare_connection() as bare, bare.cursor() as cur:
        t = time.perf_counter()
        for sql in INPUT_ROWS:
            cur.execute(sql.format(sifs="s.life_stage = 'in_service'"))
            cur.fetchall()
        fl = time.perf_counter() - t
    return {"took": took, "q": None, "fl": fl, "nf": len(INPUT_ROWS)}, (
        f"{expected} SIFs in service, {chunks[1]} chunks, {n} worker process(es); "
        f"log {logf}")


if __name__ == "__main__":
    raise SystemExit(main())
