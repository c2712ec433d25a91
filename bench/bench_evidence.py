"""Time an evidence pack for a whole site of N SIFs (default 500).

Builds a synthetic plant with ``manage.py make_scale_plant --sifs N --code packbench`` in
a fresh database, stores one assessment per SIF (as the nightly recompute would), then
builds a site pack over the last three years and reports the time of each stage, the
number of queries, the PDF page count and the zip size.

Run (temporary SQLite database and data folder, the default):
    .venv/bin/python bench/bench_evidence.py [--sifs 500] [--years 3]
Run on PostgreSQL (database created by you beforehand, e.g. packbench):
    DATABASE_URL=postgres://postgres@127.0.0.1:5432/packbench \\
        .venv/bin/python bench/bench_evidence.py
"""

from __future__ import annotations

import argparse
import datetime as dt
import io
import os
import sys
import tempfile
import time
import zipfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sifs", type=int, default=500)
    parser.add_argument("--years", type=int, default=3, help="length of the pack period")
    args = parser.parse_args()

    var = tempfile.mkdtemp(prefix="packbench-")
    os.environ["SIF_LEDGER_VAR_DIR"] = var
    os.environ.setdefault("DJANGO_SETTINGS_MODULE", "config.settings.base")
    os.environ.setdefault("CELERY_TASK_ALWAYS_EAGER", "true")
    import django

    django.setup()
    from django.contrib.auth import get_user_model
    from django.core.management import call_command
    from django.db import connection, reset_queries
    from django.test.utils import CaptureQueriesContext
    from django.utils import timezone

    from calcs.adapter import recompute_many
    from register.audit import evidence
    from register.models import EvidencePack, SafetyFunction, Site

    print(f"database: {connection.vendor} {connection.settings_dict['NAME']}; data: {var}")
    call_command("migrate", verbosity=0)
    t = time.perf_counter()
    call_command("make_scale_plant", sifs=args.sifs, code="packbench", verbosity=0)
    print(f"plant of {args.sifs} SIFs generated in {time.perf_counter() - t:.1f} s")
    site = Site.objects.get(code="packbench")
    sifs = SafetyFunction.objects.filter(unit__site=site)
    t = time.perf_counter()
    recompute_many(sifs, trigger="bench")
    print(f"assessments stored in {time.perf_counter() - t:.1f} s")

    user = get_user_model().objects.filter(is_superuser=True).first() or \
        get_user_model().objects.create_superuser("packbench-admin", password="x")
    today = timezone.localdate()
    pack = EvidencePack.objects.create(
        scope="site", site=site, requested_by=user, period_end=today,
        period_start=today - dt.timedelta(days=365 * args.years))
    stages = []
    last = [time.perf_counter()]

    def progress(percent, text):
        now = time.perf_counter()
        stages.append((percent, text, now - last[0]))
        last[0] = now

    pack.started_at = timezone.now()
    reset_queries()
    t = time.perf_counter()
    with CaptureQueriesContext(connection) as queries:
        path = evidence.build(pack, progress)
    total = time.perf_counter() - t
    end_of_build = time.perf_counter()
    totals: dict[str, float] = {}
    for _, text, secs in stages:
        key = "Charts and achieved PFDavg per SIF" if text.startswith("Charts") else text
        totals[key] = totals.get(key, 0.0) + secs
    totals["Zip and manifest"] = end_of_build - last[0]
    for key, secs in totals.items():
        print(f"  {key:<50s} {secs:7.2f} s")
    data = path.read_bytes()
    with zipfile.ZipFile(io.BytesIO(data)) as zf:
        pdf = zf.read("report.pdf")
        names = zf.namelist()
    pages = pdf.count(b"/Type /Page") - pdf.count(b"/Type /Pages")
    print(f"pack for {args.sifs} SIFs over {args.years} years: {total:.1f} s, "
          f"{len(queries)} queries, {len(names)} files, zip {len(data) / 1e6:.1f} MB, "
          f"PDF {len(pdf) / 1e6:.1f} MB, about {pages} pages")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
