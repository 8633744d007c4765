"""Cost of the Sobol sensitivity stage on the demo case, and of its analysis against the SALib loop.

Usage::

    python bench/bench_sensitivity.py [--base-samples N] [--case PATH] [--second-order] [--repeats R]

Prints, from one run:

1. the whole stage once (wall time, model runs, design points per second, as before);
2. the stage's analysis alone (Sobol estimates, N/2 re-estimate, given-data rows) on the outputs of
   that same run, in CPU seconds (``time.process_time``, minimum of R): with the vectorised
   estimators, and with SALib's ``sobol.analyze`` and ``rbd_fast.analyze`` in their place (the
   former path);
3. each estimator alone, both ways, on the demo's outputs;
4. the largest difference between the two paths' tables (the same draws: rounding only), and
   whether the ranking is the same.

Target (issue 14): sensitivity and decision stages of the demo (N = 128, as ``impact assess``
runs it) together in 2-3 CPU seconds; see bench_decision.py for the other half.

Measured 2026-12-03 on a shared 2-core AMD EPYC (numpy 2.4.6, scipy 1.17.1, SALib 1.6.0), one run:
analysis alone 0.363 CPU s vectorised against 6.772 s with SALib's loops (18.7x); the given-data
estimator on 30 outputs 0.077 against 5.168 s (67x); the Sobol estimator on 82 outputs 0.137
against 0.578 s (4.2x); largest difference in indices.csv 3.6e-15, the same NaNs and ranking.
With bench_decision.py's 0.094 + 0.187 s, the two stages' analysis takes about 0.64 CPU s
(target 2-3 s: met), against about 8.4 s before.

Measured 2026-12-05, same machine under load (issue 26: the resample means as count-weighted sums, the
given-data rows' sort orders and resamples shared by outputs on the same points): analysis alone 0.092
CPU s against 4.75 s with SALib's loops; the given-data estimator on 30 outputs 0.029 s (0.077 before);
the Sobol estimator on 84 outputs 0.041 s (0.137 before); largest difference in indices.csv against
SALib 2.0e-14, the same NaNs and ranking.
"""

from __future__ import annotations

import argparse
import sys
import time
import warnings
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

from timing import cpu_min  # noqa: E402
import impact.decision.sensitivity.estimators as estimators  # noqa: E402
import impact.decision.sensitivity.study as study  # noqa: E402
from impact.case import load_case  # noqa: E402
from impact.decision.sensitivity import Settings, sensitivity_stage  # noqa: E402
from impact.decision.sensitivity.designs import salib_seed, unit_problem  # noqa: E402
from impact.decision.sensitivity.estimators import given_data_first_order, saltelli_estimates  # noqa: E402

TARGET_SECONDS = 60.0


def salib_given_data(X, y, names, seed):
    """The former path: SALib's loop of one periodogram per resample (the reference)."""
    from SALib.analyze import rbd_fast

    ok = np.isfinite(y)
    X, y = X[ok], y[ok]
    if y.size < 64 or np.ptp(y) == 0:
        return np.full(X.shape[1], np.nan), np.full(X.shape[1], np.nan)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        S = rbd_fast.analyze(unit_problem(names), X, y, seed=salib_seed(seed, 4))
    return np.asarray(S["S1"], float), np.asarray(S["S1_conf"], float)


def salib_sobol(y, D, second_order, rng, *, resamples=100, confidence=0.95):
    """The former path: SALib's sobol.analyze, seeded as the stage seeds the vectorised estimator."""
    from SALib.analyze import sobol as salib

    seed = int(rng.bit_generator.seed_seq.entropy)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        S = salib.analyze(unit_problem([f"x{j}" for j in range(D)]), y, calc_second_order=second_order,
                          num_resamples=resamples, conf_level=confidence, seed=seed)
    return {k: np.asarray(v, float) for k, v in S.items() if k in ("S1", "S1_conf", "ST", "ST_conf", "S2", "S2_conf")}


def recording_model(store: dict):
    """The stage's model, keeping every design's outputs so the analysis can be re-run alone."""
    base = study.FoodWebModel

    class Recording(base):
        def __call__(self, unit):
            Y = base.__call__(self, unit)
            store[unit.tobytes()] = (Y, dict(self.failures))
            return Y

    return Recording


