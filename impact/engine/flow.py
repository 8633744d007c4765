"""Compiled tangent flow: state and tangent vector on the same Dormand–Prince steps, member by member.

The Lyapunov and regime diagnostics (:func:`impact.dynamics.lyapunov.lyapunov_flow`) follow each member
through a transient and a window while the tangent equations dv/dt = J(y) v ride along, the
tangent renormalised at every step end (Benettin et al. 1980). The reference does this with the
numpy stepper (:func:`impact.engine.integrate.integrate_segment`) and an observer; this kernel does the
same arithmetic in the same order for one member at a time, inside one compiled loop over the
whole transient and window, so a member's numbers never depend on its batch and the two agree to
the bit when they evaluate ``(f, J·v)`` with the same function.

One stepper serves state and tangent: the tableau, the error norm (the state's alone: the tangent
is linear in the state's own Jacobian and follows the state's steps) and the step controller are
those of :mod:`impact.engine.kernel` (constants from :mod:`impact.engine.control`), with the
longest step ``hmax``. Evaluations are at max(y, 0) with the tangent confined to the face of
present species; accepted states are projected onto y ≥ 0.

The step loop calls ``web_jvp``, the straight-line J·v that :mod:`impact.engine.generate` writes
for one web structure from the terms declared in :mod:`impact.model.terms`: the functions marked
:func:`~impact.engine.kernel.template` here are source for it, compiled inside each generated module
(:func:`impact.engine.generate.specialised_flow`) around its own ``web_jvp``, with the step's stages
(``flow_trial``) written out there with the J·v inside (:func:`impact.engine.generate.trial_source`).
``t`` reaches the J·v at the stage times of the numpy stepper (a sinusoidal breeding season).
"""

from __future__ import annotations

import math

import numpy as np

from impact.engine.control import MIN_STEP_ULPS
from impact.engine.kernel import (A, B, C, E, INITIAL_EXPONENT, NONFINITE, BLOWUP, STAGES, TOO_MANY, UNDERFLOW,
    all_finite, chosen_first_step, kernel_inline, kernel_jit, next_step, nmax, nmin, rms, sumsq, template,
    trial_first_step)

# The step loop of a generated module (:mod:`impact.engine.generate`), in its order: the templates
# here and ``flow_trial``, written there; everything in __all__ it imports from here.
FLOW_FUNCTIONS = ("face_jvp", "flow_initial_step", "flow_trial", "project", "renormalise", "flow_stage",
                  "flow_batch")
SECTION_CAPACITY = 64  # section values kept per member and call before a member is run again with room

# The tableau's weights as rows: stage s (1–5) row s of A, STAGES the solution weights B,
# STAGES + 1 the error weights E (zero entries are skipped when summing, as the reference does).
WEIGHT_ROWS = np.zeros((STAGES + 2, STAGES + 1))
WEIGHT_ROWS[1:STAGES, :STAGES - 1] = A[1:, :]
WEIGHT_ROWS[STAGES, :STAGES] = B
WEIGHT_ROWS[STAGES + 1, :] = E
# rows of the scratch array Z of the step loop
Y_NEW, V_NEW, TMP, XC, VC, F, G = range(7)
SCRATCH = 7


__all__ = ["STAGES", "C", "INITIAL_EXPONENT", "NONFINITE", "BLOWUP", "UNDERFLOW", "TOO_MANY", "MIN_STEP_ULPS",
           "kernel_jit", "kernel_inline", "nmin", "nmax", "rms", "all_finite", "next_step", "sumsq", "unit_on_face",
           "trial_first_step", "chosen_first_step",
           "hermite_max", "observe", "rows_finite", "keep_stage", "take_step", "WEIGHT_ROWS", "Y_NEW", "V_NEW", "TMP",
           "XC", "VC", "F", "G", "SCRATCH"]


@kernel_jit
def log_array(x):
    """``log(x)`` elementwise through the C library, as :func:`observe` takes it (for the reference)."""
    out = np.empty_like(x)
    for i in range(x.shape[0]):
        out[i] = math.log(x[i])
    return out


