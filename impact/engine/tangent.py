"""Running the tangent flow: the step loop of :mod:`impact.engine.flow` compiled for one structure
(:func:`impact.engine.generate.specialised_flow`), every array checked at the boundary first.

Apart from :mod:`impact.engine.flow`, whose functions are the templates the generated module is
compiled from (so the templates never import the generator that compiles them).
"""

from __future__ import annotations

import numpy as np

from impact.engine.boundary import check_kernel_arrays
from impact.engine.flow import SECTION_CAPACITY
from impact.engine.generate import specialised_flow

__all__ = ["tangent_flow"]


def tangent_flow(st, coef, y0, *, t0, transient, window, hmax, section, rtol, atol, max_steps=1_000_000,
                 blowup=1e12) -> dict:
    """Run the tangent flow generated for structure ``st`` (:func:`impact.engine.generate.specialised_flow`,
    loaded or compiled once the arrays have passed the boundary check) on every member.

    Parameters
    ----------
    st : int64 ndarray
        Structure table (:func:`impact.engine.web.pack_structure`).
    coef : ndarray (M, P)
        Coefficient rows of the members.
    y0 : ndarray (M, n)
        Start states (negative entries are taken as 0; non-finite rows fail as non-finite).
    t0, transient, window, hmax : float
        Start time, discarded time (≥ 0), recorded time (> 0) and longest step.
    section : int ndarray (M,)
        State column whose maxima are located.
    rtol, atol : ndarray (n,)

    Returns
    -------
    dict
        ``lg`` (M,) Σ ln‖v‖ over the window, ``low``/``high``/``acc`` (M, n) extremes over the
        window and the trapezoid sum Σ (y + y_new)·h, ``final`` (M, n) (NaN rows for failed
        members), ``sections`` list of M arrays, ``reason`` (M,) int8, ``nsteps`` (M,) accepted
        steps, ``nfev`` member evaluations of (f, J·v).
    """
    y0 = np.ascontiguousarray(np.maximum(np.asarray(y0, float), 0.0))
    M, n = y0.shape
    section = np.ascontiguousarray(section, dtype=np.int64)
    coef = np.ascontiguousarray(coef, dtype=float)
    times = (float(t0), float(transient), float(window), float(hmax))
    tol = (np.ascontiguousarray(rtol, dtype=float), np.ascontiguousarray(atol, dtype=float), int(max_steps),
           float(blowup))

    def run(rows, capacity):
        k = len(y0[rows])
        res = {"final": np.full((k, n), np.nan), "lg": np.zeros(k), "low": np.full((k, n), np.inf),
               "high": np.full((k, n), -np.inf), "acc": np.zeros((k, n)), "reason": np.zeros(k, np.int8),
               "nsteps": np.zeros(k, np.int64)}
        vals, count = np.empty((k, capacity)), np.zeros(k, np.int64)
        check_kernel_arrays("flow_batch", st, coef=coef[rows], y0=y0[rows], section=section[rows], rtol=tol[0], atol=tol[1], y_out=res["final"], lg=res["lg"], low=res["low"], high=res["high"], acc=res["acc"], sec_vals=vals, sec_count=count, reason=res["reason"], nsteps=res["nsteps"])  # noqa: E501  (boundary into compiled code)
        res["nfev"] = specialised_flow(st).flow_batch(
            st, coef[rows], y0[rows], *times, section[rows], *tol, res["final"], res["lg"], res["low"], res["high"],
            res["acc"], vals, count, res["reason"], res["nsteps"])
        res["sections"] = [vals[i, :min(c, capacity)].copy() for i, c in enumerate(count)]
        return res, count

    out, count = run(slice(None), SECTION_CAPACITY)
    for m in np.flatnonzero(count > SECTION_CAPACITY):
        # more maxima than room: this member again, alone, with room for all (the same numbers)
        again, _ = run(slice(m, m + 1), int(count[m]))
        out["sections"][m] = again["sections"][0]
        out["nfev"] += again["nfev"]
    out["nfev"] = int(out["nfev"])
    return out
