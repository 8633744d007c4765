"""Value of information: what learning an uncertain number exactly would be worth to the option choice.

For a choice among decisions d (doing nothing and every option) with a per-member net benefit
``NB[i, d]`` on the plausible ensemble:

* EVPI, the expected value of perfect information: ``E[max_d NB_d] − max_d E[NB_d]``;
* EVPPI of a parameter (or group) φ: ``E_φ[max_d E(NB_d | φ)] − max_d E[NB_d]``, with the
  conditional expectations estimated by non-parametric regression of each decision's net benefit on
  φ over the members (Strong, Oakley & Brennan 2014, Medical Decision Making 34:311–326; in ecology,
  Canessa et al. 2015, Methods in Ecology and Evolution 6:1219–1228).

The regression is a cubic regression spline in each parameter (B-spline basis, interior knots at
quantiles), additive for a group plus pairwise products of the linear terms; intervals come from a
bootstrap over members. Pure functions, arrays in and out.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.interpolate import BSpline

SPLINE_DEGREE = 3
# interior knots per parameter: enough to follow a threshold-like response, few enough for
# ~100 members per basis function at 1,000 members (common practice, no source)
MAX_KNOTS = 6
MEMBERS_PER_KNOT = 80
PURPOSE_VOI = 11  # spawn-key purpose of the bootstrap streams


def evpi(nb: np.ndarray) -> float:
    """EVPI from per-member net benefits ``nb`` (M, D): mean of the best minus the best mean."""
    nb = np.asarray(nb, float)
    return float(nb.max(axis=1).mean() - nb.mean(axis=0).max())


def _spline_basis(x: np.ndarray) -> np.ndarray:
    """Cubic B-spline basis of one column (M,) -> (M, K), knots at quantiles; constant column dropped."""
    n_knots = int(np.clip(x.size // MEMBERS_PER_KNOT, 1, MAX_KNOTS))
    lo, hi = float(x.min()), float(x.max())
    if hi <= lo:
        return np.zeros((x.size, 0))
    inner = np.unique(np.quantile(x, np.linspace(0, 1, n_knots + 2)[1:-1]))
    inner = inner[(inner > lo) & (inner < hi)]
    t = np.r_[[lo] * (SPLINE_DEGREE + 1), inner, [hi] * (SPLINE_DEGREE + 1)]
    B = BSpline.design_matrix(np.clip(x, lo, hi), t, SPLINE_DEGREE).toarray()
    return B[:, 1:]  # the basis sums to one: drop one column so the intercept stays identifiable


def design_matrix(x: np.ndarray) -> np.ndarray:
    """Regression design for a parameter group ``x`` (M, k): intercept, splines, pairwise products."""
    x = np.asarray(x, float).reshape(x.shape[0], -1)
    cols = [np.ones((x.shape[0], 1))] + [_spline_basis(x[:, j]) for j in range(x.shape[1])]
    z = (x - x.mean(axis=0)) / np.where(x.std(axis=0) > 0, x.std(axis=0), 1.0)
    for a in range(x.shape[1]):
        for b in range(a + 1, x.shape[1]):
            cols.append((z[:, a] * z[:, b])[:, None])
    return np.hstack(cols)


def fitted_means(nb: np.ndarray, X: np.ndarray) -> np.ndarray:
    """Least-squares fit of every decision's net benefit on the design ``X``: (M, D) fitted values."""
    # normal equations with a tiny ridge: the basis is well conditioned and this is several times
    # cheaper than an SVD inside a bootstrap loop
    gram = X.T @ X
    coef = np.linalg.solve(gram + 1e-10 * np.trace(gram) / gram.shape[0] * np.eye(gram.shape[0]), X.T @ nb)
    return X @ coef


def evppi(nb: np.ndarray, x: np.ndarray) -> float:
    """EVPPI of the parameter group ``x`` (M, k) for net benefits ``nb`` (M, D), by regression."""
    return evppi_from_design(np.asarray(nb, float), design_matrix(x))


def evppi_from_design(nb: np.ndarray, X: np.ndarray) -> float:
    """EVPPI given the regression design ``X`` (M, K) of the parameter group (see :func:`design_matrix`)."""
    g = fitted_means(nb, X)
    # partial information is worth no more than perfect information (EVPPI <= EVPI by definition);
    # a regression that overfits can estimate more, most visibly when EVPI is near zero
    return float(min(max(g.max(axis=1).mean() - g.mean(axis=0).max(), 0.0), evpi(nb)))


@dataclass(frozen=True)
class Estimate:
    """A value with its bootstrap percentile interval."""

    value: float
    low: float
    high: float


def _bootstrap(stat, nb: np.ndarray, x: np.ndarray | None, resamples: int, confidence: float,
               rng: np.random.Generator) -> Estimate:
    M = nb.shape[0]
    value = stat(nb, x)
    reps = np.empty(resamples)
    for b in range(resamples):
        i = rng.integers(0, M, M)
        reps[b] = stat(nb[i], None if x is None else x[i])
    a = (1 - confidence) / 2
    return Estimate(value, float(np.quantile(reps, a)), float(np.quantile(reps, 1 - a)))


def information_values(nb: np.ndarray, X: np.ndarray, names: list[str], groups: dict[str, list[str]] | None = None,
                       *, resamples: int = 200, confidence: float = 0.95, seed: int = 0
                       ) -> dict[str, Estimate]:
    """EVPI (key ``"all parameters"``) and the EVPPI of every parameter and declared group.

    Parameters
    ----------
    nb : ndarray (M, D)
        Net benefit of each decision in each member.
    X : ndarray (M, P)
        The members' parameter values, columns in the order of ``names``.
    groups : dict of str -> list of str, optional
        Named groups of parameters whose joint EVPPI is wanted.

    Returns
    -------
    dict of str -> Estimate, EVPI first, then parameters and groups in the order given.
    """
    nb = np.asarray(nb, float)
    ss = np.random.SeedSequence(seed, spawn_key=(PURPOSE_VOI,))
    streams = iter(np.random.Generator(np.random.PCG64(s)) for s in ss.spawn(1 + len(names) + len(groups or {})))
    out = {"all parameters": _bootstrap(lambda n, _: evpi(n), nb, None, resamples, confidence, next(streams))}
    col = {n: j for j, n in enumerate(names)}
    wanted = {n: [n] for n in names} | dict(groups or {})
    for key, members in wanted.items():
        # the basis is built once on all members; a bootstrap resamples its rows
        design = design_matrix(X[:, [col[m] for m in members]])
        out[key] = _bootstrap(evppi_from_design, nb, design, resamples, confidence, next(streams))
    return out
