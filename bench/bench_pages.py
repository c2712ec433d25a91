"""Timing of the lead's list and overview pages on a generated, invented plant.

Builds a throw-away SQLite database with one site, 10 units and N SIFs (default 1,000),
each with two subsystems, a full proof-test plan in a mixed state (on track, due soon,
overdue, escalated) and two years of signed proof tests, stores one assessment per
SIF, then requests each page several times with the Django test client and reports the
median time and the number of SQL queries.

Run:  .venv/bin/python bench/bench_pages.py [--sifs 1000] [--repeat 5]
Target: each page under 1 s with 1,000 SIFs; the list's query count independent of N.
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import statistics
import sys
import tempfile
import time

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
os.environ.setdefault("DJANGO_SETTINGS_MODULE", "config.settings.test")
os.environ.setdefault("DJANGO_ALLOW_ASYNC_UNSAFE", "true")


def build(n_sifs: int):
    from django.contrib.auth import get_user_model
    from django.utils import timezone

    from calcs import adapter
    from register import choices, services
    from register.models import (
        Component,
        DeviceType,
        Membership,
        PlantUnit,
        SafetyFunction,
        Site,
        Subsystem,
        TestPlan,
    )
    from register.schedule import followup
    from register.schedule.due import refresh_plans

    today = timezone.localdate()
    site = Site.objects.create(code="bench", name="Bench plant (invented)")
    lead = get_user_model().objects.create_user("benchlead", password="x")
    Membership.objects.create(user=lead, site=site, role=choices.Role.LEAD)
    units = [PlantUnit.objects.create(site=site, code=f"U{i:02d}", name=f"Unit {i}")
             for i in range(10)]
    tx = DeviceType.objects.create(name="Bench transmitter", role="sensing",
                                   lambda_du_per_hour=4e-7, lambda_dd_per_hour=1e-6,
                                   lambda_s_per_hour=1e-6, source="invented")
    xv = DeviceType.objects.create(name="Bench valve", role="final", lambda_du_per_hour=9e-7,
                                   device_class="A", source="invented")
    offsets = [200, 350, 380, 420, 300, 100]  # days since last test: mixed states
    with followup.suspended():
        for i in range(n_sifs):
            in_service = today - dt.timedelta(days=3 * 365)
            sif = SafetyFunction.objects.create(
                unit=units[i % 10], tag=f"B-{i:05d}", name="Bench trip",
                safe_state="Closed", target_pfd_avg=9e-3, target_sil=2,
                in_service_on=in_service)
            comps = []
            for role, typ, pos in (("sensing", tx, 1), ("final", xv, 3)):
                sub = Subsystem.objects.create(sif=sif, role=role, name=role, voting="1oo1",
                                               position=pos)
                comps.append(Component.objects.create(subsystem=sub, tag=f"{role[:2]}-{i}",
                                                      device_type=typ,
                                                      in_service_on=in_service))
            plan = TestPlan.objects.create(sif=sif, name="Full proof test", interval_months=12)
            last = today - dt.timedelta(days=offsets[i % len(offsets)])
            for back in (365, 0):
                at = dt.datetime.combine(last - dt.timedelta(days=back), dt.time(9),
                                         tzinfo=dt.UTC)
                rec = services.save_draft(user=lead, sif=sif, kind="full", performed_at=at,
                                          plan=plan, results=[services.ResultInput(
                                              component=c, as_found="pass", as_left="pass")
                                              for c in comps])
                services.sign_record(rec, lead, None, check_password=False, signed_at=at)
    refresh_plans(TestPlan.objects.all(), today)
    adapter.recompute_many(SafetyFunction.objects.all(), trigger="bench")
    return lead


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--sifs", type=int, default=1000)
    parser.add_argument("--repeat", type=int, default=5)
    args = parser.parse_args()
    tmp = tempfile.mkdtemp(prefix="bench-pages-")
    os.environ["DATABASE_URL"] = f"sqlite:///{tmp}/bench.sqlite3"
    import django

    django.setup()
    from django.core.management import call_command
    from django.db import connection
    from django.test import Client
    from django.test.utils import CaptureQueriesContext, setup_test_environment

    setup_test_environment()
    call_command("migrate", verbosity=0)
    t0 = time.perf_counter()
    lead = build(args.sifs)
    print(f"built {args.sifs} SIFs in {time.perf_counter() - t0:.1f} s")
    client = Client()
    client.force_login(lead)
    pages = {
        "overview /": "/",
        "list /sifs/": "/sifs/",
        "list, overdue SIL 2": "/sifs/?target_sil=2&overdue=true",
        "list, sorted by achieved": "/sifs/?sort=-achieved",
        "list, late in 12 months": "/sifs/?late_12m=true",
        "export .csv (all)": "/sifs/export.csv",
    }
    print(f"{'page':28} {'median ms':>10} {'max ms':>8} {'queries':>8}")
    for label, url in pages.items():
        times = []
        queries = 0
        for _ in range(args.repeat):
            connection.queries_log.clear()
            with CaptureQueriesContext(connection) as ctx:
                start = time.perf_counter()
                resp = client.get(url)
                times.append((time.perf_counter() - start) * 1000)
            assert resp.status_code == 200, (url, resp.status_code)
            queries = len(ctx.captured_queries)
        print(f"{label:28} {statistics.median(times):10.0f} {max(times):8.0f} {queries:8d}")


if __name__ == "__main__":
    main()