@kernel_jit
def unit_on_face(x, out, n):
    """``out`` = (1, 2, …, n)/‖·‖ restricted to the species present in ``x`` (all ones if none)."""
    empty = True
    for j in range(n):
        if x[j] > 0:
            out[j] = j + 1.0
            empty = False
        else:
            out[j] = 0.0
    if empty:
        for j in range(n):
            out[j] = 1.0
    norm = math.sqrt(sumsq(out, n))
    for j in range(n):
        out[j] = out[j] / norm


@kernel_jit
def hermite_max(y0, y1, f0, f1, dt):
    """Maximum of the cubic Hermite interpolant on the step (as :func:`impact.dynamics.lyapunov._hermite_max`)."""
    c1 = dt * f0
    c2 = 3.0 * (y1 - y0) - dt * (2.0 * f0 + f1)
    c3 = 2.0 * (y0 - y1) + dt * (f0 + f1)
    qa, qb, qc = 3.0 * c3, 2.0 * c2, c1
    disc = math.sqrt(nmax(qb * qb - 4.0 * qa * qc, 0.0))
    q = -0.5 * (qb + (disc if qb >= 0 else -disc))
    r1 = qc / q
    r2 = q / qa
    if math.isfinite(r1) and r1 >= 0 and r1 <= 1:
        x = r1
    elif math.isfinite(r2):
        x = r2
    else:
        x = 1.0
    x = nmin(nmax(x, 0.0), 1.0)
    return y0 + x * (c1 + x * (c2 + x * c3))


@kernel_inline
def observe(y, y_new, K, hs, norm, sec, m, lg, low, high, acc, sec_vals, sec_count):
    """Window statistics of one accepted step: ln‖v‖, extremes, trapezoid area, section maximum."""
    n = y.shape[0]
    lg[m] += math.log(norm)
    for j in range(n):
        low[m, j] = nmin(low[m, j], y_new[j])
        high[m, j] = nmax(high[m, j], y_new[j])
        acc[m, j] += (y[j] + y_new[j]) * hs
    d0, d1 = K[0, sec], K[STAGES, sec]
    if d0 > 0 and d1 <= 0:
        k = sec_count[m]
        if k < sec_vals.shape[1]:
            sec_vals[m, k] = hermite_max(y[sec], y_new[sec], d0, d1, hs)
        sec_count[m] = k + 1


@template("kernel_jit")
def face_jvp(st, cf, t, x, v, f, g, work, xc, vc):
    """``f`` and ``g = J·v`` at max(x, 0), with ``v`` and ``J·v`` zero on absent species (the web is
    closed: an absent species stays absent, so perturbations live on the face of the present ones)."""
    n = x.shape[0]
    for j in range(n):
        xc[j] = nmax(x[j], 0.0)
        vc[j] = v[j] if xc[j] > 0 else 0.0
    web_jvp(st, cf, t, xc, vc, f, g, work)
    for j in range(n):
        if not xc[j] > 0:
            g[j] = 0.0


@kernel_inline
def keep_stage(K, L, s, f, g, n):
    """Row ``s`` of ``K`` and ``L`` from ``f`` and ``g``."""
    for j in range(n):
        K[s, j] = f[j]
        L[s, j] = g[j]


@kernel_inline
def rows_finite(K, L, s, n):
    """Whether row ``s`` of ``K`` and of ``L`` are finite."""
    for j in range(n):
        if not (math.isfinite(K[s, j]) and math.isfinite(L[s, j])):
            return False
    return True


@template("kernel_jit")
def flow_initial_step(st, cf, t0, t1, y0, K, L, rtol, atol, work, y1, g1, xc, vc, fo, go, sc):
    """First step after Hairer, Nørsett & Wanner (1993), Sec. II.4 (forward in time), from f0 = K[0]
    and f at max(y1, 0); as :func:`impact.engine.stepper.select_initial_step`."""
    n = y0.shape[0]
    interval = abs(t1 - t0)
    for j in range(n):
        sc[j] = atol[j] + abs(y0[j]) * rtol[j]
    for j in range(n):
        y1[j] = y0[j] / sc[j]
    d0 = rms(y1, n)
    for j in range(n):
        y1[j] = K[0, j] / sc[j]
    d1 = rms(y1, n)
    h0 = trial_first_step(d0, d1, interval)
    for j in range(n):
        y1[j] = y0[j] + (h0 * 1.0) * K[0, j]
        g1[j] = 0.0
    face_jvp(st, cf, t0 + h0 * 1.0, y1, g1, fo, go, work, xc, vc)
    for j in range(n):
        y1[j] = (fo[j] - K[0, j]) / sc[j]
    return chosen_first_step(h0, d1, rms(y1, n) / h0, interval)


