"""Diagnosing members over sub-windows: windows from time scales, the runs, the verdicts.

:func:`diagnose_web` chooses each member's transient and window from the web's own time scales
(:mod:`impact.timescales`), follows it over sub-windows with the tangent integration of
:func:`impact.dynamics.lyapunov_flow`, hands the evidence to :mod:`impact.regimes` and doubles
the window of members whose verdict changed on doubling. A first pass with short sub-windows
settles what needs no period (equilibrium, extinction); only the rest is continued over
sub-windows long enough to look for periods. Numerics only: no file I/O here.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from . import regimes as rg
from .dynamics import DynamicsSettings, lyapunov_flow, predictability_horizon, slowest_rate
from .jacobian import WebTangent
from .model import Controls, FoodWeb, WebParams
from .timescales import ALIGN_FRACTION, WindowPlan, plan_windows, time_scales

GOLDEN = (np.sqrt(5.0) - 1.0) / 2.0
SHORT_RETURNS = 1  # oscillation periods per sub-window in the first pass (common practice, no source)


@dataclass(frozen=True)
class WindowRun:
    """What :func:`run_subwindows` kept of every member.

    Attributes
    ----------
    lyap : ndarray (M, k)
    low, high : ndarray (M, k, n)
    mean : ndarray (M, n)
        Time-mean over all sub-windows.
    sections : list of M lists of k ndarrays
    centre : ndarray (k,)
        Mid-time of each sub-window.
    end : float
        Time at the end of the last sub-window.
    final : ndarray (M, n)
    reason : ndarray (M,) int8
        First integrator failure code met (0: none).
    nfev : int
    """

    lyap: np.ndarray
    low: np.ndarray
    high: np.ndarray
    mean: np.ndarray
    sections: list
    centre: np.ndarray
    end: float
    final: np.ndarray
    reason: np.ndarray
    nfev: int


def run_subwindows(jvp, y0: np.ndarray, plan: WindowPlan, *, first_transient: float, section, members, rtol: float,
                   atol: float, t0: float = 0.0, nonnegative: bool = True, engine: str = "compiled") -> WindowRun:
    """:func:`lyapunov_flow` over ``plan.n_sub`` consecutive sub-windows, each after an alignment run.

    Each sub-window is one call of :func:`lyapunov_flow` (``engine`` as there): with the compiled
    tangent flow, every member's alignment run and sub-window are one pass of its compiled loop.

    The first sub-window follows ``max(first_transient, plan.align)``; every later one follows an
    alignment run of between one and two ``plan.align`` from where the previous one ended, so each
    sub-window's exponent starts from a tangent vector already turned toward the most expanding
    direction.
    """
    M, n = y0.shape
    k = plan.n_sub
    lyap = np.full((M, k), np.nan)
    low, high = np.full((M, k, n), np.nan), np.full((M, k, n), np.nan)
    mean = np.zeros((M, n))
    sections: list[list] = [[] for _ in range(M)]
    reason = np.zeros(M, np.int8)
    centre = np.empty(k)
    y, t, nfev = y0, float(t0), 0
    for j in range(k):
        # alignment runs of unequal lengths (golden-ratio offsets), so that on a spiral or a cycle
        # the sub-windows start at different phases and the phase terms of their exponents
        # average out instead of adding up (the spread then shows in the standard error)
        stagger = plan.align * (1.0 + (j * GOLDEN) % 1.0)
        lead = max(first_transient, stagger) if j == 0 else stagger
        d = lyapunov_flow(None, None, y, transient=lead, window=plan.sub_window, sample_dt=plan.sample_dt,
                          section=section, rtol=rtol, atol=atol, members=members, t0=t, jvp=jvp,
                          nonnegative=nonnegative, engine=engine)
        centre[j] = t + lead + 0.5 * plan.sub_window
        t += lead + plan.sub_window
        lyap[:, j], low[:, j], high[:, j] = d.lyapunov, d.low, d.high
        mean += d.mean / k
        for i in range(M):
            sections[i].append(d.sections[i])
        reason = np.where(reason != 0, reason, d.reason).astype(np.int8)
        y, nfev = d.final, nfev + d.nfev
    return WindowRun(lyap, low, high, mean, sections, centre, t, y, reason, nfev)


def join_runs(a: WindowRun, b: WindowRun) -> WindowRun:
    """Sub-windows of ``b`` (which continued ``a``'s members) appended to ``a``'s."""
    ka, kb = a.lyap.shape[1], b.lyap.shape[1]
    mean = (a.mean * ka + b.mean * kb) / (ka + kb)
    return WindowRun(np.concatenate([a.lyap, b.lyap], axis=1), np.concatenate([a.low, b.low], axis=1),
                     np.concatenate([a.high, b.high], axis=1), mean,
                     [x + y for x, y in zip(a.sections, b.sections)], np.concatenate([a.centre, b.centre]), b.end,
                     b.final, np.where(a.reason != 0, a.reason, b.reason).astype(np.int8), a.nfev + b.nfev)


def choose_plans(web: FoodWeb, p: WebParams, c: Controls, y: np.ndarray, s: DynamicsSettings,
                 returns: int, **extra) -> list[tuple[WindowPlan, np.ndarray]]:
    """Window plans from each member's time scales at the equilibrium nearest ``y`` (declared values win).

    Returns (plan, member rows) pairs, see :func:`impact.timescales.plan_windows`.
    """
    ts = time_scales(web, p, c, y)
    slow = slowest_rate(p)
    cap = np.full(len(slow), s.max_window) if s.max_window is not None else s.max_window_rates / slow
    return plan_windows(ts, slow_rate=slow, returns=returns, n_sub=s.n_sub, max_window=cap,
                        transient=s.transient, window=s.window, sample_dt=s.sample_dt, shared=s.shared_plan,
                        sub_relaxations=s.sub_relaxations, **extra)


def evidence(run: WindowRun, start: np.ndarray, level: np.ndarray, floor: np.ndarray, section: np.ndarray,
              sub_window: float):
    """Evidence for :mod:`impact.regimes`, and which species went extinct: (Evidence, (M, S) bool)."""
    S = level.size
    with np.errstate(invalid="ignore"):
        watched = start[:, :S] >= level
        gone = watched & (np.nanmax(run.high[:, :, :S], axis=1) < level)
    failed = (run.reason != 0) | ~np.isfinite(run.lyap).all(axis=1)
    ev = rg.Evidence(run.lyap, run.low, run.high, run.mean, floor, run.sections, section, run.centre,
                     gone.any(axis=1), failed, sub_window)
    return ev, gone


def diagnose_web(web: FoodWeb, p: WebParams, c: Controls, y0: np.ndarray, s: DynamicsSettings,
                 extinct_level: np.ndarray, members=None, section=None, plans=None, engine: str = "compiled"):
    """Regime, period, λ (with its standard error) and horizon of each member from ``y0`` under fixed controls.

    Parameters
    ----------
    y0 : ndarray (M, n_state)
    extinct_level : ndarray (S,)
        A species whose maximum over the window stays below this level is extinct; species
        that were already below it in ``y0`` are not counted (they were never there).
    members : int ndarray (M,), optional
        Rows of ``p`` and ``c`` of each member (default: 0..M−1).
    section : int or ndarray (M,), optional
        State column whose successive maxima form the Poincaré section; default: the last
        species (see :func:`section_species` to resolve a name).
    plans : list of (WindowPlan, rows), optional
        Default: :func:`choose_plans` (each member's own time scales).
    engine : {"compiled", "table", "numpy"}
        How the tangent flow is integrated (see :func:`impact.dynamics.lyapunov_flow`); every
        engine gives the same numbers.

    Returns
    -------
    dict with ndarrays (M,): regime, period, lyapunov, lyapunov_se, envelope_rate, reason (str),
    horizon, extinct (bool), extinct_species (str), window (time diagnosed), transient, failed
    (bool), failure (int8 integrator code); amplitude and final (M, n_state); sections (list of
    the last sub-window's section values per member); nfev.
    """
    M, n = y0.shape
    S = web.n_species
    members = np.arange(M) if members is None else np.asarray(members)
    start = np.where(np.isfinite(y0), np.maximum(y0, 0.0), np.nan)
    section = np.broadcast_to(np.asarray(S - 1 if section is None else section, int), (M,)).copy()
    jvp = WebTangent(web, p, c)
    out, nfev = None, 0
    if plans is None:
        # A first pass with short sub-windows settles what needs no period (equilibrium,
        # extinction); only the rest is continued over sub-windows long enough to look for periods.
        sub = WebParams(*(getattr(p, f)[members] for f in WebParams.__dataclass_fields__))
        cc = Controls(*(getattr(c, f)[members] for f in Controls.__dataclass_fields__))
        y = np.where(np.isfinite(start), start, 0.0)
        out, nfev = _diagnose_plans(web, jvp, start, s, extinct_level, members, section,
                                    choose_plans(web, sub, cc, y, s, returns=SHORT_RETURNS), engine)
        rest = np.flatnonzero(~np.isin(out["regime"], ("equilibrium", "extinction", "failed")))
        if rest.size:
            sub = WebParams(*(getattr(p, f)[members[rest]] for f in WebParams.__dataclass_fields__))
            cc = Controls(*(getattr(c, f)[members[rest]] for f in Controls.__dataclass_fields__))
            first = out["window"][rest] / s.n_sub
            n_pts = np.array([out["sections"][i].size for i in rest])
            measured = np.where(n_pts >= 2, first / np.maximum(n_pts, 1), np.nan)
            returns = int(np.ceil(s.max_period * (1 + 2 / s.n_sub))) + 2  # every shift testable over half the sub-windows
            long = choose_plans(web, sub, cc, y[rest], s, returns=returns, measured_period=measured,
                                min_sub=2 * first)
            spent = out["transient"][rest] + out["window"][rest] * (1 + 1.5 * ALIGN_FRACTION)
            long = [(replace(plan, transient=0.0), rows) for plan, rows in long]
            part, n2 = _diagnose_plans(web, jvp, out["final"][rest], s, extinct_level, members[rest], section[rest], long,
                                       engine)
            part["transient"] = spent
            _put(out, part, rest)
            nfev += n2
    else:
        out, nfev = _diagnose_plans(web, jvp, start, s, extinct_level, members, section, plans, engine)
    out["horizon"] = predictability_horizon(out["lyapunov"], s.delta0, s.tolerance)
    out["nfev"] = nfev
    return out


def _put(out: dict, part: dict, rows: np.ndarray) -> None:
    for k, v in part.items():
        if isinstance(v, list):
            for j, r in enumerate(rows):
                out[k][r] = v[j]
        else:
            out[k][rows] = v


def _diagnose_plans(web, jvp, start, s, extinct_level, members, section, plans, engine) -> tuple[dict, int]:
    M = start.shape[0]
    out, nfev = None, 0
    for plan, rows in plans:
        part = _diagnose_plan(web, jvp, start[rows], s, extinct_level, members[rows], section[rows], plan, engine)
        nfev += part.pop("nfev")
        if out is None:
            out = {k: (np.empty((M,) + np.shape(v)[1:], dtype=np.asarray(v).dtype) if not isinstance(v, list) else [None] * M)
                   for k, v in part.items()}
        _put(out, part, rows)
    return out, nfev


def _diagnose_plan(web: FoodWeb, jvp, start: np.ndarray, s: DynamicsSettings, extinct_level, members, section,
                   plan: WindowPlan, engine: str) -> dict:
    """:func:`diagnose_web` for members sharing one plan, with the doubling of unsettled windows."""
    M = start.shape[0]
    S = web.n_species
    level = np.asarray(extinct_level, float)
    floor = np.concatenate([level, np.zeros(web.n_state - S)])
    kw = dict(rtol=s.rtol, atol=s.atol, engine=engine)
    run = run_subwindows(jvp, start, plan, first_transient=plan.transient, section=section, members=members, **kw)
    ev, gone = evidence(run, start, level, floor, section, plan.sub_window)
    out = _verdict_columns(rg.classify(ev, s.rules), ev, gone, run, np.full(M, plan.window), web)
    out["transient"] = np.full(M, plan.transient)
    nfev = run.nfev
    # a verdict that changed on doubling gets the window doubled again, up to `doublings` times
    rows = np.arange(M)
    for _ in range(s.doublings):
        redo = np.flatnonzero(out["reason"][rows] == rg.Reason.WINDOW_DOUBLING.value)
        if not redo.size:
            break
        rows = rows[redo]
        prev = _take_run(run, redo)
        more = run_subwindows(jvp, prev.final, replace(plan, n_sub=prev.lyap.shape[1]), first_transient=plan.align,
                              section=section[rows], members=members[rows], t0=prev.end, **kw)
        nfev += more.nfev
        run = join_runs(prev, more)
        ev, g = evidence(run, start[rows], level, floor, section[rows], plan.sub_window)
        part = _verdict_columns(rg.classify(ev, s.rules), ev, g, run, np.full(rows.size, run.lyap.shape[1] * plan.sub_window), web)
        for key, val in part.items():
            if isinstance(val, list):
                for j, r in enumerate(rows):
                    out[key][r] = val[j]
            else:
                out[key][rows] = val
    out["nfev"] = nfev
    return out


def _take_run(run: WindowRun, rows: np.ndarray) -> WindowRun:
    return WindowRun(run.lyap[rows], run.low[rows], run.high[rows], run.mean[rows], [run.sections[i] for i in rows],
                     run.centre, run.end, run.final[rows], run.reason[rows], run.nfev)


def _verdict_columns(v: rg.Verdict, ev: rg.Evidence, gone: np.ndarray, run: WindowRun, window: np.ndarray,
                     web: FoodWeb) -> dict:
    names = np.array(web.species)
    failed = ev.failed & ~ev.extinct
    return dict(regime=np.asarray(v.regime, object), period=np.asarray(v.period), lyapunov=np.where(failed, np.nan, v.lyapunov),
                lyapunov_se=np.where(failed, np.nan, v.lyapunov_se), envelope_rate=v.envelope_rate,
                reason=np.asarray(v.reason, object), extinct=ev.extinct,
                extinct_species=np.array([";".join(names[g]) for g in gone], dtype=object), window=window,
                failed=failed, failure=run.reason.copy(), amplitude=ev.amplitude(), final=run.final,
                sections=[sec[-1] if sec else np.array([]) for sec in run.sections])
