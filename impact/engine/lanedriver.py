"""The block step loop of the "lanes" engine: members integrated eight at a time, lane by lane.

A block holds ``LANES`` members side by side: states ``(n, LANES)``, stages
``(STAGES + 1, n, LANES)``, coefficients ``(P, LANES)``, with the lane the last, contiguous axis, so
the stage combinations and the generated right-hand side (:mod:`impact.engine.lanes`, ``lane_rhs``)
are loops over lanes of identical arithmetic that the compiler may run in vector registers. Each
lane keeps its own time, step size, accept/reject decision and failure code; the block ends a
segment when its slowest lane does (a finished lane steps by zero until then, and nothing it
computes is read). Every operation on a lane is the scalar kernel's (:mod:`impact.engine.kernel`:
``member``, ``trial_step``, ``accept_step``, ``initial_step``, ``run_members``) in the same order,
so a member's numbers are those of the scalar kernel whichever members share its block.

These functions are not compiled here: :mod:`impact.engine.lanes` copies their source into a
module generated for one web structure, beside that structure's ``lane_rhs`` and with
``NSTATE`` set to its number of state columns (so loops over the state unroll).
"""

from __future__ import annotations

import math

import numpy as np

from impact.engine.control import MIN_STEP_ULPS
from impact.engine.kernel import (A, B, BLOWUP, C, E, HEAD_S, JUMP_CULL, JUMP_ERADICATE, NONFINITE, STAGES,
    TOO_MANY, UNDERFLOW, chosen_first_step, kernel_inline, kernel_jit, next_step, nmax, nmin, trial_first_step)

LANES = 8  # members per block: one AVX-512 register of doubles
NSTATE = -1  # state columns: each generated module sets its own

# copied into every generated lane module, in this order
DRIVER_FUNCTIONS = ("lane_count", "lane_combine", "lane_trial", "lane_finite", "lane_initial_step", "lane_propose",
                    "lane_judge", "lane_accept", "lane_member", "lane_jumps", "load_lane",
                    "lane_enter", "segment", "run_members")
# names the copied functions take from the engine's modules
HELPERS = {"impact.engine.kernel": ("A", "B", "C", "E", "STAGES", "NONFINITE", "BLOWUP", "UNDERFLOW", "TOO_MANY",
                                    "JUMP_CULL", "JUMP_ERADICATE", "HEAD_S", "kernel_jit", "kernel_inline", "nmin",
                                    "nmax", "next_step", "trial_first_step", "chosen_first_step"),
           "impact.engine.control": ("MIN_STEP_ULPS",)}


def lane_rhs(cf, t, y, out, lanes):  # pragma: no cover - every generated module defines its own
    """Right-hand side of a block: ``cf`` (P, LANES), ``t`` (LANES,), ``y`` and ``out`` (n, LANES)."""
    raise NotImplementedError("lane_rhs is generated per web structure (impact.engine.lanes)")


@kernel_inline
def lane_count(a):
    """LANES, in a form the compiler cannot fold (``a`` is any argument of the entry point).

    With a loop count it knows (8) LLVM unrolls the lane loops fully before its loop vectoriser runs,
    and its straight-line vectoriser then cannot prove that the arrays written do not overlap those
    read: the arithmetic stays scalar (measured: no packed instructions). With a count it cannot
    know, the loops stay loops and are vectorised behind a run-time overlap check."""
    return LANES if a.shape[0] >= 0 else 0


