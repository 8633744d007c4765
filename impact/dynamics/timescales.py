"""The web's own time scales, and the diagnostic windows chosen from them.

Where the trajectory has settled near an equilibrium (found by Newton's method from the
current state, on the face of the species present), the eigenvalues μ of the Jacobian there give
a relaxation time 1/|Re μ₁| (decay toward a stable point, or departure from an unstable one
and, near a Hopf point, the approach to the cycle born there), an oscillation period
2π/|Im μ₁| and the fastest rate max|μ| (which sets the longest step). Where no equilibrium is
found the period is measured (the mean time between successive maxima of the section variable
over a probe run) and the slowest per-capita rate stands in for the relaxation rate.

The window is then a number of relaxation times and of periods (constants below), never a
multiple of the case's horizon; :mod:`impact.dynamics.regimes` checks each verdict by doubling it.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from impact.engine.jacobian import jacobian
from impact.model import Controls, FoodWeb, WebParams, WebRHS

# Newton's method for the equilibrium (common practice, no source)
NEWTON_ITERATIONS = 40
NEWTON_RESIDUAL = 1e-9  # |f| relative to (|y| + 1) × the fastest rate
NEWTON_MAX_MOVE = 0.5  # a step moves no state by more than half its size (keeps states positive)

# windows from time scales (common practice, no source): 5 relaxation times leave e⁻⁵ ≈ 0.7 % of a
# perturbation; a sub-window is at least four relaxation times and holds enough returns of the
# section to look for the longest period twice; 10 steps per period (or relaxation time).
TRANSIENT_RELAXATIONS = 5.0
SUB_WINDOW_RELAXATIONS = 4.0
STEPS_PER_TIME_SCALE = 10.0
ALIGN_FRACTION = 0.25  # tangent alignment run before each sub-window, as a fraction of it
# longest step times the fastest rate |μ|max: Dormand–Prince 5(4)'s stability polynomial gives
# |R(−2)| ≈ 0.17, well inside its real-axis limit near −3.3 (computed from the polynomial; the
# margin is common practice, no source)
STIFF_STEP = 2.0


@dataclass(frozen=True)
class TimeScales:
    """Per-member time scales (time unit of the case).

    Attributes
    ----------
    relax : ndarray (M,)
        1/|Re μ₁| at the equilibrium (NaN where none was found).
    period : ndarray (M,)
        2π/|Im μ₁| of the leading pair (NaN where μ₁ is real or no equilibrium was found).
    fast : ndarray (M,)
        Largest |μ| (NaN where no equilibrium was found).
    leading : ndarray (M,)
        Re μ₁ (NaN where no equilibrium was found): negative for a stable equilibrium.
    """

    relax: np.ndarray
    period: np.ndarray
    fast: np.ndarray
    leading: np.ndarray


@dataclass(frozen=True)
class WindowPlan:
    """Transient, sub-window, alignment and longest step of one diagnosis."""

    transient: float
    sub_window: float
    n_sub: int
    align: float
    sample_dt: float

    @property
    def window(self) -> float:
        return self.sub_window * self.n_sub


def equilibrium(web: FoodWeb, p: WebParams, c: Controls, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Newton's method from ``y`` on the face of present states: (M, n) point and (M,) converged flag.

    Absent species (y ≤ 0) stay at zero; a member converges when the residual is small and every
    present state stays positive.
    """
    fun = WebRHS(web, p, c)
    M, n = y.shape
    idx = np.arange(M)
    x = np.where(np.isfinite(y), np.maximum(y, 0.0), 0.0)
    present = x > 0
    t = np.zeros(M)
    eye = np.eye(n)
    ok = np.zeros(M, bool)
    for _ in range(NEWTON_ITERATIONS):
        # a member that has converged stays where it is (and so converged): only the others are
        # evaluated again, member by member as before
        rows = np.flatnonzero(~ok)
        xa, pa = x[rows], present[rows]
        with np.errstate(all="ignore"):
            f = fun(t[rows], xa, idx[rows])
            J = jacobian(web, p, c, xa, idx[rows])
            J = np.where(pa[:, :, None] & pa[:, None, :], J, eye)  # absent: x_i stays 0
            f = np.where(pa, f, 0.0)
            scale = np.abs(J).sum(axis=2).max(axis=1) + 1e-300
            done = (np.abs(f) <= NEWTON_RESIDUAL * scale[:, None] * (np.abs(xa) + 1.0)).all(axis=1)
            ok[rows] = done
            if done.all():
                break
            good = np.isfinite(J).all(axis=(1, 2)) & np.isfinite(f).all(axis=1) & (np.abs(np.linalg.det(J)) > 0)
            step = np.zeros_like(xa)
            step[good] = np.linalg.solve(J[good], f[good][:, :, None])[:, :, 0]
            ratio = np.abs(step) / (NEWTON_MAX_MOVE * np.where(xa > 0, xa, np.inf))
            damp = 1.0 / np.maximum(1.0, np.nanmax(np.where(pa, ratio, 0.0), axis=1))
            x[rows] = np.where(pa & ~done[:, None], xa - damp[:, None] * step, xa)
    with np.errstate(all="ignore"):
        f = np.where(present, fun(t, x, idx), 0.0)
        J = jacobian(web, p, c, x, idx)
        scale = np.abs(J).sum(axis=2).max(axis=1) + 1e-300
    ok = (np.abs(f) <= NEWTON_RESIDUAL * 1e3 * scale[:, None] * (np.abs(x) + 1.0)).all(axis=1)
    ok &= np.where(present, x > 0, True).all(axis=1) & np.isfinite(x).all(axis=1)
    return x, ok


