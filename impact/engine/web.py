"""Integrating the food web over one segment with a chosen engine.

``"compiled"`` runs the per-member numba kernel with the right-hand side generated for the web's
structure (:mod:`impact.engine.generate`, compiled once per structure and cached on disk);
``"numpy"`` the ensemble reference stepper (:func:`impact.engine.integrate.integrate_segment` with
:class:`impact.model.WebRHS`). Both run the terms declared in :mod:`impact.model.terms` and return
:class:`impact.engine.integrate.SegmentResult` with the same numbers to the bit (checked by the tests);
the compiled one has no per-step fixed cost (see bench/).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from impact.engine.integrate import SegmentResult, integrate_segment
from impact.model import (Controls, FoodWeb, SegmentCoefficients, WebParams, WebRHS, pack_coefficients,
    segment_coefficients)
from impact.model.terms import pack_structure
from impact.engine.boundary import check_kernel_arrays
from impact.engine.control import MIN_RTOL, Failure

__all__ = ["ENGINES", "LANE_ENGINE", "DEFAULT_ENGINE", "pack_structure", "pack_coefficients", "coefficient_columns",
           "compiled_kernel", "tolerance", "web_segment", "MemberSegments", "Jumps", "RunResult", "web_run", "no_jumps"]

ENGINES = ("compiled", "numpy")
# Blocks of members stepped together (impact.engine.lanes): selectable, the same numbers as "compiled"
LANE_ENGINE = "lanes"
# The block engine when its machine code is at hand (loaded, or in the kernel cache), else the
# scalar kernel: the same numbers either way, so a run may change between them at any call. Its
# first compilation costs about twice the scalar kernel's, so a run never waits for it: a large
# run has it compiled aside for later ones (impact.engine.generate.compile_aside).
AUTO_ENGINE = "auto"
DEFAULT_ENGINE = AUTO_ENGINE


def coefficient_columns(co: SegmentCoefficients) -> dict[str, slice]:
    """Where each coefficient sits in :func:`pack_coefficients`' rows: name -> column slice."""
    spans, at = {}, 0
    for name in SegmentCoefficients.__dataclass_fields__:
        value = getattr(co, name)
        width = 1 if value.ndim == 1 else value.shape[1]
        spans[name] = slice(at, at + width)
        at += width
    return spans


def compiled_kernel(st: np.ndarray, engine: str = DEFAULT_ENGINE):
    """Module whose ``segment`` and ``run_members`` integrate structure ``st``, generated for it.

    ``engine="lanes"`` gives the block kernel (:mod:`impact.engine.lanes`), the same numbers.
    numba is imported (and cached machine code loaded or compiled) on first use only.
    """
    engine = ready_engine(st, engine)
    if engine == LANE_ENGINE:
        from impact.engine.lanes import specialised_lanes

        return specialised_lanes(st)
    from impact.engine.generate import specialised

    return specialised(st)


def ready_engine(st: np.ndarray, engine: str) -> str:
    """``engine``, with :data:`AUTO_ENGINE` made "lanes" or "compiled" for structure ``st``."""
    if engine != AUTO_ENGINE:
        return engine
    from impact.engine.lanes import lanes_ready

    return LANE_ENGINE if lanes_ready(st) else "compiled"


def tolerance(value, n: int, name: str) -> np.ndarray:
    """A tolerance as an (n,) array; the same rules as :func:`impact.engine.integrate.integrate_segment`."""
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
                blowup: float = 1e12, coef: np.ndarray | None = None) -> SegmentResult:
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
    engine : {"compiled", "numpy", "lanes"}
        ``"lanes"``: the compiled kernel stepping blocks of eight members together (:mod:`impact.engine.lanes`).
    coef : ndarray (m, P), optional
        The members' coefficient rows as :func:`pack_coefficients` gives them for ``p`` and ``c``
        (compiled engine): a caller integrating many segments under the same parameters and
        controls packs them once.

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
    if engine not in (*ENGINES, LANE_ENGINE, AUTO_ENGINE):
        raise ValueError(f"engine must be one of {(*ENGINES, LANE_ENGINE, AUTO_ENGINE)}, got {engine!r}")

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
    if coef is None:
        coef = pack_coefficients(segment_coefficients(web, p, c), members)
    elif coef.shape[0] != m:
        raise ValueError(f"coef has {coef.shape[0]} rows for {m} members")
    check_kernel_arrays("segment", st, coef=coef, y0=y0, h0=h, rtol=rtol, atol=atol, y_out=y_out, ymin=ymin, ymax=ymax, h_out=h_out, reason=reason, nsteps=nsteps)  # noqa: E501  (boundary into compiled code)
    nfev = compiled_kernel(st, engine).segment(st, coef, y0, h, float(t0), float(t1), rtol, atol,
                          int(max_steps), float(blowup), y_out, ymin, ymax, h_out, reason, nsteps)
    return SegmentResult(y_out, ymin, ymax, h_out, reason != 0, reason, int(nfev), nsteps)


