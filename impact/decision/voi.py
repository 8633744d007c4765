"""Value of information: what learning an uncertain number exactly would be worth to the option choice.

For a choice among decisions d (doing nothing and every option), a member i has parameters θ_i and a
realised net benefit ``NB[i, d]`` that also carries the member's chance events (eradication failure
draws, environmental noise), which knowing θ exactly would not remove. With ``g_d(θ) = E(NB_d | θ)``,
the chance integrated out:

* EVPI, the expected value of perfect information on every parameter:
  ``E_θ[max_d g_d(θ)] − max_d E_θ[g_d(θ)]``;
* EVPPI of a parameter (or group) φ: the same with ``E(NB_d | φ)`` in place of ``g_d(θ)``
  (Strong, Oakley & Brennan 2014, Medical Decision Making 34:311–326; in ecology, Canessa et al.
  2015, Methods in Ecology and Evolution 6:1219–1228).

The conditional expectations are estimated by regression of each decision's net benefit on the
parameters: additive penalised cubic B-splines (knots at quantiles, a first-difference penalty on
each parameter's coefficients, which shrinks its curve towards a constant, i.e. towards "no
influence"; P-splines of Eilers & Marx 1996, Statistical Science 11:89–121), plus penalised pairwise
products of the linear terms for a declared group. One smoothing weight per fit is chosen by
generalised cross-validation (Craven & Wahba 1979) over a grid. For EVPI the regression is on every
parameter at once: ~10 parameters x ~9 basis functions on ~1,000 members would overfit a 0/1 outcome
unpenalised (fitted noise of sd ~0.17), and the penalty chosen from the data keeps it to what the
members support.

Over-fitting guard: plugging fitted values into ``E[max_d ĝ_d]`` is biased upwards, because the
maximum picks up the fitted noise (for a 0/1 outcome with two options at a chance of 0.5 and one
parameter without influence, the former unpenalised plug-in gave 1.8 ± 0.8 points at 1,000 members,
measured over 40 seeds, with intervals that excluded 0). So the value is estimated by
cross-fitting instead: the members are split into FOLDS folds (member i in fold i mod FOLDS, fixed
before any outcome is seen); for each fold, the choice rule ``d̂(θ) = argmax_d ĝ_d(θ)`` and the
choice made now ``d₀`` (best mean) are learned from the other folds, and the fold's own realised net
benefits score them: estimate = mean over members of ``NB[i, d̂(θ_i)] − NB[i, d₀]``. A rule learned
elsewhere cannot know a member's chance events, so this scores the value of the rule without the
fitted noise: when φ has no influence, ``d̂`` is only a noisier guess of the same choice as ``d₀`` and
the estimate is at most 0 on average; otherwise it is the value of the learned rule, at most the true
value (an imperfect rule loses, second order in its error near the points where the best choice
changes). Values are clipped at 0 (EVPI and EVPPI cannot be negative). A value whose bootstrap lower
limit is 0 is not distinguishable from no value at all (a one-sided test at level (1 − confidence)/2
against that null); the report names a number "most worth measuring" only when its lower limit is
above 0. The partial value is capped at the perfect one resample by resample (EVPPI ≤ EVPI by
definition).

Intervals come from a bootstrap over members; every resample is computed at once as a row of member
weights (how often the resample drew each member). A resample's fit is not solved from its own normal
equations (R x K x K sums and R solves): it is one Newton step from the fit on the members as drawn
(the one-step, linearised bootstrap), whose only per-member objects are ``x_i e_i'`` (K x D, computed
once), so the resamples cost one (R x m) by (m x K·D) product per fold. The estimate itself (the members
as drawn) is unchanged; the replicates agree with exact refits to within the bootstrap's own Monte
Carlo error (tests/decision/test_voi.py; ``rule_gains(..., refit=True)`` keeps the exact refits as the
reference). All keys (EVPI, each parameter, each group) share the same resamples, so the cap applies
resample by resample. Pure functions, arrays in and out.
"""

