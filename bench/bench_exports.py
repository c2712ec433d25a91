"""Benchmark: the register list's exports on a generated plant (PostgreSQL).

    DATABASE_URL=postgres://postgres@127.0.0.1:5432/sif_bench_exports \\
        .venv/bin/python bench/bench_exports.py --sifs 5000 [--years 20]

Generates the plant once (``make_scale_plant``), refreshes the plans' due dates and stores
one synthetic assessment per SIF (bulk insert, mixed verdicts), then requests each export
through the Django test client as a superuser, consuming the whole (streamed) body, and
reports the time, the SQL queries and the size. Beside each: a bare psycopg read of the
same SQL the export ran (fetch all rows, nothing else), and the ratio of the two, and the
process's peak resident memory by the end of the export (run one export per process to read it for each).
Set EXPORT_BACKGROUND_SIFS above the plant's size to time the direct exports.
"""

from __future__ import annotations

import argparse
import os
import re
import resource
import statistics
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
os.environ.setdefault("DJANGO_SETTINGS_MODULE", "config.settings.base")

URLS = ["/sifs/list.xlsx", "/sifs/list.csv", "/sifs/list.xlsx?sort=-achieved&target_sil=2",
        "/sifs/export.csv", "/sifs/export.xlsx"]


def _prepare(code: str, n: int, years: int):
    import datetime as dt

    from django.core.management import call_command
    from django.utils import timezone

    from calcs.models import Assessment
    from register.models import SafetyFunction, Site, TestPlan
    from register.schedule.due import refresh_plans

    if not Site.objects.filter(code=code).exists():
        call_command("make_scale_plant", sifs=n, years=years, code=code)
    sifs = SafetyFunction.objects.filter(unit__site__code=code)
    if not Assessment.objects.filter(sif__in=sifs).exists():
        refresh_plans(TestPlan.objects.filter(sif__in=sifs))
        now = timezone.now()
        rows = []
        for i, pk in enumerate(sifs.values_list("pk", flat=True)):
            meets = (True, False, None)[i % 3]
            achieved = 1e-3 * (1 + i % 17)
            rows.append(Assessment(
                sif_id=pk, computed_at=now - dt.timedelta(minutes=i % 50), as_of=now,
                inputs_digest="0" * 64, trigger="bench", target_pfd_avg=8e-3, target_sil=2,
                design_pfd_avg=achieved * 0.8, achieved_pfd_avg=achieved,
                meets_target=meets, verdict={"meets": meets, "lines": [
                    {"key": "achieved_12m", "label": "Achieved", "status": "fail",
                     "reason": "achieved PFDavg above target"}] if meets is False else []}))
        Assessment.objects.bulk_create(rows, batch_size=2000)


def _bare(sqls: list[str]) -> float:
    import psycopg

    dsn = os.environ["DATABASE_URL"]
    with psycopg.connect(dsn) as conn, conn.cursor() as cur:
        t = time.perf_counter()
        for sql in sqls:
            cur.execute(sql)
            cur.fetchall()
        return time.perf_counter() - t


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--sifs", type=int, default=5000)
    parser.add_argument("--years", type=int, default=20)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--urls", nargs="*", default=URLS)
    parser.add_argument("--code", default=None,
                        help="site code of an existing plant (default xscale<sifs>)")
    args = parser.parse_args()
    import django

    django.setup()
    from django.contrib.auth import get_user_model
    from django.core.management import call_command
    from django.db import connection
    from django.test import Client
    from django.test.utils import CaptureQueriesContext, setup_test_environment

    setup_test_environment()
    call_command("migrate", verbosity=0)
    code = args.code or f"xscale{args.sifs}"
    t = time.perf_counter()
    _prepare(code, args.sifs, args.years)
    print(f"prepare: {time.perf_counter() - t:.1f} s")
    admin, _ = get_user_model().objects.get_or_create(
        username="bench-exports-admin", defaults={"is_superuser": True, "is_staff": True})
    client = Client()
    client.force_login(admin)
    print(f"{'export':46} {'median s':>9} {'queries':>8} {'MB':>6} {'bare s':>7} {'ratio':>6} "
          f"{'peak RSS MB':>11}")
    for url in args.urls:
        full = url
        times, size, sqls = [], 0, []
        for _ in range(args.repeat):
            with CaptureQueriesContext(connection) as ctx:
                start = time.perf_counter()
                resp = client.get(full)
                assert resp.status_code == 200, (url, resp.status_code)
                # consumed chunk by chunk, not kept: the peak memory is the export's own
                size = sum(len(c) for c in resp.streaming_content) if resp.streaming \
                    else len(resp.content)
                times.append(time.perf_counter() - start)
            # a server-side cursor's statement is "DECLARE ... CURSOR [WITH[OUT] HOLD] FOR SELECT"
            sqls = [re.sub(r"^DECLARE .*? CURSOR (?:WITH(?:OUT)? HOLD )?FOR ", "", q["sql"])
                    for q in ctx.captured_queries]
            sqls = [q for q in sqls if q.lstrip().upper().startswith("SELECT")]
            peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
        bare = min(_bare(sqls) for _ in range(args.repeat))
        med = statistics.median(times)
        print(f"{url:46} {med:9.2f} {len(ctx.captured_queries):8d} {size / 1e6:6.1f} "
              f"{bare:7.2f} {med / bare if bare else 0:6.1f} "
              f"{peak:11.0f}")


if __name__ == "__main__":
    main()