class MemberSegments:
    """Many short segments of one member under one coefficient row, through the compiled kernel
    with its arrays checked once at the boundary and reused: the same numbers as
    :func:`web_segment` with ``h0=None``, without its per-call packing and checks (a member counted
    in individuals at low numbers moves the rest of its web in many short steps).

    Parameters
    ----------
    coef_row : ndarray (1, P)
        The member's coefficient row (:func:`pack_coefficients`).
    n : int
        State columns.
    engine : {"compiled", "lanes"}
    """

    def __init__(self, web: FoodWeb, coef_row: np.ndarray, n: int, *, rtol, atol, engine: str = DEFAULT_ENGINE,
                 max_steps: int = 100_000, blowup: float = 1e12):
        if engine not in ("compiled", LANE_ENGINE, AUTO_ENGINE):
            raise ValueError(f"engine must be 'compiled', 'lanes' or 'auto' for member segments, got {engine!r}")
        self.st = pack_structure(web)
        self.coef = np.ascontiguousarray(coef_row, dtype=float)
        self.rtol, self.atol = tolerance(rtol, n, "rtol"), tolerance(atol, n, "atol")
        self.y0, self.y_out, self.ymin, self.ymax = (np.zeros((1, n)) for _ in range(4))
        self.h, self.h_out = np.full(1, np.nan), np.full(1, np.nan)
        self.reason, self.nsteps = np.zeros(1, np.int8), np.zeros(1, np.int64)
        self.limits = (int(max_steps), float(blowup))
        # every call refills these same arrays in place, so their shapes, types and layout stay as checked
        check_kernel_arrays("segment", self.st, coef=self.coef, y0=self.y0, h0=self.h, rtol=self.rtol,
                            atol=self.atol, y_out=self.y_out, ymin=self.ymin, ymax=self.ymax, h_out=self.h_out,
                            reason=self.reason, nsteps=self.nsteps)
        self.kernel = compiled_kernel(self.st, engine)

    def __call__(self, t0: float, t1: float, y: np.ndarray) -> SegmentResult:
        """The member from state ``y`` (n,) ≥ 0 at ``t0`` to ``t1`` > ``t0``."""
        if not t1 > t0:
            raise ValueError(f"a member segment needs t1 > t0, got {t0} to {t1}")
        self.y0[0] = y
        if np.any(self.y0 < 0):
            raise ValueError("y0 has negative entries")
        self.ymin[:], self.ymax[:], self.y_out[:] = self.y0, self.y0, np.nan
        self.h[:], self.h_out[:], self.reason[:], self.nsteps[:] = np.nan, np.nan, 0, 0
        nfev = self.kernel.segment(self.st, self.coef, self.y0, self.h, float(t0), float(t1), self.rtol, self.atol,
                                   *self.limits, self.y_out, self.ymin, self.ymax, self.h_out, self.reason,
                                   self.nsteps)
        return SegmentResult(self.y_out.copy(), self.ymin.copy(), self.ymax.copy(), self.h_out.copy(),
                             self.reason != 0, self.reason.copy(), int(nfev), self.nsteps.copy())


@dataclass(frozen=True)
class Jumps:
    """Instant changes of state at segment boundaries (culls, eradications, arrivals), in the
    order they apply: entries ``start[b]`` to ``start[b + 1] − 1`` act at boundary ``b``.

    Attributes
    ----------
    start : int64 ndarray (K + 2,)
    kind : int64 ndarray (E,)
        :data:`impact.engine.kernel.JUMP_CULL`, ``JUMP_ERADICATE`` or ``JUMP_ADD``.
    species : int64 ndarray (E,)
    carrion_yield : float ndarray (E,)
        Carrion per culled individual, or −1 where culled animals are not left as carrion.
    value : float ndarray (M, E)
        Fraction culled, residual fraction of a failed eradication, or amount added.
    fails : float ndarray (M, E)
        1 where an eradication fails (other kinds: unused).
    """

    start: np.ndarray
    kind: np.ndarray
    species: np.ndarray
    carrion_yield: np.ndarray
    value: np.ndarray
    fails: np.ndarray


