"""Writing the plans' derived columns (``register.schedule.due.write_columns``) against
Django's ``bulk_update`` and the bare read of the same rows, in one run.

    DATABASE_URL=postgres://postgres@127.0.0.1:5432/benchw .venv/bin/python manage.py migrate
    DATABASE_URL=postgres://postgres@127.0.0.1:5432/benchw PYTHONPATH=. \\
        .venv/bin/python bench/bench_plan_columns.py [plans]

Builds the plans once (bulk, one SIF), then three rounds of: bulk_update of the five
columns, write_columns of the same, a bare values_list read; prints seconds and ratios.
"""

import datetime as dt
import os
import sys
import time

import django

os.environ.setdefault("DJANGO_SETTINGS_MODULE", "config.settings.base")
django.setup()

from register.models import TestPlan  # noqa: E402
from register.schedule import due  # noqa: E402
from tests import factories as f  # noqa: E402

WANT = int(sys.argv[1]) if len(sys.argv) > 1 else 6000
if TestPlan.objects.count() < WANT:
    sif = f.sif(f.unit(f.site()))
    TestPlan.objects.bulk_create([TestPlan(sif=sif, name=f"p{i}", interval_months=12)
                                  for i in range(WANT)])
plans = list(TestPlan.objects.all())
for k in range(3):
    day = dt.date(2026, 1, 1) + dt.timedelta(days=2 * k)
    for p in plans:
        for c in due.STATE_COLUMNS:
            setattr(p, c, day)
    t = time.perf_counter()
    TestPlan.objects.bulk_update(plans, due.STATE_COLUMNS, batch_size=1000)
    old = time.perf_counter() - t
    for p in plans:
        for c in due.STATE_COLUMNS:
            setattr(p, c, day + dt.timedelta(days=1))
    t = time.perf_counter()
    due.write_columns(plans)
    new = time.perf_counter() - t
    t = time.perf_counter()
    list(TestPlan.objects.values_list("id", *due.STATE_COLUMNS))
    floor = time.perf_counter() - t
    print(f"{len(plans)} plans: bulk_update {old:.2f} s ({old / floor:.0f}x floor), "
          f"write_columns {new:.2f} s ({new / floor:.0f}x floor), bare read {floor:.3f} s")
assert TestPlan.objects.filter(next_due_on=day + dt.timedelta(days=1)).count() == len(plans)