@template("kernel_inline")
def project(st, cf, t_new, y_new, v_new, K, L, work, xc, vc, fo, go):
    """Project an accepted state onto y ≥ 0 and zero the tangent of absent species; a projected
    state's f and J·v are evaluated again (FSAL). Returns (not finite, evaluations)."""
    n = y_new.shape[0]
    negative = False
    for j in range(n):
        if y_new[j] < 0:
            negative = True
    if negative:
        for j in range(n):
            y_new[j] = nmax(y_new[j], 0.0)
    for j in range(n):
        if y_new[j] <= 0:
            v_new[j] = 0.0
    if not negative:
        return False, 0
    face_jvp(st, cf, t_new, y_new, v_new, fo, go, work, xc, vc)
    keep_stage(K, L, STAGES, fo, go, n)
    return not rows_finite(K, L, STAGES, n), 1


@kernel_inline
def take_step(y, v, K, L, y_new, v_new, bad, blowup):
    """Make the accepted step the member's state; returns its failure code (non-finite state,
    tangent or J·v, then blow-up), as :func:`impact.engine.integrate.integrate_segment` checks them."""
    n = y.shape[0]
    for j in range(n):
        y[j] = y_new[j]
        v[j] = v_new[j]
        K[0, j] = K[STAGES, j]
        L[0, j] = L[STAGES, j]
    if bad or not (all_finite(y) and all_finite(v)):
        return NONFINITE
    for j in range(n):
        if not math.isfinite(L[0, j]):
            return NONFINITE
    for j in range(n):
        if abs(y[j]) > blowup:
            return BLOWUP
    return 0


@template("kernel_inline")
def renormalise(st, cf, t_new, y_new, v_new, K, L, work, xc, vc, fo, go):
    """Divide the tangent ``v_new`` and its J·v (``L[STAGES]``) by the tangent's norm; returns (norm,
    evaluations). A vector with nothing left to perturb restarts on the present face, no growth
    counted; an overflowing norm makes the tangent NaN (the member fails, it is not restarted)."""
    n = y_new.shape[0]
    norm = math.sqrt(sumsq(v_new, n))
    nfev = 0
    if norm == 0:
        unit_on_face(y_new, v_new, n)
        face_jvp(st, cf, t_new, y_new, v_new, fo, go, work, xc, vc)  # its f is not wanted
        for j in range(n):
            L[STAGES, j] = go[j]
        nfev = 1
        norm = 1.0
    for j in range(n):
        v_new[j] = v_new[j] / norm
        L[STAGES, j] = L[STAGES, j] / norm
    if not math.isfinite(norm):
        for j in range(n):
            v_new[j] = math.nan
    return norm, nfev


