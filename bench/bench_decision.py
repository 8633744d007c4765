"""The decision stage on the demo: where its time goes, the whole stage against its 1 s target (issue 26),
and the cost of the main-effect and value-of-information tables against the former loops.

Usage::

    python bench/bench_decision.py [--case PATH] [--calibrated DIR | --prior] [--members M] [--repeats R]
                                   [--workers W] [--newton] [--loops]

By default (issue 26) it builds the case's ensemble as ``impact assess`` does (``--calibrated DIR``: the
members of an ``impact calibrate`` folder; ``--prior``: prior draws), runs the options once, then prints
the decision stage's split, CPU seconds of each part computed alone in this process (minimum of R):
press signs, drivers.csv, information.csv, studies.csv + study_sizes.csv (which reuse information.csv's
gains), weighing, the prior screen's simulations (the engine's runs of its design points) and its
analysis; their total; and the whole stage as ``impact assess`` runs it (api.decision_stage with W worker
threads: the screen's simulations on the workers beside the rest), wall and CPU seconds, against the
1 s target. On a machine shared with other work read the CPU seconds: wall time there is whatever
share of the cores the process got.

Measured 2026-12-05 on the shared 2-core AMD EPYC (load 2-4 from other work), the demo calibrated
(1,000 members, 13 parameters, 3 objectives, 4 studies), CPU s, before (commit 874b15e) -> after:
press signs 0.22 -> 0.21 (impact/dynamics, not changed); drivers 0.08 -> 0.08; information.csv
0.36 -> 0.24; studies.csv + study_sizes.csv 2.1 -> 0.37; weighing 0.02 -> 0.02; prior screen:
simulations 1.05 -> 1.05 (the engine's runs: 1,920 points x spin-up and 3 options), analysis 0.30 ->
0.12. The stage 4.1 -> 2.2 CPU s; whole stage 1.46 s wall at best (load ~2.3), 2.4 CPU s with its
threads; in the demo's manifest (execution.stage_seconds.sensitivity) 5.4 s -> 2.9-3.9 s, loaded.
Target <= 1 s wall: not met. What stands in the way: the screen's simulations alone are 1.05 CPU s
(0.5 s on two free cores), and press signs 0.2 s; with the rest (0.75 s) the stage is ~2.1 CPU s, so at
least ~1.05 s wall on two free cores even when every part overlaps.

Both tables reuse the members already run. Prints, from one run: the core stage (draws + paired
option runs) once, then each table in CPU seconds (``time.process_time``, minimum of R) as computed
now (every bootstrap resample at once, as member weights) and by the former loops (one regression
per resample, kept here as the reference), their ratio, the largest difference between the two
tables (the same draws: rounding only), and the extra cost as a share of the core stage.
Targets: under 10 % of the core stage; with bench_sensitivity.py, the demo's sensitivity and
decision stages together in 2-3 CPU seconds (issue 14).

Measured 2026-12-03 on a shared 2-core AMD EPYC (numpy 2.4.6, scipy 1.17.1), one run, 1,000
members: main effects 0.094 CPU s against 0.579 s for the former loops (6.2x); value of information
0.187 s against 1.017 s (5.4x); largest differences 1.6e-14 (drivers.csv) and 1.8e-15
(information.csv), exact zeros kept. Extra cost 15.7 % of a core stage of 1.78 CPU s (prior
draws, no calibration): the 10 % target is not met because the core stage itself got faster.
In a profile of what is left, the resamples' normal equations (100 x 1,000 members x K² products
per parameter) take about 40 %, then the spline bases and the fitted values per member (EVPPI).

Since 2026-12-04 the value of information is cross-fitted (impact/voi.py: chance left out, a regression on
every parameter at once for EVPI) and its reference loop runs each resample's cross-fitted fits alone.
Measured that day, same machine under load, one run: 0.85 CPU s against 45.3 s (53x), identical tables;
information_table alone 0.67 CPU s against 0.17 s for the former member-by-member estimator (minimum of 3).
The batched solves of the every-parameter design (101 resamples x 91 x 91, per fold) and its one
eigendecomposition per design now lead the profile.

Since 2026-12-05 the resamples' fits are one Newton step from the fit on the members as drawn
(onestep.newton_coefficients) instead of each resample's own normal equations and solve. ``--stage`` (the
default part of this script's output now) times what the decision stage computes on the kept members
(api.hinges_stage: drivers, value of information, studies and their sizes, weighing), CPU seconds,
with the Newton step and with the exact refits (``rule_gains(refit=True)``, the former path), and the
largest change of any interval limit in those tables. The former resample-by-resample loops run only
with ``--loops`` (about a minute). Measured 2026-12-05, the demo calibrated (1,000 members, 11
parameters, 3 objectives, 4 studies), shared 2-core machine at load ~11, OpenBLAS on 1 thread: the
stage 5.9 CPU s before, 2.5-3.0 CPU s after; value-of-information estimates identical, interval limits
moved within the bootstrap's Monte Carlo error. With OpenBLAS's default threads on that loaded machine
the same stage took 50 CPU s (164 s wall): the threads spin while waiting for a core.
"""