from __future__ import annotations

import contextlib
import contextvars
import functools
import hashlib
from dataclasses import dataclass

import numpy as np

from impact.decision import onestep
from impact.decision.onestep import weighted_sums

SPLINE_DEGREE = 3
# interior knots per parameter: enough to follow a threshold-like response, few enough for
# ~100 members per basis function at 1,000 members (common practice, no source)
MAX_KNOTS = 6
MEMBERS_PER_KNOT = 80
PURPOSE_VOI = 11  # spawn-key purpose of the bootstrap streams
# folds of the cross-fitting: each rule is learned on 80 % of the members (common practice, no source)
FOLDS = 5
# smoothing weights tried by generalised cross-validation, relative to the median eigenvalue of the
# penalty in the metric of the design: from almost unpenalised to a constant fit
SMOOTHING_GRID = np.logspace(-4.0, 6.0, 41)
BATCH_VALUES = 1 << 21  # values held at once by the weighted sums (16 MB of floats), whatever M


@functools.lru_cache(maxsize=1)
def _blas_controller():
    try:
        from threadpoolctl import ThreadpoolController
    except ImportError:  # declared in pyproject; without it the products run on BLAS's own threads
        return None
    return ThreadpoolController()


def one_blas_thread():
    """A context in which BLAS runs on one thread.

    The products and solves here are small (K ~ 10-100, a few hundred rows per fold): a threaded BLAS
    splits them across cores, which on a shared 2-core machine costs several times the CPU of one core
    doing them (measured with this module's rule_gains on 1,000 members, 200 resamples, 9 columns:
    0.30 / 0.66 / 0.99 CPU s per call on OpenBLAS's default threads against 0.036 / 0.056 / 0.17 s on
    one, for a one-parameter, two-parameter and every-parameter design).
    """
    ctl = _blas_controller()
    return contextlib.nullcontext() if ctl is None else ctl.limit(limits=1, user_api="blas")


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
    return np.hstack([np.ones((x.shape[0], 1))] + [_spline_basis(x[:, j]) for j in range(x.shape[1])] + [_products(x)])


def _products(x: np.ndarray) -> np.ndarray:
    """Pairwise products of the standardised columns of ``x`` (M, k): (M, k(k−1)/2)."""
    z = (x - x.mean(axis=0)) / np.where(x.std(axis=0) > 0, x.std(axis=0), 1.0)
    cols = [z[:, a] * z[:, b] for a in range(x.shape[1]) for b in range(a + 1, x.shape[1])]
    return np.column_stack(cols) if cols else np.zeros((x.shape[0], 0))