@dataclass(frozen=True)
class RunResult:
    """A whole run of every member: states and running extremes at the output slots (M, T, n),
    failure codes (M,), the step size each member would continue with (M,) and member
    right-hand-side evaluations."""

    states: np.ndarray
    cummin: np.ndarray
    cummax: np.ndarray
    reason: np.ndarray
    h: np.ndarray
    nfev: int


def web_run(web: FoodWeb, coef: np.ndarray, times: np.ndarray, y0: np.ndarray, jumps: Jumps,
            slot_of: np.ndarray, T: int, *, rtol, atol, h0=None, engine: str = DEFAULT_ENGINE,
            max_steps: int = 100_000, blowup: float = 1e12) -> RunResult:
    """Integrate every member through all segments of a run in one compiled call.

    Parameters
    ----------
    coef : ndarray (K, M, P) or (1, M, P)
        Each segment's coefficient rows (:func:`pack_coefficients`), or one set for every segment.
    times : ndarray (K + 1,)
        Segment boundaries, increasing.
    y0 : ndarray (M, n_state)
        State after the jumps at ``times[0]``; non-finite rows have failed.
    slot_of : int ndarray (K + 1,)
        Output slot of each boundary, or −1; slot ``slot_of[0]`` holds ``y0``.
    h0 : ndarray (M,), optional
        First step sizes, e.g. those of a run this one continues (NaN or None: chosen).
    engine : {"compiled", "lanes"}
        A whole run is compiled only (the numpy engine runs segment by segment:
        :func:`impact.engine.simulate.run_option_by_segment`).

    Returns
    -------
    RunResult
        The same numbers as :func:`web_segment` called segment by segment with the jumps between.
    """
    if engine not in ("compiled", LANE_ENGINE, AUTO_ENGINE):
        raise ValueError(f"engine must be 'compiled', 'lanes' or 'auto' for a whole run, got {engine!r}")
    y0 = np.ascontiguousarray(y0, dtype=float)
    M, n = y0.shape
    if coef.shape[0] not in (1, len(times) - 1) or coef.shape[1] != M:
        raise ValueError(f"coef has shape {coef.shape} for {len(times) - 1} segments of {M} members")
    rtol = tolerance(rtol, n, "rtol")
    atol = tolerance(atol, n, "atol")
    states, cummin, cummax = (np.full((M, T, n), np.nan) for _ in range(3))
    if slot_of[0] >= 0:
        states[:, slot_of[0]] = cummin[:, slot_of[0]] = cummax[:, slot_of[0]] = y0
    reason = np.zeros(M, dtype=np.int8)
    h = np.full(M, np.nan) if h0 is None else np.array(np.broadcast_to(np.asarray(h0, float), (M,)))
    h_out = np.full(M, np.nan)
    st = pack_structure(web)
    coef, times, slot_of = (np.ascontiguousarray(coef, dtype=float), np.ascontiguousarray(times, dtype=float),
                            np.ascontiguousarray(slot_of, dtype=np.int64))
    check_kernel_arrays("run_members", st, times=times, coef=coef, y0=y0, h0=h, jump_start=jumps.start, jump_kind=jumps.kind, jump_species=jumps.species, jump_yield=jumps.carrion_yield, jump_value=jumps.value, jump_aux=jumps.fails, rtol=rtol, atol=atol, slot_of=slot_of, states=states, cummin=cummin, cummax=cummax, reason=reason, h_out=h_out)  # noqa: E501  (boundary into compiled code)
    nfev = compiled_kernel(st, engine).run_members(
        st, coef, times, y0, h, jumps.start, jumps.kind,
        jumps.species, jumps.carrion_yield, jumps.value, jumps.fails, rtol, atol, int(max_steps), float(blowup),
        slot_of, states, cummin, cummax, reason, h_out)
    return RunResult(states, cummin, cummax, reason, h_out, int(nfev))


def no_jumps(segments: int, members: int) -> Jumps:
    """Jumps for a run without any (``segments`` segments, ``members`` members)."""
    return Jumps(np.zeros(segments + 2, np.int64), np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0),
                 np.zeros((members, 0)), np.zeros((members, 0)))
