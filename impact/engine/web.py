"""Integrating the food web over one segment with a chosen engine.

``"compiled"`` runs the per-member numba kernel with the right-hand side generated for the web's
structure (:mod:`impact.engine.generate`, compiled once per structure and cached on disk);
``"table"`` the same step loop reading a structure table (:mod:`impact.engine.kernel`, compiled
once for every web); ``"numpy"`` the ensemble reference stepper
(:func:`impact.integrate.integrate_segment` with :class:`impact.model.WebRHS`). All return
:class:`impact.integrate.SegmentResult` with the same numbers to the bit (checked by the tests);
the compiled ones have no per-step fixed cost, and the generated one is the fastest (see bench/).
"""

from __future__ import annotations

import warnings

import numpy as np

from ..integrate import SegmentResult, integrate_segment
from ..model import (RESPONSE_POWER, Controls, FoodWeb, SegmentCoefficients, WebParams, WebRHS,
                     segment_coefficients)
from .control import MIN_RTOL, Failure

ENGINES = ("compiled", "table", "numpy")
DEFAULT_ENGINE = "compiled"


def pack_structure(web: FoodWeb) -> np.ndarray:
    """The web's structure as the kernel's int64 table (layout in :mod:`impact.engine.kernel`)."""
    links = web.links
    S = web.n_species
    head = [S, web.n_state, int(web.has_carrion), len(links), len(web.competition),
            len(web.mutualism), int(web.logistic.any()), int(web.crowding), len(web.obligate)]
    cols = ([l.consumer for l in links] + [l.resource for l in links]
            + [RESPONSE_POWER[l.response] for l in links]
            + [int(l.response == "holling1") for l in links])
    pairs = ([x for pair in web.competition for x in pair] + [x for pair in web.mutualism for x in pair]
             + [x for pair in web.obligate for x in pair])
    per_species = [int(i in web.interference) for i in range(S)] + [int(i in web.sterile) for i in range(S)]
    adult = dict(web.stages)
    per_species += [adult.get(i, -1) for i in range(S)] + [int(i in web.wave) for i in range(S)]
    return np.array(head + cols + pairs + per_species, dtype=np.int64)


def pack_coefficients(co: SegmentCoefficients, rows: np.ndarray) -> np.ndarray:
    """Coefficient rows of members ``rows`` in the kernel's column order: (m, P) float64."""
    parts = [np.take(getattr(co, f), rows, axis=0) for f in SegmentCoefficients.__dataclass_fields__]
    parts[-1] = parts[-1][:, None]  # decay is one number per member
    return np.ascontiguousarray(np.concatenate(parts, axis=1), dtype=float)


def compiled_kernel(st: np.ndarray, engine: str = DEFAULT_ENGINE):
    """Module whose ``segment`` integrates structure ``st``: generated for it, or the table one.

    numba is imported (and cached machine code loaded or compiled) on first use only.
    """
    if engine == "table":
        from . import kernel

        return kernel
    from .generate import specialised

    return specialised(st)


def tolerance(value, n: int, name: str) -> np.ndarray:
    """A tolerance as an (n,) array; the same rules as :func:`impact.integrate.integrate_segment`."""
    arr = np.asarray(value, dtype=float)
    if arr.ndim > 1 or (arr.ndim == 1 and arr.shape != (n,)):
        raise ValueError(f"{name} must be a scalar or have shape ({n},), got shape {arr.shape}")
    if np.any(~np.isfinite(arr)) or np.any(arr < 0):
        raise ValueError(f"{name} must be finite and non-negative")
    arr = np.broadcast_to(arr, (n,)).copy()
    if name == "rtol" and np.any(arr < MIN_RTOL):
        warnings.warn(f"rtol below {MIN_RTOL:.3g} raised to that value", stacklevel=3)
        arr = np.maximum(arr, MIN_RTOL)
    return arr


def web_segment(web: FoodWeb, p: WebParams, c: Controls, t0: float, t1: float, y0, *, rtol, atol,
                h0=None, members=None, engine: str = DEFAULT_ENGINE, max_steps: int = 100_000,
                blowup: float = 1e12) -> SegmentResult:
    """Integrate members of the web from ``t0`` to ``t1`` under fixed controls, projected onto y ≥ 0.

    Parameters
    ----------
    p, c : WebParams, Controls
        Parameters and controls of the whole ensemble (rows indexed by ``members``).
    y0 : ndarray (m, n_state)
        Finite rows are integrated; non-finite rows fail as non-finite.
    rtol, atol : float or ndarray (n_state,)
    h0 : ndarray (m,), optional
        First step sizes (NaN or None: chosen automatically).
    members : int ndarray (m,), optional
        Rows of ``p`` and ``c``; default ``arange(m)``.
    engine : {"compiled", "table", "numpy"}

    Returns
    -------
    SegmentResult
        With the compiled engine ``nfev`` counts member evaluations (the numpy engine counts
        calls, each on a subset of the ensemble).
    """
    y0 = np.array(y0, dtype=float)
    m, n = y0.shape
    members = np.arange(m) if members is None else np.asarray(members)
    if engine == "numpy":
        return integrate_segment(WebRHS(web, p, c), t0, t1, y0, rtol=rtol, atol=atol, h0=h0,
                                 members=members, nonnegative=True, max_steps=max_steps,
                                 blowup=blowup)
    if engine not in ENGINES:
        raise ValueError(f"engine must be one of {ENGINES}, got {engine!r}")

    if np.any(y0 < 0):
        raise ValueError("y0 has negative entries")
    rtol = tolerance(rtol, n, "rtol")
    atol = tolerance(atol, n, "atol")
    h = np.full(m, np.nan) if h0 is None else np.broadcast_to(np.asarray(h0, float), (m,)).copy()
    y_out = np.full((m, n), np.nan)
    reason = np.zeros(m, dtype=np.int8)
    nsteps = np.zeros(m, dtype=np.int64)
    if t1 == t0 or m == 0:
        bad = ~np.isfinite(y0).all(axis=1)
        reason[bad] = Failure.NONFINITE
        y_out[~bad] = y0[~bad]
        return SegmentResult(y_out, y0.copy(), y0.copy(), h, reason != 0, reason, 0, nsteps)
    ymin, ymax, h_out = y0.copy(), y0.copy(), np.full(m, np.nan)
    st = pack_structure(web)
    coef = pack_coefficients(segment_coefficients(web, p, c), members)
    nfev = compiled_kernel(st, engine).segment(st, coef, y0, h, float(t0), float(t1), rtol, atol,
                          int(max_steps), float(blowup), y_out, ymin, ymax, h_out, reason, nsteps)
    return SegmentResult(y_out, ymin, ymax, h_out, reason != 0, reason, int(nfev), nsteps)
