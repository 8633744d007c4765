"""Ensemble embedded Runge-Kutta integration with per-member adaptive steps.

Every member of an ensemble carries its own time, step size and error control, so a member's
trajectory is the same whether it is integrated alone or in a batch of thousands. To keep that
true to the last bit, all arithmetic across stages and state components is elementwise with a
fixed order of operations (no BLAS, no reductions whose order numpy may choose), and a member's
step size depends on its own error estimate only. The right-hand side must keep the same promise:
row ``i`` of its output may depend on row ``i`` of its input and on ``members[i]`` only.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

# Multiply steps computed from the asymptotic behaviour of errors by this.
SAFETY = 0.9
MIN_FACTOR = 0.2  # Minimum allowed decrease of a step size.
MAX_FACTOR = 10  # Maximum allowed increase of a step size.

EPS = np.finfo(float).eps

FAILURE_REASONS = {0: "ok", 1: "non-finite", 2: "blow-up", 3: "step underflow", 4: "too many steps"}

_OK, _NONFINITE, _BLOWUP, _UNDERFLOW, _TOO_MANY = 0, 1, 2, 3, 4


class DormandPrince54:
    """Dormand-Prince 5(4) pair with first-same-as-last stages (Dormand & Prince 1980)."""

    order = 5
    error_estimator_order = 4
    n_stages = 6
    C = np.array([0, 1 / 5, 3 / 10, 4 / 5, 8 / 9, 1])
    A = np.array([
        [0, 0, 0, 0, 0],
        [1 / 5, 0, 0, 0, 0],
        [3 / 40, 9 / 40, 0, 0, 0],
        [44 / 45, -56 / 15, 32 / 9, 0, 0],
        [19372 / 6561, -25360 / 2187, 64448 / 6561, -212 / 729, 0],
        [9017 / 3168, -355 / 33, 46732 / 5247, 49 / 176, -5103 / 18656],
    ])
    B = np.array([35 / 384, 0, 500 / 1113, 125 / 192, -2187 / 6784, 11 / 84])
    # Difference between the 5th- and embedded 4th-order weights; the last entry
    # multiplies the derivative at the new point (the FSAL stage).
    E = np.array([-71 / 57600, 0, 71 / 16695, -71 / 1920, 17253 / 339200, -22 / 525, 1 / 40])


@dataclass(frozen=True)
class SegmentResult:
    """Outcome of integrating an ensemble over one time segment.

    Attributes
    ----------
    y : ndarray, shape (M, n)
        State at ``t1``; rows of failed members are NaN.
    ymin, ymax : ndarray, shape (M, n)
        Running minimum / maximum over the initial state and all accepted steps (for failed
        members: up to the last accepted step before the failure).
    h : ndarray, shape (M,)
        Last accepted step size that was not shortened to land on ``t1``; if every accepted step
        was shortened, the step size the controller proposed next. Meant as ``h0`` of the next
        segment.
    failed : ndarray of bool, shape (M,)
    reason : ndarray of int8, shape (M,)
        Failure code, see ``FAILURE_REASONS``.
    nfev : int
        Number of right-hand-side calls (each call evaluates a subset of the ensemble).
    nsteps : ndarray of int, shape (M,)
        Accepted steps per member.
    """

    y: np.ndarray
    ymin: np.ndarray
    ymax: np.ndarray
    h: np.ndarray
    failed: np.ndarray
    reason: np.ndarray
    nfev: int
    nsteps: np.ndarray


def _rms_rows(x):
    """Per-row RMS of ``x`` (m, n), summed column by column so the order never depends on m."""
    n = x.shape[1]
    acc = x[:, 0] * x[:, 0]
    for j in range(1, n):
        acc += x[:, j] * x[:, j]
    return np.sqrt(acc / n)


def error_norm(K, E, tmp, hcol, y, y_new, rtol, atol):
    """Per-member RMS of the embedded error estimate, scaled by ``atol + rtol·max(|y|, |y_new|)``: (m,)."""
    err = _combine(K, E, tmp)
    err *= hcol
    scale = np.maximum(np.abs(y), np.abs(y_new))
    scale *= rtol
    scale += atol
    err /= scale
    return _rms_rows(err)


def _combine(K, coeffs, tmp):
    """Fixed-order elementwise sum ``sum_i coeffs[i] * K[i]`` skipping zero weights."""
    out = None
    for k, c in zip(K, coeffs):
        if c == 0:
            continue
        if out is None:
            out = k * c
        else:
            np.multiply(k, c, out=tmp)
            out += tmp
    return out


def _take_rows(keep, *arrays):
    """Rows ``keep`` (bool mask) of each array; ``np.take`` is far faster than fancy indexing."""
    ki = np.flatnonzero(keep)
    return [np.take(a, ki, axis=0) for a in arrays]


def _as_tolerance(value, n, name):
    arr = np.asarray(value, dtype=float)
    if arr.ndim > 1 or (arr.ndim == 1 and arr.shape != (n,)):
        raise ValueError(f"{name} must be a scalar or have shape ({n},), got shape {arr.shape}")
    if np.any(~np.isfinite(arr)) or np.any(arr < 0):
        raise ValueError(f"{name} must be finite and non-negative")
    return arr


def _select_initial_step(fun, t0, y0, f0, members, t_bound, direction, order, rtol, atol):
    """Per-member initial step after Hairer, Norsett & Wanner (1993), Sec. II.4.

    Same rule as ``scipy.integrate._ivp.common.select_initial_step`` applied to each row.

    Returns
    -------
    h : ndarray, shape (m,)
        Positive step sizes.
    nfev : int
        Right-hand-side calls used (0 or 1).
    """
    interval = abs(t_bound - t0)
    scale = atol + np.abs(y0) * rtol
    d0 = _rms_rows(y0 / scale)
    d1 = _rms_rows(f0 / scale)
    with np.errstate(divide="ignore", invalid="ignore"):
        h0 = np.where((d0 < 1e-5) | (d1 < 1e-5), 1e-6, 0.01 * d0 / d1)
    h0 = np.minimum(h0, interval)
    y1 = y0 + (h0 * direction)[:, None] * f0
    f1 = np.asarray(fun(t0 + h0 * direction, y1, members), dtype=float)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        d2 = _rms_rows((f1 - f0) / scale) / h0
        small = (d1 <= 1e-15) & (d2 <= 1e-15)
        h1 = np.where(small, np.maximum(1e-6, h0 * 1e-3),
                      (0.01 / np.maximum(d1, d2)) ** (1 / (order + 1)))
    h = np.minimum(np.minimum(100 * h0, h1), interval)
    # A non-finite f1 gives NaN here; start tiny and let the controller grow the step.
    h = np.where(np.isfinite(h) & (h > 0), h, np.minimum(1e-6, interval))
    return h, 1


def integrate_segment(fun, t0: float, t1: float, y0, *, rtol=1e-6, atol=1e-9, h0=None,
                      members=None, nonnegative=True, max_steps=100_000,
                      blowup=1e12) -> SegmentResult:
    """Integrate an ensemble from ``t0`` to ``t1`` with Dormand-Prince 5(4), step per member.

    Parameters
    ----------
    fun : callable ``fun(t, y, members) -> dydt``
        ``t`` ndarray (m,) per-member times, ``y`` ndarray (m, n), ``members`` int ndarray (m,)
        member indices; returns a new ndarray (m, n) on every call (the integrator keeps and
        edits it). Called only on active members. Row ``i`` of the output must depend only on
        ``t[i]``, ``y[i]`` and ``members[i]``.
    t0, t1 : float
        Segment start and end; ``t1 < t0`` integrates backwards.
    y0 : array_like, shape (M, n)
        Initial states.
    rtol, atol : float or array_like, shape (n,)
        Relative and absolute tolerances of the per-member RMS error norm.
    h0 : float or array_like, shape (M,), optional
        Initial step sizes; non-finite or non-positive entries (and ``None``) are replaced by the
        automatic choice of Hairer, Norsett & Wanner (1993), Sec. II.4.
    members : int array_like, shape (M,), optional
        Member indices passed to ``fun``; defaults to ``arange(M)``.
    nonnegative : bool
        Project accepted states onto ``y >= 0`` (removes small negative overshoots).
    max_steps : int
        A member that has taken this many accepted steps without reaching ``t1`` fails (code 4).
    blowup : float
        A member with any ``|y| > blowup`` after an accepted step fails (code 2).

    Returns
    -------
    SegmentResult
    """
    method = DormandPrince54
    y0 = np.array(y0, dtype=float)
    if y0.ndim != 2:
        raise ValueError(f"y0 must have shape (members, state), got shape {y0.shape}")
    M, n = y0.shape
    if n == 0:
        raise ValueError("y0 must have at least one state variable")
    t0 = float(t0)
    t1 = float(t1)
    if not (np.isfinite(t0) and np.isfinite(t1)):
        raise ValueError("t0 and t1 must be finite")
    rtol = _as_tolerance(rtol, n, "rtol")
    atol = _as_tolerance(atol, n, "atol")
    if np.any(rtol < 100 * EPS):
        warnings.warn(f"rtol below {100 * EPS:.3g} raised to that value", stacklevel=2)
        rtol = np.maximum(rtol, 100 * EPS)
    if members is None:
        members = np.arange(M)
    else:
        members = np.asarray(members)
        if members.shape != (M,) or not np.issubdtype(members.dtype, np.integer):
            raise ValueError(f"members must be an integer array of shape ({M},)")
    if int(max_steps) < 1:
        raise ValueError("max_steps must be at least 1")
    max_steps = int(max_steps)
    if nonnegative and np.any(y0 < 0):
        raise ValueError("y0 has negative entries but nonnegative=True")

    y_out = np.full((M, n), np.nan)
    ymin_out = y0.copy()
    ymax_out = y0.copy()
    h_out = np.full(M, np.nan)
    reason = np.zeros(M, dtype=np.int8)
    nsteps = np.zeros(M, dtype=np.int64)
    nfev = 0

    if M == 0 or t1 == t0:
        bad = ~np.all(np.isfinite(y0), axis=1)
        reason[bad] = _NONFINITE
        y_out[~bad] = y0[~bad]
        if h0 is not None:
            h_out[:] = np.broadcast_to(np.asarray(h0, dtype=float), (M,))
        return SegmentResult(y_out, ymin_out, ymax_out, h_out, reason != 0, reason, nfev, nsteps)

    direction = 1.0 if t1 > t0 else -1.0
    interval = abs(t1 - t0)

    # --- initial state and derivative ------------------------------------------------------
    bad = ~np.all(np.isfinite(y0), axis=1)
    reason[bad] = _NONFINITE
    idx = np.flatnonzero(~bad)
    y = y0[idx]
    mem = members[idx]
    t = np.full(idx.size, t0)
    if idx.size:
        f = np.asarray(fun(t, y, mem), dtype=float)
        nfev += 1
        if f.shape != y.shape:
            raise ValueError(f"fun returned shape {f.shape}, expected {y.shape}")
        ok = np.all(np.isfinite(f), axis=1)
        if not ok.all():
            reason[idx[~ok]] = _NONFINITE
            idx, y, mem, t, f = idx[ok], y[ok], mem[ok], t[ok], f[ok]
    else:
        f = np.empty((0, n))

    if h0 is None:
        h = np.full(idx.size, np.nan)
    else:
        h = np.broadcast_to(np.asarray(h0, dtype=float), (M,))[idx].copy()
    need = ~(np.isfinite(h) & (h > 0))
    if need.any():
        hs, k = _select_initial_step(fun, t0, y[need], f[need], mem[need], t1, direction,
                                     method.error_estimator_order, rtol, atol)
        h[need] = hs
        nfev += k
    h = np.minimum(h, interval)

    ymin = y.copy()
    ymax = y.copy()
    rejected = np.zeros(idx.size, dtype=bool)
    last_nonfinite = np.zeros(idx.size, dtype=bool)
    hgood = np.full(idx.size, np.nan)
    nacc = np.zeros(idx.size, dtype=np.int64)

    A, B, C, E = method.A, method.B, method.C, method.E
    exponent = -1.0 / (method.error_estimator_order + 1)

    def retire(leave, done):
        """Write rows of members leaving the active set into the outputs."""
        rows, yl, ok, lo, hi, hg, hl, ns = _take_rows(leave, idx, y, done, ymin, ymax, hgood, h,
                                                      nacc)
        y_out[rows] = np.where(ok[:, None], yl, np.nan)
        ymin_out[rows] = lo
        ymax_out[rows] = hi
        h_out[rows] = np.where(np.isfinite(hg), hg, hl)
        nsteps[rows] = ns

    while idx.size:
        # The smallest step that still moves t by 10 ulps (as scipy's RungeKutta solvers).
        min_step = 10 * np.abs(np.nextafter(t, direction * np.inf) - t)
        h = np.where(rejected, h, np.maximum(h, min_step))
        under = h < min_step
        if under.any():
            code = np.where(last_nonfinite[under], _NONFINITE, _UNDERFLOW).astype(np.int8)
            reason[idx[under]] = code
            keep = ~under
            retire(under, np.zeros(idx.size, dtype=bool))
            (idx, y, f, t, h, mem, ymin, ymax, rejected, hgood, nacc,
             last_nonfinite) = _take_rows(keep, idx, y, f, t, h, mem, ymin, ymax, rejected,
                                          hgood, nacc, last_nonfinite)
            (min_step,) = _take_rows(keep, min_step)
            if not idx.size:
                break

        t_new = t + direction * h
        clipped = direction * (t_new - t1) >= 0
        t_new[clipped] = t1
        hs = t_new - t  # signed step actually attempted
        # A full (m, n) copy of the step: broadcasting an (m, 1) column is several times slower.
        hcol = np.repeat(hs, n).reshape(-1, n)

        tmp = np.empty_like(y)
        with np.errstate(over="ignore", invalid="ignore"):
            K = [f]
            for s in range(1, method.n_stages):
                dy = _combine(K, A[s, :s], tmp)
                dy *= hcol
                dy += y
                K.append(np.asarray(fun(t + C[s] * hs, dy, mem), dtype=float))
            y_new = _combine(K, B, tmp)
            y_new *= hcol
            y_new += y
            f_new = np.asarray(fun(t_new, y_new, mem), dtype=float)
            K.append(f_new)
            nfev += method.n_stages

            err_norm = error_norm(K, E, tmp, hcol, y, y_new, rtol, atol)

        finite = np.isfinite(err_norm)
        accept = err_norm < 1
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            grow = np.where(err_norm == 0, MAX_FACTOR,
                            np.minimum(MAX_FACTOR, SAFETY * err_norm ** exponent))
            grow = np.where(rejected, np.minimum(1.0, grow), grow)
            shrink = np.where(finite, np.maximum(MIN_FACTOR, SAFETY * err_norm ** exponent),
                              MIN_FACTOR)
        h = np.abs(hs) * np.where(accept, grow, shrink)
        rejected = ~accept
        last_nonfinite = ~finite

        fail = np.zeros(idx.size, dtype=bool)
        if accept.any():
            # Cheap whole-array checks first; row-wise reductions only when something is off.
            if nonnegative and y_new.min() < 0:
                neg = accept & np.any(y_new < 0, axis=1)
                if neg.any():
                    # Keep FSAL consistent: the stored derivative must belong to the projected state.
                    y_new[neg] = np.maximum(y_new[neg], 0.0)
                    f_new[neg] = np.asarray(fun(t_new[neg], y_new[neg], mem[neg]), dtype=float)
                    nfev += 1
                    nf = np.zeros(idx.size, dtype=bool)
                    nf[neg] = ~np.all(np.isfinite(f_new[neg]), axis=1)
                    reason[idx[nf]] = _NONFINITE
                    fail |= nf
            # Take the new arrays and put back the (usually few) rejected rows; cheaper than
            # masked copies of the whole ensemble.
            rej = np.flatnonzero(~accept)
            if rej.size:
                y_new[rej] = y[rej]
                f_new[rej] = f[rej]
                t_new[rej] = t[rej]
            y, f, t = y_new, f_new, t_new
            np.minimum(ymin, y, out=ymin)
            np.maximum(ymax, y, out=ymax)
            nacc += accept
            good = accept & ~clipped
            hgood[good] = np.abs(hs[good])

            # An accepted error norm is finite only if y_new is, so this is a safety net.
            if not np.isfinite(y).all():
                nonfin = accept & ~fail & ~np.all(np.isfinite(y), axis=1)
                reason[idx[nonfin]] = _NONFINITE
                fail |= nonfin
            if np.abs(y).max() > blowup:
                blown = accept & ~fail & np.any(np.abs(y) > blowup, axis=1)
                reason[idx[blown]] = _BLOWUP
                fail |= blown

        done = accept & clipped & ~fail
        too_many = ~done & ~fail & (nacc >= max_steps)
        if too_many.any():
            reason[idx[too_many]] = _TOO_MANY
            fail |= too_many
        leave = done | fail
        if leave.any():
            # Compact only when the active set shrinks.
            retire(leave, done)
            keep = ~leave
            (idx, y, f, t, h, mem, ymin, ymax, rejected, hgood, nacc,
             last_nonfinite) = _take_rows(keep, idx, y, f, t, h, mem, ymin, ymax, rejected,
                                          hgood, nacc, last_nonfinite)

    failed = reason != 0
    return SegmentResult(y_out, ymin_out, ymax_out, h_out, failed, reason, nfev, nsteps)


def integrate(fun, t_eval, y0, *, rtol=1e-6, atol=1e-9, members=None, nonnegative=True, **kw):
    """Integrate an ensemble through the points ``t_eval`` with :func:`integrate_segment`.

    Parameters
    ----------
    fun : callable ``fun(t, y, members) -> dydt``
        As in :func:`integrate_segment`.
    t_eval : array_like, shape (T,)
        Strictly monotonic output times; ``t_eval[0]`` is the initial time.
    y0 : array_like, shape (M, n)
        States at ``t_eval[0]``.
    rtol, atol, members, nonnegative
        As in :func:`integrate_segment`.
    **kw
        ``max_steps`` (per segment) and ``blowup``, passed on to :func:`integrate_segment`.

    Returns
    -------
    Y : ndarray, shape (M, T, n)
        States at ``t_eval``; NaN from the first output time a member failed to reach onwards.
    summary : SegmentResult
        ``y`` is the final state, ``ymin``/``ymax`` run over the whole span, ``nsteps`` and
        ``nfev`` are totals, ``h`` is the last step size, ``failed``/``reason`` say whether and
        why a member stopped.
    """
    unknown = set(kw) - {"max_steps", "blowup"}
    if unknown:
        raise TypeError(f"unexpected keyword arguments: {sorted(unknown)}")
    t_eval = np.asarray(t_eval, dtype=float)
    if t_eval.ndim != 1 or t_eval.size == 0:
        raise ValueError("t_eval must be a non-empty 1-d array")
    steps = np.diff(t_eval)
    if not (np.all(steps > 0) or np.all(steps < 0)):
        raise ValueError("t_eval must be strictly monotonic")
    y0 = np.array(y0, dtype=float)
    if y0.ndim != 2:
        raise ValueError(f"y0 must have shape (members, state), got shape {y0.shape}")
    M, n = y0.shape
    members = np.arange(M) if members is None else np.asarray(members)
    if members.shape != (M,):
        raise ValueError(f"members must have shape ({M},)")

    T = t_eval.size
    Y = np.full((M, T, n), np.nan)
    first = integrate_segment(fun, t_eval[0], t_eval[0], y0, rtol=rtol, atol=atol,
                              members=members, nonnegative=nonnegative, **kw)
    Y[:, 0] = first.y
    ymin, ymax = y0.copy(), y0.copy()
    reason = first.reason.copy()
    h = np.full(M, np.nan)
    nsteps = np.zeros(M, dtype=np.int64)
    nfev = first.nfev
    y = first.y
    for k in range(1, T):
        alive = np.flatnonzero(reason == 0)
        if not alive.size:
            break
        seg = integrate_segment(fun, t_eval[k - 1], t_eval[k], y[alive], rtol=rtol, atol=atol,
                                h0=h[alive], members=members[alive],
                                nonnegative=nonnegative, **kw)
        nfev += seg.nfev
        nsteps[alive] += seg.nsteps
        ymin[alive] = np.minimum(ymin[alive], seg.ymin)
        ymax[alive] = np.maximum(ymax[alive], seg.ymax)
        reason[alive] = seg.reason
        h[alive] = seg.h
        y = np.full((M, n), np.nan)
        y[alive] = seg.y
        Y[:, k] = y
    summary = SegmentResult(y=Y[:, -1].copy(), ymin=ymin, ymax=ymax, h=h, failed=reason != 0,
                            reason=reason, nfev=nfev, nsteps=nsteps)
    return Y, summary
