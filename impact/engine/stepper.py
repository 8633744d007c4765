"""The numpy reference stepper's arithmetic: Dormand–Prince stages and their combination, the
error norm, the step-size controller, the first-step guess, the projection onto y ≥ 0, and the
per-member bookkeeping of the members still integrating.

Everything is elementwise across members with a fixed order of operations (no BLAS, no
reductions whose order numpy may choose), so a member's numbers never depend on its batch;
:mod:`impact.engine.integrate` drives these pieces over a segment and :mod:`impact.engine.kernel`
mirrors them, operation for operation, for one member at a time.
"""

from __future__ import annotations

import numpy as np

from impact.engine.control import ERROR_EXPONENT, MAX_FACTOR, MIN_FACTOR, SAFETY, DormandPrince54


def libm_power(x, p: float) -> np.ndarray:
    """``x ** p`` elementwise through the C library's ``pow``, as compiled code computes it.

    numpy's vectorised power may differ from ``pow`` in the last bit on CPUs with wide SIMD units;
    the step controller raises errors to a power, so one differing bit in a step size would part
    the reference from the compiled kernel. ``0 ** p`` for ``p < 0`` is ``inf`` (as numpy).
    """
    from impact.engine.kernel import power_array  # numba is loaded on first use only

    x = np.asarray(x, dtype=float)
    return power_array(np.ascontiguousarray(x).ravel(), float(p)).reshape(x.shape)


def libm_log(x) -> np.ndarray:
    """``log(x)`` elementwise through the C library's ``log``, as compiled code computes it (numpy's
    vectorised log may differ in the last bit; see :func:`libm_power`)."""
    from impact.engine.flow import log_array

    x = np.asarray(x, dtype=float)
    return log_array(np.ascontiguousarray(x).ravel()).reshape(x.shape)


def rms_rows(x):
    """Per-row RMS of ``x`` (m, n), summed column by column so the order never depends on m."""
    n = x.shape[1]
    acc = x[:, 0] * x[:, 0]
    for j in range(1, n):
        acc += x[:, j] * x[:, j]
    return np.sqrt(acc / n)


def error_norm(K, E, tmp, hcol, y, y_new, rtol, atol):
    """Per-member RMS of the embedded error estimate, scaled by ``atol + rtol·max(|y|, |y_new|)``: (m,)."""
    err = combine(K, E, tmp)
    err *= hcol
    scale = np.maximum(np.abs(y), np.abs(y_new))
    scale *= rtol
    scale += atol
    err /= scale
    return rms_rows(err)


def combine(K, coeffs, tmp):
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


def as_tolerance(value, n, name):
    arr = np.asarray(value, dtype=float)
    if arr.ndim > 1 or (arr.ndim == 1 and arr.shape != (n,)):
        raise ValueError(f"{name} must be a scalar or have shape ({n},), got shape {arr.shape}")
    if np.any(~np.isfinite(arr)) or np.any(arr < 0):
        raise ValueError(f"{name} must be finite and non-negative")
    return arr


def select_initial_step(fun, t0, y0, f0, members, t_bound, direction, order, rtol, atol):
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
    d0 = rms_rows(y0 / scale)
    d1 = rms_rows(f0 / scale)
    with np.errstate(divide="ignore", invalid="ignore"):
        h0 = np.where((d0 < 1e-5) | (d1 < 1e-5), 1e-6, 0.01 * d0 / d1)
    h0 = np.minimum(h0, interval)
    y1 = y0 + (h0 * direction)[:, None] * f0
    f1 = np.asarray(fun(t0 + h0 * direction, y1, members), dtype=float)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        d2 = rms_rows((f1 - f0) / scale) / h0
        small = (d1 <= 1e-15) & (d2 <= 1e-15)
        h1 = np.where(small, np.maximum(1e-6, h0 * 1e-3),
                      libm_power(0.01 / np.maximum(d1, d2), 1 / (order + 1)))
    h = np.minimum(np.minimum(100 * h0, h1), interval)
    # A non-finite f1 gives NaN here; start tiny and let the controller grow the step.
    h = np.where(np.isfinite(h) & (h > 0), h, np.minimum(1e-6, interval))
    return h, 1


class Active:
    """Per-member arrays of the members still integrating, compacted together when some leave."""

    FIELDS = ("idx", "y", "f", "v", "g", "t", "h", "mem", "ymin", "ymax", "rejected", "hgood",
              "nacc", "last_nonfinite")

    def __init__(self, **arrays):
        for name in self.FIELDS:
            setattr(self, name, arrays.get(name))

    def keep(self, mask):
        ki = np.flatnonzero(mask)
        for name in self.FIELDS:
            a = getattr(self, name)
            if a is not None:
                setattr(self, name, np.take(a, ki, axis=0))


