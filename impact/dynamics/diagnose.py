"""Diagnosing members over sub-windows: windows from time scales, the runs, the verdicts.

:func:`diagnose_web` chooses each member's transient and window from the web's own time scales
(:mod:`impact.dynamics.timescales`), follows it over sub-windows with the tangent integration of
:func:`impact.dynamics.lyapunov.lyapunov_flow`, hands the evidence to :mod:`impact.dynamics.regimes` and doubles
the window of members whose verdict changed on doubling. A first pass with short sub-windows
settles what needs no period (equilibrium, extinction); only the rest is continued over
sub-windows long enough to look for periods. Numerics only: no file I/O here.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from impact.dynamics import regimes as rg
from impact.dynamics.lyapunov import DynamicsSettings, lyapunov_flow, predictability_time, slowest_rate
from impact.engine.jacobian import WebTangent
from impact.model import Controls, FoodWeb, WebParams
from impact.dynamics.timescales import ALIGN_FRACTION, WindowPlan, leading_real_part, plan_windows, time_scales

GOLDEN = (np.sqrt(5.0) - 1.0) / 2.0
SHORT_RETURNS = 1  # oscillation periods per sub-window in the first pass (common practice, no source)
GROWTH_STEPS = 4  # doublings of the sub-window while the section holds too few points (up to the cap)


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
                 returns: int, **extra) -> tuple[list[tuple[WindowPlan, np.ndarray]], np.ndarray]:
    """Window plans from each member's time scales at the equilibrium nearest ``y`` (declared values win).

    Returns (plan, member rows) pairs and the (M,) flag of members whose needs exceed the cap,
    see :func:`impact.dynamics.timescales.plan_windows`.
    """
    ts = time_scales(web, p, c, y)
    slow = slowest_rate(p)
    cap = np.full(len(slow), s.max_window) if s.max_window is not None else s.max_window_rates / slow
    return plan_windows(ts, slow_rate=slow, returns=returns, n_sub=s.n_sub, max_window=cap,
                        transient=s.transient, window=s.window, sample_dt=s.sample_dt,
                        sub_relaxations=s.sub_relaxations, **extra)


def evidence(run: WindowRun, start: np.ndarray, level: np.ndarray, floor: np.ndarray, section: np.ndarray,
             sub_window: float, leading=None, remaining: bool = False):
    """Evidence for :mod:`impact.dynamics.regimes`, and which species went extinct: (Evidence, (M, S) bool).

    With ``remaining`` a species lost over the window does not make the member ``extinction``
    (the caller goes on with the remaining web).
    """
    S = level.size
    with np.errstate(invalid="ignore"):
        watched = start[:, :S] >= level
        gone = watched & (np.nanmax(run.high[:, :, :S], axis=1) < level)
    failed = (run.reason != 0) | ~np.isfinite(run.lyap).all(axis=1)
    extinct = np.zeros(len(gone), bool) if remaining else gone.any(axis=1)
    ev = rg.Evidence(run.lyap, run.low, run.high, run.mean, floor, run.sections, section, run.centre,
                     extinct, failed, sub_window, leading)
    return ev, gone


@dataclass(frozen=True)
class _Job:
    """What every pass of one :func:`diagnose_web` call shares."""

    web: FoodWeb
    p: WebParams
    c: Controls
    jvp: WebTangent
    s: DynamicsSettings
    level: np.ndarray
    engine: str
    remaining: bool

    def rows(self, members):
        return (WebParams(*(getattr(self.p, f)[members] for f in WebParams.__dataclass_fields__)),
                Controls(*(getattr(self.c, f)[members] for f in Controls.__dataclass_fields__)))

    def leading(self, run: WindowRun, members) -> np.ndarray:
        """Re μ₁ at the equilibrium found from the window's end, else from its time-mean."""
        p, c = self.rows(members)
        return leading_real_part(self.web, p, c, run.final, run.mean)

    def plans(self, members, y, returns, **extra):
        p, c = self.rows(members)
        return choose_plans(self.web, p, c, np.where(np.isfinite(y), y, 0.0), self.s, returns=returns, **extra)


