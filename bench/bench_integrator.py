"""Speed of the ensemble integrator against a per-member ``solve_ivp`` loop, at matched accuracy.

Usage::

    python bench/bench_integrator.py [--members N] [--horizon T] [--subset S] [--seed SEED]

The model is an invented four-species chain (logistic plant, herbivore with Holling type II
feeding, mesopredator, top predator) with parameters drawn per member from a seeded Generator.
Both methods run in this one process on the same members with the same rtol/atol. The
``solve_ivp`` loop is timed on a random subset and scaled linearly to the whole ensemble.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
from scipy.integrate import solve_ivp

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from impact.engine.integrate import integrate_segment  # noqa: E402

TARGET = 100.0  # required speed-up over the per-member loop
RTOL, ATOL = 1e-6, 1e-9
NAMES = ("r", "K", "a1", "h1", "e1", "m1", "a2", "h2", "e2", "m2", "a3", "h3", "e3", "m3")


def draw_parameters(members, seed):
    """Invented parameter ranges (demo values), one row per member, drawn per member stream."""
    lo = np.array([0.8, 5.0, 0.8, 0.3, 0.5, 0.10, 0.6, 0.3, 0.4, 0.08, 0.5, 0.3, 0.3, 0.05])
    hi = np.array([1.5, 15.0, 1.5, 0.8, 0.8, 0.30, 1.2, 0.8, 0.7, 0.20, 1.0, 0.8, 0.6, 0.15])
    rows = [np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(m, 0))).uniform(lo, hi)
            for m in range(members)]
    return np.array(rows)


def initial_states(members):
    return np.tile([2.0, 1.0, 0.5, 0.2], (members, 1))


def make_ensemble_rhs(p):
    """Right-hand side for the whole ensemble; column access keeps every operation elementwise."""
    cols = {name: p[:, i] for i, name in enumerate(NAMES)}
    cache = {"members": None, "par": None}

    def fun(t, y, members):
        if cache["members"] is not members:
            # The integrator passes the same index array until its active set shrinks.
            cache["members"] = members
            cache["par"] = {k: np.take(v, members) for k, v in cols.items()}
        q = cache["par"]
        P, H, Mz, Z = y[:, 0], y[:, 1], y[:, 2], y[:, 3]
        g1 = q["a1"] * P * H / (1.0 + q["a1"] * q["h1"] * P)
        g2 = q["a2"] * H * Mz / (1.0 + q["a2"] * q["h2"] * H)
        g3 = q["a3"] * Mz * Z / (1.0 + q["a3"] * q["h3"] * Mz)
        out = np.empty_like(y)
        out[:, 0] = q["r"] * P * (1.0 - P / q["K"]) - g1
        out[:, 1] = q["e1"] * g1 - q["m1"] * H - g2
        out[:, 2] = q["e2"] * g2 - q["m2"] * Mz - g3
        out[:, 3] = q["e3"] * g3 - q["m3"] * Z
        return out

    return fun


def make_single_rhs(row):
    """Same model for one member, in plain floats (the fastest form for a scalar solver)."""
    r, K, a1, h1, e1, m1, a2, h2, e2, m2, a3, h3, e3, m3 = (float(v) for v in row)

    def fun(t, y):
        P, H, Mz, Z = y
        g1 = a1 * P * H / (1.0 + a1 * h1 * P)
        g2 = a2 * H * Mz / (1.0 + a2 * h2 * H)
        g3 = a3 * Mz * Z / (1.0 + a3 * h3 * Mz)
        return np.array([r * P * (1.0 - P / K) - g1, e1 * g1 - m1 * H - g2,
                         e2 * g2 - m2 * Mz - g3, e3 * g3 - m3 * Z])

    return fun


def relative_error(y, ref):
    return float(np.max(np.abs(y - ref) / np.maximum(np.abs(ref), ATOL / RTOL)))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--members", type=int, default=10_000)
    ap.add_argument("--horizon", type=float, default=50.0)
    ap.add_argument("--subset", type=int, default=200,
                    help="members timed with the solve_ivp loop (scaled linearly)")
    ap.add_argument("--check", type=int, default=5, help="members checked against a reference")
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args(argv)

    M, T = args.members, args.horizon
    p = draw_parameters(M, args.seed)
    y0 = initial_states(M)
    fun = make_ensemble_rhs(p)

    # a first call loads numba (the step controller's powers go through it): not the integrator's cost
    integrate_segment(fun, 0.0, 0.1, y0[:2], rtol=RTOL, atol=ATOL, members=np.arange(2))
    start = time.perf_counter()
    res = integrate_segment(fun, 0.0, T, y0, rtol=RTOL, atol=ATOL)
    t_ens = time.perf_counter() - start

    pick = np.random.default_rng(np.random.SeedSequence(args.seed, spawn_key=(1,)))
    subset = np.sort(pick.choice(M, size=min(args.subset, M), replace=False))
    start = time.perf_counter()
    loop_y = {}
    for m in subset:
        sol = solve_ivp(make_single_rhs(p[m]), (0.0, T), y0[m], method="RK45", rtol=RTOL, atol=ATOL)
        loop_y[m] = sol.y[:, -1]
    t_sub = time.perf_counter() - start
    t_loop = t_sub * M / subset.size

    err_ens, err_loop = [], []
    for m in subset[: args.check]:
        ref = solve_ivp(make_single_rhs(p[m]), (0.0, T), y0[m], method="DOP853",
                        rtol=1e-12, atol=1e-14).y[:, -1]
        err_ens.append(relative_error(res.y[m], ref))
        err_loop.append(relative_error(loop_y[m], ref))

    ratio = t_loop / t_ens
    print(f"members                      {M}")
    print(f"horizon                      {T:g} time units, rtol={RTOL:g}, atol={ATOL:g}")
    print(f"ensemble integrator          {t_ens:.3f} s  (failed members: {int(res.failed.sum())}, "
          f"RHS calls: {res.nfev}, mean accepted steps: {res.nsteps.mean():.1f})")
    print(f"solve_ivp RK45 loop          {t_sub:.3f} s on {subset.size} random members, "
          f"scaled linearly to {M}: {t_loop:.1f} s")
    print(f"max rel. error at t={T:g} vs DOP853 rtol=1e-12 on {len(err_ens)} members: "
          f"ensemble {max(err_ens):.2e}, solve_ivp {max(err_loop):.2e}")
    print(f"speed-up                     {ratio:.1f}x")
    print(f"target                       >= {TARGET:g}x: {'met' if ratio >= TARGET else 'NOT met'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
