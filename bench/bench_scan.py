"""Benchmark: the periodic scan of a large plant, its time and number of SQL queries.

Run by hand against PostgreSQL, into a database of your own (created by ``migrate``):
    DATABASE_URL=postgres://postgres@127.0.0.1:5432/sif_bench_scan \
        .venv/bin/python bench/bench_scan.py --sifs 5000
Runs the scan three times on a plant of N SIFs (``make_scale_plant``, one yearly plan per
SIF, with a lead and an owner so that notifications have recipients):

1. the first scan (every plan refreshed for the first time: the upgrade case),
2. the same scan again (nothing changed: writes nothing, creates nothing),
3. the scan the next day (``as_of``: the daily case),
4. the scan 30 days later (``as_of``: a month of state changes at once).

E-mails: with a Redis broker (``CELERY_BROKER_URL``, ``CELERY_TASK_ALWAYS_EAGER=false``)
the scan only queues one task per new notification, as in production.

``--scan-module`` names another module with a ``scan(as_of=None, notify=True)`` (for
example a copy of an earlier version, to compare). ``--sifs 500 --sifs 5000`` runs
both sizes into separate sites, to show whether the query count depends on size.
"""

import argparse
import datetime as dt
import importlib
import os
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
os.environ.setdefault("DJANGO_SETTINGS_MODULE", "config.settings.base")


def build(n: int, code: str):
    from django.contrib.auth import get_user_model
    from django.core.management import call_command
    from django.db import connection
    from django.utils import timezone

    from register import choices
    from register.models import Membership, SafetyFunction, Site, TestPlan

    if not Site.objects.filter(code=code).exists():
        call_command("make_scale_plant", sifs=n, code=code)
        if connection.vendor == "postgresql":
            with connection.cursor() as c:
                c.execute("ANALYZE")  # planner statistics for the bulk-loaded rows
    site = Site.objects.get(code=code)
    lead, _ = get_user_model().objects.get_or_create(
        username=f"{code}-lead", defaults={"email": f"{code}-lead@example.invalid"})
    Membership.objects.get_or_create(user=lead, site=site, role=choices.Role.LEAD)
    SafetyFunction.objects.filter(unit__site=site, owner__isnull=True).update(owner=lead)
    # The plans as an earlier version left them: a due date cached, no state dates yet
    # (the generator writes no caches at all).
    TestPlan.objects.filter(sif__unit__site=site, next_due_on__isnull=True,
                            due_soon_on__isnull=True).update(next_due_on=timezone.localdate())
    return site


def only(site_code: str):
    """Follow only the plans of one site in this run (the other sites' SIFs are put in
    design for the run and put back after)."""
    from register import choices
    from register.models import SafetyFunction

    others = SafetyFunction.objects.exclude(unit__site__code=site_code).filter(
        life_stage=choices.LifeStage.IN_SERVICE)
    ids = list(others.values_list("pk", flat=True))
    SafetyFunction.objects.filter(pk__in=ids).update(life_stage=choices.LifeStage.DESIGN)
    return ids


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--sifs", type=int, action="append")
    parser.add_argument("--scan-module", default="register.schedule.scan")
    args = parser.parse_args()
    sizes = args.sifs or [5000]
    import django

    django.setup()
    from django.core.management import call_command
    from django.db import connection
    from django.test.utils import CaptureQueriesContext
    from django.urls import reverse
    from django.utils import timezone

    from register import choices
    from register.models import Notification, SafetyFunction

    call_command("migrate", verbosity=0)
    scan = importlib.import_module(args.scan_module).scan
    reverse("register:home")  # load the URL configuration before timing (once per process)
    print(f"scan module: {args.scan_module}")
    for n in sizes:
        code = f"scale{n}"
        t = time.perf_counter()
        build(n, code)
        print(f"[{n} SIFs] plant ready in {time.perf_counter() - t:.1f} s")
        hidden = only(code)
        try:
            before = Notification.objects.count()
            later = timezone.localdate() + dt.timedelta(days=30)
            cases = (("first scan", {}), ("second scan", {}),
                     ("scan the next day", {"as_of": timezone.localdate() + dt.timedelta(days=1)}),
                     ("scan 30 days later", {"as_of": later}))
            for label, kwargs in cases:
                with CaptureQueriesContext(connection) as q:
                    t = time.perf_counter()
                    result = scan(**kwargs)
                    took = time.perf_counter() - t
                now = Notification.objects.count()
                print(f"[{n} SIFs] {label}: {took:.2f} s, {len(q)} queries, "
                      f"{len(result.plans)} plans looked at, {now - before} notifications")
                before = now
        finally:
            SafetyFunction.objects.filter(pk__in=hidden).update(
                life_stage=choices.LifeStage.IN_SERVICE)


if __name__ == "__main__":
    main()
