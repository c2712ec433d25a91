"""Timing of the achieved-PFDavg history model on an invented plant.

Builds 5,000 invented SIFs of 5 channels each (2 pressure transmitters 1oo2,
one logic solver 1oo1, 2 shutdown valves 1oo2 with partial-stroke tests),
20 years of test records each (about 100 records per SIF, about 500,000 in all), then
times achieved PFDavg over the last 12 months and since in service.

Run:  .venv/bin/python bench/bench_history.py [--sifs 5000] [--workers 2]
Targets: one SIF (both windows) well under 50 ms; all SIFs under 60 s.
"""

from __future__ import annotations

import argparse
import os
import random
import statistics
import sys
import time
from concurrent.futures import ProcessPoolExecutor
from datetime import datetime, timedelta

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

try:
    from calcs.engine.observed import observed_windows
except ImportError:  # an older tree, for before/after comparisons
    observed_windows = None
from calcs.engine.history import (
    Channel,
    Group,
    SifHistory,
    TestEvent,
    achieved_pfd_windows,
)

AS_OF = datetime(2025, 1, 1)
YEARS = 20


def _dates(rng: random.Random, start: datetime, every_days: float, count: int,
           offset_days: float = 0.0) -> list[datetime]:
    out = []
    t = start + timedelta(days=offset_days)
    for _ in range(count):
        t = t + timedelta(days=every_days + rng.choice((0, 0, 0, -10, 15, 40, 95)))
        out.append(t)
    return [d for d in out if d <= AS_OF]


def _tests(rng: random.Random, dates: list[datetime], kind: str) -> tuple[TestEvent, ...]:
    tests = [
        TestEvent(at=d, kind=kind, failed=rng.random() < 0.02,
                  restore_hours=rng.choice((None, 24.0, 72.0)))
        for d in dates
    ]
    # one real process demand per channel, answered correctly; credited with the
    # coverage of a partial test for half of them
    when = dates[0] + timedelta(days=rng.uniform(0, (dates[-1] - dates[0]).days))
    tests.append(TestEvent(at=when, kind="demand", coverage=rng.choice((None, 0.5))))
    return tuple(sorted(tests, key=lambda t: t.at))


def make_sif(seed: int) -> SifHistory:
    """One invented SIF of the demonstration plant (seeded, reproducible)."""
    rng = random.Random(seed)
    ins = AS_OF - timedelta(days=365 * YEARS + rng.randint(0, 30))
    n_per = YEARS

    def tx(i: int) -> Channel:
        return Channel(lambda_du=3e-7 * rng.uniform(0.5, 2), lambda_dd=2e-6, in_service=ins,
                       tests=_tests(rng, _dates(rng, ins, 360, n_per), "full"))

    logic = Channel(lambda_du=5e-8, lambda_dd=1e-6, in_service=ins,
                    tests=_tests(rng, _dates(rng, ins, 360, n_per), "full"))

    def valve(i: int) -> Channel:
        full = _tests(rng, _dates(rng, ins, 725, n_per // 2 + 1), "full")
        partial = _tests(rng, _dates(rng, ins, 725, n_per // 2 + 1, offset_days=-365),
                         "partial")
        return Channel(lambda_du=2e-6 * rng.uniform(0.5, 2), proof_test_coverage=0.9,
                       partial_test_coverage=0.6, mrt_hours=24.0, in_service=ins,
                       tests=tuple(sorted(full + partial, key=lambda t: t.at)))

    bypasses = []
    for _ in range(rng.randint(0, 3)):
        s = ins + timedelta(days=rng.uniform(0, 365 * YEARS))
        bypasses.append((s, s + timedelta(hours=rng.uniform(2, 72))))
    return SifHistory(
        name=f"SIF-{seed:05d}",
        groups=(
            Group(name="pressure transmitters", voting="1oo2", beta=0.05, beta_d=0.025,
                  channels=(tx(0), tx(1))),
            Group(name="logic solver", voting="1oo1", channels=(logic,)),
            Group(name="shutdown valves", voting="1oo2", beta=0.1,
                  channels=(valve(0), valve(1))),
        ),
        bypasses=tuple(bypasses),
    )


def evaluate(sif: SifHistory) -> tuple[float, float]:
    """What a recompute does per SIF: achieved PFDavg and observed unavailability over the
    last 12 months and since in service."""
    windows = [(None, AS_OF), ("in_service", AS_OF)]
    last12, since = achieved_pfd_windows(sif, windows, as_of=AS_OF)
    if observed_windows is not None:
        observed_windows(sif, windows, as_of=AS_OF)
    return last12.pfd_avg, since.pfd_avg


def _chunk(seeds: range) -> tuple[int, float, float, float]:
    """Build and evaluate a chunk inside a worker; returns (count, sums, eval secs)."""
    sifs = [make_sif(s) for s in seeds]
    t0 = time.perf_counter()
    a = b = 0.0
    for sif in sifs:
        x, y = evaluate(sif)
        a += x
        b += y
    return len(sifs), a, b, time.perf_counter() - t0


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--sifs", type=int, default=5000)
    ap.add_argument("--workers", type=int, default=2)
    args = ap.parse_args()

    # one SIF
    sif = make_sif(1)
    n_tests = sum(len(c.tests) for g in sif.groups for c in g.channels)
    evaluate(sif)
    runs = []
    for _ in range(50):
        t0 = time.perf_counter()
        evaluate(sif)
        runs.append(time.perf_counter() - t0)
    print(f"one SIF ({n_tests} test records, 5 channels), both windows: "
          f"median {statistics.median(runs) * 1e3:.2f} ms, max {max(runs) * 1e3:.2f} ms")

    # building the inputs (not part of the calculation)
    t0 = time.perf_counter()
    sifs = [make_sif(s) for s in range(args.sifs)]
    build = time.perf_counter() - t0
    total_tests = sum(len(c.tests) for s in sifs for g in s.groups for c in g.channels)
    print(f"built {len(sifs)} SIFs with {total_tests} test records in {build:.1f} s")

    # all SIFs, one process
    t0 = time.perf_counter()
    for s in sifs:
        evaluate(s)
    serial = time.perf_counter() - t0
    print(f"all SIFs, 1 process, both windows: {serial:.1f} s "
          f"({serial / len(sifs) * 1e3:.2f} ms per SIF)")

    # all SIFs, worker processes (each builds its own share, only evaluation timed)
    step = max(1, args.sifs // (args.workers * 4))
    chunks = [range(i, min(i + step, args.sifs)) for i in range(0, args.sifs, step)]
    t0 = time.perf_counter()
    with ProcessPoolExecutor(max_workers=args.workers) as pool:
        results = list(pool.map(_chunk, chunks))
    wall = time.perf_counter() - t0
    eval_cpu = sum(r[3] for r in results)
    print(f"all SIFs, {args.workers} workers: wall {wall:.1f} s including building the inputs "
          f"in the workers; evaluation {eval_cpu:.1f} s CPU "
          f"(~{eval_cpu / args.workers:.1f} s wall on {args.workers} cores)")
    mean12 = sum(r[1] for r in results) / args.sifs
    mean_all = sum(r[2] for r in results) / args.sifs
    print(f"mean achieved PFDavg: last 12 months {mean12:.3e}, since in service {mean_all:.3e}")
    ok = statistics.median(runs) < 0.05 and serial / args.workers < 60
    print("targets met" if ok else "TARGETS NOT MET")


if __name__ == "__main__":
    main()