@kernel_inline
def lane_combine(K, coeffs, count, hs, y, out, lanes):
    """``out[j] = (Σ coeffs[s]·K[s, j])·hs + y[j]`` lane by lane over the first ``count`` stages,
    skipping zero weights: :func:`impact.engine.kernel.combine_stages` and its step, per lane.
    Flat views (``K`` of (STAGES + 1, n, LANES), the others of (n, LANES)); ``lanes`` is LANES,
    passed so the compiler keeps the lane loops and vectorises them (see :mod:`impact.engine.lanes`)."""
    n = NSTATE
    for j in range(n):
        r = j * LANES
        first = True
        for s in range(count):
            c = coeffs[s]
            if c == 0:
                continue
            q = (s * n + j) * LANES
            if first:
                for l in range(lanes):
                    out[r + l] = K[q + l] * c
                first = False
            else:
                for l in range(lanes):
                    out[r + l] += K[q + l] * c
        for l in range(lanes):
            out[r + l] = out[r + l] * hs[l] + y[r + l]


@kernel_inline
def lane_trial(cf, t, t_new, hs, y, KS, y_new, tmp, ts, err, rtol, atol, lanes):
    """One Dormand-Prince step of every lane (``hs`` (LANES,) signed steps): ``y_new``, the new
    derivative in ``KS[STAGES]`` and the RMS error norm in ``err``, as
    :func:`impact.engine.kernel.trial_step` per lane."""
    n = NSTATE
    K, yf, ynf, tf = KS.reshape(-1), y.reshape(-1), y_new.reshape(-1), tmp.reshape(-1)
    for s in range(1, STAGES):
        for l in range(lanes):
            ts[l] = t[l] + C[s] * hs[l]
        lane_combine(K, A[s], s, hs, yf, tf, lanes)
        lane_rhs(cf, ts, tmp, KS[s], lanes)
    lane_combine(K, B, STAGES, hs, yf, ynf, lanes)
    lane_rhs(cf, t_new, y_new, KS[STAGES], lanes)
    for j in range(n):
        r = j * LANES
        first = True
        for s in range(STAGES + 1):
            c = E[s]
            if c == 0:
                continue
            q = (s * n + j) * LANES
            if first:
                for l in range(lanes):
                    tf[r + l] = K[q + l] * c
                first = False
            else:
                for l in range(lanes):
                    tf[r + l] += K[q + l] * c
        for l in range(lanes):
            scale = nmax(abs(yf[r + l]), abs(ynf[r + l])) * rtol[j] + atol[j]
            tf[r + l] = tf[r + l] * hs[l] / scale
    for l in range(lanes):
        err[l] = tf[l] * tf[l]
    for j in range(1, n):
        for l in range(lanes):
            err[l] = err[l] + tf[j * LANES + l] * tf[j * LANES + l]
    for l in range(lanes):
        err[l] = math.sqrt(err[l] / n)


@kernel_inline
def lane_finite(x, l):
    """Whether column ``l`` of ``x`` (n, LANES) is finite."""
    for j in range(NSTATE):
        if not math.isfinite(x[j, l]):
            return False
    return True


@kernel_jit
def lane_initial_step(cf, t0, t1, y0, f0, rtol, atol, direction, need, h, y1, f1, sc, ts, lanes):
    """First steps of the lanes in ``need`` into ``h``, as :func:`impact.engine.kernel.initial_step`
    per lane (HNW 1993, Sec. II.4); one block evaluation of the right-hand side."""
    n = NSTATE
    interval = abs(t1 - t0)
    h0s = np.empty(LANES)
    d1s = np.empty(LANES)
    for l in range(LANES):
        if not need[l]:
            for j in range(n):
                y1[j, l] = y0[j, l]
            ts[l] = t0
            continue
        for j in range(n):
            sc[j, l] = atol[j] + abs(y0[j, l]) * rtol[j]
        acc = 0.0
        for j in range(n):
            v = y0[j, l] / sc[j, l]
            acc = v * v if j == 0 else acc + v * v
        d0 = math.sqrt(acc / n)
        for j in range(n):
            v = f0[j, l] / sc[j, l]
            acc = v * v if j == 0 else acc + v * v
        d1 = math.sqrt(acc / n)
        h0 = trial_first_step(d0, d1, interval)
        for j in range(n):
            y1[j, l] = y0[j, l] + (h0 * direction) * f0[j, l]
        ts[l] = t0 + h0 * direction
        h0s[l], d1s[l] = h0, d1
    lane_rhs(cf, ts, y1, f1, lanes)
    for l in range(LANES):
        if need[l]:
            acc = 0.0
            for j in range(n):
                v = (f1[j, l] - f0[j, l]) / sc[j, l]
                acc = v * v if j == 0 else acc + v * v
            h[l] = chosen_first_step(h0s[l], d1s[l], math.sqrt(acc / n) / h0s[l], interval)


