"""What the decision hinges on, computed on the plausible ensemble the assessment believes.

Two tables, from the members already run (no new simulation):

* ``sensitivity/drivers.csv``: for every option, the main-effect (first-order) index of each
  uncertain parameter on each quantity the verdict rests on: each objective's good outcome under
  the option, and each species' paired change in mean abundance (log ratio of option to baseline,
  over the whole period). Kept members are not independent draws from the priors (the plausibility
  filter couples the parameters), so the index is estimated from the given data by regression:
  the adjusted R² of a cubic regression spline of the output on one parameter, i.e.
  ``Var(E[Y | X_i]) / Var(Y)`` including what ``X_i`` carries of correlated parameters. Intervals
  are bootstrap percentiles over members.
* ``sensitivity/information.csv``: for each objective, the EVPI of the choice among doing nothing and
  every option, and the EVPPI of each parameter (:mod:`impact.decision.voi`). The net benefit of a choice in a
  member is 1 when the member's outcome goes the objective's way (its event happens when wanted, or
  does not when unwanted), else 0, so values are in probability units: how much the chance of a good
  outcome would rise, on average, if the choice could wait until the number is known exactly. The
  member's chance events (a failed eradication, a bad year) are averaged out, not counted as ignorance:
  the values are cross-fitted values of regression choice rules (:mod:`impact.decision.voi`). Objectives that
  share their members share the regressions' normal equations.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from impact.case import Case
from impact.case.structures import STRUCTURE_KEY
from impact.risk.effects import BASELINE, best_choices, good_outcome
from impact.decision.structurevoi import KIND, STRUCTURE_ROW, structure_evppi
from impact.decision.voi import (bootstrap_counts, design_matrix, fitted_means, information_values_many,
    member_slices, ridge_solve, weighted_normal_equations, weighted_sums)

DRIVER_COLUMNS = ("option", "output", "species", "parameter", "value", "low", "high", "interval", "level", "n",
                  "conditional_on")
INFORMATION_COLUMNS = ("objective", "parameter", "kind", "value", "low", "high", "interval", "level", "n",
                       "best_choice", "best_chance", "unit")
CONDITIONAL_ON = "plausible ensemble (kept members), with their noise and chance events"
RESAMPLES = 100
PURPOSE_DRIVERS = 12


def main_effects(Y: np.ndarray, X: np.ndarray, *, resamples: int = RESAMPLES, confidence: float = 0.95,
                 seed: int = 0) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Main-effect index of every column of ``X`` (M, P) on every column of ``Y`` (M, K), from given data.

    Returns
    -------
    value, low, high : ndarray (P, K)
        Adjusted R² of a one-parameter regression spline, with bootstrap percentile limits;
        NaN for an output that does not vary.
    """
    Y = np.asarray(Y, float)
    M, P = X.shape
    ss = np.random.SeedSequence(seed, spawn_key=(PURPOSE_DRIVERS,))
    rng = np.random.Generator(np.random.PCG64(ss))
    W = bootstrap_counts(rng, M, resamples)
    # centred once, so the resamples' sums of squares below hold no large cancelling means; the fits
    # have an intercept, so their residuals do not change (but for the 1e-10 ridge's square)
    Yc = Y - Y.mean(axis=0)
    sums = weighted_sums(W, Yc), weighted_sums(W, Yc**2), _constant_in(W, Y)
    out = np.full((3, P, Y.shape[1]), np.nan)
    a = (1 - confidence) / 2
    for j in range(P):
        D = design_matrix(X[:, [j]])
        out[0, j] = _adjusted_r2(Y, D)
        reps = _weighted_adjusted_r2(Yc, D, W, sums)
        out[1, j], out[2, j] = np.quantile(reps, a, axis=0), np.quantile(reps, 1 - a, axis=0)
    return out[0], out[1], out[2]


def _weighted_adjusted_r2(Yc: np.ndarray, D: np.ndarray, W: np.ndarray, sums) -> np.ndarray:
    """:func:`_adjusted_r2` on every resample given as member weights ``W`` (R, M): (R, K').

    ``sums`` are ``W @ Yc``, ``W @ Yc**2`` and :func:`_constant_in` (R, K'). The residual sum of squares
    comes from the normal equations (for their solution b, ``b' G b = b' r − ridge·b'b``), so no member
    is visited again.
    """
    gram, rhs = weighted_normal_equations(W, D, Yc)
    coef, ridge = ridge_solve(gram, rhs)  # (R, K, K'), (R,)
    s1, s2, constant = sums
    n = W.sum(axis=1)[:, None]
    rss = s2 - (coef * rhs).sum(axis=1) - ridge[:, None] * (coef * coef).sum(axis=1)
    resid_mean = (s1 - np.einsum("rk,rkj->rj", weighted_sums(W, D), coef)) / n
    var = s2 / n - (s1 / n) ** 2
    M, K = D.shape
    with np.errstate(invalid="ignore", divide="ignore"):
        adj = 1 - (rss / n - resid_mean**2) / var * (M - 1) / max(M - K, 1)
    return np.where(constant, np.nan, adj)


def _constant_in(W: np.ndarray, Y: np.ndarray) -> np.ndarray:
    """Whether each output (column of ``Y``, (M, K')) is constant on each resample (row of ``W``): (R, K').

    Tested on the drawn values themselves: a variance from sums would leave rounding dust, not zero.
    """
    R, M = W.shape
    lo, hi = np.full((R, Y.shape[1]), np.inf), np.full((R, Y.shape[1]), -np.inf)
    for sl in member_slices(M, R * Y.shape[1]):
        drawn = W[:, sl, None] > 0
        lo = np.minimum(lo, np.where(drawn, Y[sl], np.inf).min(axis=1))
        hi = np.maximum(hi, np.where(drawn, Y[sl], -np.inf).max(axis=1))
    return lo == hi


