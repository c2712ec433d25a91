"""Benchmark of the design calculation: 20,000 invented SIFs of 3 subsystems each.

Run: .venv/bin/python bench/bench_design.py [number_of_sifs]
Prints SIFs per second and total seconds for building the inputs, for the
design calculation (evaluate_sif) and for the JSON-dict path (evaluate_case,
which also finds the longest proof test interval when a target is given).
"""

from __future__ import annotations

import random
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from calcs.engine import SifDesign, Subsystem, evaluate_case, evaluate_sif

Y = 8760.0
SENSOR_VOTINGS = ["1oo1", "1oo2", "2oo3", "1oo3", "2oo4"]
LOGIC_VOTINGS = ["1oo1", "1oo2D", "2oo3"]
FINAL_VOTINGS = ["1oo1", "1oo2", "2oo2", "1oo3"]


def invented_subsystem(rng: random.Random, role: str) -> dict:
    votings = {"sensors": SENSOR_VOTINGS, "logic": LOGIC_VOTINGS, "final": FINAL_VOTINGS}[role]
    sub = {
        "name": role,
        "voting": rng.choice(votings),
        "lambda_du_per_hour": 10 ** rng.uniform(-9, -5.5),
        "lambda_dd_per_hour": 10 ** rng.uniform(-9, -5),
        "lambda_sd_per_hour": 10 ** rng.uniform(-9, -6),
        "beta": rng.choice([0.01, 0.02, 0.05, 0.1]),
        "beta_d": rng.choice([0.005, 0.01, 0.025, 0.05]),
        "mttr_hours": rng.choice([8.0, 24.0, 72.0]),
        "proof_test_interval_hours": rng.choice([0.5, 1, 2, 3, 5]) * Y,
    }
    if rng.random() < 0.4:
        sub["proof_test_coverage"] = rng.uniform(0.6, 0.99)
        sub["mission_time_hours"] = rng.choice([10, 15, 20]) * Y
    if role == "final" and rng.random() < 0.3:
        sub["partial_test_interval_hours"] = rng.choice([730.0, 2190.0])
        sub["partial_test_coverage"] = rng.uniform(0.2, 0.6) * sub.get("proof_test_coverage", 1.0)
    if rng.random() < 0.5:
        sub["sff"] = rng.uniform(0.5, 0.995)
        sub["hft_type"] = rng.choice(["A", "B"])
        sub["systematic_capability"] = rng.choice([1, 2, 3])
    return sub


def invented_case(rng: random.Random) -> dict:
    case = {
        "demand_mode": "low" if rng.random() < 0.85 else "high",
        "subsystems": [invented_subsystem(rng, r) for r in ("sensors", "logic", "final")],
    }
    return case


def main(count: int = 20_000) -> None:
    rng = random.Random(20240611)
    cases = [invented_case(rng) for _ in range(count)]

    start = time.perf_counter()
    sifs = [SifDesign(tuple(Subsystem(**s) for s in c["subsystems"]), demand_mode=c["demand_mode"])
            for c in cases]
    build = time.perf_counter() - start

    start = time.perf_counter()
    checksum = 0.0
    for sif in sifs:
        checksum += evaluate_sif(sif).pfd_avg
    calc = time.perf_counter() - start

    subset = cases[:2000]
    for c in subset:
        if c["demand_mode"] == "low":
            c["target_pfd_avg"] = 1e-2
    start = time.perf_counter()
    for c in subset:
        evaluate_case(c)
    full = time.perf_counter() - start

    print(f"SIFs: {count} (3 subsystems each), checksum of PFDavg {checksum:.6g}")
    print(f"build inputs (validation): {build:.3f} s  ({count / build:,.0f} SIFs/s)")
    print(f"design calculation:        {calc:.3f} s  ({count / calc:,.0f} SIFs/s)")
    print(f"evaluate_case incl. validation, JSON dict and longest test interval "
          f"({len(subset)} SIFs): {full:.3f} s  ({len(subset) / full:,.0f} SIFs/s)")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 20_000)