@kernel_inline
def lane_propose(t, h, t_new, hs, t1, direction, going, rejected, last_nonfinite, clipped, code):
    """The next step of every going lane (``t_new``, signed ``hs``), or its end by step underflow, as
    the head of :func:`impact.engine.kernel.member`'s loop; lanes not going step by zero. Returns
    the number of lanes stepping."""
    count = 0
    for l in range(LANES):
        if going[l]:
            tl = t[l]
            min_step = MIN_STEP_ULPS * abs(np.nextafter(tl, direction * np.inf) - tl)
            if not rejected[l]:
                h[l] = nmax(h[l], min_step)
            if h[l] < min_step:
                code[l] = NONFINITE if last_nonfinite[l] else UNDERFLOW
                going[l] = False
            else:
                tn = tl + direction * h[l]
                clipped[l] = direction * (tn - t1) >= 0
                if clipped[l]:
                    tn = t1
                t_new[l] = tn
                hs[l] = tn - tl
                count += 1
        if not going[l]:  # steps by zero until the block ends
            t_new[l] = t[l]
            hs[l] = 0.0
    return count


@kernel_inline
def lane_judge(err, hs, h, going, rejected, last_nonfinite, accepted, negative, y_new):
    """Each going lane's next step size and accept decision from its error norm; accepted states
    with a negative entry are projected onto y ≥ 0 (``negative``). Returns whether any was."""
    project = False
    for l in range(LANES):
        accepted[l] = False
        if not going[l]:
            continue
        e = err[l]
        h[l] = next_step(e, hs[l], rejected[l])
        rejected[l] = not e < 1
        last_nonfinite[l] = not math.isfinite(e)
        if rejected[l]:
            continue
        accepted[l] = True
        negative[l] = False
        for j in range(NSTATE):
            if y_new[j, l] < 0:
                negative[l] = True
        if negative[l]:
            for j in range(NSTATE):
                y_new[j, l] = nmax(y_new[j, l], 0.0)
            project = True
    return project


@kernel_inline
def lane_accept(l, KS, proj, y, y_new, ymin, ymax, projected, blowup):
    """Lane ``l`` takes its new state (with the derivative ``proj`` of its projected state when
    ``projected``), as :func:`impact.engine.kernel.accept_step`; returns its failure code."""
    c = 0
    if projected:
        for j in range(NSTATE):
            KS[STAGES, j, l] = proj[j, l]
        if not lane_finite(proj, l):
            c = NONFINITE
    for j in range(NSTATE):
        y[j, l] = y_new[j, l]
        KS[0, j, l] = KS[STAGES, j, l]
        ymin[j, l] = nmin(ymin[j, l], y[j, l])
        ymax[j, l] = nmax(ymax[j, l], y[j, l])
    if c == 0 and not lane_finite(y, l):
        c = NONFINITE
    if c == 0:
        for j in range(NSTATE):
            if abs(y[j, l]) > blowup:
                c = BLOWUP
    return c