@template("kernel_jit")
def flow_stage(st, cf, y, v, K, L, Z, work, h, t0, t1, hmax, rtol, atol, max_steps, blowup, in_window, sec, m, lg,
               low, high, acc, sec_vals, sec_count):
    """Integrate state ``y`` and tangent ``v`` of one member from ``t0`` to ``t1`` (> t0) in place.

    Returns (failure code, h for the next stage, evaluations, accepted steps): one member's path
    through :func:`impact.engine.integrate.integrate_segment` with the observer of
    :func:`impact.dynamics.lyapunov.lyapunov_flow`. ``K``, ``L`` (STAGES + 1, n): stages of f and J·v;
    ``Z`` (SCRATCH, n) scratch.
    """
    n = y.shape[0]
    y_new, v_new, tmp, xc, vc, fo, go = Z[Y_NEW], Z[V_NEW], Z[TMP], Z[XC], Z[VC], Z[F], Z[G]
    if not (all_finite(y) and all_finite(v)):
        return NONFINITE, h, 0, 0
    face_jvp(st, cf, t0, y, v, fo, go, work, xc, vc)
    keep_stage(K, L, 0, fo, go, n)
    nfev = 1
    if not rows_finite(K, L, 0, n):
        return NONFINITE, h, nfev, 0
    if not (math.isfinite(h) and h > 0):
        h = flow_initial_step(st, cf, t0, t1, y, K, L, rtol, atol, work, tmp, v_new, xc, vc, fo, go, y_new)
        nfev += 1
    h = nmin(nmin(h, abs(t1 - t0)), hmax)
    t = t0
    rejected = False
    last_nonfinite = False
    hgood = math.nan
    nacc = 0
    code = 0
    while True:
        min_step = MIN_STEP_ULPS * abs(np.nextafter(t, np.inf) - t)
        if not rejected:
            h = nmax(h, min_step)
        if h < min_step:
            code = NONFINITE if last_nonfinite else UNDERFLOW
            break
        t_new = t + h
        clipped = t_new - t1 >= 0
        if clipped:
            t_new = t1
        hs = t_new - t
        err = flow_trial(st, cf, t, t_new, y, v, K, L, Z, work, hs, rtol, atol)
        nfev += STAGES
        h = nmin(next_step(err, hs, rejected), hmax)
        rejected = not err < 1
        last_nonfinite = not math.isfinite(err)
        if rejected:
            continue
        bad, extra = project(st, cf, t_new, y_new, v_new, K, L, work, xc, vc, fo, go)
        norm, more = renormalise(st, cf, t_new, y_new, v_new, K, L, work, xc, vc, fo, go)
        nfev += extra + more
        if in_window:
            observe(y, y_new, K, hs, norm, sec, m, lg, low, high, acc, sec_vals, sec_count)
        code = take_step(y, v, K, L, y_new, v_new, bad, blowup)
        t = t_new
        nacc += 1
        if not clipped:
            hgood = abs(hs)
        if code != 0 or clipped:
            break
        if nacc >= max_steps:
            code = TOO_MANY
            break
    return code, (hgood if math.isfinite(hgood) else h), nfev, nacc


@template("kernel_jit")
def flow_batch(st, coef, y0, t0, transient, window, hmax, section, rtol, atol, max_steps, blowup, y_out, lg, low,
               high, acc, sec_vals, sec_count, reason, nsteps):
    """Every member through the transient (tangent renormalised, nothing recorded), then the window
    (recorded); fills the outputs, returns member evaluations.

    ``y0`` (M, n) start states (≥ 0 or NaN), ``coef`` (M, P) coefficient rows, ``section`` (M,)
    state columns; ``lg`` (M,), ``acc`` (M, n) zero and ``low``/``high`` (M, n) ±inf on entry;
    ``sec_vals`` (M, capacity) and ``sec_count`` (M,) zero: a count above the capacity means
    values were dropped.
    """
    M, n = y0.shape
    K = np.empty((STAGES + 1, n))
    L = np.empty((STAGES + 1, n))
    work = np.empty((10, n))
    y, v, Z = np.empty(n), np.empty(n), np.empty((SCRATCH, n))
    nfev = 0
    for m in range(M):
        for j in range(n):
            y[j] = y0[m, j]
        unit_on_face(y, v, n)
        h = math.nan
        code = 0
        nacc = 0
        for stage in range(2):  # one call site: flow_stage is compiled once
            if stage == 0 and not transient > 0:
                continue
            start = t0 if stage == 0 else t0 + transient
            end = t0 + transient if stage == 0 else t0 + transient + window
            code, h, extra, more = flow_stage(st, coef[m], y, v, K, L, Z, work, h, start, end, hmax, rtol, atol,
                                              max_steps, blowup, stage == 1, section[m], m, lg, low, high, acc,
                                              sec_vals, sec_count)
            nfev += extra
            nacc += more
            if code != 0:
                break
        reason[m] = code
        nsteps[m] = nacc
        for j in range(n):
            y_out[m, j] = y[j] if code == 0 else math.nan
    return nfev
