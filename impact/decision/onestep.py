"""One-step bootstrap fits and their scoring, for :mod:`impact.decision.voi`.

A resample's penalised fit is one Newton step from the fit on the members as drawn (the linearised
bootstrap; see :func:`newton_coefficients`), and a cross-fitting fold scores each resample's rule by the
outcome of the decision it chooses. The functions here do that for every resample at once, as member
weights (R, m), and, for choice sets of one width, for every set at once. Pure functions, arrays in and out.
"""

from __future__ import annotations

import numpy as np

# columns per matrix product: a threaded BLAS splits wider products across cores, which on a shared
# 2-core machine cost several times the CPU of one core doing them (measured: 100 x 1,000 x 190
# products, 7 CPU ms whole against 1.1 ms in blocks of 8)
BLAS_COLUMNS = 8


def weighted_sums(W: np.ndarray, A: np.ndarray) -> np.ndarray:
    """``W @ A``: sums (R, c) of the columns of ``A`` (m, c) under each row of member weights ``W`` (R, m),
    in blocks of BLAS_COLUMNS columns."""
    out = np.empty((W.shape[0], A.shape[1]))
    for c in range(0, A.shape[1], BLAS_COLUMNS):
        out[:, c:c + BLAS_COLUMNS] = W @ A[:, c:c + BLAS_COLUMNS]
    return out


def fold_gains_equal_sets(G: np.ndarray, S: np.ndarray, lams: list[float], Xt: np.ndarray, Yt: np.ndarray,
                           Wt: np.ndarray, Xf: np.ndarray, Yf: np.ndarray, wf: np.ndarray, sums: np.ndarray,
                           D: int, trained: tuple[np.ndarray, np.ndarray] | None = None) -> np.ndarray:
    """One fold's gains (R, J) of J choice sets of D columns each, side by side in ``Yt`` (m_t, J·D) and ``Yf``
    (m_f, J·D), each set with its smoothing weight ``lams[j]``: the one-step fits of :func:`newton_step_splits`
    and the scoring of :func:`impact.decision.voi.rule_gains`, every set in the same array operations.

    ``Xt``, ``Wt`` are the training members' design (m_t, K) and weights (R, m_t); ``Xf``, ``wf`` the fold's
    (m_f, K), (R, m_f); ``sums`` (R, J·D) every row's sums of the net benefits over the training members;
    ``trained`` (optional) every row's weighted sums over the training members of ``x x'`` (R, K, K) and ``x y'``
    (R, K, J·D), from which the gradient is taken instead of from the residuals (the same step, other sums).
    """
    K = G.shape[0]
    R, m = Wt.shape
    J = len(lams)
    lam = np.asarray(lams, float)[:, None, None]
    A = G[None] + lam * S[None]
    ridge = (1e-10 * np.trace(A, axis1=1, axis2=2) / K)[:, None, None]  # the tiny ridge of ridge_solve
    eye = np.eye(K)[None]
    Ar, Pr = A + ridge * eye, lam * S[None] + ridge * eye
    coef0 = np.linalg.solve(Ar, (Xt.T @ Yt).reshape(K, J, D).transpose(1, 0, 2))  # (J, K, D)
    c0 = coef0.transpose(1, 0, 2).reshape(K, J * D)
    if trained is None:
        e = Yt - Xt @ c0
        grad = (Wt @ (Xt[:, :, None] * e[:, None, :]).reshape(m, K * J * D)).reshape(R, K, J, D)
    else:  # Σ w x (y − x'c0)' = Σ w x y' − (Σ w x x') c0
        xx, xy = trained
        grad = (xy - (xx.reshape(R * K, K) @ c0).reshape(R, K, J * D)).reshape(R, K, J, D)
    grad -= (Pr @ coef0).transpose(1, 0, 2)[None]
    step = np.linalg.solve(Ar, grad.transpose(2, 1, 0, 3).reshape(J, K, R * D)).reshape(J, K, R, D)
    coef = c0.reshape(K, J, D)[None] + step.transpose(2, 1, 0, 3)  # (R, K, J, D)
    mf = Xf.shape[0]
    # every resample's fitted values as one product: (R·J·D, K) by (K, m_f)
    fitted = (coef.transpose(0, 2, 3, 1).reshape(R * J * D, K) @ Xf.T).reshape(R, J, D, mf)
    yT = np.ascontiguousarray(Yf.T).reshape(J, D, mf)
    got = chosen_values(fitted, yT, nan=bool(np.isnan(coef).any()))  # (R, J, m_f)
    now = sums.reshape(R, J, D).argmax(axis=2)[:, :, None]  # the choice made now, in each set
    y_now = yT[:, 0]
    for d in range(1, D):
        y_now = np.where(now == d, yT[:, d], y_now)
    return (wf[:, None, :] * (got - y_now)).sum(axis=2)


