"""Benchmark: recomputing every SIF of a scale plant, and where the time goes.

Times ``recompute_many`` over the whole plant (each run a new evaluation day, so every
SIF is evaluated again); with ``--phases``, the time of each step of a recompute (reading
the rows, building the engine's inputs, the history model, storing); with ``--profile``,
the functions that take the most time. Uses the scale plant that bench/bench_scale.py builds (built here when missing):
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
    parser.add_argument("--phases", action="store_true")
    parser.add_argument("--top", type=int, default=30)
    parser.add_argument("--chunk", type=int, default=None,
                        help="SIFs per engine batch (default: the recompute's own)")
    args = parser.parse_args()
    import django

    django.setup()
    from django.core.management import call_command
    from django.utils import timezone

    from calcs.adapter import assessment
    from register.models import SafetyFunction, Site

    def recompute_many(*a, **k):
        if args.chunk:
            k["chunk"] = args.chunk
        return assessment.recompute_many(*a, **k)

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
    if args.phases:
        as_of += dt.timedelta(days=1)
        took = phases(lambda: recompute_many(qs, trigger="bench", as_of=as_of))
        for name, ms in took:
            print(f"  {name:40} {ms:8.0f} ms")
    if args.profile:
        as_of += dt.timedelta(days=1)
        prof = cProfile.Profile()
        prof.enable()
        recompute_many(qs, trigger="bench", as_of=as_of)
        prof.disable()
        out = io.StringIO()
        pstats.Stats(prof, stream=out).sort_stats("cumulative").print_stats(args.top)
        print(out.getvalue())


def phases(run) -> list[tuple[str, float]]:
    """Run ``run`` once with the steps of a recompute timed (each step's functions wrapped
    for that run only); steps nest (``assess`` holds the engine's)."""
    import functools

    from calcs.adapter import assessment
    from calcs.engine import history, observed

    steps = [
        (assessment, "load", "read the rows (load)"),
        (assessment, "latest_assessments", "newest assessments"),
        (assessment, "_full_due_dates", "due dates"),
        (assessment, "inputs_digest", "inputs digest"),
        (assessment, "_begin", "assessments up to the averages (per SIF)"),
        (assessment, "design_input", "  design input"),
        (assessment.eng_design, "evaluate_sif", "  design figures"),
        (assessment, "_schedule_check", "  schedule self-check"),
        (assessment, "history_input", "  history input"),
        (history, "prepare", "  history prepared"),
        (history.PreparedHistory, "windows_request", "  windows compiled, nodes laid out"),
        (observed, "observed_windows", "  observed windows"),
        (history.PreparedHistory, "projection_request", "  projection compiled"),
        (assessment, "_evaluate", "averages, one batch per chunk"),
        (assessment._Started, "finish", "assessments completed (per SIF)"),
        (assessment, "_store", "store"),
    ]
    took: dict[str, float] = {}
    saved = []
    for owner, attr, label in steps:
        fn = getattr(owner, attr)
        saved.append((owner, attr, fn))

        def timed(*a, _fn=fn, _label=label, **k):
            t = time.perf_counter()
            try:
                return _fn(*a, **k)
            finally:
                took[_label] = took.get(_label, 0.0) + time.perf_counter() - t

        setattr(owner, attr, functools.wraps(fn)(timed))
    t = time.perf_counter()
    try:
        run()
    finally:
        for owner, attr, fn in saved:
            setattr(owner, attr, fn)
    took["recompute (all)"] = time.perf_counter() - t
    return [(label, took.get(label, 0.0) * 1000)
            for label in ["recompute (all)"] + [x[2] for x in steps]]


if __name__ == "__main__":
    main()
