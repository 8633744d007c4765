"""Estimators: Sobol indices (SALib's estimators, every parameter and bootstrap resample at once) and
SALib's Morris analysis with the failure rule, the N/2 convergence check, the generic study of any
model of unit rows, and given-data first-order indices (random balance designs, likewise at once).

SALib stays the reference: the tests compare these estimates with ``sobol.analyze`` and
``rbd_fast.analyze`` on the same data and draws."""

from __future__ import annotations

import functools
import hashlib
import warnings
from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np

from impact.decision.sensitivity.designs import (DEFAULT_FAILURE_LIMIT, DEFAULT_TOLERANCE, MIN_BLOCKS,
    MorrisDesign, SobolDesign, UnitModel, salib_seed, sobol_design, unit_problem)


@dataclass(frozen=True)
class Indices:
    """Sobol indices of one output.

    Attributes
    ----------
    status : str
        ``ok``, ``constant`` (no variance to apportion) or ``refused`` (too many failures).
    S1, S1_conf, ST, ST_conf : ndarray (D,)
        ``*_conf`` is the bootstrap half-width at the requested confidence (NaN unless ok).
    S2, S2_conf : ndarray (D, D) or None
        Upper triangle filled when the design has second-order blocks.
    failed_points : int
        Design points without a finite value.
    blocks_used : int
        Base samples entering the estimate (blocks with a failed point are dropped whole).
    message : str
    """

    status: str
    S1: np.ndarray
    S1_conf: np.ndarray
    ST: np.ndarray
    ST_conf: np.ndarray
    S2: np.ndarray | None
    S2_conf: np.ndarray | None
    failed_points: int
    blocks_used: int
    message: str = ""


def no_indices(design: SobolDesign, status: str, failed: int, used: int, message: str) -> Indices:
    D = design.D
    fill = 0.0 if status == "constant" else np.nan
    s2 = np.full((D, D), np.nan) if design.second_order else None
    if s2 is not None and status == "constant":
        s2[np.triu_indices(D, 1)] = 0.0
    z = np.full(D, fill)
    return Indices(status, z, z.copy(), z.copy(), z.copy(), s2, None if s2 is None else s2.copy(), failed, used, message)


def sobol_indices(design: SobolDesign, y: np.ndarray, *, confidence: float = 0.95, resamples: int = 100,
                  failure_limit: float = DEFAULT_FAILURE_LIMIT, seed: int = 0) -> Indices:
    """First-, total- and second-order Sobol indices with bootstrap CIs (Saltelli et al. 2010; see
    :func:`saltelli_estimates`).

    Parameters
    ----------
    design : SobolDesign
    y : ndarray (design.runs,)
        One output per design row; NaN marks a failed point.
    failure_limit : float
        Largest share of failed points for which indices are still presented.
    """
    y = np.asarray(y, float)
    if y.shape != (design.runs,):
        raise ValueError(f"expected {design.runs} outputs for this design, got shape {y.shape}")
    bad = ~np.isfinite(y)
    n_bad = int(bad.sum())
    good_block = ~bad.reshape(design.N, design.step).any(axis=1)
    used = int(good_block.sum())
    if n_bad > failure_limit * design.runs:
        return no_indices(design, "refused", n_bad, used,
                      f"{n_bad} of {design.runs} design points ({n_bad / design.runs:.1%}) have no value, "
                      f"more than the declared limit of {failure_limit:.0%}; indices are not presented")
    if used < MIN_BLOCKS:
        return no_indices(design, "refused", n_bad, used,
                      f"only {used} complete base samples remain (at least {MIN_BLOCKS} needed)")
    yk = y.reshape(design.N, design.step)[good_block].ravel()
    if np.ptp(yk) <= 1e-12 * max(1.0, float(np.abs(yk).max())):
        return no_indices(design, "constant", n_bad, used, "the output does not vary over the design")
    S = saltelli_estimates(yk, design.D, design.second_order, np.random.default_rng(salib_seed(seed, 2)),
                           resamples=resamples, confidence=confidence)
    s2 = S["S2"] if design.second_order else None
    s2c = S["S2_conf"] if design.second_order else None
    msg = f"{n_bad} failed points; {design.N - used} base samples dropped" if n_bad else ""
    return Indices("ok", S["S1"], S["S1_conf"], S["ST"], S["ST_conf"], s2, s2c, n_bad, used, msg)


