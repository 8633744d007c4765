"""The per-member Dormand-Prince step loop of the food web's state kernel, and its compiled helpers.

One member at a time is integrated through a whole segment with its state in small scratch arrays.
The step loop calls ``web_rhs``, the right-hand side that :mod:`impact.engine.generate` writes for one
web structure from the terms declared in :mod:`impact.model.terms`: the functions marked
:func:`template` below are source for it, compiled inside each generated module around its own
``web_rhs`` (never here, where there is none). The helpers without the mark are compiled here once
(numba, cached on disk) and imported by every generated module. Every floating-point operation
mirrors, in the same order, the numpy reference (:func:`impact.engine.integrate.integrate_segment`
with :class:`impact.model.WebRHS`), so the two agree to rounding; step control reads the constants
of :mod:`impact.engine.control`. Members are independent by construction: nothing is shared between
rows.
"""

from __future__ import annotations

import math

import numba
import numpy as np

from impact.engine.control import (ERROR_EXPONENT, MAX_FACTOR, MIN_FACTOR, MIN_STEP_ULPS, SAFETY, DormandPrince54,
    Failure, template)

from impact.model.terms import HEAD_S, HEADER

# Everything a generated module (:mod:`impact.engine.generate`) imports from here: the step loop's
# compiled helpers and constants (the :func:`template` functions it compiles itself).
__all__ = ["HEADER", "HEAD_S", "A", "B", "C", "E", "STAGES", "INITIAL_EXPONENT", "NONFINITE", "BLOWUP", "UNDERFLOW",
           "TOO_MANY", "kernel_jit", "kernel_inline", "nmin", "nmax", "sumsq", "rms", "all_finite",
           "trial_first_step", "chosen_first_step", "power_array", "next_step", "JUMP_CULL", "JUMP_ERADICATE",
           "JUMP_ADD"]

A = DormandPrince54.A.copy()
B = DormandPrince54.B.copy()
C = DormandPrince54.C.copy()
E = DormandPrince54.E.copy()
STAGES = DormandPrince54.n_stages
INITIAL_EXPONENT = 1.0 / (DormandPrince54.error_estimator_order + 1)
NONFINITE = int(Failure.NONFINITE)
BLOWUP = int(Failure.BLOWUP)
UNDERFLOW = int(Failure.UNDERFLOW)
TOO_MANY = int(Failure.TOO_MANY_STEPS)

kernel_jit = numba.njit(cache=True, nogil=True, error_model="numpy")
# Pieces of the step loop are inlined into it at numba's level: as separate functions they cost
# about a sixth of the kernel's speed (measured with bench/bench_engine.py).
kernel_inline = numba.njit(cache=True, nogil=True, error_model="numpy", inline="always")


@kernel_jit
def nmin(a, b):
    """numpy.minimum for scalars (NaN propagates)."""
    if a != a or b != b:
        return a + b
    return a if a <= b else b


@kernel_jit
def nmax(a, b):
    """numpy.maximum for scalars (NaN propagates)."""
    if a != a or b != b:
        return a + b
    return a if a >= b else b


@kernel_jit
def power_array(x, p):
    """``x ** p`` elementwise through the C library's ``pow`` (as the kernel computes it)."""
    out = np.empty_like(x)
    for i in range(x.shape[0]):
        v = x[i]
        out[i] = v ** p if v != 0 or p >= 0 else math.inf
    return out


@kernel_jit
def sumsq(x, n):
    """Σ x_j² over the first ``n`` entries, summed in column order (the reference's order)."""
    acc = x[0] * x[0]
    for j in range(1, n):
        acc = acc + x[j] * x[j]
    return acc


@kernel_jit
def rms(x, n):
    return math.sqrt(sumsq(x, n) / n)


@template("kernel_jit")
def initial_step(st, cf, t0, t1, y0, f0, rtol, atol, direction, work, y1, f1, sc):
    """Per-member copy of :func:`impact.engine.stepper.select_initial_step` (HNW 1993, Sec. II.4)."""
    n = y0.shape[0]
    interval = abs(t1 - t0)
    for j in range(n):
        sc[j] = atol[j] + abs(y0[j]) * rtol[j]
    for j in range(n):
        y1[j] = y0[j] / sc[j]
    d0 = rms(y1, n)
    for j in range(n):
        y1[j] = f0[j] / sc[j]
    d1 = rms(y1, n)
    h0 = trial_first_step(d0, d1, interval)
    for j in range(n):
        y1[j] = y0[j] + (h0 * direction) * f0[j]
    web_rhs(st, cf, t0 + h0 * direction, y1, f1, work)
    for j in range(n):
        y1[j] = (f1[j] - f0[j]) / sc[j]
    return chosen_first_step(h0, d1, rms(y1, n) / h0, interval)