def diagnose_web(web: FoodWeb, p: WebParams, c: Controls, y0: np.ndarray, s: DynamicsSettings,
                 extinct_level: np.ndarray, members=None, section=None, engine: str = "compiled", lost=None):
    """Regime, period, λ (with its standard error) and horizon of each member from ``y0`` under fixed controls.

    Every member's windows come from its own time scales (rounded to powers of two, so members
    with equal plans run together), and every member is integrated on its own steps, so its
    numbers never depend on the other members of the call.

    Parameters
    ----------
    y0 : ndarray (M, n_state)
    extinct_level : ndarray (S,)
        A species whose maximum over the window stays below this level is extinct; species
        that were already below it in ``y0`` are not counted (they were never there), unless
        ``lost`` says so.
    members : int ndarray (M,), optional
        Rows of ``p`` and ``c`` of each member (default: 0..M−1).
    section : int or ndarray (M,), optional
        State column whose successive maxima form the Poincaré section; default: the last
        species (see :func:`section_species` to resolve a name).
    engine : {"compiled", "numpy"}
        How the tangent flow is integrated (see :func:`impact.dynamics.lyapunov.lyapunov_flow`); every
        engine gives the same numbers.
    lost : bool ndarray (M, S), optional
        Species counted as extinct from the start (e.g. below their quasi-extinction level at
        the assessment horizon): they are set to zero, and a species lost over a window is set
        to zero too and the member diagnosed again, so ``regime`` is that of the remaining web
        (``extinction`` only when no species remains). Without it a loss over the window makes
        the member ``extinction``.

    Returns
    -------
    dict with ndarrays (M,): regime, period, lyapunov, lyapunov_se, envelope_rate, reason (str),
    predictability_time, extinct (bool), extinct_species (str), window (time diagnosed), transient, failed
    (bool), failure (int8 integrator code), capped (bool: own needs beyond the cap); amplitude and
    final (M, n_state); sections (list of the last sub-window's section values per member); nfev.
    """
    M, n = y0.shape
    S = web.n_species
    members = np.arange(M) if members is None else np.asarray(members)
    start = np.where(np.isfinite(y0), np.maximum(y0, 0.0), np.nan)
    section = np.broadcast_to(np.asarray(S - 1 if section is None else section, int), (M,)).copy()
    job = _Job(web, p, c, WebTangent(web, p, c), s, np.asarray(extinct_level, float), engine, lost is not None)
    if lost is None:
        out, nfev = _diagnose_all(job, start, members, section)
    else:
        lost = np.array(lost, bool)
        start[:, :S] = np.where(lost, 0.0, start[:, :S])
        out, nfev = _diagnose_all(job, start, members, section)
        gone = out.pop("gone")
        for _ in range(S):
            again = np.flatnonzero(gone.any(axis=1))
            if not again.size:
                break
            # a species lost over the window: go on with the remaining web from where it ended
            lost[again] |= gone[again]
            y = out["final"][again].copy()
            y[:, :S] = np.where(lost[again], 0.0, y[:, :S])
            part, n2 = _diagnose_all(job, y, members[again], section[again])
            gone = np.zeros_like(lost)
            gone[again] = part.pop("gone")
            _put(out, part, again)
            nfev += n2
        none_left = ~((start[:, :S] > 0) & ~lost).any(axis=1)
        out["regime"] = np.where(none_left, "extinction", out["regime"]).astype(object)
        out["reason"] = np.where(none_left, "", out["reason"]).astype(object)
        names = np.array(web.species)
        out["extinct"] = lost.any(axis=1)
        out["extinct_species"] = np.array([";".join(names[g]) for g in lost], dtype=object)
    out.pop("gone", None)
    out["predictability_time"] = predictability_time(out["lyapunov"], s.delta0, s.tolerance)
    out["nfev"] = nfev
    return out


def _diagnose_all(job: _Job, start: np.ndarray, members, section) -> tuple[dict, int]:
    """The passes of :func:`diagnose_web`: short sub-windows, long ones for the rest, then growth.

    A first pass with short sub-windows settles what needs no period (equilibrium, extinction);
    only the rest is continued over sub-windows long enough to look for periods, and a member
    whose section still holds too few points, or whose sub-windows are shorter than the
    relaxation time at the equilibrium found from its window's end, is continued with doubled
    sub-windows until neither holds or its window reaches the cap.
    """
    s = job.s
    y = np.where(np.isfinite(start), start, 0.0)
    plans, capped = job.plans(members, y, SHORT_RETURNS)
    out, nfev = _diagnose_plans(job, start, members, section, plans)
    out["capped"] = capped
    # an equilibrium whose own relaxation time (at the equilibrium found from the window's end)
    # asked for longer sub-windows than the plan chosen at the start had is diagnosed again
    with np.errstate(divide="ignore"):
        need = s.sub_relaxations / np.abs(out["leading"])
    short = (out["regime"] == "equilibrium") & ~out["capped"] & (out["window"] / s.n_sub < need)
    done = np.isin(out["regime"], ("equilibrium", "extinction", "failed")) & ~short | out["gone"].any(axis=1)
    rest = np.flatnonzero(~done)
    returns = int(np.ceil(s.max_period * (1 + 2 / s.n_sub))) + 2  # every shift testable over half the sub-windows
    if rest.size:
        first = out["window"][rest] / s.n_sub
        n_pts = np.array([out["sections"][i].size for i in rest])
        measured = np.where(n_pts >= 2, first / np.maximum(n_pts, 1), np.nan)
        spent = out["transient"][rest] + out["window"][rest] * (1 + 1.5 * ALIGN_FRACTION)
        part, n2 = _continue(job, out, rest, members, section, returns, measured_period=measured, min_sub=2 * first)
        part["transient"] = spent
        _put(out, part, rest)
        nfev += n2
    few = rg.Reason.FEW_SECTION_POINTS.value
    for _ in range(GROWTH_STEPS):
        # too few section points, or sub-windows shorter than the relaxation time at the
        # equilibrium found from the window's end (the plan came from an earlier state)
        with np.errstate(divide="ignore", invalid="ignore"):
            short = out["window"] / s.n_sub < s.sub_relaxations / np.abs(out["leading"])
        short &= ~np.isin(out["regime"], ("extinction", "failed"))
        grow = np.flatnonzero(((out["reason"] == few) | short) & ~out["capped"] & ~out["gone"].any(axis=1))
        if not grow.size:
            break
        sub = out["window"][grow] / s.n_sub
        spent = out["transient"][grow] + out["window"][grow] * (1 + 1.5 * ALIGN_FRACTION)
        part, n2 = _continue(job, out, grow, members, section, returns, min_sub=2 * sub)
        part["transient"] = spent
        _put(out, part, grow)
        nfev += n2
    # a verdict that needs the whole window is not given on a window shorter than the member needs
    withhold = out["capped"] & (np.isin(out["regime"], ("aperiodic",)) | (out["reason"] == few))
    out["regime"] = np.where(withhold, "undetermined", out["regime"]).astype(object)
    out["reason"] = np.where(withhold, rg.Reason.WINDOW_CAP.value, out["reason"]).astype(object)
    return out, nfev


