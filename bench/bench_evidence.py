"""Time an evidence pack for a whole site of N SIFs (default 500).

Builds a synthetic plant with ``manage.py make_scale_plant --sifs N --code CODE`` (unless a
site with that code is there already: ``--code`` reuses it), stores one assessment per SIF
(as the nightly recompute would; skipped with ``--keep-assessments`` when each SIF has
one), then builds a site pack over the last three years and reports the time of each
stage, the number of queries, the PDF page count and the zip size.

``--workers``: the pack goes through the packs queue to real Celery workers started
beforehand against the same database and broker (``celery -A config worker -Q packs -c 2``);
the time is from sending the task to the pack row saying done, the stages are read from
the row as it goes.

Run (temporary SQLite database and data folder, the default):
    .venv/bin/python bench/bench_evidence.py [--sifs 500] [--years 3]
Run on PostgreSQL (database created and migrated by you beforehand, e.g. packbench):
    DATABASE_URL=postgres://postgres@127.0.0.1:5432/packbench \\
        .venv/bin/python bench/bench_evidence.py
With workers (same DATABASE_URL, CELERY_BROKER_URL and SIF_LEDGER_VAR_DIR for both):
    CELERY_TASK_ALWAYS_EAGER=false .venv/bin/celery -A config worker -Q packs -c 2 &
    CELERY_TASK_ALWAYS_EAGER=false .venv/bin/python bench/bench_evidence.py --code s500 \\
        --keep-assessments --workers
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
    parser.add_argument("--code", default="packbench", help="site code (reused when there)")
    parser.add_argument("--keep-assessments", action="store_true",
                        help="do not recompute when every SIF has an assessment")
    parser.add_argument("--workers", action="store_true",
                        help="build through the packs queue on running Celery workers")
    parser.add_argument("--timeout", type=int, default=1800, help="seconds (with --workers)")
    args = parser.parse_args()

    if "SIF_LEDGER_VAR_DIR" not in os.environ:
        os.environ["SIF_LEDGER_VAR_DIR"] = tempfile.mkdtemp(prefix="packbench-")
    var = os.environ["SIF_LEDGER_VAR_DIR"]
    os.environ.setdefault("DJANGO_SETTINGS_MODULE", "config.settings.base")
    os.environ.setdefault("CELERY_TASK_ALWAYS_EAGER", "false" if args.workers else "true")
    import django

    django.setup()
    from django.conf import settings
    from django.contrib.auth import get_user_model
    from django.core.management import call_command
    from django.db import connection, reset_queries
    from django.test.utils import CaptureQueriesContext
    from django.utils import timezone

    from calcs.adapter import recompute_many
    from calcs.models import Assessment
    from register.audit import evidence
    from register.models import EvidencePack, SafetyFunction, Site

    print(f"database: {connection.vendor} {connection.settings_dict['NAME']}; data: {var}")
    call_command("migrate", verbosity=0)
    if not Site.objects.filter(code=args.code).exists():
        t = time.perf_counter()
        call_command("make_scale_plant", sifs=args.sifs, code=args.code, verbosity=0)
        print(f"plant of {args.sifs} SIFs generated in {time.perf_counter() - t:.1f} s")
    site = Site.objects.get(code=args.code)
    sifs = SafetyFunction.objects.filter(unit__site=site)
    n_sifs = sifs.count()
    assessed = Assessment.objects.filter(sif__in=sifs).values("sif").distinct().count()
    if not (args.keep_assessments and assessed == n_sifs):
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

    queries = []
    if args.workers:
        from register.audit.tasks import build_evidence_pack

        t = time.perf_counter()
        build_evidence_pack.apply_async(args=[pack.pk], queue=settings.PACKS_QUEUE)
        seen = None
        while True:
            row = EvidencePack.objects.values("status", "stage").get(pk=pack.pk)
            if row["stage"] != seen:
                if seen is not None:
                    progress(0, seen)
                seen = row["stage"]
            if row["status"] in (EvidencePack.Status.DONE, EvidencePack.Status.FAILED):
                break
            if time.perf_counter() - t > args.timeout:
                print("timed out")
                return 1
            time.sleep(0.05)
        total = time.perf_counter() - t
        end_of_build = last[0]
        pack.refresh_from_db()
        if pack.status != EvidencePack.Status.DONE:
            print(f"pack failed: {pack.error}")
            return 1
        path = Path(settings.VAR_DIR) / pack.result_path
    else:
        pack.started_at = timezone.now()
        reset_queries()
        t = time.perf_counter()
        with CaptureQueriesContext(connection) as queries:
            path = evidence.build(pack, progress)
        total = time.perf_counter() - t
        end_of_build = time.perf_counter()
    totals: dict[str, float] = {}
    for _, text, secs in stages:
        key = ("Charts and achieved PFDavg per SIF" if text.startswith("Charts") else
               "Sections" if text.startswith("Sections") else text)
        totals[key] = totals.get(key, 0.0) + secs
    totals["Zip and manifest" if not args.workers else "Last stage"] = end_of_build - last[0]
    for key, secs in totals.items():
        print(f"  {key:<50s} {secs:7.2f} s")
    data = path.read_bytes()
    with zipfile.ZipFile(io.BytesIO(data)) as zf:
        pdf = zf.read("report.pdf")
        names = zf.namelist()
    pages = pdf.count(b"/Type /Page") - pdf.count(b"/Type /Pages")
    images = pdf.count(b"/Subtype /Image")
    mode = "workers" if args.workers else "in process"
    print(f"pack for {n_sifs} SIFs over {args.years} years ({mode}): {total:.1f} s, "
          f"{len(queries) if queries else '-'} queries, {len(names)} files, "
          f"zip {len(data) / 1e6:.1f} MB, PDF {len(pdf) / 1e6:.1f} MB, about {pages} pages, "
          f"{images} raster images in the PDF")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
