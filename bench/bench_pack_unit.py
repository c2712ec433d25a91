"""Time the evidence pack of the largest unit of a loaded plant (the demo plant by default).

Needs a database that holds the plant already (``manage.py load_demo``). The pack covers
the longest period a request may ask for (from the unit's first in-service date, at most
``MAX_PACK_YEARS``, to today). Builds it ``--runs`` times and reports each stage's median,
the PDF size, its pages and its raster images (none: the charts are vector graphics). The
build runs in this process, section after section (``evidence.build``); for the pack on
worker processes see ``bench_evidence.py --workers``.

Run:
    DATABASE_URL=postgres://postgres@127.0.0.1:5432/<db> SIF_LEDGER_VAR_DIR=/tmp/<dir> \\
        .venv/bin/python bench/bench_pack_unit.py [--site saltmere] [--runs 3]
"""

from __future__ import annotations

import argparse
import io
import os
import statistics
import sys
import time
import zipfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--site", default="saltmere", help="site code")
    parser.add_argument("--runs", type=int, default=3)
    args = parser.parse_args()
    os.environ.setdefault("DJANGO_SETTINGS_MODULE", "config.settings.base")
    os.environ.setdefault("CELERY_TASK_ALWAYS_EAGER", "true")
    import django

    django.setup()
    from django.contrib.auth import get_user_model
    from django.db.models import Count
    from django.utils import timezone

    from register.audit import evidence
    from register.audit.evidence.requests import MAX_PACK_YEARS, service_start
    from register.models import EvidencePack, PlantUnit, Site

    site = Site.objects.get(code=args.site)
    unit = PlantUnit.objects.filter(site=site).annotate(n=Count("sifs")).order_by("-n")[0]
    today = timezone.localdate()
    first = service_start(EvidencePack.Scope.UNIT, site, unit) or today.replace(year=today.year - 3)
    start = max(first, today.replace(year=today.year - MAX_PACK_YEARS))
    user = get_user_model().objects.filter(is_superuser=True).first() or \
        get_user_model().objects.order_by("pk").first()
    print(f"unit {unit.code} {unit.name}: {unit.n} SIFs, period {start} to {today}")
    stages: dict[str, list[float]] = {}
    totals = []
    for _ in range(args.runs):
        pack = EvidencePack.objects.create(scope="unit", site=site, unit=unit,
                                           requested_by=user, period_start=start,
                                           period_end=today)
        last = [time.perf_counter()]
        run: dict[str, float] = {}

        def progress(percent, text, run=run, last=last):
            now = time.perf_counter()
            key = "Sections" if text.startswith("Sections") else text
            run[key] = run.get(key, 0.0) + now - last[0]
            last[0] = now

        pack.started_at = timezone.now()
        t = time.perf_counter()
        path = evidence.build(pack, progress)
        totals.append(time.perf_counter() - t)
        run["Zip and manifest"] = time.perf_counter() - last[0]
        for key, secs in run.items():
            stages.setdefault(key, []).append(secs)
        pack.delete()
    for key, values in stages.items():
        print(f"  {key:<44s} median {statistics.median(values):6.2f} s, "
              f"fastest {min(values):6.2f} s")
    with zipfile.ZipFile(io.BytesIO(path.read_bytes())) as zf:
        pdf = zf.read("report.pdf")
        names = zf.namelist()
    images = pdf.count(b"/Subtype /Image")
    pages = pdf.count(b"/Type /Page") - pdf.count(b"/Type /Pages")
    print(f"pack build: median {statistics.median(totals):.2f} s, fastest {min(totals):.2f} s "
          f"of {args.runs} "
          f"({', '.join(f'{t:.2f}' for t in totals)}); {len(names)} files, PDF "
          f"{len(pdf) / 1e6:.2f} MB, {pages} pages, {images} raster images in the PDF (the charts "
          "are drawn as vector graphics)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