def penalised_design(x: np.ndarray, interactions: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """:func:`design_matrix` of ``x`` (M, k) and its penalty (K, K): a first difference on each spline block's
    coefficients (the dropped first one counted as 0), so a large weight leaves only the intercept; a ridge
    on the pairwise products. ``interactions=False`` leaves the products out (an additive design)."""
    x = np.asarray(x, float).reshape(x.shape[0], -1)
    bases = [_spline_basis(x[:, j]) for j in range(x.shape[1])]
    X = np.hstack([np.ones((x.shape[0], 1)), *bases, *([_products(x)] if interactions else [])])
    S = np.zeros((X.shape[1], X.shape[1]))
    at = 1
    for B in bases:
        k = B.shape[1]
        D1 = np.eye(k) - np.eye(k, k=-1)  # c_1 − 0, c_2 − c_1, ...
        S[at:at + k, at:at + k] = D1.T @ D1
        at += k
    S[at:, at:] = np.eye(X.shape[1] - at)
    return X, S


def penalty_eigensystem(gram: np.ndarray, S: np.ndarray) -> tuple[np.ndarray, np.ndarray] | None:
    """Demmler–Reinsch form of a penalised fit with normal matrix ``gram`` = X'X (K, K) and penalty ``S``
    (K, K): with ``X'X = LL'`` and ``L⁻¹SL⁻ᵀ = U diag(s) U'``, the fit shrinks the component ``z = U'L⁻¹X'Y``
    by ``1/(1 + λs)``. Returns ``(U'L⁻¹ (K, K), s (K,))``, or None when nothing is penalised.

    It depends on the design alone, so objectives that share their members share it.
    """
    K = gram.shape[0]
    L = np.linalg.cholesky(gram + 1e-10 * np.trace(gram) / K * np.eye(K))
    Linv = np.linalg.inv(L)
    s, U = np.linalg.eigh(Linv @ S @ Linv.T)
    s = np.clip(s, 0.0, None)
    if not (s > 1e-12 * max(float(s.max()), 1e-300)).any():
        return None
    return U.T @ Linv, s


def smoothing_weight(eig: tuple[np.ndarray, np.ndarray] | None, rhs: np.ndarray, yy: float, m: float) -> float:
    """Penalty weight λ minimising the generalised cross-validation score (Craven & Wahba 1979), summed over
    the responses, given :func:`penalty_eigensystem` ``eig``, ``rhs`` = X'Y (K, D), ``yy`` = the sum of
    squares of Y and ``m`` rows. Each λ of the grid costs O(K)."""
    if eig is None:
        return 0.0
    T, s = eig
    z2 = ((T @ rhs) ** 2).sum(axis=1)  # (K,)
    lam = SMOOTHING_GRID / np.median(s[s > 1e-12 * s.max()])
    keep = 1.0 / (1.0 + lam[:, None] * s[None, :])  # (grid, K)
    rss = (yy - z2.sum()) + ((1 - keep) ** 2) @ z2
    edf = keep.sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        gcv = np.where(m - edf > 0.5, m * rss / (m - edf) ** 2, np.inf)
    return float(lam[int(np.argmin(gcv))])


def fitted_means(nb: np.ndarray, X: np.ndarray) -> np.ndarray:
    """Least-squares fit of every decision's net benefit on the design ``X``: (M, D) fitted values."""
    # normal equations with a tiny ridge: the basis is well conditioned and this is several times
    # cheaper than an SVD inside a bootstrap loop
    gram = X.T @ X
    coef = np.linalg.solve(gram + 1e-10 * np.trace(gram) / gram.shape[0] * np.eye(gram.shape[0]), X.T @ nb)
    return X @ coef


def resample_counts(draws: np.ndarray, M: int) -> np.ndarray:
    """How often each of ``M`` members appears in each bootstrap resample: draws (R, n) -> counts (R, M)."""
    R = draws.shape[0]
    return np.bincount((draws + M * np.arange(R)[:, None]).ravel(), minlength=R * M).reshape(R, M).astype(float)


def member_slices(M: int, width: int) -> list[slice]:
    """Slices of ``M`` members, each holding at most ~BATCH_VALUES values when a member carries ``width``."""
    step = max(1, BATCH_VALUES // max(width, 1))
    return [slice(lo, lo + step) for lo in range(0, M, step)]


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


@dataclass(frozen=True)
class Estimate:
    """A value with its bootstrap percentile interval."""

    value: float
    low: float
    high: float


def estimates(rows: np.ndarray, confidence: float) -> list[Estimate]:
    """An :class:`Estimate` of each row of ``rows`` (n, 1 + R): the value in column 0, the percentile limits of
    the R resamples after it (each row's own ``np.quantile``, every row's in one call)."""
    rows = np.asarray(rows, float).reshape(-1, np.shape(rows)[-1])
    a = (1 - confidence) / 2
    lim = np.quantile(rows[:, 1:], [a, 1 - a], axis=1)
    return [Estimate(float(v), float(lo), float(hi)) for v, lo, hi in zip(rows[:, 0], lim[0], lim[1])]


def bootstrap_counts(rng: np.random.Generator, M: int, resamples: int) -> np.ndarray:
    """Counts (resamples, M) of members in resamples of M drawn with replacement from ``rng``."""
    # one call draws the same numbers as one call of M per resample, in turn
    return resample_counts(rng.integers(0, M, size=(resamples, M)), M)




def folds_of(M: int) -> list[np.ndarray]:
    """Members of each cross-fitting fold: member i is in fold i mod FOLDS (fewer folds below FOLDS members)."""
    F = max(1, min(FOLDS, M))
    return [np.arange(k, M, F) for k in range(F)]


def rule_gains(nb: np.ndarray, X: np.ndarray, S: np.ndarray, W: np.ndarray,
               splits: list[slice] | None = None, *, refit: bool = False) -> np.ndarray:
    """Cross-fitted value of choosing by the regression on ``X`` rather than now, under each row of member
    weights ``W`` (R, M), for each choice set in ``splits``: (len(splits), R), unclipped (see the module doc).

    Parameters
    ----------
    nb : ndarray (M, D)
        Realised net benefits; ``splits`` (default: all columns) cuts them into the choice sets of
        separate objectives, which share the design's normal equations.
    X, S : ndarray (M, K), (K, K)
        Design (first column the intercept) and its penalty (:func:`penalised_design`).
    W : ndarray (R, M)
        Member weights; row 0 must be all ones (the members as drawn: its fit sets each fold's smoothing
        weight, which the other rows reuse).
    refit : bool
        True: every row's fits solved exactly from its own weighted normal equations (R, K, K), the
        reference. False (default): each row's coefficients from the fit on the members as drawn by
        ``onestep.REFIT_STEPS`` Newton steps with that fit's matrix
        (:func:`impact.decision.onestep.newton_coefficients`): row 0 is the same either way, the other rows
        agree to within the bootstrap's own Monte Carlo error (tested).
    """
    shared = _SHARED.get()
    with one_blas_thread():
        if refit or shared is None or not any(W is w for w in shared["weights"].values()):
            return _rule_gains(nb, X, S, W, splits, refit)
        return _shared_rule_gains(shared["gains"], nb, X, S, W, splits or [slice(0, nb.shape[1])])


# Within shared_gains(): the weights of member_weights by (M, resamples, seed), and the gains already computed
_SHARED: contextvars.ContextVar = contextvars.ContextVar("impact_decision_shared_gains", default=None)


@contextlib.contextmanager
def shared_gains():
    """A context in which each choice set's gains (:func:`rule_gains`) on the same design, members, weights and net
    benefits are computed once: the information, studies and study-size tables ask for the same EVPI and EVPPIs.

    Within it, :func:`member_weights` hands every caller with the same (M, resamples, seed) the same read-only
    array, which is how the gains know their weights without reading them; other weights are never shared.
    A choice set computed beside others gives the numbers it gives alone (the design's sums are shared, each
    set's fit is its own), so the tables do not depend on which table asked first. (The shared products
    round differently from one set's alone; that can change a resample's choice only where two decisions'
    fitted values tie to rounding: not once on the demo, tests/decision/test_voi.py.)
    """
    token = _SHARED.set({"weights": {}, "gains": {}})
    try:
        yield
    finally:
        _SHARED.reset(token)


def _digest(a: np.ndarray) -> tuple:
    a = np.ascontiguousarray(a)
    return a.shape, a.dtype.str, hashlib.blake2b(a.view(np.uint8).ravel(), digest_size=16).digest()


def _shared_rule_gains(book: dict, nb: np.ndarray, X: np.ndarray, S: np.ndarray, W: np.ndarray,
                       splits: list[slice]) -> np.ndarray:
    """:func:`_rule_gains` (Newton step) of the choice sets not yet in ``book``, computed together; all from ``book``."""
    design = (id(W), _digest(X), _digest(S))
    keys = [design + (_digest(nb[:, cols]),) for cols in splits]
    todo = list(dict.fromkeys(k for k in keys if k not in book))
    if todo:
        first = {k: keys.index(k) for k in todo}
        sub, sub_splits = choice_sets([nb[:, splits[first[k]]] for k in todo])
        for k, row in zip(todo, _rule_gains(sub, X, S, W, sub_splits, False)):
            book[k] = row
    return np.stack([book[k] for k in keys])


def _rule_gains(nb, X, S, W, splits, refit):
    M = nb.shape[0]
    splits = splits or [slice(0, nb.shape[1])]
    folds = folds_of(M)
    # each fold's normal equations once (every row with refit, else only the members as drawn); a fold's
    # training sums are the total less its own
    moments = [weighted_normal_equations(W[:, f], X[f], nb[f]) if refit
               else ((X[f].T @ X[f])[None], (X[f].T @ nb[f])[None]) for f in folds]
    gram = sum(g for g, _ in moments)
    rhs = sum(r for _, r in moments)
    # every row's sums of the net benefits per fold: the choice made now (best weighted mean of the training folds)
    Wf = [W[:, f] for f in folds]
    fold_sums = [weighted_sums(w, nb[f]) for w, f in zip(Wf, folds)]
    all_sums = sum(fold_sums)
    gain = np.zeros((len(splits), W.shape[0]))
    sq = (nb**2).sum(axis=0)
    # the smoothing weight's eigensystem from the design on all members (it holds no outcome, so the folds
    # stay apart), scaled to a fold's share of them: a training gram of c·X'X has s/c and U'L⁻¹/√c
    eig = penalty_eigensystem(gram[0], S)
    # choice sets of one width side by side (objectives under the same options): every fold's sets at once
    width = nb.shape[1] // len(splits)
    width *= all(c == slice(j * width, (j + 1) * width) for j, c in enumerate(splits)) and width * len(splits) == nb.shape[1]
    small = width and not refit and onestep.REFIT_STEPS == 1 and X.shape[1] < onestep.MOMENTS_BELOW * nb.shape[1]
    trained = onestep.training_sums(Wf, X, nb, folds) if small else None
    for k, (f, (g_k, r_k)) in enumerate(zip(folds, moments)):
        if len(folds) == 1:
            break  # one member: nothing to learn from
        G, b = gram - g_k, rhs - r_k
        train = np.concatenate([folds[j] for j in range(len(folds)) if j != k])
        Xt, nbt, Wt, Xf, nbf = X[train], nb[train], None if refit else W[:, train], X[f], nb[f]
        c = (M - f.size) / M
        fold_eig = None if eig is None else (eig[0] / np.sqrt(c), eig[1] / c)
        now_all = (all_sums - fold_sums[k]).T  # (D, R)
        cols_f = np.arange(f.size)
        # the smoothing weight comes from the training folds as drawn (row 0): one number the resamples reuse
        lams = [smoothing_weight(fold_eig, b[0][:, cols], float(sq[cols].sum() - (nbf[:, cols] ** 2).sum()), M - f.size)
                for cols in splits]
        if width and not refit and onestep.REFIT_STEPS == 1:
            gain += onestep.fold_gains_equal_sets(G[0], S, lams, Xt, nbt, Wt, Xf, nbf, Wf[k], now_all.T, width,
                                                  None if trained is None else trained[k]).T
            continue
        if refit:
            coefs = [ridge_solve(G + lam * S, b[:, :, cols])[0] for lam, cols in zip(lams, splits)]  # (R, K, D) each
        elif onestep.REFIT_STEPS == 1:
            fitted = weighted_fitted(onestep.newton_step_splits(G[0], S, lams, Xt, nbt, Wt, splits), Xf)  # every choice set's
            at = np.cumsum([0] + [nb[:, cols].shape[1] for cols in splits])
            coefs = None
        else:
            coefs = [onestep.newton_coefficients(G[0] + lam * S, lam * S, Xt, nbt[:, cols], Wt) for lam, cols in zip(lams, splits)]
        for j, cols in enumerate(splits):
            F = weighted_fitted(coefs[j], Xf) if coefs is not None else fitted[:, at[j]:at[j + 1]]
            chosen = onestep.first_maximum(F)  # (R, m_k)
            now = onestep.first_maximum(now_all[cols].T[:, :, None])[:, 0]  # (R,)
            y = nbf[:, cols]
            got = y.T[chosen, cols_f]  # (R, m_k)
            gain[j] += (Wf[k] * (got - y[:, now].T)).sum(axis=1)
    return gain / W.sum(axis=1)


def choice_sets(nbs: list[np.ndarray]) -> tuple[np.ndarray, list[slice]]:
    """Several choice sets (each (M, D_j)) side by side (M, ΣD_j), and the columns of each."""
    nb = np.hstack([np.asarray(n, float) for n in nbs])
    edges = np.cumsum([0] + [np.asarray(n).shape[1] for n in nbs])
    return nb, [slice(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:])]


def member_weights(M: int, resamples: int, seed: int) -> np.ndarray:
    """Row 0 all ones (the members as drawn: the estimate), then the bootstrap resamples as member counts
    (resamples + 1, M), from the value-of-information stream: every caller with the same seed and M
    resamples the same members, so values computed apart can be capped resample by resample."""
    shared = _SHARED.get()
    if shared is not None and (M, resamples, seed) in shared["weights"]:
        return shared["weights"][(M, resamples, seed)]
    ss = np.random.SeedSequence(seed, spawn_key=(PURPOSE_VOI,))
    rng = np.random.Generator(np.random.PCG64(ss.spawn(1)[0]))
    W = np.vstack([np.ones((1, M)), bootstrap_counts(rng, M, resamples)])
    if shared is not None:
        W.flags.writeable = False
        shared["weights"][(M, resamples, seed)] = W
    return W


def information_values(nb: np.ndarray, X: np.ndarray, names: list[str], groups: dict[str, list[str]] | None = None,
                       *, resamples: int = 200, confidence: float = 0.95, seed: int = 0
                       ) -> dict[str, Estimate]:
    """EVPI (key ``"all parameters"``) and the EVPPI of every parameter and declared group.

    Parameters
    ----------
    nb : ndarray (M, D)
        Realised net benefit of each decision in each member (chance events included).
    X : ndarray (M, P)
        The members' parameter values, columns in the order of ``names``.
    groups : dict of str -> list of str, optional
        Named groups of parameters whose joint EVPPI is wanted.

    Returns
    -------
    dict of str -> Estimate, EVPI first, then parameters and groups in the order given; values and
    limits clipped at 0, EVPPI capped at EVPI resample by resample.
    """
    return information_values_many([nb], X, names, groups, resamples=resamples, confidence=confidence, seed=seed)[0]


def information_values_many(nbs: list[np.ndarray], X: np.ndarray, names: list[str],
                            groups: dict[str, list[str]] | None = None, *, resamples: int = 200,
                            confidence: float = 0.95, seed: int = 0) -> list[dict[str, Estimate]]:
    """:func:`information_values` of several choice sets ``nbs`` (each (M, D_j)) on the same members ``X``
    (M, P): the same numbers as one call each, with the designs' normal equations shared."""
    nb, splits = choice_sets(nbs)
    X = np.asarray(X, float).reshape(nb.shape[0], -1)
    W = member_weights(nb.shape[0], resamples, seed)
    top = np.maximum(rule_gains(nb, *penalised_design(X, interactions=False), W, splits), 0.0)
    values = {"all parameters": top}
    col = {n: j for j, n in enumerate(names)}
    for key, members in ({n: [n] for n in names} | dict(groups or {})).items():
        # the basis is built once on all members; a resample weighs its rows by how often it drew them
        values[key] = np.minimum(np.maximum(rule_gains(nb, *penalised_design(X[:, [col[m] for m in members]]), W,
                                                       splits), 0.0), top)
    keys = list(values)
    rows = np.stack([values[k] for k in keys], axis=1)  # (choice sets, keys, 1 + R)
    return [dict(zip(keys, estimates(r, confidence))) for r in rows]
