"""Benchmark: recomputing every SIF of a scale plant, and where the time goes.

Times ``recompute_many`` over the whole plant (each run a new evaluation day, so every
SIF is evaluated again) and, with ``--profile``, prints the functions that take the most
time. Uses the scale plant that bench/bench_scale.py builds (built here when missing):
    DATABASE_URL=postgres://postgres@127.0.0.1:5432/sif_bench_scale \\
        .venv/bin/python bench/bench_recompute.py --sifs 1000 --profile
"""

import argparse
import cProfile
import datetime as dt
import io
import os
import pstats
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
os.environ.setdefault("DJANGO_SETTINGS_MODULE", "config.settings.base")


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--sifs", type=int, default=1000)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--profile", action="store_true")
    parser.add_argument("--top", type=int, default=30)
    args = parser.parse_args()
    import django

    django.setup()
    from django.core.management import call_command
    from django.utils import timezone

    from calcs.adapter import recompute_many
    from register.models import SafetyFunction, Site

    call_command("migrate", verbosity=0)
    code = f"scale{args.sifs}"
    if not Site.objects.filter(code=code).exists():
        call_command("make_scale_plant", sifs=args.sifs, code=code)
    qs = SafetyFunction.objects.filter(unit__site__code=code)
    as_of = timezone.now()
    best = None
    for _ in range(args.repeat):
        as_of += dt.timedelta(days=1)
        t = time.perf_counter()
        recompute_many(qs, trigger="bench", as_of=as_of)
        took = time.perf_counter() - t
        best = took if best is None else min(best, took)
    print(f"recompute of {qs.count()} SIFs: best of {args.repeat} {best * 1000:.0f} ms")
    if args.profile:
        as_of += dt.timedelta(days=1)
        prof = cProfile.Profile()
        prof.enable()
        recompute_many(qs, trigger="bench", as_of=as_of)
        prof.disable()
        out = io.StringIO()
        pstats.Stats(prof, stream=out).sort_stats("cumulative").print_stats(args.top)
        print(out.getvalue())


if __name__ == "__main__":
    main()