@kernel_inline
def trial_first_step(d0, d1, interval):
    """The trial step h0 of Hairer, Nørsett & Wanner (1993), Sec. II.4, from the scaled norms of y0
    (d0) and f0 (d1): the part the state kernel and the tangent flow share."""
    h0 = 1e-6 if (d0 < 1e-5 or d1 < 1e-5) else 0.01 * d0 / d1
    return nmin(h0, interval)


@kernel_inline
def chosen_first_step(h0, d1, d2, interval):
    """The first step from the trial step h0 and the norms of f0 (d1) and of the change of f over
    h0 divided by h0 (d2), at most 100 h0 and the interval (HNW 1993, Sec. II.4)."""
    if d1 <= 1e-15 and d2 <= 1e-15:
        h1 = nmax(1e-6, h0 * 1e-3)
    else:
        h1 = (0.01 / nmax(d1, d2)) ** INITIAL_EXPONENT
    h = nmin(nmin(100 * h0, h1), interval)
    if not (math.isfinite(h) and h > 0):
        h = min(1e-6, interval)
    return h


@kernel_jit
def all_finite(x):
    for v in x:
        if not math.isfinite(v):
            return False
    return True


@template("kernel_jit")
def combine_stages(K, coeffs, count, out):
    """``out = Σ coeffs[i]·K[i]`` over the first ``count`` stages, skipping zero weights, in the
    order of :func:`impact.engine.stepper.combine`."""
    n = out.shape[0]
    first = True
    for s in range(count):
        c = coeffs[s]
        if c == 0:
            continue
        if first:
            for j in range(n):
                out[j] = K[s, j] * c
            first = False
        else:
            for j in range(n):
                out[j] += K[s, j] * c


@template("kernel_jit")
def segment(st, coef, y0, h0, t0, t1, rtol, atol, max_steps, blowup, y_out, ymin, ymax, h_out,
            reason, nsteps):
    """Integrate every member from ``t0`` to ``t1``; fills the output arrays, returns the number
    of member right-hand-side evaluations.

    ``y0`` (M, n) finite non-negative states, ``h0`` (M,) first steps (NaN: choose), ``coef``
    (M, P) coefficient rows; outputs as the fields of :class:`impact.engine.integrate.SegmentResult`
    (``ymin``/``ymax`` must hold ``y0`` on entry).
    """
    M, n = y0.shape
    direction = 1.0 if t1 > t0 else -1.0
    K = np.empty((STAGES + 1, n))
    work = np.empty((5, n))
    y, y_new, tmp, sc = np.empty(n), np.empty(n), np.empty(n), np.empty(n)
    nfev = 0
    for m in range(M):
        cf = coef[m]
        for j in range(n):
            y[j] = y0[m, j]
        if not all_finite(y):
            reason[m] = NONFINITE
            continue
        web_rhs(st, cf, t0, y, K[0], work)
        nfev += 1
        if not all_finite(K[0]):
            reason[m] = NONFINITE
            continue
        h = h0[m]
        if not (math.isfinite(h) and h > 0):
            h = initial_step(st, cf, t0, t1, y, K[0], rtol, atol, direction, work, tmp, K[1], sc)
            nfev += 1
        h = nmin(h, abs(t1 - t0))
        nfev += member(st, cf, y, K, work, y_new, tmp, sc, h, t0, t1, direction, rtol, atol,
                        max_steps, blowup, m, y_out, ymin, ymax, h_out, reason, nsteps)
    return nfev


@template("kernel_inline")
def trial_step(st, cf, t, t_new, y, K, work, y_new, tmp, hs, rtol, atol):
    """One Dormand-Prince step of size ``hs`` from ``y`` (derivative in ``K[0]``) into ``y_new``
    (derivative in ``K[STAGES]``); returns the RMS error norm, as :func:`impact.engine.integrate.error_norm`."""
    n = y.shape[0]
    for s in range(1, STAGES):
        combine_stages(K, A[s], s, tmp)
        for j in range(n):
            tmp[j] = tmp[j] * hs + y[j]
        web_rhs(st, cf, t + C[s] * hs, tmp, K[s], work)
    combine_stages(K, B, np.int64(STAGES), y_new)
    for j in range(n):
        y_new[j] = y_new[j] * hs + y[j]
    web_rhs(st, cf, t_new, y_new, K[STAGES], work)
    combine_stages(K, E, STAGES + 1, tmp)
    for j in range(n):
        scale = nmax(abs(y[j]), abs(y_new[j])) * rtol[j] + atol[j]
        tmp[j] = tmp[j] * hs / scale
    return rms(tmp, n)


