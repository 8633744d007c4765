"""Extra cost of the sensitivity and value-of-information tables on the plausible members.

Usage::

    python bench/bench_decision.py [--case PATH] [--members M]

Both tables reuse the members already run, so their cost is measured against the core stage
(draws + paired option runs) of the same members, in the same process and run.
Target: under 10 % of the core stage.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from impact.assess import assess_members, draw_ensemble  # noqa: E402
from impact.case import load_case  # noqa: E402
from impact.decision import drivers_table, information_table  # noqa: E402

TARGET_RATIO = 0.10


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--case", default=str(ROOT / "casework" / "island_mesopredator.toml"))
    ap.add_argument("--members", type=int, default=1000)
    args = ap.parse_args()
    case = load_case(args.case)
    t0 = time.perf_counter()
    ens = draw_ensemble(case, args.members, case.seed)
    runs = assess_members(case, ens, case.seed)
    core = time.perf_counter() - t0
    t1 = time.perf_counter()
    drivers_table(case, ens.values, runs, case.seed)
    t2 = time.perf_counter()
    information_table(case, ens.values, runs, case.seed)
    t3 = time.perf_counter()
    extra = t3 - t1
    print(f"core stage ({args.members} members, in-process): {core:.2f} s")
    print(f"main effects: {t2 - t1:.2f} s; value of information: {t3 - t2:.2f} s")
    print(f"extra cost / core stage: {extra / core:.1%} (target under {TARGET_RATIO:.0%})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