class Model:
    """The right-hand side with or without its tangent, behind one calling convention."""

    def __init__(self, fun, with_tangent: bool):
        self.fun, self.with_tangent, self.nfev = fun, with_tangent, 0

    def __call__(self, t, y, v, mem):
        """``(f, g)`` with ``g = J·v`` (None without a tangent)."""
        self.nfev += 1
        if self.with_tangent:
            f, g = self.fun(t, y, v, mem)
            return np.asarray(f, dtype=float), np.asarray(g, dtype=float)
        return np.asarray(self.fun(t, y, mem), dtype=float), None

    def state_only(self, t, y, mem):
        """``f`` alone (for the initial step choice)."""
        return self(t, y, np.zeros_like(y) if self.with_tangent else None, mem)[0]


def trial_step(model: Model, b: Active, hs, t_new):
    """One Dormand-Prince step of state (and tangent) for every active member.

    Returns ``y_new, v_new, f_new, g_new, K, hcol`` with ``K`` the state stages (FSAL stage last)
    and ``hcol`` the signed step repeated over the columns, (m, n).
    """
    A, B, C = DormandPrince54.A, DormandPrince54.B, DormandPrince54.C
    n = b.y.shape[1]
    # A full (m, n) copy of the step: broadcasting an (m, 1) column is several times slower.
    hcol = np.repeat(hs, n).reshape(-1, n)
    tmp = np.empty_like(b.y)
    K, L = [b.f], [b.g]
    for s in range(1, DormandPrince54.n_stages):
        dy = combine(K, A[s, :s], tmp)
        dy *= hcol
        dy += b.y
        dv = None
        if b.v is not None:
            dv = combine(L, A[s, :s], tmp)
            dv *= hcol
            dv += b.v
        k, l = model(b.t + C[s] * hs, dy, dv, b.mem)
        K.append(k)
        L.append(l)
    y_new = combine(K, B, tmp)
    y_new *= hcol
    y_new += b.y
    v_new = None
    if b.v is not None:
        v_new = combine(L, B, tmp)
        v_new *= hcol
        v_new += b.v
    f_new, g_new = model(t_new, y_new, v_new, b.mem)
    K.append(f_new)
    return y_new, v_new, f_new, g_new, K, hcol


def next_step(err_norm, hs, rejected, hmax):
    """Step-size controller: ``(h, accept, finite)`` per member.

    An accepted step grows by ``SAFETY·err^(-1/5)`` (at most ``MAX_FACTOR``, not at all right
    after a rejection); a rejected one shrinks by the same rule (at least ``MIN_FACTOR``, exactly
    that when the error is not finite). Hairer, Norsett & Wanner (1993), Sec. II.4.
    """
    finite = np.isfinite(err_norm)
    accept = err_norm < 1
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        factor = SAFETY * libm_power(err_norm, ERROR_EXPONENT)
        grow = np.where(err_norm == 0, MAX_FACTOR, np.minimum(MAX_FACTOR, factor))
        grow = np.where(rejected, np.minimum(1.0, grow), grow)
        shrink = np.where(finite, np.maximum(MIN_FACTOR, factor), MIN_FACTOR)
    h = np.abs(hs) * np.where(accept, grow, shrink)
    if np.isfinite(hmax):
        h = np.minimum(h, hmax)
    return h, accept, finite


def project(model: Model, b: Active, accept, t_new, y_new, v_new, f_new, g_new):
    """Project accepted states onto y ≥ 0 in place; returns rows whose new derivative is not finite.

    Each row is judged on its own (``y_new >= 0`` is False for NaN, so a non-finite row never
    hides the negative entries of the others). The derivative of a projected row is evaluated
    again so the stored FSAL stage belongs to the projected state. The tangent of an absent
    species (y ≤ 0) is set to zero: the web is closed, so it stays on the face of present species.
    """
    bad = np.zeros(len(accept), dtype=bool)
    if np.all(y_new > 0):
        return bad
    neg = accept & np.any(y_new < 0, axis=1)
    if neg.any():
        y_new[neg] = np.maximum(y_new[neg], 0.0)
    if v_new is not None:
        v_new[y_new <= 0] = 0.0
    if neg.any():
        f, g = model(t_new[neg], y_new[neg], None if v_new is None else v_new[neg], b.mem[neg])
        f_new[neg] = f
        ok = np.all(np.isfinite(f), axis=1)
        if g_new is not None:
            g_new[neg] = g
            ok &= np.all(np.isfinite(g), axis=1)
        bad[neg] = ~ok
    return bad


def nonfinite_rows(b: Active, accept):
    """Accepted rows whose state or tangent is not finite (a safety net: a finite error norm
    implies a finite state)."""
    arrays = [a for a in (b.y, b.v, b.g) if a is not None]
    if all(np.isfinite(a).all() for a in arrays):
        return np.zeros(len(accept), dtype=bool)
    ok = np.ones(len(accept), dtype=bool)
    for a in arrays:
        ok &= np.all(np.isfinite(a), axis=1)
    return accept & ~ok
