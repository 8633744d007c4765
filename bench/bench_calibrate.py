"""Sequential Monte Carlo against rejection on a case where rejection keeps under 1 % of draws,
and the calibration of the demo case (two monitored species and a limit on change).

Usage::

    python bench/bench_calibrate.py [--members M] [--widths W ...] [--workers K]

The invented case: one species in exponential decline from an uncertain initial abundance
(log-uniform 50–200) at an uncertain rate (uniform −0.2 to −0.05 per year) over a 20-year spin-up,
observed today in a narrow range [10, 10 + W] (W = 0.1 keeps about 0.3 % of prior draws, W = 0.01
about 0.03 %). Both samplers target the prior restricted to that
range; the bench prints the simulations each spent (target: SMC at least 10× fewer), a two-sample
Kolmogorov–Smirnov test per parameter between the two ensembles (margin: statistic below the
0.1 % critical value for independent samples, 1.95·sqrt(2/M); SMC members are not independent, so
this is a practical check with no stated false-failure rate), and the demo calibration's
simulations per second and wall time (target: under a minute on 2 cores).

Calibration at the engine's pace: in the same run, the engine spins up ``ENGINE_ROUNDS`` × members
rows of the calibrated ensemble in one batch on the same executor (the engine's pace, with the
same per-chunk work of turning rows into parameters and distances), and the bench prints the
calibration's simulations per second as a share of it (1.0: the sampler costs nothing beyond its
simulations; issue 26's target is 15,000 simulations per second on 2 threads).
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
from scipy import stats

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from impact.ensemble.calibrate import build_ensemble, evaluate  # noqa: E402
from impact.case import load_case, parse_case  # noqa: E402
from impact.ensemble.sample import unit_columns  # noqa: E402
from impact.run.execute import make_executor  # noqa: E402

TARGET_RATIO = 10.0
DEMO_TARGET_SECONDS = 60.0
TARGET_SIMULATIONS_PER_SECOND = 15_000
ENGINE_ROUNDS = 8


def narrow_case(members: int, width: float, sampler: str):
    data = {"case": {"title": "narrow range (INVENTED)", "invented": True, "time_unit": "year", "horizon": 5.0,
                     "spinup": 20.0, "members": members, "max_draws": 10_000_000, "seed": 4},
            "parameters": {"r": {"distribution": "uniform", "low": -0.2, "high": -0.05},
                           "n0": {"distribution": "log-uniform", "low": 50.0, "high": 200.0}},
            "species": [{"name": "newt", "growth": "exponential", "growth_rate": "r", "initial": "n0",
                         "quasi_extinction": 1.0}],
            "observed": [{"species": "newt", "low": 10.0, "high": 10.0 + width}],
            "interventions": [{"name": "none", "kind": "press-harvest", "species": "newt", "rate": 0.0}],
            "options": [{"name": "none", "interventions": ["none"]}],
            "calibration": {"sampler": sampler, "max_simulations": 10_000_000}}
    return parse_case(data, Path("narrow.toml"))


def compare(width: float, members: int, ex) -> None:
    got = {}
    print(f"observed range [10, {10 + width:g}], {members} members:")
    for sampler in ("rejection", "smc"):
        case = narrow_case(members, width, sampler)
        t0 = time.perf_counter()
        ens, cal = build_ensemble(case, members, case.seed, executor=ex)
        got[sampler] = (ens, cal, time.perf_counter() - t0)
        print(f"  {sampler:>9}: {cal.simulations:>9} simulations, {got[sampler][2]:6.1f} s, acceptance "
              f"{cal.acceptance:.3%}, prior acceptance {cal.prior_acceptance:.3%}")
    ratio = got["rejection"][1].simulations / got["smc"][1].simulations
    print(f"  rejection / SMC simulations: {ratio:.1f}× (target at least {TARGET_RATIO:.0f}× below 1 % acceptance)")
    crit = 1.95 * np.sqrt(2 / members)
    for name in ("r", "n0"):
        ks = stats.ks_2samp(got["rejection"][0].values[name], got["smc"][0].values[name])
        print(f"    {name}: KS statistic {ks.statistic:.3f} (margin {crit:.3f}) -> "
              f"{'same' if ks.statistic < crit else 'DIFFERENT'}")


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--members", type=int, default=1000)
    ap.add_argument("--widths", type=float, nargs="*", default=[0.1, 0.01])
    ap.add_argument("--workers", type=int, default=1)
    args = ap.parse_args()
    ex = make_executor(args.workers)
    for width in args.widths:
        compare(width, args.members, ex)
    demo = load_case(ROOT / "casework" / "island_mesopredator.toml")
    evaluate(demo, np.full((8, unit_columns(demo)), 0.5), ex)  # load the kernels before the clock starts
    t0 = time.perf_counter()
    ens, cal = build_ensemble(demo, demo.members, demo.seed, executor=ex)
    wall = time.perf_counter() - t0
    rate = cal.simulations / wall
    print(f"demo calibration ({demo.members} members, {len(demo.monitoring)} monitored species, {args.workers} "
          f"worker(s)): {cal.simulations} simulations in {wall:.1f} s = {rate:,.0f} per second "
          f"(target under {DEMO_TARGET_SECONDS:.0f} s and {TARGET_SIMULATIONS_PER_SECOND:,} per second)")
    rows = np.tile(ens.unit, (ENGINE_ROUNDS, 1))
    t0 = time.perf_counter()
    evaluate(demo, rows, ex)
    engine = len(rows) / (time.perf_counter() - t0)
    print(f"  engine pace on the same executor: {engine:,.0f} spin-ups per second in one batch of {len(rows)}; "
          f"calibration / engine = {rate / engine:.2f}")
    ex.close()
    return 0


if __name__ == "__main__":
    sys.exit(main())