@kernel_inline
def next_step(err, hs, rejected):
    """The controller of :func:`impact.engine.stepper.next_step` for one member: the next step size."""
    factor = SAFETY * err ** ERROR_EXPONENT if err != 0 else math.inf
    if err < 1:
        grow = MAX_FACTOR if err == 0 else nmin(MAX_FACTOR, factor)
        if rejected:
            grow = nmin(1.0, grow)
        return abs(hs) * grow
    return abs(hs) * (nmax(MIN_FACTOR, factor) if math.isfinite(err) else MIN_FACTOR)


@template("kernel_inline")
def accept_step(st, cf, t_new, y, K, work, y_new, blowup, m, ymin, ymax):
    """Take ``y_new`` (projected onto y ≥ 0) as the state; returns (failure code, evaluations)."""
    n = y.shape[0]
    code = 0
    nfev = 0
    negative = False
    for j in range(n):
        if y_new[j] < 0:
            negative = True
    if negative:
        # keep FSAL consistent: the stored derivative must belong to the projected state
        for j in range(n):
            y_new[j] = nmax(y_new[j], 0.0)
        web_rhs(st, cf, t_new, y_new, K[STAGES], work)
        nfev = 1
        if not all_finite(K[STAGES]):
            code = NONFINITE
    for j in range(n):
        y[j] = y_new[j]
        K[0, j] = K[STAGES, j]
        ymin[m, j] = nmin(ymin[m, j], y[j])
        ymax[m, j] = nmax(ymax[m, j], y[j])
    if code == 0 and not all_finite(y):
        code = NONFINITE
    if code == 0:
        for j in range(n):
            if abs(y[j]) > blowup:
                code = BLOWUP
    return code, nfev


@template("kernel_jit")
def member(st, cf, y, K, work, y_new, tmp, sc, h, t0, t1, direction, rtol, atol, max_steps,
           blowup, m, y_out, ymin, ymax, h_out, reason, nsteps):
    """Step loop of one member (state in ``y``, derivative in ``K[0]``); returns evaluations."""
    n = y.shape[0]
    t = t0
    rejected = False
    last_nonfinite = False
    hgood = math.nan
    nacc = 0
    nfev = 0
    code = 0
    while True:
        min_step = MIN_STEP_ULPS * abs(np.nextafter(t, direction * np.inf) - t)
        if not rejected:
            h = nmax(h, min_step)
        if h < min_step:
            code = NONFINITE if last_nonfinite else UNDERFLOW
            break
        t_new = t + direction * h
        clipped = direction * (t_new - t1) >= 0
        if clipped:
            t_new = t1
        hs = t_new - t
        err = trial_step(st, cf, t, t_new, y, K, work, y_new, tmp, hs, rtol, atol)
        nfev += STAGES
        h = next_step(err, hs, rejected)
        rejected = not err < 1
        last_nonfinite = not math.isfinite(err)
        if rejected:
            continue
        code, extra = accept_step(st, cf, t_new, y, K, work, y_new, blowup, m, ymin, ymax)
        nfev += extra
        t = t_new
        nacc += 1
        if not clipped:
            hgood = abs(hs)
        if code != 0 or clipped:
            break
        if nacc >= max_steps:
            code = TOO_MANY
            break
    reason[m] = code
    nsteps[m] = nacc
    h_out[m] = hgood if math.isfinite(hgood) else h
    for j in range(n):
        y_out[m, j] = y[j] if code == 0 else math.nan
    return nfev


# Kinds of the jumps a run applies at segment boundaries (see :func:`run_members`).
JUMP_CULL = 0         # removed = y·value; y −= removed; the carrion pool gains yield·removed (yield ≥ 0)
JUMP_ERADICATE = 1    # y = y·value where the eradication fails (aux = 1), else 0
JUMP_ADD = 2          # y += value