def time_scales(web: FoodWeb, p: WebParams, c: Controls, y: np.ndarray) -> TimeScales:
    """Relaxation time, period and fastest rate at the equilibrium nearest each state ``y``."""
    x, ok = equilibrium(web, p, c, y)
    M = len(x)
    relax, period, fast, lead = (np.full(M, np.nan) for _ in range(4))
    J = jacobian(web, p, c, x, np.arange(M))
    for i in np.flatnonzero(ok):
        keep = x[i] > 0
        mu = np.linalg.eigvals(J[i][np.ix_(keep, keep)]) if keep.any() else np.array([])
        if not mu.size or not np.isfinite(mu).all():
            continue
        top = mu[np.argmax(mu.real)]
        lead[i] = top.real
        relax[i] = 1.0 / abs(top.real) if top.real != 0 else np.inf
        period[i] = 2 * np.pi / abs(top.imag) if top.imag != 0 else np.nan
        fast[i] = float(np.abs(mu).max())
    return TimeScales(relax, period, fast, lead)


def leading_real_part(web: FoodWeb, p: WebParams, c: Controls, *starts: np.ndarray) -> np.ndarray:
    """Re μ₁ of the Jacobian at the equilibrium Newton's method finds from the first start that converges.

    Each start is an (M, n) state (e.g. the end of a diagnosed window, then its time-mean, which
    on a cycle lies near the equilibrium the cycle surrounds). Returns (M,): negative for a
    stable equilibrium, positive for an unstable one, NaN where no start converged. Each member's
    value depends on its own parameters and starts only.
    """
    M = len(starts[0])
    lead = np.full(M, np.nan)
    todo = np.arange(M)
    for y in starts:
        if not todo.size:
            break
        sub = WebParams(*(getattr(p, f)[todo] for f in WebParams.__dataclass_fields__))
        cc = Controls(*(getattr(c, f)[todo] for f in Controls.__dataclass_fields__))
        lead[todo] = time_scales(web, sub, cc, np.asarray(y, float)[todo]).leading
        todo = todo[~np.isfinite(lead[todo])]
    return lead


def _pow2_up(x: np.ndarray) -> np.ndarray:
    return 2.0 ** np.ceil(np.log2(x))