@kernel_jit
def lane_member(cf, y, KS, y_new, tmp, proj, h, live, t0, t1, direction, rtol, atol, max_steps, blowup,
                ymin, ymax, code, nacc, h_out, lanes):
    """The step loop of :func:`impact.engine.kernel.member` for the lanes in ``live`` at once, each
    from ``t0`` with its state in ``y`` (n, LANES), derivative in ``KS[0]`` and step in ``h``, to
    ``t1``. Writes per lane the failure ``code``, accepted steps ``nacc`` and next step ``h_out``,
    updates ``ymin``/``ymax``; leaves the end state in ``y``. Returns member evaluations."""
    t = np.full(LANES, t0)
    t_new, hs, ts, err = np.empty(LANES), np.zeros(LANES), np.empty(LANES), np.empty(LANES)
    hgood = np.full(LANES, math.nan)
    rejected, last_nonfinite = np.zeros(LANES, np.bool_), np.zeros(LANES, np.bool_)
    clipped, accepted, negative = np.zeros(LANES, np.bool_), np.zeros(LANES, np.bool_), np.zeros(LANES, np.bool_)
    going = live.copy()
    nfev = 0
    for l in range(LANES):
        if live[l]:
            code[l] = 0
            nacc[l] = 0
    while True:
        count = lane_propose(t, h, t_new, hs, t1, direction, going, rejected, last_nonfinite, clipped, code)
        if count == 0:
            break
        lane_trial(cf, t, t_new, hs, y, KS, y_new, tmp, ts, err, rtol, atol, lanes)
        nfev += STAGES * count
        if lane_judge(err, hs, h, going, rejected, last_nonfinite, accepted, negative, y_new):
            lane_rhs(cf, t_new, y_new, proj, lanes)  # the derivative of the projected states
        for l in range(LANES):
            if not accepted[l]:
                continue
            if negative[l]:
                nfev += 1
            c = lane_accept(l, KS, proj, y, y_new, ymin, ymax, negative[l], blowup)
            t[l] = t_new[l]
            nacc[l] += 1
            if not clipped[l]:
                hgood[l] = abs(hs[l])
            if c == 0 and not clipped[l] and nacc[l] >= max_steps:
                c = TOO_MANY
            code[l] = c
            if c != 0 or clipped[l]:
                going[l] = False
    for l in range(LANES):
        if live[l]:
            h_out[l] = hgood[l] if math.isfinite(hgood[l]) else h[l]
    return nfev


@kernel_inline
def lane_jumps(y, l, S, first, stop, jump_kind, jump_species, jump_yield, value, aux):
    """Jumps ``first`` to ``stop − 1`` on lane ``l`` of ``y`` (``value``, ``aux`` its member's rows), as
    :func:`impact.engine.kernel.run_members` applies them; ``S`` the carrion pool's column."""
    for e in range(first, stop):
        j = jump_species[e]
        kind = jump_kind[e]
        if kind == JUMP_CULL:
            removed = y[j, l] * value[e]
            y[j, l] = y[j, l] - removed
            if jump_yield[e] >= 0:
                y[S, l] = y[S, l] + jump_yield[e] * removed
        elif kind == JUMP_ERADICATE:
            y[j, l] = y[j, l] * value[e] if aux[e] != 0 else 0.0
        else:
            y[j, l] = y[j, l] + value[e]


@kernel_inline
def load_lane(src, dst, l):
    """Column ``l`` of ``dst`` (k, LANES) from the row ``src`` (k,)."""
    for j in range(src.shape[0]):
        dst[j, l] = src[j]


