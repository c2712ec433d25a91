"""Timing of the demo loader (``register.demo.load``) and a fingerprint of what it built.

Run by hand, on PostgreSQL or SQLite. The database DATABASE_URL names is the bench's own:
its name must contain "bench", and it is dropped and created again (PostgreSQL) or
deleted (SQLite) before the run:

    DATABASE_URL=postgres://postgres@127.0.0.1:5432/sif_demo_bench \\
        .venv/bin/python bench/bench_demo_load.py [--in-transaction] [--profile out.prof]
        [--facts out.json]
    DATABASE_URL=sqlite:////tmp/sif_demo_bench.sqlite3 .venv/bin/python bench/bench_demo_load.py

By default the plant is loaded as ``load_demo`` loads it (outside a transaction: each
step commits); ``--in-transaction`` loads it inside one transaction, rolled back at the
end, as a test that loads its own plant would. Prints the load time, the SQL queries it
made, and the demo's facts (SIFs, how many meet their target, records, chain entries,
chain check). ``--facts`` writes every record, assessment figure and history date to a
JSON file, so two versions of the loader can be compared (``diff`` the files of two runs
made on the same day).
"""

from __future__ import annotations

import argparse
import cProfile
import json
import os
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
os.environ.setdefault("DJANGO_SETTINGS_MODULE", "config.settings.base")


class _Rollback(Exception):
    pass


def _facts(site) -> dict:
    from calcs.adapter import latest_assessments
    from register.models import (
        Bypass,
        ComponentResult,
        Deferral,
        Demand,
        SafetyFunction,
        TestPlan,
        TestRecord,
    )

    sifs = list(SafetyFunction.objects.filter(unit__site=site).order_by("tag"))
    latest = latest_assessments([s.pk for s in sifs])
    tag = {s.pk: s.tag for s in sifs}
    records = [
        [tag[r.sif_id], r.kind, r.performed_at.isoformat(), r.signed_at.isoformat(),
         r.verified_at.isoformat() if r.verified_at else None, r.performed_by.username,
         sorted([c.component.tag, c.as_found, c.failure_mode,
                 sorted([m.phase, m.quantity, m.value] for m in c.measurements.all())]
                for c in r.results.all())]
        for r in TestRecord.objects.filter(sif__in=sifs).select_related("performed_by")
        .prefetch_related("results__component", "results__measurements")
        .order_by("sif__tag", "performed_at", "kind")
    ]
    return {
        "sifs": len(sifs),
        "meeting": sum(1 for a in latest.values() if a.meets_target),
        "assessments": {
            tag[pk]: {"meets": a.meets_target, "design": a.design_pfd_avg,
                      "achieved": a.achieved_pfd_avg,
                      "observed": a.observed_unavailability}
            for pk, a in sorted(latest.items(), key=lambda kv: tag[kv[0]])},
        "targets": {s.tag: s.target_pfd_avg for s in sifs},
        "plans": sorted([tag[p.sif_id], p.kind, str(p.next_due_on)]
                        for p in TestPlan.objects.filter(sif__in=sifs)),
        "records": records,
        "results": ComponentResult.objects.filter(record__sif__in=sifs).count(),
        "demands": sorted([tag[d.sif_id], d.occurred_at.isoformat(), d.successful]
                          for d in Demand.objects.filter(sif__in=sifs)),
        "bypasses": sorted([tag[b.sif_id], b.started_at.isoformat(),
                            b.ended_at.isoformat() if b.ended_at else None]
                           for b in Bypass.objects.filter(sif__in=sifs)),
        "deferrals": sorted([str(d.due_on), str(d.proposed_on), d.status]
                            for d in Deferral.objects.filter(plan__sif__in=sifs)),
        "record_history_dates": sorted(
            [tag[h.sif_id], h.performed_at.isoformat(), h.history_change_reason,
             h.history_date.isoformat()]
            for h in TestRecord.history.filter(sif_id__in=[s.pk for s in sifs])),
    }