def replaying_model(store: dict):
    class Replaying:
        def __init__(self, *args, **kwargs):
            self.failures, self.seconds = {}, 0.0

        def __call__(self, unit):
            Y, self.failures = store[unit.tobytes()]
            return Y

    return Replaying


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--case", default=str(ROOT / "casework" / "island_mesopredator.toml"))
    ap.add_argument("--base-samples", type=int, default=128)
    ap.add_argument("--second-order", action="store_true")
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    case = load_case(args.case)
    settings = Settings(base_samples=args.base_samples, second_order=args.second_order, seed=case.seed,
                        confidence=case.risk.confidence)
    store: dict = {}
    original = study.FoodWebModel
    study.FoodWebModel = recording_model(store)
    t0 = time.perf_counter()
    try:
        res = sensitivity_stage(case, settings)
    finally:
        study.FoodWebModel = original
    wall = time.perf_counter() - t0
    info = res.info
    points = info["runs"]
    n_options = 1 + len(case.options)
    sim = info["seconds"]["simulation"]
    print(f"case: {case.title}")
    print(f"N = {info['N']} base samples, D = {info['D']}, second order: {info['second_order']}")
    print(f"design points: {points}; model runs (points x {n_options} paired options incl. baseline, "
          f"each after its spin-up): {points * n_options}")
    print(f"outputs analysed: {len(res.convergence)} (x2 for the N/2 convergence re-estimate)")
    print(f"stage wall time: {wall:.1f} s  (target < {TARGET_SECONDS:.0f} s)  -> {'MET' if wall < TARGET_SECONDS else 'NOT MET'}")
    print(f"simulation: {sim:.1f} s = {points / sim:.0f} design points/s = {points * n_options / sim:.0f} option runs/s")

    study.FoodWebModel = replaying_model(store)
    try:
        new_s, new = cpu_min(lambda: sensitivity_stage(case, settings), args.repeats)
        study.given_data_first_order, estimators.saltelli_estimates = salib_given_data, salib_sobol
        old_s, old = cpu_min(lambda: sensitivity_stage(case, settings), args.repeats)
    finally:
        study.FoodWebModel = original
        study.given_data_first_order, estimators.saltelli_estimates = given_data_first_order, saltelli_estimates
    cols = ["S1", "S1_conf", "ST", "ST_conf"]
    diff = np.nanmax(np.abs(new.indices[cols].to_numpy(float) - old.indices[cols].to_numpy(float)))
    same_nan = bool((new.indices[cols].isna() == old.indices[cols].isna()).all().all())
    same_rank = new.ranking[["parameter", "rank"]].equals(old.ranking[["parameter", "rank"]])
    print(f"analysis alone, CPU s (min of {args.repeats}): {new_s:.3f} vectorised vs {old_s:.3f} with SALib's "
          f"sobol.analyze and rbd_fast = {old_s / new_s:.1f}x")

    # the given-data estimator alone, on the headline outputs the stage gives it
    (Y, _), = [v for v in store.values() if v[0].shape[0] == points]
    from impact.decision.sensitivity.designs import sobol_design
    design = sobol_design(info["parameters"], args.base_samples, args.second_order, case.seed)
    rows = design.base_rows()
    kept = Y[rows, 0] == 1.0
    labels = study.output_labels(case)
    cols_k = [k for k, (_, m, _) in enumerate(labels) if m in study.GIVEN_DATA_METRICS]
    names = info["parameters"]

    def each(fn):
        return [fn(design.unit[rows][kept], Y[rows, k][kept], names, case.seed) for k in cols_k]

    est_new_s, _ = cpu_min(lambda: each(given_data_first_order), args.repeats)
    est_old_s, _ = cpu_min(lambda: each(salib_given_data), args.repeats)
    print(f"given-data estimator on {len(cols_k)} outputs x {len(names)} parameters ({int(kept.sum())} plausible "
          f"points, 100 resamples): {est_new_s:.3f} vs {est_old_s:.3f} CPU s = {est_old_s / est_new_s:.0f}x")
    design_rows = Y[: (Y.shape[0] // design.step) * design.step]
    ks = [k for k in range(Y.shape[1]) if np.isfinite(Y[:, k]).all() and np.ptp(Y[:, k]) > 0]

    def sobol_each(fn):
        return [fn(design_rows[:, k], design.D, design.second_order, np.random.default_rng(salib_seed(case.seed, 2)))
                for k in ks]

    sob_new_s, _ = cpu_min(lambda: sobol_each(saltelli_estimates), args.repeats)
    sob_old_s, _ = cpu_min(lambda: sobol_each(salib_sobol), args.repeats)
    print(f"Sobol estimator on {len(ks)} outputs (N = {design.N}, 100 resamples): {sob_new_s:.3f} vs "
          f"{sob_old_s:.3f} CPU s = {sob_old_s / sob_new_s:.1f}x")
    print(f"largest difference in indices.csv between the two paths: {diff:.1e} (NaN where the other is NaN: "
          f"{same_nan}); ranking.csv order the same: {same_rank}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