# the gradient from per-fold sums of x x' and x y' (K² + K·D per member, once) costs less than from each fold's
# residuals (K·D per training member, per fold: 4 K·D per member over 5 folds) while K < 3 D
MOMENTS_BELOW = 3


def weighted_moments(w: np.ndarray, X: np.ndarray, Y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Every row's weighted sums ``Σ w x x'`` (R, K, K) and ``Σ w x y'`` (R, K, D) over the members ``X`` (m, K),
    ``Y`` (m, D), weights ``w`` (R, m)."""
    m, K = X.shape
    D = Y.shape[1]
    XY = np.hstack([X, Y])
    s = (w @ (X[:, :, None] * XY[:, None, :]).reshape(m, K * (K + D))).reshape(-1, K, K + D)
    return s[:, :, :K], s[:, :, K:]


def training_sums(Wf: list[np.ndarray], X: np.ndarray, Y: np.ndarray, folds: list[np.ndarray]) -> list[tuple]:
    """Every row's weighted sums of ``x x'`` (R, K, K) and ``x y'`` (R, K, D) over each fold's training members
    (all folds but its own), from :func:`weighted_moments` of each fold under its weights ``Wf[k]`` (R, m_k).

    For a small design these give each fold's Newton gradient (R·M·(K² + K·D) products once) instead of the
    products of its residuals (R·m_t·K·D per fold).
    """
    per_fold = [weighted_moments(w, X[f], Y[f]) for w, f in zip(Wf, folds)]
    xx, xy = sum(a for a, _ in per_fold), sum(b for _, b in per_fold)
    return [(xx - a, xy - b) for a, b in per_fold]


def chosen_values(F: np.ndarray, y: np.ndarray, nan: bool | None = None) -> np.ndarray:
    """``y[j, d*, i]`` at ``d* = F[r, j, :, i].argmax()`` for fitted values ``F`` (R, J, D, m) and outcomes ``y``
    (J, D, m): (R, J, m), the first of tied maxima as argmax, by D − 1 comparisons and selections. ``nan``: whether
    ``F`` may hold NaN (None: look), where argmax's rule (the first NaN) is kept by argmax itself."""
    R, J, D, m = F.shape
    if np.isnan(F).any() if nan is None else nan:
        idx = F.argmax(axis=2)
        return y[np.arange(J)[None, :, None], idx, np.arange(m)[None, None, :]]
    best, got = F[:, :, 0], np.broadcast_to(y[:, 0], (R, J, m))
    for d in range(1, D):
        better = F[:, :, d] > best
        got = np.where(better, y[:, d], got)
        if d < D - 1:
            best = np.maximum(best, F[:, :, d])
    return got


def first_maximum(F: np.ndarray) -> np.ndarray:
    """``F.argmax(axis=1)`` of ``F`` (R, D, m) -> (R, m), by D − 1 comparisons of (R, m) slices: the first of
    tied maxima, as argmax (argmax along a short middle axis walks the array with a stride)."""
    if F.shape[1] == 1 or np.isnan(F).any():
        return F.argmax(axis=1)
    best = F[:, 0]
    idx = np.zeros(best.shape, np.intp)
    for d in range(1, F.shape[1]):
        better = F[:, d] > best
        idx[better] = d
        best = np.where(better, F[:, d], best)
    return idx


# Newton steps of the resampled fits: each shrinks a resample's distance to its exact refit by about the
# relative size of its change of design, ~sqrt(K/M) (measured on the demo and in tests/decision/test_voi.py)
REFIT_STEPS = 1


def newton_coefficients(A: np.ndarray, P: np.ndarray, Xt: np.ndarray, Yt: np.ndarray, Wt: np.ndarray,
                        steps: int | None = None) -> np.ndarray:
    """Coefficients (R, K, D) of the penalised fits of ``Yt`` (m, D) on ``Xt`` (m, K) under each row of member
    weights ``Wt`` (R, m), by Newton steps from the fit under unit weights with that fit's matrix
    ``A = Xt'Xt + P`` (K, K), penalty ``P`` (K, K).

    A resample's fit solves ``(Xt' diag(w) Xt + P) β = Xt' diag(w) Yt``; one step from β is
    ``β + A⁻¹ (Xt' diag(w) (Yt − Xt β) − P β)``, which needs each resample's residuals (m, D) but never its
    (K, K) normal matrix: R·m·K·D products per step instead of R·m·K² and R solves of (K, K). Starting from
    the unit-weight fit, the first step is the one-step (linearised) bootstrap; each further step shrinks
    the distance to the exact refit by the factor ``‖A⁻¹ Xt' diag(w − 1) Xt‖``.
    """
    steps = REFIT_STEPS if steps is None else steps
    K = A.shape[0]
    ridge = 1e-10 * np.trace(A) / K  # the tiny ridge of ridge_solve, so row 0 equals its fit
    Ar = A + ridge * np.eye(K)
    Pr = P + ridge * np.eye(K)
    coef0 = np.linalg.solve(Ar, Xt.T @ Yt)  # (K, D)
    R, m, D = Wt.shape[0], Xt.shape[0], Yt.shape[1]
    # first step: residuals shared by every resample, so the weighted sums are one matrix product
    e = Yt - Xt @ coef0
    grad = weighted_sums(Wt, (Xt[:, :, None] * e[:, None, :]).reshape(m, K * D)).reshape(R, K, D)
    grad -= (Pr @ coef0)[None]
    coef = coef0[None] + solve_many(Ar, grad)
    for _ in range(steps - 1):
        resid = Yt[None] - Xt @ coef  # (R, m, D)
        grad = np.einsum("mk,rmd->rkd", Xt, Wt[:, :, None] * resid, optimize=True) - Pr @ coef
        coef = coef + solve_many(Ar, grad)
    return coef


def newton_step_splits(G: np.ndarray, S: np.ndarray, lams: list[float], Xt: np.ndarray, Yt: np.ndarray,
                        Wt: np.ndarray, splits: list[slice]) -> np.ndarray:
    """:func:`newton_coefficients` (one step) of every choice set in ``splits`` at once, the choice set ``j`` with
    matrix ``G + lams[j]·S`` (K, K) and penalty ``lams[j]·S``: (R, K, ΣD_j), the sets' columns side by side.

    The sets differ in their smoothing weight, so each has its own fit and factorisation, but the resamples'
    weighted sums of every set's ``x_i e_i'`` are one (R x m) by (m x K·ΣD_j) product."""
    K = G.shape[0]
    R, m = Wt.shape
    eye = np.eye(K)
    fits = []
    for lam, cols in zip(lams, splits):
        A = G + lam * S
        ridge = 1e-10 * np.trace(A) / K  # the tiny ridge of ridge_solve, as in newton_coefficients
        Ar = A + ridge * eye
        fits.append((Ar, lam * S + ridge * eye, np.linalg.solve(Ar, Xt.T @ Yt[:, cols])))
    coef0 = np.hstack([c for _, _, c in fits])  # (K, ΣD_j)
    e = np.hstack([Yt[:, cols] for cols in splits]) - Xt @ coef0
    D = coef0.shape[1]
    grad = (Wt @ (Xt[:, :, None] * e[:, None, :]).reshape(m, K * D)).reshape(R, K, D)
    coef = np.empty_like(grad)
    at = 0
    for Ar, Pr, c0 in fits:
        d = c0.shape[1]
        coef[:, :, at:at + d] = c0[None] + solve_many(Ar, grad[:, :, at:at + d] - (Pr @ c0)[None])
        at += d
    return coef


def solve_many(A: np.ndarray, B: np.ndarray) -> np.ndarray:
    """``A⁻¹ B[r]`` for every r: A (K, K), B (R, K, D) -> (R, K, D), one factorisation."""
    R, K, D = B.shape
    return np.linalg.solve(A, np.moveaxis(B, 0, 1).reshape(K, R * D)).reshape(K, R, D).swapaxes(0, 1)
