"""The table-reading right-hand side and J·v, member by member (numba): the "table" engine of the
tangent flow (:mod:`impact.engine.flow`), compiled once for every web.

The "compiled" engine's J·v is generated from the terms declared in :mod:`impact.model.terms` for each
structure (:func:`impact.engine.generate.jvp_source`) and knows every term; this interpreter of the
structure table knows the terms :func:`supports` lists, and the tests hold it equal to the
generated J·v to the bit on the webs it supports.
"""

from __future__ import annotations

import numpy as np

from impact.model.terms import (HEAD_CARRION, HEAD_CC, HEAD_L, HEAD_LOGISTIC, HEAD_N, HEAD_O, HEAD_S, HEAD_U,
    HEADER, Structure, pack_structure, terms_used)
from impact.engine.kernel import K_DENS, K_INFLOW, K_LIN, K_LINKS, K_RPOS, K_SCALE, kernel_jit


def supports(web) -> bool:
    """Whether the table kernel :func:`member_jvp` knows every term of ``web``: the feeding (Holling
    I–III), competition, facultative mutualism and carrion terms (the generated J·v knows them all)."""
    return supports_structure(pack_structure(web))


# The declared terms (impact.model.terms.TERMS) member_jvp differentiates (a term declared later is
# refused here and runs in the generated J·v).
TABLE_TERMS = frozenset({"births", "feeding", "controls", "logistic", "linear", "eaten", "carrion"})


def supports_structure(st) -> bool:
    """:func:`supports` for a structure table (and no term declared after the table kernel)."""
    s = Structure.decode(st)
    if not set(terms_used(s)) <= TABLE_TERMS:
        return False
    return not (s.O or any(s.interfere) or s.crowding or any(s.sterile) or any(a >= 0 for a in s.adult)
                or any(s.wave) or any(r < 0 for r in s.resource))


@kernel_jit
def member_jvp(st, cf, t, y, v, out, jv, work):
    """``out = f(y)`` and ``jv = J(y) v`` for one member (``t`` unused: no supported term depends on time).

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
    S, n, carrion, L = st[HEAD_S], st[HEAD_N], st[HEAD_CARRION], st[HEAD_L]
    Cc, U, logistic, O = st[HEAD_CC], st[HEAD_U], st[HEAD_LOGISTIC], st[HEAD_O]
    o_rpos, o_lin, o_dens, o_inf = K_RPOS * S, K_LIN * S, K_DENS * S, K_INFLOW * S
    o_a = K_LINKS * S
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
        out[i] = cf[K_SCALE * S + i] * births[i]
        jv[i] = cf[K_SCALE * S + i] * dbirths[i]
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
def batch_jvp(st, coef, t, y, v, out, jv):
    """:func:`member_jvp` for every row: coef (m, P), t (m,), y, v, out, jv (m, n)."""
    work = np.empty((10, y.shape[1]))
    for k in range(y.shape[0]):
        member_jvp(st, coef[k], t[k], y[k], v[k], out[k], jv[k], work)


__all__ = ["batch_jvp", "member_jvp"]