@template("kernel_jit")
def run_members(st, coef, times, y0, h0, jump_start, jump_kind, jump_species, jump_yield, jump_value, jump_aux,
                rtol, atol, max_steps, blowup, slot_of, states, cummin, cummax, reason, h_out):
    """A whole option run of every member: the segments between ``times`` in turn, each under its
    own coefficient rows, with the jumps at the boundaries, recording states and running extremes
    at the output slots. Returns the member right-hand-side evaluations.

    The arithmetic is that of :func:`segment` called once per segment (each member continuing from
    its previous step size) with the jumps and running extremes of
    :func:`impact.engine.simulate.run_option` between calls, so both give the same numbers to the bit.

    ``coef`` (K, M, P) coefficient rows per segment, or (1, M, P) for every segment; ``times`` (K+1,); ``y0`` (M, n) the state after
    the jumps at ``times[0]`` (non-finite rows have failed); ``h0`` (M,) first step sizes (NaN:
    choose); ``h_out`` (M,) the step size each member would continue with (written); jumps at boundary b are entries
    ``jump_start[b]`` to ``jump_start[b+1] − 1`` of ``jump_kind``, ``jump_species``, ``jump_yield``
    (E,) and ``jump_value``, ``jump_aux`` (M, E); ``slot_of`` (K+1,) the output slot of each
    boundary or −1; ``states``, ``cummin``, ``cummax`` (M, T, n) NaN-filled, slot of boundary 0
    written by the caller; ``reason`` (M,) int8 failure codes (written).
    """
    K = times.shape[0] - 1
    M, n = y0.shape
    S = st[HEAD_S]
    KS = np.empty((STAGES + 1, n))
    work = np.empty((5, n))
    y, y_new, tmp, sc = np.empty(n), np.empty(n), np.empty(n), np.empty(n)
    lo, hi = np.empty(n), np.empty(n)
    y_end, smin, smax = np.empty((1, n)), np.empty((1, n)), np.empty((1, n))
    h_end = np.empty(1)
    code1 = np.zeros(1, dtype=np.int8)
    steps1 = np.zeros(1, dtype=np.int64)
    nfev = 0
    for m in range(M):
        for j in range(n):
            y[j] = y0[m, j]
            lo[j] = y[j]
            hi[j] = y[j]
        failed = not all_finite(y)
        reason[m] = NONFINITE if failed else 0
        h = h0[m]
        for k in range(K):
            t0, t1 = times[k], times[k + 1]
            if not failed:
                cf = coef[k if coef.shape[0] > 1 else 0, m]
                code = 0
                if not all_finite(y):
                    code = NONFINITE
                else:
                    web_rhs(st, cf, t0, y, KS[0], work)
                    nfev += 1
                    if not all_finite(KS[0]):
                        code = NONFINITE
                if code == 0:
                    if not (math.isfinite(h) and h > 0):
                        h = initial_step(st, cf, t0, t1, y, KS[0], rtol, atol, 1.0, work, tmp, KS[1], sc)
                        nfev += 1
                    h = nmin(h, abs(t1 - t0))
                    for j in range(n):
                        smin[0, j] = y[j]
                        smax[0, j] = y[j]
                    nfev += member(st, cf, y, KS, work, y_new, tmp, sc, h, t0, t1, 1.0, rtol, atol,
                                   max_steps, blowup, np.int64(0), y_end, smin, smax, h_end, code1, steps1)
                    code = code1[0]
                    h = h_end[0]
                    for j in range(n):
                        y[j] = y_end[0, j]
                        lo[j] = nmin(lo[j], smin[0, j])
                        hi[j] = nmax(hi[j], smax[0, j])
                if code != 0:
                    failed = True
                    reason[m] = code
            for e in range(jump_start[k + 1], jump_start[k + 2]):
                j = jump_species[e]
                kind = jump_kind[e]
                if kind == JUMP_CULL:
                    removed = y[j] * jump_value[m, e]
                    y[j] = y[j] - removed
                    if jump_yield[e] >= 0:
                        y[S] = y[S] + jump_yield[e] * removed
                elif kind == JUMP_ERADICATE:
                    y[j] = y[j] * jump_value[m, e] if jump_aux[m, e] != 0 else 0.0
                else:
                    y[j] = y[j] + jump_value[m, e]
            for j in range(n):
                lo[j] = nmin(lo[j], y[j])
                hi[j] = nmax(hi[j], y[j])
            if failed:
                for j in range(n):
                    y[j] = math.nan
                    lo[j] = math.nan
                    hi[j] = math.nan
            s = slot_of[k + 1]
            if s >= 0:
                for j in range(n):
                    states[m, s, j] = y[j]
                    cummin[m, s, j] = lo[j]
                    cummax[m, s, j] = hi[j]
        h_out[m] = h
    return nfev