def _continue(job: _Job, out: dict, rows: np.ndarray, members, section, returns: int, **extra) -> tuple[dict, int]:
    """Diagnose ``rows`` again from where their last window ended, on plans with longer sub-windows."""
    plans, capped = job.plans(members[rows], out["final"][rows], returns, **extra)
    plans = [(replace(plan, transient=0.0), r) for plan, r in plans]
    part, nfev = _diagnose_plans(job, out["final"][rows], members[rows], section[rows], plans)
    part["capped"] = capped | out["capped"][rows]
    return part, nfev


def _put(out: dict, part: dict, rows: np.ndarray) -> None:
    for k, v in part.items():
        if isinstance(v, list):
            for j, r in enumerate(rows):
                out[k][r] = v[j]
        else:
            out[k][rows] = v


def _diagnose_plans(job: _Job, start, members, section, plans) -> tuple[dict, int]:
    M = start.shape[0]
    out, nfev = None, 0
    for plan, rows in plans:
        part = _diagnose_plan(job, start[rows], members[rows], section[rows], plan)
        nfev += part.pop("nfev")
        if out is None:
            out = {k: (np.empty((M,) + np.shape(v)[1:], dtype=np.asarray(v).dtype) if not isinstance(v, list) else [None] * M)
                   for k, v in part.items()}
        _put(out, part, rows)
    return out, nfev


def _diagnose_plan(job: _Job, start: np.ndarray, members, section, plan: WindowPlan) -> dict:
    """:func:`diagnose_web` for members sharing one plan, with the doubling of unsettled windows."""
    M = start.shape[0]
    web, s = job.web, job.s
    S = web.n_species
    floor = np.concatenate([job.level, np.zeros(web.n_state - S)])
    kw = dict(rtol=s.rtol, atol=s.atol, engine=job.engine)
    run = run_subwindows(job.jvp, start, plan, first_transient=plan.transient, section=section, members=members, **kw)
    ev, gone = evidence(run, start, job.level, floor, section, plan.sub_window, job.leading(run, members), job.remaining)
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
        more = run_subwindows(job.jvp, prev.final, replace(plan, n_sub=prev.lyap.shape[1]), first_transient=plan.align,
                              section=section[rows], members=members[rows], t0=prev.end, **kw)
        nfev += more.nfev
        run = join_runs(prev, more)
        ev, g = evidence(run, start[rows], job.level, floor, section[rows], plan.sub_window,
                         job.leading(run, members[rows]), job.remaining)
        part = _verdict_columns(rg.classify(ev, s.rules), ev, g, run, np.full(rows.size, run.lyap.shape[1] * plan.sub_window), web)
        _put(out, part, rows)
    out["nfev"] = nfev
    return out


def _take_run(run: WindowRun, rows: np.ndarray) -> WindowRun:
    return WindowRun(run.lyap[rows], run.low[rows], run.high[rows], run.mean[rows], [run.sections[i] for i in rows],
                     run.centre, run.end, run.final[rows], run.reason[rows], run.nfev)


def _verdict_columns(v: rg.Verdict, ev: rg.Evidence, gone: np.ndarray, run: WindowRun, window: np.ndarray,
                     web: FoodWeb) -> dict:
    names = np.array(web.species)
    failed = ev.failed & ~ev.extinct
    lead = np.full(len(v.regime), np.nan) if ev.leading is None else np.asarray(ev.leading, float)
    return dict(regime=np.asarray(v.regime, object), period=np.asarray(v.period), leading=lead, lyapunov=np.where(failed, np.nan, v.lyapunov),
                lyapunov_se=np.where(failed, np.nan, v.lyapunov_se), envelope_rate=v.envelope_rate,
                reason=np.asarray(v.reason, object), extinct=ev.extinct,
                extinct_species=np.array([";".join(names[g]) for g in gone], dtype=object), window=window, gone=gone,
                failed=failed, failure=run.reason.copy(), amplitude=ev.amplitude(), final=run.final,
                sections=[sec[-1] if sec else np.array([]) for sec in run.sections])