@kernel_jit
def segment(st, coef, y0, h0, t0, t1, rtol, atol, max_steps, blowup, y_out, ymin, ymax, h_out, reason, nsteps):
    """:func:`impact.engine.kernel.segment` (same arguments, same numbers) stepping blocks of
    ``LANES`` members: member ``b·LANES + l`` in lane ``l`` of block ``b``; the last block's spare
    lanes hold zeros and are never read."""
    M = y0.shape[0]
    n = NSTATE
    lanes = lane_count(y0)
    direction = 1.0 if t1 > t0 else -1.0
    cf = np.zeros((coef.shape[1], LANES))
    y, y_new, tmp, proj, sc = np.zeros((n, LANES)), np.zeros((n, LANES)), np.zeros((n, LANES)), np.zeros((n, LANES)), \
        np.zeros((n, LANES))
    lo, hi = np.zeros((n, LANES)), np.zeros((n, LANES))
    KS = np.zeros((STAGES + 1, n, LANES))
    ts, h, hb = np.full(LANES, t0), np.empty(LANES), np.empty(LANES)
    live, need = np.zeros(LANES, np.bool_), np.zeros(LANES, np.bool_)
    code, nacc = np.zeros(LANES, np.int64), np.zeros(LANES, np.int64)
    nfev = 0
    for b0 in range(0, M, LANES):
        for l in range(LANES):
            m = b0 + l
            live[l] = m < M
            if live[l]:
                load_lane(coef[m], cf, l)
                load_lane(y0[m], y, l)
                if not lane_finite(y, l):
                    reason[m] = NONFINITE
                    live[l] = False
            else:
                for j in range(n):
                    y[j, l] = 0.0
        for l in range(LANES):
            ts[l] = t0
        lane_rhs(cf, ts, y, KS[0], lanes)
        for l in range(LANES):
            if live[l]:
                nfev += 1
                if not lane_finite(KS[0], l):
                    reason[b0 + l] = NONFINITE
                    live[l] = False
            need[l] = False
            if live[l]:
                h[l] = h0[b0 + l]
                need[l] = not (math.isfinite(h[l]) and h[l] > 0)
                if need[l]:
                    nfev += 1
                load_lane(ymin[b0 + l], lo, l)
                load_lane(ymax[b0 + l], hi, l)
        lane_initial_step(cf, t0, t1, y, KS[0], rtol, atol, direction, need, h, tmp, KS[1], sc, ts, lanes)
        for l in range(LANES):
            h[l] = nmin(h[l], abs(t1 - t0))
        nfev += lane_member(cf, y, KS, y_new, tmp, proj, h, live, t0, t1, direction, rtol, atol, max_steps,
                            blowup, lo, hi, code, nacc, hb, lanes)
        for l in range(LANES):
            if live[l]:
                m = b0 + l
                reason[m] = code[l]
                nsteps[m] = nacc[l]
                h_out[m] = hb[l]
                for j in range(n):
                    y_out[m, j] = y[j, l] if code[l] == 0 else math.nan
                    ymin[m, j] = lo[j, l]
                    ymax[m, j] = hi[j, l]
    return nfev


@kernel_jit
def lane_enter(coef, b0, cf, y, KS, failed, live, need, code, h, ts, t0, t1, rtol, atol, tmp, sc, smin, smax, lanes):
    """A block entering the segment ``[t0, t1]`` in :func:`run_members`: the lanes not ``failed`` load
    their coefficient rows (``coef`` (M, P), the block from row ``b0``), evaluate their derivative
    into ``KS[0]`` (``code`` NONFINITE where it or the state is not finite) and choose a first
    step where theirs is not usable; ``live`` the lanes that go on, ``smin``/``smax`` their state.
    Returns member evaluations, as the scalar kernel counts them."""
    nfev = 0
    for l in range(LANES):
        live[l] = not failed[l]
        code[l] = 0
        ts[l] = t0
        if live[l]:
            load_lane(coef[b0 + l], cf, l)
            if not lane_finite(y, l):
                code[l] = NONFINITE
                live[l] = False
    lane_rhs(cf, ts, y, KS[0], lanes)
    for l in range(LANES):
        need[l] = False
        if live[l]:
            nfev += 1
            if not lane_finite(KS[0], l):
                code[l] = NONFINITE
                live[l] = False
        if live[l]:
            need[l] = not (math.isfinite(h[l]) and h[l] > 0)
            if need[l]:
                nfev += 1
    lane_initial_step(cf, t0, t1, y, KS[0], rtol, atol, 1.0, need, h, tmp, KS[1], sc, ts, lanes)
    for l in range(LANES):
        if live[l]:
            h[l] = nmin(h[l], abs(t1 - t0))
        for j in range(NSTATE):
            smin[j, l] = y[j, l]
            smax[j, l] = y[j, l]
    return nfev


