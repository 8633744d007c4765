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
bootstrap over members. Every resample is computed at once as a row of member weights (how often the
resample drew each member), which gives the fit on the resampled rows without gathering them. Pure
functions, arrays in and out.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

SPLINE_DEGREE = 3
# interior knots per parameter: enough to follow a threshold-like response, few enough for
# ~100 members per basis function at 1,000 members (common practice, no source)
MAX_KNOTS = 6
MEMBERS_PER_KNOT = 80
PURPOSE_VOI = 11  # spawn-key purpose of the bootstrap streams
BATCH_VALUES = 1 << 21  # values held at once by the weighted sums (16 MB of floats), whatever M
# columns per matrix product: a threaded BLAS splits wider products across cores, which on a shared
# 2-core machine cost several times the CPU of one core doing them (measured: 100 x 1,000 x 190
# products, 7 CPU ms whole against 1.1 ms in blocks of 8)
BLAS_COLUMNS = 8


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
    from scipy.interpolate import BSpline  # (a quarter second to import: only runs that need it pay)

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


def resample_counts(draws: np.ndarray, M: int) -> np.ndarray:
    """How often each of ``M`` members appears in each bootstrap resample: draws (R, n) -> counts (R, M)."""
    R = draws.shape[0]
    return np.bincount((draws + M * np.arange(R)[:, None]).ravel(), minlength=R * M).reshape(R, M).astype(float)


def member_slices(M: int, width: int) -> list[slice]:
    """Slices of ``M`` members, each holding at most ~BATCH_VALUES values when a member carries ``width``."""
    step = max(1, BATCH_VALUES // max(width, 1))
    return [slice(lo, lo + step) for lo in range(0, M, step)]


def weighted_sums(W: np.ndarray, A: np.ndarray) -> np.ndarray:
    """``W @ A``: sums (R, c) of the columns of ``A`` (m, c) under each row of member weights ``W`` (R, m),
    in blocks of BLAS_COLUMNS columns."""
    out = np.empty((W.shape[0], A.shape[1]))
    for c in range(0, A.shape[1], BLAS_COLUMNS):
        out[:, c:c + BLAS_COLUMNS] = W @ A[:, c:c + BLAS_COLUMNS]
    return out


def weighted_normal_equations(W: np.ndarray, X: np.ndarray, Y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``X' diag(w) X`` (R, K, K) and ``X' diag(w) Y`` (R, K, D) for each row ``w`` of member weights ``W`` (R, M).

    With resample counts as weights, row r holds the normal equations of the rows of resample r,
    without gathering them.
    """
    R, M = W.shape
    K = X.shape[1]
    XY = np.hstack([X, Y])
    width = K * XY.shape[1]
    moments = np.zeros((R, width))
    for sl in member_slices(M, width):
        # every member's products x x' and x y' in a row, so the weighted sums are matrix products
        moments += weighted_sums(W[:, sl], (X[sl, :, None] * XY[sl, None, :]).reshape(-1, width))
    moments = moments.reshape(R, K, XY.shape[1])
    return moments[:, :, :K], moments[:, :, K:]


def ridge_solve(gram: np.ndarray, rhs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Coefficients (..., K, D) of the normal equations with :func:`fitted_means`' tiny ridge, and the ridge (...)."""
    K = gram.shape[-1]
    ridge = 1e-10 * np.trace(gram, axis1=-2, axis2=-1) / K
    return np.linalg.solve(gram + ridge[..., None, None] * np.eye(K), rhs), ridge


def weighted_fit(W: np.ndarray, X: np.ndarray, Y: np.ndarray) -> np.ndarray:
    """Least-squares coefficients (R, K, D) of ``Y`` (M, D) on ``X`` (M, K) under each row of member weights
    ``W`` (R, M): with resample counts as weights, row r is the fit of :func:`fitted_means` on resample r."""
    return ridge_solve(*weighted_normal_equations(W, X, Y))[0]


def weighted_fitted(coef: np.ndarray, X: np.ndarray) -> np.ndarray:
    """Fitted values of every resample's fit ``coef`` (R, K, D) at the rows ``X`` (m, K), laid out (R, D, m)."""
    return np.swapaxes(coef, 1, 2) @ X.T


def weighted_evpi(nb: np.ndarray, W: np.ndarray) -> np.ndarray:
    """:func:`evpi` of ``nb`` (M, D) under each row of member weights ``W`` (R, M): (R,)."""
    n = W.sum(axis=1)
    return (W @ nb.max(axis=1)) / n - weighted_sums(W, nb).max(axis=1) / n


def weighted_evppi(nb: np.ndarray, X: np.ndarray, W: np.ndarray) -> np.ndarray:
    """:func:`evppi_from_design` under each row of member weights ``W`` (R, M): (R,), capped alike."""
    R, M = W.shape
    coef = weighted_fit(W, X, nb)  # (R, K, D)
    n = W.sum(axis=1)
    best_each = np.zeros(R)
    for sl in member_slices(M, R * nb.shape[1]):
        best_each += (W[:, sl] * weighted_fitted(coef, X[sl]).max(axis=1)).sum(axis=1)
    best_mean = np.einsum("rk,rkd->rd", weighted_sums(W, X), coef).max(axis=1)
    v = (best_each - best_mean) / n
    return np.minimum(np.maximum(v, 0.0), weighted_evpi(nb, W))


@dataclass(frozen=True)
class Estimate:
    """A value with its bootstrap percentile interval."""

    value: float
    low: float
    high: float


def _bootstrap(value: float, reps: np.ndarray, confidence: float) -> Estimate:
    a = (1 - confidence) / 2
    return Estimate(value, float(np.quantile(reps, a)), float(np.quantile(reps, 1 - a)))


def bootstrap_counts(rng: np.random.Generator, M: int, resamples: int) -> np.ndarray:
    """Counts (resamples, M) of members in resamples of M drawn with replacement from ``rng``."""
    # one call draws the same numbers as one call of M per resample, in turn
    return resample_counts(rng.integers(0, M, size=(resamples, M)), M)


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
    M = nb.shape[0]
    W = bootstrap_counts(next(streams), M, resamples)
    out = {"all parameters": _bootstrap(evpi(nb), weighted_evpi(nb, W), confidence)}
    col = {n: j for j, n in enumerate(names)}
    wanted = {n: [n] for n in names} | dict(groups or {})
    for key, members in wanted.items():
        # the basis is built once on all members; a resample weighs its rows by how often it drew them
        design = design_matrix(X[:, [col[m] for m in members]])
        W = bootstrap_counts(next(streams), M, resamples)
        out[key] = _bootstrap(evppi_from_design(nb, design), weighted_evppi(nb, design, W), confidence)
    return out