def saltelli_estimates(y: np.ndarray, D: int, second_order: bool, rng: np.random.Generator, *,
                       resamples: int = 100, confidence: float = 0.95) -> dict[str, np.ndarray]:
    """Sobol indices of one output of a Saltelli design, every parameter and resample at once.

    First order by Saltelli et al. 2010 (their Table 2, (b); table letters from memory), total order
    by Jansen's estimator (ibid., (f)), second order by Saltelli 2002, each over the output variance
    of A and B; half-widths are ``z * sd`` over bootstrap resamples of the base samples. These are
    SALib's ``sobol.analyze`` estimates (same draws from ``rng``; point values identical, half-widths
    to rounding), without its loop over parameters: a resample's means are sums over the base samples
    weighted by how often the resample drew each (one product for every parameter and resample).

    Parameters
    ----------
    y : ndarray (N * step,)
        Finite outputs in the design's row order (block i: A_i, AB_i^(1..D), [BA_i^(1..D)], B_i).
    rng : numpy.random.Generator
        Stream of the resamples: one draw of (N, resamples) base-sample indices.

    Returns
    -------
    dict of ndarray: ``S1``, ``S1_conf``, ``ST``, ``ST_conf`` (D,); with second order also ``S2``,
    ``S2_conf`` (D, D), upper triangle filled, NaN elsewhere.
    """
    step = 2 * D + 2 if second_order else D + 2
    y = np.asarray(y, float)
    y = (y - y.mean()) / y.std()
    blocks = y.reshape(-1, step)
    N = blocks.shape[0]
    A, B = blocks[:, 0], blocks[:, -1]
    AB, BA = blocks[:, 1:D + 1], blocks[:, D + 1:2 * D + 1]
    draws = rng.integers(N, size=(N, resamples))
    z = normal_quantile(0.5 + confidence / 2)
    # SALib's summation order: the point estimate sums each parameter's samples as one contiguous row
    # (AB.T, (D, N)); the resamples sum down the base samples of (N, R, columns) stacks
    ABt, BAt = AB.T.copy(), BA.T.copy()
    var = _output_variance(A, B)
    S1, ST = _first_total(A, B, ABt, var, -1)
    Ar, Br = A[draws], B[draws]
    spread = np.ptp(np.r_[Ar, Br])
    moves = spread != 0.0
    # a resample's means are its count-weighted sums over the base samples: one (R x N) by (N x D) product of
    # each base sample's terms, instead of gathering (N, R, D) stacks (the same sums in another order)
    C = _resample_counts(draws)
    var_r = _counted_variance(C, A, B, spread)[:, None]
    S1r = _share(C @ (B[:, None] * (AB - A[:, None])) / N, var_r)
    STr = _share(0.5 * (C @ (A[:, None] - AB) ** 2) / N, var_r)
    per = max(1, SALTELLI_CHUNK // (N * resamples))  # parameters per stack, so memory stays bounded
    out = {"S1": S1, "ST": ST, "S1_conf": z * S1r.std(axis=0, ddof=1) if moves else np.zeros(D),
           "ST_conf": z * STr.std(axis=0, ddof=1) if moves else np.zeros(D)}
    if second_order:
        out["S2"], out["S2_conf"] = np.full((D, D), np.nan), np.full((D, D), np.nan)
        for j in range(D - 1):
            k = np.arange(j + 1, D)
            out["S2"][j, k] = _closed_second(A, B, BAt[j], ABt[k], var, -1) - S1[j] - S1[k]
            BAj = BA[:, [j]][draws]
            for c in _column_chunks(k, per):
                reps = _closed_second(Ar[..., None], Br[..., None], BAj, AB[:, c][draws], var_r, 0) - S1r[:, j, None] - S1r[:, c]
                out["S2_conf"][j, c] = z * reps.std(axis=0, ddof=1)
    return out


EPS = np.finfo(float).eps


@functools.lru_cache(maxsize=8)
def normal_quantile(p: float) -> float:
    """The standard normal quantile at ``p`` (scipy's ``norm.ppf``, asked once per level: each call costs ~0.1 ms)."""
    from scipy.stats import norm

    return float(norm.ppf(p))
SALTELLI_CHUNK = 1 << 21  # resampled values per stack (16 MB of floats), whatever N and D


def _resample_counts(draws: np.ndarray) -> np.ndarray:
    """How often each base sample is drawn in each resample: draws (N, R) of indices -> counts (R, N)."""
    N, R = draws.shape
    return np.bincount((draws.T + N * np.arange(R)[:, None]).ravel(), minlength=R * N).reshape(R, N).astype(float)


def _counted_variance(C: np.ndarray, A: np.ndarray, B: np.ndarray, spread: float) -> np.ndarray:
    """:func:`_output_variance` of each resample's A and B outputs from its counts ``C`` (R, N): (R,), 0 when the
    resampled outputs' ``spread`` (their range over every resample) is nil. The outputs are standardised (mean 0,
    variance 1), so the one-pass form's cancellation costs nothing that matters."""
    if spread <= EPS:
        return np.zeros(C.shape[0])
    n = 2.0 * C.shape[1]
    mean = (C @ (A + B)) / n
    return (C @ (A * A + B * B)) / n - mean * mean


def _column_chunks(cols: np.ndarray, per: int) -> list[np.ndarray]:
    return [cols[i:i + per] for i in range(0, len(cols), per)]


def _output_variance(A: np.ndarray, B: np.ndarray) -> np.ndarray:
    """Variance of the A and B outputs (N,) or (N, R): () or (R,); 0 where they do not move at all."""
    y = np.r_[A, B]
    if np.ptp(y) <= EPS:
        return np.zeros(y.shape[1:])
    return np.var(y, axis=0)


def _share(v: np.ndarray, var: np.ndarray) -> np.ndarray:
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(var > EPS, v / var, 0.0)


def _first_total(A, B, AB, var, axis: int) -> tuple[np.ndarray, np.ndarray]:
    """First order (Saltelli et al. 2010) and total order (Jansen) shares, summing along ``axis``."""
    first = np.mean(B * (AB - A), axis=axis)
    total = 0.5 * np.mean((A - AB) ** 2, axis=axis)
    return _share(first, var), _share(total, var)


def _closed_second(A, B, BAj, ABk, var, axis: int) -> np.ndarray:
    """Closed second-order share V_jk / V (Saltelli 2002) of parameter j with each column of ``ABk``."""
    return _share(np.mean(BAj * ABk - A * B, axis=axis), var)


def morris_effects(design: MorrisDesign, y: np.ndarray, *, seed: int = 0) -> dict[str, np.ndarray]:
    """Elementary-effect summaries mu* and sigma (Morris 1991; Campolongo et al. 2007; SALib).

    Parameters
    ----------
    y : ndarray (design.runs,)
        NaN values are replaced by the output median so one failure does not void a trajectory.

    Returns
    -------
    dict with ndarrays (D,): ``mu_star``, ``sigma``, ``mu_star_conf``
    """
    from SALib.analyze import morris as morris_analyze

    y = np.asarray(y, float)
    ok = np.isfinite(y)
    if not ok.any() or np.ptp(y[ok]) == 0:
        z = np.zeros(design.D)
        return {"mu_star": z, "sigma": z.copy(), "mu_star_conf": z.copy()}
    y = np.where(ok, y, np.median(y[ok]))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        S = morris_analyze.analyze(unit_problem(design.names), design.unit, y, num_levels=design.levels,
                                   seed=salib_seed(seed, 3))
    return {k: np.asarray(S[k], float) for k in ("mu_star", "sigma", "mu_star_conf")}


def convergence(full: Indices, half: Indices, tolerance: float) -> dict:
    """Shift of the indices from N/2 to N and CI width at N, against a declared tolerance."""
    if full.status != "ok" or half.status != "ok":
        conv = full.status == "constant" and half.status == "constant"
        return dict(max_shift=0.0 if conv else np.nan, max_ci_width=0.0 if conv else np.nan,
                    tolerance=tolerance, converged=conv)
    shift = float(np.nanmax(np.abs(np.r_[full.S1 - half.S1, full.ST - half.ST])))
    width = float(np.nanmax(2.0 * np.r_[full.S1_conf, full.ST_conf]))
    return dict(max_shift=shift, max_ci_width=width, tolerance=tolerance,
                converged=bool(shift <= tolerance and width <= tolerance))


@dataclass(frozen=True)
class Study:
    """A whole Sobol study of a model with K outputs.

    Attributes
    ----------
    design : SobolDesign
    outputs : ndarray (design.runs, K)
    indices : list of Indices (K,)
        At N base samples.
    half : list of Indices (K,)
        At N/2 (the first half of the same design).
    convergence : list of dict (K,)
    """

    design: SobolDesign
    outputs: np.ndarray
    indices: list
    half: list
    convergence: list


def sobol_study(model: UnitModel, names: Sequence[str], N: int, *, second_order: bool = False, seed: int = 0,
                confidence: float = 0.95, resamples: int = 100, tolerance: float = DEFAULT_TOLERANCE,
                failure_limit: float = DEFAULT_FAILURE_LIMIT) -> Study:
    """Design, run and estimate: the one path used for analytic checks and for the food web.

    Parameters
    ----------
    model : callable, unit rows ndarray (n, D) -> ndarray (n, K)
        Maps points of the unit hypercube to K outputs (NaN for a failed point).
    """
    design = sobol_design(names, N, second_order, seed)
    Y = np.asarray(model(design.unit), float)
    if Y.ndim == 1:
        Y = Y[:, None]
    half_design = design.head(N // 2)
    kw = dict(confidence=confidence, resamples=resamples, failure_limit=failure_limit, seed=seed)
    full = [sobol_indices(design, Y[:, k], **kw) for k in range(Y.shape[1])]
    half = [sobol_indices(half_design, Y[: half_design.runs, k], **kw) for k in range(Y.shape[1])]
    conv = [convergence(f, h, tolerance) for f, h in zip(full, half)]
    return Study(design, Y, full, half, conv)


def through_priors(f: Callable[[np.ndarray], np.ndarray], priors: Sequence) -> UnitModel:
    """Wrap a model of parameter values as a model of unit rows, mapping each column by its prior's ppf."""
    def model(unit: np.ndarray) -> np.ndarray:
        X = np.column_stack([p.ppf(unit[:, j]) for j, p in enumerate(priors)])
        return f(X)
    return model


RBD_HARMONICS = 10  # harmonics summed as the first-order part of the spectrum (SALib's and Plischke's default M)
RBD_RESAMPLES = 100
RBD_CHUNK = 1 << 21  # resampled values per FFT batch: bounds memory (~50 MB) whatever N and D


def rbd_first_order(X: np.ndarray, y: np.ndarray, rng: np.random.Generator | None, *, harmonics: int = RBD_HARMONICS,
                    resamples: int = RBD_RESAMPLES, confidence: float = 0.95,
                    plan: tuple[np.ndarray, np.ndarray] | None = None) -> tuple[np.ndarray, np.ndarray]:
    """First-order indices of every column of ``X`` from given data, with bootstrap half-widths.

    The random-balance estimator on given data (Tarantola, Gatelli & Mara 2006; Plischke 2010, EASI):
    the outputs sorted by one input and folded (odd ranks reversed after the even ones) form a
    periodic signal whose first ``harmonics`` Fourier components carry that input's main effect;
    the ratio to the whole spectrum is bias-corrected (Tissot & Prieur 2012). The
    half-width is ``z * sd`` over bootstrap replicates, each of ``n // 2`` points drawn with
    replacement, as SALib's ``rbd_fast.analyze`` does (same draws from ``rng``, same values to
    rounding); here every replicate of every input is one row of a single real FFT.

    Parameters
    ----------
    X : ndarray (n, D)
        Input values (any scale; only their ranks matter). Ties between distinct points are
        broken by position.
    y : ndarray (n,)
        Finite outputs.
    rng : numpy.random.Generator
        Stream of the resamples; ``D * resamples`` draws of ``n // 2`` indices, input by input.
    plan : tuple, optional
        :func:`rbd_plan` of ``X`` and ``rng`` made already (then ``rng`` is not read).

    Returns
    -------
    S1, S1_conf : ndarray (D,)
    """
    X, y = np.asarray(X, float), np.asarray(y, float)
    order, resampled = plan if plan is not None else rbd_plan(X, rng, resamples)
    D = X.shape[1]
    S1 = _spectral_share(y[order.T], harmonics)  # (D,)
    reps = np.empty((D, resamples))
    per_input = max(1, RBD_CHUNK // max(resampled[0].size, 1))
    for lo in range(0, D, per_input):
        j = np.arange(lo, min(D, lo + per_input))
        reps[j] = _spectral_share(y[resampled[j]], harmonics)
    conf = normal_quantile(0.5 + confidence / 2.0) * reps.std(axis=1, ddof=1)
    return S1, conf


def rbd_plan(X: np.ndarray, rng: np.random.Generator, resamples: int = RBD_RESAMPLES) -> tuple[np.ndarray, np.ndarray]:
    """What :func:`rbd_first_order` reads the outputs through, which depends on the inputs and the stream alone
    (so outputs on the same points share it): each input's sort order (n, D), and the point indices (D, R, n // 2)
    of each resample sorted by each input; ``rng`` draws ``D * resamples`` resamples of ``n // 2`` indices."""
    n, D = X.shape
    m = n // 2
    order = np.argsort(X, axis=0, kind="stable")  # (n, D)
    rank = np.empty_like(order)
    np.put_along_axis(rank, order, np.arange(n)[:, None], axis=0)
    draws = rng.integers(0, n, size=(D, resamples, m))
    resampled = np.empty((D, resamples, m), order.dtype)
    per_input = max(1, RBD_CHUNK // max(resamples * m, 1))
    for lo in range(0, D, per_input):
        j = np.arange(lo, min(D, lo + per_input))
        # a resample sorted by input j is the sorted ranks of its points, read back through `order`
        sorted_ranks = np.sort(rank[draws[j], j[:, None, None]], axis=-1)
        resampled[j] = order[sorted_ranks, j[:, None, None]]
    return order, resampled


def _spectral_share(ys: np.ndarray, harmonics: int) -> np.ndarray:
    """Bias-corrected share of the first harmonics in the spectrum of outputs ``ys`` (..., n) sorted by one input."""
    n = ys.shape[-1]
    folded = np.concatenate([ys[..., ::2], ys[..., 1::2][..., ::-1]], axis=-1)
    folded = folded - folded.mean(axis=-1, keepdims=True)
    power = np.abs(np.fft.rfft(folded, axis=-1)) ** 2
    # one-sided spectrum: every bin but the mean and (n even) the Nyquist bin stands for two
    w = np.full(power.shape[-1], 2.0)
    w[0] = 0.0
    if n % 2 == 0:
        w[-1] = 1.0
    with np.errstate(invalid="ignore", divide="ignore"):
        # a resample of an indicator can be constant: its share is NaN, and so is the half-width, as in SALib
        s1 = (power[..., : harmonics + 1] @ w[: harmonics + 1]) / (power @ w)
    lam = 2.0 * harmonics / n
    return s1 - lam / (1.0 - lam) * (1.0 - s1)


def given_data_first_order(X: np.ndarray, y: np.ndarray, names: Sequence[str], seed: int) -> tuple[np.ndarray, np.ndarray]:
    """First-order indices from given data by random balance designs (see :func:`rbd_first_order`).

    Rows with a non-finite output are dropped; fewer than 64 left, or a constant output, gives NaN.

    Returns
    -------
    S1, S1_conf : ndarray (D,)
    """
    if X.shape[1] != len(names):
        raise ValueError(f"names: {len(names)} names for {X.shape[1]} columns of X")
    ok = np.isfinite(y)
    X, y = X[ok], y[ok]
    D = X.shape[1]
    if y.size < 64 or np.ptp(y) == 0:
        return np.full(D, np.nan), np.full(D, np.nan)
    # the stream SALib drew from when it computed these rows (salib_seed is itself on the SeedSequence path);
    # outputs on the same points share their sort orders and resamples (the same draws: the same stream)
    key = (X.shape, hashlib.blake2b(np.ascontiguousarray(X).view(np.uint8).ravel(), digest_size=16).digest(),
           salib_seed(seed, 4), RBD_RESAMPLES, RBD_CHUNK)
    plan = _RBD_PLANS.get(key)
    if plan is None:
        plan = rbd_plan(X, np.random.default_rng(salib_seed(seed, 4)))
        _RBD_PLANS.clear()  # one set of points at a time: the stage asks for its outputs one after another
        _RBD_PLANS[key] = plan
    return rbd_first_order(X, y, None, plan=plan)


_RBD_PLANS: dict = {}  # the last set of points' rbd_plan, by a digest of the points and the stream