@kernel_jit
def run_members(st, coef, times, y0, h0, jump_start, jump_kind, jump_species, jump_yield, jump_value, jump_aux,
                rtol, atol, max_steps, blowup, slot_of, states, cummin, cummax, reason, h_out):
    """:func:`impact.engine.kernel.run_members` (same arguments, same numbers) stepping blocks of
    ``LANES`` members through every segment together: a block enters a segment when its slowest
    member has left the last one."""
    K = times.shape[0] - 1
    M = y0.shape[0]
    n = NSTATE
    lanes = lane_count(y0)
    S = st[HEAD_S]
    cf = np.zeros((coef.shape[2], LANES))
    y, y_new, tmp, proj, sc = np.zeros((n, LANES)), np.zeros((n, LANES)), np.zeros((n, LANES)), np.zeros((n, LANES)), \
        np.zeros((n, LANES))
    lo, hi, smin, smax = np.zeros((n, LANES)), np.zeros((n, LANES)), np.zeros((n, LANES)), np.zeros((n, LANES))
    KS = np.zeros((STAGES + 1, n, LANES))
    ts, h, hb = np.empty(LANES), np.empty(LANES), np.empty(LANES)
    live, need, failed = np.zeros(LANES, np.bool_), np.zeros(LANES, np.bool_), np.zeros(LANES, np.bool_)
    code, nacc = np.zeros(LANES, np.int64), np.zeros(LANES, np.int64)
    nfev = 0
    for b0 in range(0, M, LANES):
        width = min(LANES, M - b0)
        for l in range(LANES):
            if l < width:
                load_lane(y0[b0 + l], y, l)
                failed[l] = not lane_finite(y, l)
                reason[b0 + l] = NONFINITE if failed[l] else 0
                h[l] = h0[b0 + l]
            else:
                for j in range(n):
                    y[j, l] = 0.0
                failed[l] = True
            for j in range(n):
                lo[j, l] = y[j, l]
                hi[j, l] = y[j, l]
        for k in range(K):
            t0, t1 = times[k], times[k + 1]
            g = k if coef.shape[0] > 1 else 0
            nfev += lane_enter(coef[g], b0, cf, y, KS, failed, live, need, code, h, ts, t0, t1, rtol, atol, tmp, sc,
                               smin, smax, lanes)
            nfev += lane_member(cf, y, KS, y_new, tmp, proj, h, live, t0, t1, 1.0, rtol, atol, max_steps,
                                blowup, smin, smax, code, nacc, hb, lanes)
            for l in range(width):
                if live[l]:
                    h[l] = hb[l]
                    for j in range(n):
                        if code[l] != 0:
                            y[j, l] = math.nan
                        lo[j, l] = nmin(lo[j, l], smin[j, l])
                        hi[j, l] = nmax(hi[j, l], smax[j, l])
                if not failed[l] and code[l] != 0:
                    failed[l] = True
                    reason[b0 + l] = code[l]
                m = b0 + l
                lane_jumps(y, l, S, jump_start[k + 1], jump_start[k + 2], jump_kind, jump_species, jump_yield,
                           jump_value[m], jump_aux[m])
                for j in range(n):
                    lo[j, l] = nmin(lo[j, l], y[j, l])
                    hi[j, l] = nmax(hi[j, l], y[j, l])
                if failed[l]:
                    for j in range(n):
                        y[j, l] = math.nan
                        lo[j, l] = math.nan
                        hi[j, l] = math.nan
                s = slot_of[k + 1]
                if s >= 0:
                    for j in range(n):
                        states[m, s, j] = y[j, l]
                        cummin[m, s, j] = lo[j, l]
                        cummax[m, s, j] = hi[j, l]
        for l in range(width):
            h_out[b0 + l] = h[l]
    return nfev