from __future__ import annotations

import argparse
import functools
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

from timing import cpu_min  # noqa: E402
import impact.decision.hinges as decision  # noqa: E402
from impact.risk.runs import assess_members
from impact.ensemble.draws import draw_ensemble  # noqa: E402
from impact.case import load_case  # noqa: E402
import impact.decision.voi as voi  # noqa: E402
import impact.decision.studies as studies  # noqa: E402
import impact.decision.structurevoi as structurevoi  # noqa: E402
from impact.decision.voi import (PURPOSE_VOI, Estimate, bootstrap_counts, design_matrix, fitted_means,
    penalised_design, rule_gains)

TARGET_RATIO = 0.10
TARGET_SECONDS = 1.0  # the decision stage on the demo (issue 26)


def loop_main_effects(Y, X, *, resamples=decision.RESAMPLES, confidence=0.95, seed=0):
    """The former main effects: one spline regression per parameter per resample."""
    Y = np.asarray(Y, float)
    M, P = X.shape
    rng = np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed, spawn_key=(decision.PURPOSE_DRIVERS,))))
    boot = [rng.integers(0, M, M) for _ in range(resamples)]
    out = np.full((3, P, Y.shape[1]), np.nan)
    a = (1 - confidence) / 2

    def adj_r2(Yb, D):
        var = Yb.var(axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            r2 = 1 - (Yb - fitted_means(Yb, D)).var(axis=0) / var
            adj = 1 - (1 - r2) * (M - 1) / max(M - D.shape[1], 1)
        return np.where(var > 0, adj, np.nan)

    for j in range(P):
        D = design_matrix(X[:, [j]])
        out[0, j] = adj_r2(Y, D)
        reps = np.stack([adj_r2(Y[i], D[i]) for i in boot])
        out[1, j], out[2, j] = np.quantile(reps, a, axis=0), np.quantile(reps, 1 - a, axis=0)
    return out[0], out[1], out[2]


def loop_information_values(nb, X, names, groups=None, *, resamples=200, confidence=0.95, seed=0):
    """The value of information one resample at a time (each resample's cross-fitted fits on its own)."""
    nb = np.asarray(nb, float)
    M = nb.shape[0]
    ss = np.random.SeedSequence(seed, spawn_key=(PURPOSE_VOI,))
    W = bootstrap_counts(np.random.Generator(np.random.PCG64(ss.spawn(1)[0])), M, resamples)
    a = (1 - confidence) / 2
    ones = np.ones((1, M))

    def values(design):
        # row 0 (all ones) sets the smoothing weights, as in the fast path
        reps = np.array([rule_gains(nb, *design, np.vstack([ones, w[None]]))[0, 1] for w in W])
        return np.maximum(rule_gains(nb, *design, ones)[0, 0], 0.0), np.maximum(reps, 0.0)

    top, top_reps = values(penalised_design(X, interactions=False))
    out = {"all parameters": Estimate(float(top), float(np.quantile(top_reps, a)), float(np.quantile(top_reps, 1 - a)))}
    col = {n: j for j, n in enumerate(names)}
    for key, members in ({n: [n] for n in names} | dict(groups or {})).items():
        v, reps = values(penalised_design(X[:, [col[m] for m in members]]))
        v, reps = min(v, top), np.minimum(reps, top_reps)
        out[key] = Estimate(float(v), float(np.quantile(reps, a)), float(np.quantile(reps, 1 - a)))
    return out


def loop_information_values_many(nbs, X, names, groups=None, **kw):
    return [loop_information_values(nb, X, names, groups, **kw) for nb in nbs]


def largest_difference(a, b, cols) -> float:
    return float(np.nanmax(np.abs(a[cols].to_numpy(float) - b[cols].to_numpy(float))))


def stage_tables(case, ens, runs, refit: bool, repeats: int):
    """CPU seconds (minimum of ``repeats``) of the decision stage's tables on the kept members, and the tables;
    ``refit`` swaps in the exact refit of every resample (the former path) wherever the gains are computed."""
    from impact.api import hinges_stage

    exact = functools.partial(voi.rule_gains, refit=True)
    saved = {m: m.rule_gains for m in (voi, studies, structurevoi)}
    try:
        if refit:
            for m in saved:
                m.rule_gains = exact
        return cpu_min(lambda: hinges_stage(case, ens, runs, case.seed).tables, repeats)
    finally:
        for m, f in saved.items():
            m.rule_gains = f


def limit_change(a: dict, b: dict) -> str:
    """The largest change of an interval limit between two sets of tables, per table that has limits."""
    out = []
    for k, x in a.items():
        y = b[k]
        cols = [c for c in x.columns if c == "low" or c == "high" or c.endswith("_low") or c.endswith("_high")]
        if not cols:
            continue
        d = float(np.nanmax(np.abs(x[cols].to_numpy(float) - y[cols].to_numpy(float))))
        same = [c for c in ("value", "evsi", "enbs") if c in x.columns]
        eq = all(np.array_equal(x[c].to_numpy(float), y[c].to_numpy(float), equal_nan=True) for c in same)
        out.append(f"{k.split('/')[-1]} {d:.3g}{'' if eq else ' (ESTIMATES DIFFER)'}")
    return "; ".join(out)


def stage_split(case, ens, runs, repeats: int) -> dict[str, float]:
    """CPU seconds (minimum of ``repeats``) of each part of the decision stage, in this process alone, in the
    order the stage computes them (the studies reuse information.csv's gains, as in api.hinges_stage)."""
    from impact.api import press_stage
    from impact.decision.sensitivity import Settings as ScreenSettings
    from impact.decision.studies import study_tables
    from impact.decision.voi import shared_gains
    from impact.decision.weighing import weighing_tables
    import impact.decision.sensitivity.study as study

    parts: dict[str, float] = {}

    def timed(name, fn):
        t = time.process_time()
        out = fn()
        parts[name] = min(parts.get(name, np.inf), time.process_time() - t)
        return out

    base = study.FoodWebModel
    sim = [0.0]

    class Timed(base):  # the screen's model runs, apart from its analysis
        def __call__(self, unit):
            t = time.process_time()
            try:
                return base.__call__(self, unit)
            finally:
                sim[0] += time.process_time() - t

    from impact.api import AssessSettings

    screen = ScreenSettings(base_samples=AssessSettings().resolved(case).base_samples, seed=case.seed,
                            confidence=case.risk.confidence)
    for _ in range(repeats):
        timed("press signs", lambda: press_stage(case, ens, runs))
        timed("drivers.csv", lambda: decision.drivers_table(case, ens.values, runs, case.seed))
        with shared_gains():
            timed("information.csv", lambda: decision.information_table(case, ens.values, runs, case.seed))
            if case.studies:
                timed("studies.csv + study_sizes.csv",
                      lambda: study_tables(case, ens.values, ens.today, ens.draws, runs, case.seed))
        if case.weighing is not None:
            timed("weighing.csv + budget.csv", lambda: weighing_tables(case, runs, case.seed, ens.draws))
        if len(case.uncertain) >= 2:
            sim[0] = 0.0
            study.FoodWebModel = Timed
            try:
                t = time.process_time()
                study.sensitivity_stage(case, screen)
                whole = time.process_time() - t
            finally:
                study.FoodWebModel = base
            parts["prior screen: simulations"] = min(parts.get("prior screen: simulations", np.inf), sim[0])
            parts["prior screen: analysis"] = min(parts.get("prior screen: analysis", np.inf), whole - sim[0])
    return parts


def whole_stage(case, ens, runs, workers: int, repeats: int) -> tuple[float, float]:
    """Wall and CPU seconds (each the minimum of ``repeats``) of api.decision_stage as ``impact assess`` runs it
    with ``workers`` worker threads: the prior screen's simulations on the workers beside the rest."""
    from impact.api import AssessSettings, decision_stage
    from impact.run.execute import make_executor

    settings = AssessSettings().resolved(case)
    wall, cpu = np.inf, np.inf
    with make_executor(workers) as executor:
        for _ in range(repeats):
            t, c = time.perf_counter(), time.process_time()
            decision_stage(case, settings, case.seed, ens, runs, executor=executor)
            wall, cpu = min(wall, time.perf_counter() - t), min(cpu, time.process_time() - c)
    return wall, cpu


def compare_newton(case, ens, runs, repeats: int) -> None:
    (new_s, new), (old_s, old) = (stage_tables(case, ens, runs, False, repeats),
                                  stage_tables(case, ens, runs, True, repeats))
    print(f"decision stage on the kept members (drivers, information, studies, weighing), CPU s, minimum of "
          f"{repeats}: Newton step {new_s:.2f} | exact refits (former) {old_s:.2f} | ratio {old_s / new_s:.1f}x")
    print(f"largest change of an interval limit, Newton step against exact refits: {limit_change(new, old)}")


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--case", default=str(ROOT / "casework" / "island_mesopredator.toml"))
    ap.add_argument("--members", type=int, default=None, help="members (default: the case's)")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--workers", type=int, default=2, help="worker threads of the whole-stage timing")
    ap.add_argument("--prior", action="store_true", help="prior draws instead of the case's calibrated ensemble")
    ap.add_argument("--newton", action="store_true", help="also time the exact refits against the Newton step")
    ap.add_argument("--loops", action="store_true", help="also time the former resample-by-resample loops")
    ap.add_argument("--calibrated", default=None, metavar="DIR",
                    help="a folder of `impact calibrate` for --case: the decision stage on those members")
    args = ap.parse_args()
    from impact.api import AssessSettings
    from impact.ensemble.calibrate import build_ensemble

    case = load_case(args.case)
    members = args.members or AssessSettings().resolved(case).members
    t0 = time.process_time()
    if args.calibrated:
        from impact.api import load_ensemble

        ens, how = load_ensemble(args.calibrated, case).ensemble, f"calibrated, from {args.calibrated}"
    elif args.prior:
        ens, how = draw_ensemble(case, members, case.seed), "prior draws"
    else:
        ens, how = build_ensemble(case, members, case.seed)[0], "built as impact assess builds it"
    runs = assess_members(case, ens, case.seed)
    core = time.process_time() - t0
    print(f"case: {case.title}; {len(ens.draws)} members ({how}); {len(case.uncertain)} uncertain parameters; "
          f"ensemble and option runs {core:.1f} CPU s (not part of the stage)")
    parts = stage_split(case, ens, runs, args.repeats)
    print(f"decision stage, CPU s of each part in this process alone (minimum of {args.repeats}):")
    for name, sec in parts.items():
        print(f"  {name:<32} {sec:6.3f}")
    print(f"  {'total':<32} {sum(parts.values()):6.3f}")
    wall, cpu = whole_stage(case, ens, runs, args.workers, args.repeats)
    print(f"whole stage as impact assess runs it ({args.workers} worker threads, the screen's simulations beside "
          f"the rest): {wall:.2f} s wall, {cpu:.2f} CPU s (minimum of {args.repeats}); target <= {TARGET_SECONDS:g} s "
          f"wall: {'MET' if wall <= TARGET_SECONDS else 'NOT MET'} (at least CPU / {args.workers} = "
          f"{cpu / args.workers:.2f} s on {args.workers} free cores)")
    if args.newton:
        compare_newton(case, ens, runs, args.repeats)
    if not args.loops:
        return 0

    def tables():
        return (cpu_min(lambda: decision.drivers_table(case, ens.values, runs, case.seed), args.repeats),
                cpu_min(lambda: decision.information_table(case, ens.values, runs, case.seed), args.repeats))

    (drv_s, drv), (inf_s, inf) = tables()
    now = (decision.main_effects, decision.information_values_many)
    decision.main_effects, decision.information_values_many = loop_main_effects, loop_information_values_many
    try:
        (drv_old_s, drv_old), (inf_old_s, inf_old) = tables()
    finally:
        decision.main_effects, decision.information_values_many = now
    cols = ["value", "low", "high"]
    print(f"CPU s, minimum of {args.repeats}:  now   former loops  ratio")
    print(f"  main effects (drivers.csv)      {drv_s:6.3f}  {drv_old_s:6.3f}  {drv_old_s / drv_s:5.1f}x")
    print(f"  value of information            {inf_s:6.3f}  {inf_old_s:6.3f}  {inf_old_s / inf_s:5.1f}x")
    print(f"largest difference: drivers.csv {largest_difference(drv, drv_old, cols):.1e}, information.csv "
          f"{largest_difference(inf, inf_old, cols):.1e}; exact zeros kept: "
          f"{bool(((inf.value == 0) == (inf_old.value == 0)).all())}")
    print(f"extra cost / ensemble and option runs: {(drv_s + inf_s) / core:.1%} (target under {TARGET_RATIO:.0%})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