def _adjusted_r2(Y: np.ndarray, D: np.ndarray) -> np.ndarray:
    M, K = D.shape
    resid = Y - fitted_means(Y, D)
    var = Y.var(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        r2 = 1 - resid.var(axis=0) / var
        # the adjustment removes what K basis functions fit of pure noise (unbiased under a null of no effect)
        adj = 1 - (1 - r2) * (M - 1) / max(M - K, 1)
    # not clipped: a slightly negative value says "no detectable effect" and is shown as it is
    return np.where(var > 0, adj, np.nan)


def _outputs(case: Case, summaries: dict, option: str) -> tuple[list[tuple[str, str]], np.ndarray]:
    """Labels (output, species) and values (M, K) of what the verdict rests on, under one option."""
    labels, cols = [], []
    for obj in case.objectives:
        labels.append((f"objective “{obj.name}”: good outcome", obj.species))
        cols.append(good_outcome(case, obj, summaries[option]))
    run, base = summaries[option], summaries[BASELINE]
    k = run.slot(case.horizon)
    for j, sp in enumerate(case.species):
        if not sp.present:
            continue
        with np.errstate(invalid="ignore", divide="ignore"):
            ratio = np.log(run.mean[:, k, j] / base.mean[:, k, j])
        labels.append(("paired change in mean abundance (log ratio)", sp.name))
        cols.append(np.where(np.isfinite(ratio), ratio, np.nan))
    return labels, np.column_stack(cols)


def drivers_table(case: Case, values: dict, summaries: dict, seed: int) -> pd.DataFrame:
    """Main effects of every uncertain parameter on the verdict's quantities, per option (see module doc)."""
    names = [p.name for p in case.uncertain]
    X = np.column_stack([values[n] for n in names])
    rows = []
    for opt in case.options:
        labels, Y = _outputs(case, summaries, opt.name)
        ok = np.isfinite(Y).all(axis=1)
        v, lo, hi = main_effects(Y[ok], X[ok], confidence=case.risk.confidence, seed=seed)
        for k, (output, sp) in enumerate(labels):
            for j, n in enumerate(names):
                rows.append(dict(option=opt.name, output=output, species=sp, parameter=n, value=v[j, k],
                                 low=lo[j, k], high=hi[j, k], interval="bootstrap_percentile",
                                 level=case.risk.confidence, n=int(ok.sum()), conditional_on=CONDITIONAL_ON))
    return pd.DataFrame(rows, columns=list(DRIVER_COLUMNS))


def information_table(case: Case, values: dict, summaries: dict, seed: int) -> pd.DataFrame:
    """EVPI and per-parameter EVPPI of the choice under every objective (see module doc)."""
    names = [p.name for p in case.uncertain]
    X = np.column_stack([values[n] for n in names])
    choices = [BASELINE, *(o.name for o in case.options)]
    group_names = {g.name for g in case.groups}
    groups = {g.name: list(g.parameters) for g in case.groups}
    nbs = [np.column_stack([good_outcome(case, obj, summaries[c]) for c in choices]) for obj in case.objectives]
    oks = [np.isfinite(nb).all(axis=1) for nb in nbs]
    # objectives on the same members share the regressions' normal equations (the same numbers as one at a time)
    vals: dict[int, dict] = {}
    for mask in {ok.tobytes(): ok for ok in oks}.values():
        same = [i for i, ok in enumerate(oks) if np.array_equal(ok, mask)]
        many = information_values_many([nbs[i][mask] for i in same], X[mask], names, groups=groups,
                                       resamples=RESAMPLES, confidence=case.risk.confidence, seed=seed)
        vals.update(zip(same, many))
    rows = []
    for i, obj in enumerate(case.objectives):
        ok = oks[i]
        means = nbs[i][ok].mean(axis=0)
        best = int(np.argmax(means))
        # the one rule for "best" (effects.best_choices), on the same members as page 1 and comparisons.csv
        tied = "; ".join(best_choices(choices, means))
        for key, e in vals[i].items():
            kind = "evpi" if key == "all parameters" else ("group evppi" if key in group_names else "evppi")
            rows.append(dict(objective=obj.name, parameter=key, kind=kind,
                             value=e.value, low=e.low, high=e.high, interval="bootstrap_percentile",
                             level=case.risk.confidence, n=int(ok.sum()), best_choice=tied,
                             best_chance=float(means[best]), unit="probability of a good outcome"))
        if STRUCTURE_KEY in values:  # the value of knowing the web's structure (impact.decision.structurevoi)
            e = structure_evppi(nbs[i][ok], values[STRUCTURE_KEY][ok].astype(np.int64), resamples=RESAMPLES,
                                confidence=case.risk.confidence, seed=seed)
            rows.append(dict(objective=obj.name, parameter=STRUCTURE_ROW, kind=KIND, value=e.value, low=e.low,
                             high=e.high, interval="bootstrap_percentile", level=case.risk.confidence, n=int(ok.sum()),
                             best_choice=tied, best_chance=float(means[best]), unit="probability of a good outcome"))
    return pd.DataFrame(rows, columns=list(INFORMATION_COLUMNS))
