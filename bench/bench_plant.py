"""Benchmark: recompute and scan a 5,000-SIF plant (~500,000 component results).

Run by hand against PostgreSQL (creates and drops its own database):
    DATABASE_URL=postgres://postgres@127.0.0.1:5432/sif_bench .venv/bin/python bench/bench_plant.py --sifs 5000
Prints the time and the number of SQL queries of each step.
"""

import argparse
import os
import statistics
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
os.environ.setdefault("DJANGO_SETTINGS_MODULE", "config.settings.base")


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--sifs", type=int, default=5000)
    args = parser.parse_args()
    import django

    django.setup()
    from django.core.management import call_command
    from django.db import connection, reset_queries
    from django.test.utils import CaptureQueriesContext

    from calcs.adapter import recompute_many
    from register.models import SafetyFunction, Site
    from register.schedule.scan import scan

    call_command("migrate", verbosity=0)
    code = f"scale{args.sifs}"
    t = time.perf_counter()
    if not Site.objects.filter(code=code).exists():
        call_command("make_scale_plant", sifs=args.sifs, code=code)
    print(f"generate: {time.perf_counter() - t:.1f} s")
    qs = SafetyFunction.objects.filter(unit__site__code=code)
    reset_queries()
    with CaptureQueriesContext(connection) as q:
        t = time.perf_counter()
        out = recompute_many(qs, trigger="bench")
        took = time.perf_counter() - t
    print(f"recompute all: {len(out)} SIFs in {took:.1f} s, {len(q)} queries, "
          f"{sum(1 for a in out if a.error)} errors")
    one = qs.order_by("pk")[:1].values("pk")
    times = []
    for _ in range(5):
        with CaptureQueriesContext(connection) as q1:
            t = time.perf_counter()
            recompute_many(SafetyFunction.objects.filter(pk__in=one), trigger="bench")
            times.append(time.perf_counter() - t)
    print(f"recompute one SIF: best {min(times) * 1000:.0f} ms, {len(q1)} queries")
    # The usual case: a passing test was just signed, then its SIF is recomputed.
    import datetime as dt

    from django.contrib.auth import get_user_model
    from django.utils import timezone

    from register import choices, services
    from register.models import Component
    from register.schedule import followup

    tech = get_user_model().objects.get(username=f"{code}-tech")
    sif = SafetyFunction.objects.get(pk=one[0]["pk"])
    after = []
    for k in range(5):
        with followup.suspended():
            rec = services.save_draft(
                user=tech, sif=sif, kind=choices.TestKind.PARTIAL,
                performed_at=timezone.now() - dt.timedelta(hours=k + 1),
                results=[services.ResultInput(component=c, as_found="pass", as_left="pass")
                         for c in Component.objects.filter(subsystem__sif=sif)])
            services.sign_record(rec, tech, None, check_password=False)
        t = time.perf_counter()
        recompute_many(SafetyFunction.objects.filter(pk=sif.pk), trigger="bench")
        after.append(time.perf_counter() - t)
    print(f"recompute one SIF right after signing a passing test: median "
          f"{statistics.median(after) * 1000:.0f} ms, best {min(after) * 1000:.0f} ms")
    with CaptureQueriesContext(connection) as q2:
        t = time.perf_counter()
        result = scan(notify=False)
        took = time.perf_counter() - t
    print(f"scan (report only): {len(result.plans)} plans in {took:.1f} s, {len(q2)} queries")
    with CaptureQueriesContext(connection) as q3:
        t = time.perf_counter()
        result = scan()
        took = time.perf_counter() - t
    print(f"scan (with caches and notifications): {took:.1f} s, {len(q3)} queries, "
          f"{result.notifications_created} notifications")


if __name__ == "__main__":
    main()
