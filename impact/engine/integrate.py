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

from impact.engine.control import FAILURE_REASONS, MIN_RTOL, MIN_STEP_ULPS, DormandPrince54, Failure
from impact.engine.stepper import (error_norm, as_tolerance, select_initial_step, Active, Model, trial_step,
    next_step, project, nonfinite_rows)

__all__ = ["FAILURE_REASONS", "DormandPrince54", "Failure", "SegmentResult", "StepView",
           "integrate", "integrate_segment", "error_norm"]


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
    v : ndarray, shape (M, n), or None
        Tangent vectors at ``t1`` when a tangent was integrated (NaN rows for failed members).
    """

    y: np.ndarray
    ymin: np.ndarray
    ymax: np.ndarray
    h: np.ndarray
    failed: np.ndarray
    reason: np.ndarray
    nfev: int
    nsteps: np.ndarray
    v: np.ndarray | None = None


@dataclass(frozen=True)
class StepView:
    """One iteration of the stepper as an observer sees it (arrays over the active members).

    Rejected rows already hold their old values in the ``*_new`` arrays. An observer may rescale
    ``v_new`` and ``g_new`` in place (tangent renormalisation); the stepper checks them for
    finiteness afterwards.

    Attributes
    ----------
    rows : int ndarray (m,)
        Rows of the call's ``y0`` that the active members occupy.
    accept : bool ndarray (m,)
    t, t_new, hs : ndarray (m,)
        Step start, step end and signed step.
    y, y_new, f, f_new : ndarray (m, n)
        State and derivative at the step's start and end.
    v_new, g_new : ndarray (m, n) or None
        Tangent vector and J·v at the step's end (None without a tangent).
    """

    rows: np.ndarray
    accept: np.ndarray
    t: np.ndarray
    t_new: np.ndarray
    hs: np.ndarray
    y: np.ndarray
    y_new: np.ndarray
    f: np.ndarray
    f_new: np.ndarray
    v_new: np.ndarray | None
    g_new: np.ndarray | None


def _check_inputs(y0, t0, t1, rtol, atol, members, max_steps, nonnegative, tangent):
    """Validated ``(y0, t0, t1, rtol, atol, members, max_steps, v0)`` (programming errors raise)."""
    y0 = np.array(y0, dtype=float)
    if y0.ndim != 2:
        raise ValueError(f"y0 must have shape (members, state), got shape {y0.shape}")
    M, n = y0.shape
    if n == 0:
        raise ValueError("y0 must have at least one state variable")
    t0, t1 = float(t0), float(t1)
    if not (np.isfinite(t0) and np.isfinite(t1)):
        raise ValueError("t0 and t1 must be finite")
    rtol = as_tolerance(rtol, n, "rtol")
    atol = as_tolerance(atol, n, "atol")
    if np.any(rtol < MIN_RTOL):
        warnings.warn(f"rtol below {MIN_RTOL:.3g} raised to that value", stacklevel=3)
        rtol = np.maximum(rtol, MIN_RTOL)
    if members is None:
        members = np.arange(M)
    else:
        members = np.asarray(members)
        if members.shape != (M,) or not np.issubdtype(members.dtype, np.integer):
            raise ValueError(f"members must be an integer array of shape ({M},)")
    if int(max_steps) < 1:
        raise ValueError("max_steps must be at least 1")
    if nonnegative and np.any(y0 < 0):
        raise ValueError("y0 has negative entries but nonnegative=True")
    v0 = None
    if tangent is not None:
        v0 = np.array(tangent, dtype=float)
        if v0.shape != y0.shape:
            raise ValueError(f"tangent must have shape {y0.shape}, got {v0.shape}")
    return y0, t0, t1, rtol, atol, members, int(max_steps), v0


def integrate_segment(fun, t0: float, t1: float, y0, *, rtol=1e-6, atol=1e-9, h0=None,
                      members=None, nonnegative=True, max_steps=100_000, blowup=1e12,
                      hmax=np.inf, tangent=None, observer=None) -> SegmentResult:
    """Integrate an ensemble from ``t0`` to ``t1`` with Dormand-Prince 5(4), step per member.

    Parameters
    ----------
    fun : callable
        Without ``tangent``: ``fun(t, y, members) -> dydt``; with it:
        ``fun(t, y, v, members) -> (dydt, J·v)``. ``t`` ndarray (m,) per-member times, ``y`` and
        ``v`` ndarray (m, n), ``members`` int ndarray (m,) member indices; returns new arrays
        (m, n) on every call (the integrator keeps and edits them). Called only on active
        members. Row ``i`` of the output must depend only on ``t[i]``, ``y[i]``, ``v[i]`` and
        ``members[i]``.
    t0, t1 : float
        Segment start and end; ``t1 < t0`` integrates backwards.
    y0 : array_like, shape (M, n)
        Initial states.
    rtol, atol : float or array_like, shape (n,)
        Relative and absolute tolerances of the per-member RMS error norm (state only: the
        tangent is linear in the state's own Jacobian and follows the state's steps).
    h0 : float or array_like, shape (M,), optional
        Initial step sizes; non-finite or non-positive entries (and ``None``) are replaced by the
        automatic choice of Hairer, Norsett & Wanner (1993), Sec. II.4.
    members : int array_like, shape (M,), optional
        Member indices passed to ``fun``; defaults to ``arange(M)``.
    nonnegative : bool
        Project accepted states onto ``y >= 0`` (removes small negative overshoots); tangent
        entries of states at zero are set to zero.
    max_steps : int
        A member that has taken this many accepted steps without reaching ``t1`` fails.
    blowup : float
        A member with any ``|y| > blowup`` after an accepted step fails.
    hmax : float
        Longest step allowed.
    tangent : array_like, shape (M, n), optional
        Initial tangent vectors, advanced on the state's steps with the same stages.
    observer : callable ``observer(StepView)``, optional
        Called after every iteration in which some member accepted a step.

    Returns
    -------
    SegmentResult
        ``reason`` holds :class:`impact.engine.control.Failure` codes; ``v`` the tangent at ``t1``
        when one was integrated.
    """
    y0, t0, t1, rtol, atol, members, max_steps, v0 = _check_inputs(
        y0, t0, t1, rtol, atol, members, max_steps, nonnegative, tangent)
    M, n = y0.shape
    model = Model(fun, v0 is not None)
    out = _Outputs(y0, v0)
    if M == 0 or t1 == t0:
        return out.trivial(h0)

    direction = 1.0 if t1 > t0 else -1.0
    b = _start(model, out, y0, v0, t0, t1, h0, members, rtol, atol, hmax, direction)
    while b.idx.size:
        # The smallest step that still moves t by MIN_STEP_ULPS ulps (as scipy's RungeKutta solvers).
        min_step = MIN_STEP_ULPS * np.abs(np.nextafter(b.t, direction * np.inf) - b.t)
        b.h = np.where(b.rejected, b.h, np.maximum(b.h, min_step))
        under = b.h < min_step
        if under.any():
            out.reason[b.idx[under]] = np.where(b.last_nonfinite[under], Failure.NONFINITE,
                                                Failure.UNDERFLOW)
            out.retire(b, under, np.zeros(b.idx.size, dtype=bool))
            b.keep(~under)
            if not b.idx.size:
                break
        _iterate(model, b, out, t1, direction, rtol, atol, nonnegative, max_steps, blowup, hmax,
                 observer)
    return out.result(model.nfev)


def _iterate(model, b, out, t1, direction, rtol, atol, nonnegative, max_steps, blowup, hmax,
             observer):
    """One trial step of every active member, acceptance, projection, checks and retirement."""
    t_new = b.t + direction * b.h
    clipped = direction * (t_new - t1) >= 0
    t_new[clipped] = t1
    hs = t_new - b.t  # signed step actually attempted
    with np.errstate(over="ignore", invalid="ignore"):
        y_new, v_new, f_new, g_new, K, hcol = trial_step(model, b, hs, t_new)
        err_norm = error_norm(K, DormandPrince54.E, np.empty_like(b.y), hcol, b.y, y_new, rtol, atol)
    b.h, accept, finite = next_step(err_norm, hs, b.rejected, hmax)
    b.rejected = ~accept
    b.last_nonfinite = ~finite
    fail = np.zeros(b.idx.size, dtype=bool)
    if accept.any():
        if nonnegative:
            bad = project(model, b, accept, t_new, y_new, v_new, f_new, g_new)
            out.reason[b.idx[bad]] = Failure.NONFINITE
            fail |= bad
        # Take the new arrays and put back the (usually few) rejected rows; cheaper than
        # masked copies of the whole ensemble.
        rej = np.flatnonzero(~accept)
        if rej.size:
            y_new[rej], f_new[rej], t_new[rej] = b.y[rej], b.f[rej], b.t[rej]
            if v_new is not None:
                v_new[rej], g_new[rej] = b.v[rej], b.g[rej]
        if observer is not None:
            observer(StepView(b.idx, accept, b.t, t_new, hs, b.y, y_new, b.f, f_new, v_new, g_new))
        b.y, b.f, b.t, b.v, b.g = y_new, f_new, t_new, v_new, g_new
        np.minimum(b.ymin, b.y, out=b.ymin)
        np.maximum(b.ymax, b.y, out=b.ymax)
        b.nacc += accept
        good = accept & ~clipped
        b.hgood[good] = np.abs(hs[good])
        nonfin = nonfinite_rows(b, accept) & ~fail
        out.reason[b.idx[nonfin]] = Failure.NONFINITE
        fail |= nonfin
        # ``<=`` is False for NaN, so a failed row never hides another's blow-up.
        if not np.all(np.abs(b.y) <= blowup):
            blown = accept & ~fail & np.any(np.abs(b.y) > blowup, axis=1)
            out.reason[b.idx[blown]] = Failure.BLOWUP
            fail |= blown
    done = accept & clipped & ~fail
    too_many = ~done & ~fail & (b.nacc >= max_steps)
    if too_many.any():
        out.reason[b.idx[too_many]] = Failure.TOO_MANY_STEPS
        fail |= too_many
    leave = done | fail
    if leave.any():
        # Compact only when the active set shrinks.
        out.retire(b, leave, done)
        b.keep(~leave)


class _Outputs:
    """Result arrays over all M rows, filled as members leave the active set."""

    def __init__(self, y0, v0):
        M, n = y0.shape
        self.y0 = y0
        self.y = np.full((M, n), np.nan)
        self.v = None if v0 is None else np.full((M, n), np.nan)
        self.ymin, self.ymax = y0.copy(), y0.copy()
        self.h = np.full(M, np.nan)
        self.reason = np.zeros(M, dtype=np.int8)
        self.nsteps = np.zeros(M, dtype=np.int64)

    def retire(self, b: Active, leave, done):
        """Write rows of members leaving the active set."""
        ki = np.flatnonzero(leave)
        rows, ok = b.idx[ki], done[ki]
        self.y[rows] = np.where(ok[:, None], b.y[ki], np.nan)
        if self.v is not None:
            self.v[rows] = np.where(ok[:, None], b.v[ki], np.nan)
        self.ymin[rows] = b.ymin[ki]
        self.ymax[rows] = b.ymax[ki]
        hg = b.hgood[ki]
        self.h[rows] = np.where(np.isfinite(hg), hg, b.h[ki])
        self.nsteps[rows] = b.nacc[ki]

    def trivial(self, h0):
        """Result of an empty ensemble or an empty interval."""
        bad = ~np.all(np.isfinite(self.y0), axis=1)
        self.reason[bad] = Failure.NONFINITE
        self.y[~bad] = self.y0[~bad]
        if h0 is not None:
            self.h[:] = np.broadcast_to(np.asarray(h0, dtype=float), self.h.shape)
        return self.result(0)

    def result(self, nfev):
        return SegmentResult(self.y, self.ymin, self.ymax, self.h, self.reason != 0, self.reason,
                             nfev, self.nsteps, self.v)


def _start(model, out, y0, v0, t0, t1, h0, members, rtol, atol, hmax, direction) -> Active:
    """Evaluate the initial derivatives, drop non-finite members and choose first steps."""
    M, n = y0.shape
    bad = ~np.all(np.isfinite(y0), axis=1)
    if v0 is not None:
        bad |= ~np.all(np.isfinite(v0), axis=1)
    out.reason[bad] = Failure.NONFINITE
    idx = np.flatnonzero(~bad)
    b = Active(idx=idx, y=y0[idx], v=None if v0 is None else v0[idx], mem=members[idx],
                t=np.full(idx.size, t0))
    if idx.size:
        b.f, b.g = model(b.t, b.y, b.v, b.mem)
        if b.f.shape != b.y.shape:
            raise ValueError(f"fun returned shape {b.f.shape}, expected {b.y.shape}")
        ok = np.all(np.isfinite(b.f), axis=1)
        if b.g is not None:
            ok &= np.all(np.isfinite(b.g), axis=1)
        out.reason[idx[~ok]] = Failure.NONFINITE
        b.keep(ok)
    else:
        b.f, b.g = np.empty((0, n)), (None if v0 is None else np.empty((0, n)))
    m = b.idx.size
    if h0 is None:
        b.h = np.full(m, np.nan)
    else:
        b.h = np.broadcast_to(np.asarray(h0, dtype=float), (M,))[b.idx].copy()
    need = ~(np.isfinite(b.h) & (b.h > 0))
    if need.any():
        b.h[need], _ = select_initial_step(model.state_only, t0, b.y[need], b.f[need],
                                            b.mem[need], t1, direction,
                                            DormandPrince54.error_estimator_order, rtol, atol)
    b.h = np.minimum(np.minimum(b.h, abs(t1 - t0)), hmax)
    b.ymin, b.ymax = b.y.copy(), b.y.copy()
    b.rejected = np.zeros(m, dtype=bool)
    b.last_nonfinite = np.zeros(m, dtype=bool)
    b.hgood = np.full(m, np.nan)
    b.nacc = np.zeros(m, dtype=np.int64)
    return b


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
