"""Compiled right-hand side and its directional derivative J·v, member by member (numba).

The Lyapunov and regime diagnostics integrate the tangent equations dv/dt = J(y) v beside the
state. :class:`impact.jacobian.WebTangent` evaluates ``(f, J v)`` with whole-column numpy
operations, whose fixed cost per operation dominates on the small batches the diagnostics run;
this kernel does the same arithmetic in the same order for one member at a time, so the two
agree to rounding and a member's numbers never depend on its batch. It reads the structure table
and coefficient rows of :mod:`impact.engine.kernel` (same layout, same packing) and covers the
terms :func:`supports` lists; other webs keep the numpy reference.
"""

from __future__ import annotations

import numpy as np

from .kernel import HEADER, kernel_jit

# coefficient columns per species before the per-link ones (layout in :mod:`impact.engine.kernel`)
PER_SPECIES_COEFFICIENTS = 12


def supports(web) -> bool:
    """Whether :func:`member_jvp` knows every term of ``web``: the feeding (Holling I–III), competition,
    facultative mutualism and carrion terms. Webs with obligate mutualism, interference, crowding,
    sterile releases, life stages, sinusoidal breeding or alternative food use the numpy reference."""
    return not (web.obligate or web.interference or web.crowding or web.sterile or web.stages or web.wave
                or any(link.resource < 0 for link in web.links))


@kernel_jit
def member_jvp(st, cf, y, v, out, jv, work):
    """``out = f(y)`` and ``jv = J(y) v`` for one member.

    Parameters
    ----------
    st : int64 ndarray
        Structure table (:func:`impact.engine.web.pack_structure`).
    cf : float64 ndarray (P,)
        The member's coefficient row (:func:`impact.engine.web.pack_coefficients`).
    y, v : float64 ndarray (n,)
        State and tangent vector.
    out, jv : float64 ndarray (n,)
        Written.
    work : float64 ndarray (10, n)
        Scratch.
    """
    S, n, carrion, L, Cc, U, logistic, O = st[0], st[1], st[2], st[3], st[4], st[5], st[6], st[8]
    o_rpos, o_lin, o_dens, o_inf = S, 2 * S, 3 * S, 4 * S
    o_a = PER_SPECIES_COEFFICIENTS * S
    o_ah, o_e = o_a + L, o_a + 2 * L
    o_al = o_a + 4 * L  # after a, ah, e and the alternative food of each link
    o_be = o_al + Cc
    o_H = o_be + U
    o_dec = o_H + U + O
    lc, lr, lp, l1 = HEADER, HEADER + L, HEADER + 2 * L, HEADER + 3 * L
    cp = HEADER + 4 * L
    up = cp + 2 * Cc
    births, dbirths, loss, dloss = work[0], work[1], work[2], work[3]
    den, dden, seen, boost, dboost = work[4], work[5], work[6], work[7], work[8]
    if U > 0:
        for i in range(S):
            boost[i] = 1.0
            dboost[i] = 0.0
        for u in range(U):
            ben, par = st[up + 2 * u], st[up + 2 * u + 1]
            P = y[par]
            Hu = cf[o_H + u]
            boost[ben] += cf[o_be + u] * P / (Hu + P)
            dboost[ben] += cf[o_be + u] * Hu / ((Hu + P) * (Hu + P)) * v[par]
        for i in range(S):
            births[i] = cf[o_rpos + i] * y[i] * boost[i]
            dbirths[i] = cf[o_rpos + i] * (v[i] * boost[i] + y[i] * dboost[i])
    else:
        for i in range(S):
            births[i] = cf[o_rpos + i] * y[i]
            dbirths[i] = cf[o_rpos + i] * v[i]
    if L > 0:
        for i in range(n):
            loss[i] = 0.0
            dloss[i] = 0.0
            seen[i] = 0.0
        for l in range(L):
            if st[l1 + l] == 0:
                R, dR = y[st[lr + l]], v[st[lr + l]]
                if st[lp + l] == 2:
                    Rq, dRq = R * R, 2.0 * R * dR
                else:
                    Rq, dRq = R, dR
                term, dterm = cf[o_ah + l] * Rq, cf[o_ah + l] * dRq
                j = st[lc + l]
                if seen[j] == 0.0:
                    den[j] = term + 1.0
                    dden[j] = dterm
                    seen[j] = 1.0
                else:
                    den[j] = term + den[j]
                    dden[j] = dterm + dden[j]
        for l in range(L):
            R, dR = y[st[lr + l]], v[st[lr + l]]
            if st[lp + l] == 2:
                Rq, dRq = R * R, 2.0 * R * dR
            else:
                Rq, dRq = R, dR
            j = st[lc + l]
            if st[l1 + l] == 1:
                I = cf[o_a + l] * Rq
                dI = cf[o_a + l] * dRq
            else:
                D = den[j]
                I = cf[o_a + l] * Rq / D
                dI = (cf[o_a + l] * dRq - I * dden[j]) / D
            eaten = I * y[j]
            deaten = dI * y[j] + I * v[j]
            births[j] += cf[o_e + l] * eaten
            dbirths[j] += cf[o_e + l] * deaten
            loss[st[lr + l]] += eaten
            dloss[st[lr + l]] += deaten
    for i in range(S):
        out[i] = cf[i] * births[i]
        jv[i] = cf[i] * dbirths[i]
    if logistic:
        crowd, dcrowd = boost, dboost  # the boost is spent: reuse its scratch for crowding
        for i in range(S):
            crowd[i] = y[i]
            dcrowd[i] = v[i]
        for k in range(Cc):
            i, j = st[cp + 2 * k], st[cp + 2 * k + 1]
            crowd[i] += cf[o_al + k] * y[j]
            dcrowd[i] += cf[o_al + k] * v[j]
        for i in range(S):
            out[i] -= cf[o_dens + i] * y[i] * crowd[i]
            jv[i] -= cf[o_dens + i] * (v[i] * crowd[i] + y[i] * dcrowd[i])
    for i in range(S):
        out[i] += cf[o_lin + i] * y[i]
        jv[i] += cf[o_lin + i] * v[i]
    if L > 0:
        for i in range(S):
            out[i] -= loss[i]
            jv[i] -= dloss[i]
    if carrion:
        gain, dgain = cf[o_inf] * y[0], cf[o_inf] * v[0]
        for i in range(1, S):
            gain = gain + cf[o_inf + i] * y[i]
            dgain = dgain + cf[o_inf + i] * v[i]
        dC = gain - cf[o_dec] * y[S]
        ddC = dgain - cf[o_dec] * v[S]
        if L > 0:
            dC -= loss[S]
            ddC -= dloss[S]
        out[S] = dC
        jv[S] = ddC


@kernel_jit
def batch_jvp(st, coef, y, v, out, jv):
    """:func:`member_jvp` for every row: coef (m, P), y, v, out, jv (m, n)."""
    work = np.empty((10, y.shape[1]))
    for k in range(y.shape[0]):
        member_jvp(st, coef[k], y[k], v[k], out[k], jv[k], work)


__all__ = ["batch_jvp", "member_jvp"]
