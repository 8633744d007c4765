"""Cost of the Sobol sensitivity stage on the demo case.

Usage::

    python bench/bench_sensitivity.py [--base-samples N] [--case PATH] [--second-order]

Prints, from one run: wall time of the whole stage, number of model runs (design points ×
options), design points per second, and the ratio of time in SALib analysis (estimation,
bootstrap, convergence re-estimate, given-data estimator) to time simulating.
Target: the demo's full stage at N = 1024 in under 60 s on 2 cores.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from impact.case import load_case  # noqa: E402
from impact.sensitivity import Settings, sensitivity_stage  # noqa: E402

TARGET_SECONDS = 60.0


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--case", default=str(ROOT / "casework" / "island_mesopredator.toml"))
    ap.add_argument("--base-samples", type=int, default=1024)
    ap.add_argument("--second-order", action="store_true")
    args = ap.parse_args()
    case = load_case(args.case)
    settings = Settings(base_samples=args.base_samples, second_order=args.second_order, seed=case.seed)
    t0 = time.perf_counter()
    res = sensitivity_stage(case, settings)
    wall = time.perf_counter() - t0
    info = res.info
    points = info["runs"]
    n_options = 1 + len(case.options)
    sim, ana = info["seconds"]["simulation"], info["seconds"]["analysis"]
    print(f"case: {case.title}")
    print(f"N = {info['N']} base samples, D = {info['D']}, second order: {info['second_order']}")
    print(f"design points: {points}; model runs (points x {n_options} paired options incl. baseline, "
          f"each after its spin-up): {points * n_options}")
    print(f"outputs analysed: {len(res.convergence)} (x2 for the N/2 convergence re-estimate)")
    print(f"stage wall time: {wall:.1f} s  (target < {TARGET_SECONDS:.0f} s)  -> {'MET' if wall < TARGET_SECONDS else 'NOT MET'}")
    print(f"simulation: {sim:.1f} s = {points / sim:.0f} design points/s = {points * n_options / sim:.0f} option runs/s")
    print(f"SALib analysis: {ana:.1f} s; analysis / simulation = {ana / sim:.2f}")
    print(f"not converged outputs: {info['not_converged']} of {len(res.convergence)}; refused: {len(res.refused)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