def plan_windows(ts: TimeScales, *, slow_rate: np.ndarray, returns: int, n_sub: int, max_window: np.ndarray,
                 sub_relaxations: float = SUB_WINDOW_RELAXATIONS,
                 transient: float | None = None, window: float | None = None,
                 sample_dt: float | None = None, measured_period=None,
                 min_sub=None) -> tuple[list[tuple[WindowPlan, np.ndarray]], np.ndarray]:
    """Window plans from each member's own time scales, members sharing a plan grouped together.

    Each member's transient and sub-window are rounded up, and its longest step down, to a power
    of two of the time unit, so members with similar time scales run side by side while a
    member's plan (and so its numbers) never depends on the other members.

    Parameters
    ----------
    ts : TimeScales
    slow_rate : ndarray (M,)
        Each member's slowest per-capita rate (1/time): its relaxation rate where no
        equilibrium was found.
    returns : int
        Section returns (oscillation periods) a sub-window should hold.
    n_sub : int
        Number of sub-windows.
    sub_relaxations : float
        Relaxation times a sub-window should span at least.
    max_window : ndarray (M,)
        Cap on the window and on the transient (a verdict that needs more stays undetermined).
    transient, window, sample_dt : float, optional
        Declared values (case file or command line) that override the chosen ones.
    measured_period : ndarray (M,), optional
        Mean time between section maxima measured on an earlier run, used where the
        equilibrium gives no period.
    min_sub : ndarray (M,), optional
        Shortest sub-window (e.g. twice that of an earlier, undecided pass).

    Returns
    -------
    plans : list of (WindowPlan, int ndarray of member rows)
    capped : ndarray (M,) bool
        Members whose own time scales asked for a longer transient or sub-window than
        ``max_window`` allows (their window is the cap: a verdict that needs the whole window
        is withheld, see :func:`impact.dynamics.diagnose.diagnose_web`). Declared values are never capped.
    """
    fallback = 1.0 / slow_rate
    relax = np.where(np.isfinite(ts.relax), ts.relax, fallback)
    period = ts.period if measured_period is None else np.where(np.isfinite(ts.period), ts.period, measured_period)
    sub = sub_relaxations * relax
    sub = np.where(np.isfinite(period), np.maximum(sub, returns * period), sub)
    if min_sub is not None:
        sub = np.maximum(sub, min_sub)
    sub_cap, tr_need = _pow2_up(max_window / n_sub), _pow2_up(TRANSIENT_RELAXATIONS * relax)
    capped = np.zeros(len(sub), bool)
    if window is None:
        capped |= ~(_pow2_up(sub) <= sub_cap)
    if transient is None:
        capped |= ~(tr_need <= _pow2_up(max_window))
    sub = np.minimum(_pow2_up(sub), sub_cap)
    if window is not None:
        sub = np.full(len(sub), float(window) / n_sub)
    tr = np.minimum(tr_need, _pow2_up(max_window))
    if transient is not None:
        tr = np.full(len(tr), float(transient))
    # the step limit resolves the oscillation (section maxima, extremes, renormalisation); and,
    # since the step size follows the state's error alone, it also keeps |h μ| ≤ 1 for the fastest
    # rate at the equilibrium: near rest the state's error allows long steps on which the explicit
    # tangent integration of a stiff direction would grow without bound (a false positive λ)
    scale = np.where(np.isfinite(period), period, relax)
    scale = np.where(np.isfinite(ts.fast) & (ts.fast > 0), np.minimum(scale, STEPS_PER_TIME_SCALE * STIFF_STEP / ts.fast),
                     scale)
    dt = 2.0 ** np.floor(np.log2(scale / STEPS_PER_TIME_SCALE))
    if sample_dt is not None:
        dt = np.full(len(dt), float(sample_dt))
    dt = np.minimum(dt, sub / 10)
    key = np.stack([tr, sub, dt], axis=1)
    plans = []
    for row in np.unique(key, axis=0):
        rows = np.flatnonzero((key == row).all(axis=1))
        plans.append((WindowPlan(transient=float(row[0]), sub_window=float(row[1]), n_sub=n_sub,
                                 align=ALIGN_FRACTION * float(row[1]), sample_dt=float(row[2])), rows))
    return plans, capped