def _fresh_database():
    """Drop and create the bench's database (before Django connects to it)."""
    import dj_database_url

    url = os.environ.get("DATABASE_URL", "")
    cfg = dj_database_url.parse(url) if url else {}
    name = str(cfg.get("NAME", ""))
    if "bench" not in name:
        sys.exit("Set DATABASE_URL to a database of the bench's own (its name must contain "
                 "'bench'); it is dropped and created again.")
    if cfg["ENGINE"].endswith("sqlite3"):
        Path(name).unlink(missing_ok=True)
        return
    import psycopg

    with psycopg.connect(host=cfg.get("HOST") or None, port=cfg.get("PORT") or None,
                         user=cfg.get("USER") or None, password=cfg.get("PASSWORD") or None,
                         dbname="postgres", autocommit=True) as admin:
        admin.execute(f'DROP DATABASE IF EXISTS "{name}"')
        admin.execute(f'CREATE DATABASE "{name}"')


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--in-transaction", action="store_true",
                        help="load inside one transaction (rolled back at the end)")
    parser.add_argument("--profile", help="write a cProfile of the load to this file")
    parser.add_argument("--facts", help="write the demo's facts to this JSON file")
    args = parser.parse_args()
    _fresh_database()
    import django

    django.setup()
    from django.conf import settings
    from django.core.management import call_command
    from django.db import connection, transaction
    from django.utils import timezone

    from register import demo
    from register.audit.chain import verify_chain
    from register.management.commands.rundemo import (
        mail_to_files,
        no_query_log,
        quiet_task_log,
    )
    from register.models import ChainEntry

    t = time.perf_counter()
    call_command("migrate", verbosity=0)
    print(f"database: {connection.vendor} {connection.settings_dict['NAME']} "
          f"(migrated in {time.perf_counter() - t:.1f} s)")
    profiler = cProfile.Profile() if args.profile else None
    queries = 0

    def count(execute, sql, params, many, context):
        nonlocal queries
        queries += 1
        return execute(sql, params, many, context)

    stages: dict[str, float] = {}
    last = [time.perf_counter()]

    def stage(what, done, total):
        now = time.perf_counter()
        key = what if what in ("library", "recompute") or what.startswith("demands") else "SIFs"
        stages[key] = stages.get(key, 0.0) + now - last[0]
        last[0] = now

    def backend_cpu() -> float:
        """CPU seconds of the database server process serving this connection (PostgreSQL
        on this machine), so runs on a busy machine can still be compared."""
        if connection.vendor != "postgresql":
            return 0.0
        with connection.cursor() as cursor:
            cursor.execute("SELECT pg_backend_pid()")
            pid = cursor.fetchone()[0]
        try:
            fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
        except OSError:
            return 0.0
        return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")

    def run():
        with connection.execute_wrapper(count):
            cpu, db_cpu = time.process_time(), backend_cpu()
            t = time.perf_counter()
            if profiler:
                profiler.enable()
            # as load_demo loads it: no SQL log even with DEBUG on, e-mails to files
            with (no_query_log(), quiet_task_log(),
                  mail_to_files(Path(settings.VAR_DIR) / "demo-mail")):
                try:
                    site = demo.load(timezone.localdate(), progress=stage)
                except TypeError:  # an older loader, for before/after comparisons
                    site = demo.load(timezone.localdate())
            if profiler:
                profiler.disable()
            took = time.perf_counter() - t
            cpu, db_cpu = time.process_time() - cpu, backend_cpu() - db_cpu
        if profiler:
            profiler.dump_stats(args.profile)
        facts = _facts(site)
        mode = "in one transaction" if args.in_transaction else "step by step"
        print(f"demo load ({mode}): {took:.1f} s, {queries} SQL queries; "
              + ", ".join(f"{k} {v:.1f} s" for k, v in stages.items()))
        print(f"CPU: this process {cpu:.1f} s, database server {db_cpu:.1f} s "
              f"(machine load average {os.getloadavg()[0]:.1f})")
        print(f"SIFs {facts['sifs']}, meeting their target {facts['meeting']}, "
              f"not meeting {facts['sifs'] - facts['meeting']}; "
              f"{len(facts['records'])} test records, {facts['results']} results, "
              f"{ChainEntry.objects.count()} chain entries")
        t = time.perf_counter()
        print(verify_chain().summary(), f"({time.perf_counter() - t:.1f} s)")
        if args.facts:
            Path(args.facts).write_text(json.dumps(facts, indent=1, sort_keys=True))

    if not args.in_transaction:
        run()
        return
    try:
        with transaction.atomic():
            run()
            raise _Rollback
    except _Rollback:
        pass


if __name__ == "__main__":
    main()
