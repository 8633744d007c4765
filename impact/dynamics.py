"""Dynamical regime diagnostics: equilibrium, cycles, chaos, predictability horizon, scans.

After a transient, each member is followed over a window while the tangent (variational)
equations ride along and are renormalised at every integration step (Benettin et al. 1980),
giving the largest Lyapunov exponent λ. The trajectory is also cut by a Poincaré section — the
successive local maxima of one state variable, located inside the step where its derivative
changes sign by cubic Hermite interpolation — and the period k is the smallest shift under
which the section sequence repeats. The regime follows from the section, λ and the amplitude:

* ``extinction``  a watched species stays below its extinction level over the window;
* ``equilibrium`` λ < −lambda_tol, or the relative amplitude of every state is < eq_tol;
* ``cycle``       the section repeats with period k ≤ max_period (relative tolerance period_tol);
* ``chaotic``     no period and λ > lambda_tol;
* ``irregular``   no period and |λ| ≤ lambda_tol (quasi-periodic, or not yet settled).

The predictability horizon is t = ln(Δ/δ0)/λ for λ > 0 (an initial relative error δ0 grows to
the tolerance Δ); it is infinite otherwise. All thresholds live in :class:`DynamicsSettings`
and are written to ``dynamics.json``. Numerics only: no file I/O here.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, replace

import numpy as np
import pandas as pd

from .case import Case
from .errors import CaseError
from .integrate import FAILURE_REASONS, StepView, integrate_segment
from .jacobian import WebTangent, jacobian, tangent
from .model import Controls, FoodWeb, WebParams, WebRHS, build_web, web_params

REGIMES = ("equilibrium", "cycle", "irregular", "chaotic", "extinction")


@dataclass(frozen=True)
class DynamicsSettings:
    """Declared settings of the diagnostics (all times in the case's time unit).

    Attributes
    ----------
    transient, window : float
        Time discarded before diagnosing, and time diagnosed.
    sample_dt : float
        Longest integration step of the diagnostics (tangent renormalisation and section checks
        happen at every step end, so at least this often); must be well below half the
        shortest oscillation period.
    delta0, tolerance : float
        Initial relative uncertainty (e.g. a survey's relative error) and the relative error
        at which a projection stops being useful; horizon = ln(tolerance/delta0)/λ.
    eq_tol : float
        Relative amplitude (max − min)/(mean + abs_floor) below which a state is at rest.
    period_tol : float
        Relative tolerance for two section values to count as the same point.
    max_period : int
        Longest period looked for.
    lambda_tol : float
        |λ| at or below which λ is treated as zero (1/time unit). A finite-time estimate on a
        cycle is O(1/window), so 10/window is the default in :func:`default_settings`
        (common practice, no source).
    rtol, atol : float
        Integrator tolerances for model and tangent.
    member_cap : int
        At most this many members per option are diagnosed in an assessment.
    """

    transient: float
    window: float
    sample_dt: float
    delta0: float = 0.05
    tolerance: float = 0.5
    eq_tol: float = 1e-3
    period_tol: float = 1e-3
    max_period: int = 16
    lambda_tol: float = 0.005
    rtol: float = 1e-7
    atol: float = 1e-9
    member_cap: int = 48


@dataclass(frozen=True)
class Diagnosis:
    """Per-member outcome of :func:`lyapunov_flow` and :func:`classify`.

    Attributes
    ----------
    lyapunov : ndarray (M,)
        Largest Lyapunov exponent (NaN for failed members).
    sections : list of ndarray
        Section values (successive maxima of the section variable) per member, in time order.
    low, high, mean : ndarray (M, n)
        Minimum, maximum and time-mean of each state over the window.
    final : ndarray (M, n)
        State at the end of the window.
    failed : ndarray (M,) bool
    reason : ndarray (M,) int8
        Integrator failure code (see ``impact.integrate.FAILURE_REASONS``).
    nfev : int
    """

    lyapunov: np.ndarray
    sections: list
    low: np.ndarray
    high: np.ndarray
    mean: np.ndarray
    final: np.ndarray
    failed: np.ndarray
    reason: np.ndarray
    nfev: int


# --------------------------------------------------------------------------------------------
# small pure estimators


def predictability_horizon(lyap, delta0: float, tolerance: float) -> np.ndarray:
    """Time for an error δ0 to grow to Δ at rate λ, ln(Δ/δ0)/λ (Lorenz 1969); inf for λ ≤ 0."""
    lyap = np.asarray(lyap, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.log(tolerance / delta0) / lyap
    return np.where(np.isnan(lyap), np.nan, np.where(lyap > 0, t, np.inf))


def detect_period(values: np.ndarray, period_tol: float, max_period: int) -> int:
    """Smallest k ≤ max_period with s[i+k] ≈ s[i] over the last section points; 0 if none.

    Uses the last ``2·max_period`` points (all if fewer); a period k needs at least 2k points.
    Values are compared relative to the largest |s| (Poincaré return-map periodicity).
    """
    s = np.asarray(values, float)
    s = s[-2 * max_period:]
    if s.size < 2:
        return 0
    scale = max(float(np.abs(s).max()), 1e-300)
    for k in range(1, max_period + 1):
        if s.size < 2 * k:
            break
        if np.all(np.abs(s[k:] - s[:-k]) <= period_tol * scale):
            return k
    return 0


def classify(lyap: np.ndarray, sections: list, amplitude: np.ndarray, extinct: np.ndarray,
             s: DynamicsSettings, flow: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """Regime name and period per member.

    For a map (``flow=False``) a negative λ only says the orbit is stable, so the section
    alone decides between cycles and the rest.

    Parameters
    ----------
    lyap : ndarray (M,)
    sections : list of M ndarrays
    amplitude : ndarray (M,)
        Largest relative amplitude over the state variables.
    extinct : ndarray (M,) bool

    Returns
    -------
    regime : ndarray (M,) of str
    period : ndarray (M,) int (0 where no period applies)
    """
    M = len(lyap)
    regime = np.empty(M, dtype=object)
    period = np.zeros(M, dtype=int)
    for k in range(M):
        lam = lyap[k]
        if extinct[k]:
            regime[k] = "extinction"
        elif np.isnan(lam):
            regime[k] = "failed"
        elif flow and (lam < -s.lambda_tol or amplitude[k] < s.eq_tol):
            regime[k] = "equilibrium"
        else:
            p = detect_period(sections[k], s.period_tol, s.max_period)
            if p:
                regime[k], period[k] = "cycle", p
            elif lam > s.lambda_tol:
                regime[k] = "chaotic"
            else:
                regime[k] = "irregular"
    return regime, period


def _hermite_max(y0, y1, f0, f1, dt):
    """Maximum of the cubic Hermite interpolant on [0, dt] where f0 > 0 ≥ f1: (k,) arrays.

    With p(s) = y0 + c1 s + c2 s² + c3 s³ on s ∈ [0, 1], p'(0) > 0 ≥ p'(1) leaves exactly one
    root of the quadratic p' in (0, 1]; it is taken from the cancellation-free form of the
    quadratic formula (Press et al. 2007, Numerical Recipes 3rd ed., Sec. 5.6).
    """
    c1 = dt * f0
    c2 = 3.0 * (y1 - y0) - dt * (2.0 * f0 + f1)
    c3 = 2.0 * (y0 - y1) + dt * (f0 + f1)
    qa, qb, qc = 3.0 * c3, 2.0 * c2, c1
    with np.errstate(divide="ignore", invalid="ignore"):
        disc = np.sqrt(np.maximum(qb * qb - 4.0 * qa * qc, 0.0))
        q = -0.5 * (qb + np.where(qb >= 0, disc, -disc))
        r1 = qc / q
        r2 = q / qa
    inside1 = np.isfinite(r1) & (r1 >= 0) & (r1 <= 1)
    x = np.where(inside1, r1, np.where(np.isfinite(r2), r2, 1.0))
    x = np.clip(x, 0.0, 1.0)
    return y0 + x * (c1 + x * (c2 + x * c3))


# --------------------------------------------------------------------------------------------
# Lyapunov exponent of a flow (Benettin et al. 1980) on the ensemble integrator


class _TangentWatch:
    """Observer of the stepper for :func:`lyapunov_flow`.

    Renormalises the tangent at every step end (Benettin et al. 1980) and, once ``in_window``
    is set, accumulates per member ln‖v‖, the extremes, the trapezoid time integral of the
    state and the section maxima (arrays over all M rows of the call).
    """

    def __init__(self, fj, members, section, n, nonnegative):
        M = len(members)
        self.fj, self.members, self.section, self.nonnegative = fj, members, section, nonnegative
        self.in_window = False
        self.nfev = 0
        self.lg = np.zeros(M)
        self.low = np.full((M, n), np.inf)
        self.high = np.full((M, n), -np.inf)
        self.acc = np.zeros((M, n))
        self.sections: list[list[float]] = [[] for _ in range(M)]

    def unit_on_face(self, x):
        """Start vector (1, 2, …, n)/‖·‖ restricted to the present face (all ones if none)."""
        n = x.shape[1]
        w = np.tile(np.arange(1.0, n + 1.0), (x.shape[0], 1))
        if self.nonnegative:
            w = np.where(x > 0, w, 0.0)
            empty = ~(w > 0).any(axis=1)
            w[empty] = 1.0
        return w / np.sqrt(_sumsq(w))[:, None]

    def __call__(self, s: StepView):
        accept = s.accept
        norm = np.sqrt(_sumsq(s.v_new))
        norm[~accept] = 1.0
        if (norm == 0).any():
            # nothing left to perturb: restart the vector on the present face, no growth counted
            dead = np.flatnonzero(norm == 0)
            s.v_new[dead] = self.unit_on_face(s.y_new[dead])
            _, s.g_new[dead] = self.fj(s.t_new[dead], s.y_new[dead], s.v_new[dead],
                                       self.members[s.rows[dead]])
            self.nfev += 1
            norm[dead] = 1.0
        with np.errstate(invalid="ignore", divide="ignore"):
            np.divide(s.v_new, norm[:, None], out=s.v_new)
            np.divide(s.g_new, norm[:, None], out=s.g_new)
            # an overflowing norm must fail the member, not restart it from zero growth
            s.v_new[~np.isfinite(norm)] = np.nan
            if self.in_window:
                self._accumulate(s, norm)

    def _accumulate(self, s: StepView, norm):
        rows, accept = s.rows, s.accept
        # time integral by the trapezoid rule over the step, for the time-mean
        area = s.y + s.y_new
        area *= np.repeat(s.hs, area.shape[1]).reshape(area.shape)
        if rows.size == self.lg.size and accept.all():
            # the usual case (every member active and accepted): plain in-place updates
            self.lg += np.log(norm)
            np.minimum(self.low, s.y_new, out=self.low)
            np.maximum(self.high, s.y_new, out=self.high)
            self.acc += area
        else:
            w = accept[:, None]
            self.lg[rows] += np.where(accept, np.log(norm), 0.0)
            self.low[rows] = np.where(w, np.minimum(self.low[rows], s.y_new), self.low[rows])
            self.high[rows] = np.where(w, np.maximum(self.high[rows], s.y_new), self.high[rows])
            self.acc[rows] += np.where(w, area, 0.0)
        rr = np.arange(rows.size)
        sec = self.section[rows]
        d0, d1 = s.f[rr, sec], s.f_new[rr, sec]
        hit = np.flatnonzero(accept & (d0 > 0) & (d1 <= 0))
        if hit.size:
            sh = sec[hit]
            peaks = _hermite_max(s.y[hit, sh], s.y_new[hit, sh], d0[hit], d1[hit], s.hs[hit])
            for j, val in zip(rows[hit], peaks):
                self.sections[j].append(float(val))


def lyapunov_flow(fun, jac, y0, *, transient: float, window: float, sample_dt: float, section=0,
                  rtol=1e-7, atol=1e-9, members=None, nonnegative=True, t0: float = 0.0, jvp=None,
                  max_steps: int = 1_000_000, blowup: float = 1e12) -> Diagnosis:
    """Largest Lyapunov exponent by tangent integration with renormalisation (Benettin et al. 1980).

    State and tangent vector advance together on the steps of
    :func:`impact.integrate.integrate_segment`, one adaptive step size per member chosen from the
    state's error alone: the tangent equation is linear with the state's own Jacobian, so the
    state's step resolves it too (common practice, no source), and keeping it out of the error
    norm leaves the step sequence that of a plain run. Steps land exactly only on the end of the
    transient and of the window; the tangent is renormalised at every step end, the window
    statistics are time-weighted over steps, and section maxima are located inside the step
    where the section variable's derivative changes sign, by cubic Hermite interpolation of the
    step's end values and derivatives.

    Parameters
    ----------
    fun : callable ``fun(t, y, members) -> (m, n)``
    jac : callable ``jac(t, y, members) -> (m, n, n)``, or None when ``jvp`` is given
    y0 : ndarray (M, n)
    transient, window : float
        Discarded time and diagnosed time.
    sample_dt : float
        Longest step allowed, so that renormalisation and section checks happen at least this
        often (keep it below half the shortest oscillation period).
    section : int or int ndarray (M,)
        State column whose successive maxima form the Poincaré section.
    members : int ndarray (M,), optional
        Member indices passed on to ``fun``, ``jac`` and ``jvp``.
    nonnegative : bool
        Evaluate the model at max(y, 0) (abundances) and project accepted states onto y ≥ 0.
    jvp : callable ``jvp(t, y, v, members) -> (f, J v)``, optional
        Right-hand side and Jacobian–vector product in one call (e.g.
        :class:`impact.jacobian.WebTangent`); default: ``fun`` and ``jac`` times ``v``.
    max_steps, blowup : as in :func:`impact.integrate.integrate_segment` (steps per stage:
        transient, then window).

    Returns
    -------
    Diagnosis
        ``nfev`` counts evaluations of the right-hand side with its tangent.
    """
    y_all = np.array(y0, float)
    M, n = y_all.shape
    members = np.arange(M) if members is None else np.asarray(members)
    section_all = np.broadcast_to(np.asarray(section, int), (M,)).copy()
    if jvp is None:
        def jvp(t, x, v, mem):
            return fun(t, x, mem), tangent(jac(t, x, mem), v)

    def fj(t, x, v, mem):
        if not nonnegative:
            return jvp(t, x, v, mem)
        x = np.maximum(x, 0.0)
        # An absent species stays absent (the model is of Kolmogorov form and the web is
        # closed), so perturbations are confined to the face of present species: otherwise
        # the invasion rate of an eradicated species would pass for chaos.
        present = x > 0
        if present.all():
            return jvp(t, x, v, mem)
        f, jv = jvp(t, x, np.where(present, v, 0.0), mem)
        return f, np.where(present, jv, 0.0)

    start = np.maximum(y_all, 0.0) if nonnegative else y_all
    watch = _TangentWatch(fj, members, section_all, n, nonnegative)
    kw = dict(rtol=rtol, atol=atol, members=members, nonnegative=nonnegative, max_steps=max_steps,
              blowup=blowup, hmax=float(sample_dt), observer=watch)
    y, v, h, reason, nfev = start, watch.unit_on_face(start), None, np.zeros(M, np.int8), 0
    # overflow and 0/0 in a failing member are caught by the stepper's finiteness checks
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        if transient > 0:
            run_in = integrate_segment(fj, t0, t0 + transient, y, tangent=v, **kw)
            y, v, h, reason, nfev = run_in.y, run_in.v, run_in.h, run_in.reason, run_in.nfev
        watch.in_window = True
        diag = integrate_segment(fj, t0 + transient, t0 + transient + window, y, h0=h, tangent=v,
                                 **kw)
    reason = np.where(reason != 0, reason, diag.reason).astype(np.int8)
    ok = reason == 0
    okc = ok[:, None]
    return Diagnosis(np.where(ok, watch.lg / window, np.nan),
                     [np.array(s) for s in watch.sections],
                     np.where(okc, watch.low, np.nan), np.where(okc, watch.high, np.nan),
                     np.where(okc, watch.acc / (2.0 * window), np.nan), np.where(okc, diag.y, np.nan),
                     ~ok, reason, nfev + diag.nfev + watch.nfev)


def _sumsq(x):
    """Per-row sum of squares, column by column so the order never depends on the batch."""
    acc = x[:, 0] * x[:, 0]
    for j in range(1, x.shape[1]):
        acc = acc + x[:, j] * x[:, j]
    return acc


def relative_amplitude(d: Diagnosis, floor: np.ndarray | float = 0.0) -> np.ndarray:
    """Largest (max − min)/(mean + floor) over the state variables: (M,)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        a = (d.high - d.low) / (np.abs(d.mean) + floor + 1e-300)
    return np.nanmax(np.where(np.isfinite(a), a, 0.0), axis=1)


# --------------------------------------------------------------------------------------------
# one-dimensional maps (x -> g(x)) vectorised over parameter values


def lyapunov_map(step, deriv, x0, *, transient: int, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Lyapunov exponent of a 1-D map as the orbit mean of ln|g'(x)| (e.g. Ott 2002, Sec. 2.3).

    Parameters
    ----------
    step, deriv : callable ndarray (M,) -> ndarray (M,)
    x0 : ndarray (M,)
    transient, n : int
        Iterations discarded, iterations kept.

    Returns
    -------
    lyap : ndarray (M,)
    orbit : ndarray (M, n)
        The kept iterates (each one a section point of the map).
    """
    x = np.array(x0, float)
    for _ in range(transient):
        x = step(x)
    orbit = np.empty((x.size, n))
    acc = np.zeros(x.size)
    for i in range(n):
        with np.errstate(divide="ignore"):
            acc += np.log(np.abs(deriv(x)))
        orbit[:, i] = x
        x = step(x)
    return acc / n, orbit


# --------------------------------------------------------------------------------------------
# the food web


def web_functions(web: FoodWeb, p: WebParams, c: Controls):
    """``fun`` and ``jac`` of the food web in the integrator's calling convention."""
    fun = WebRHS(web, p, c)
    cache = {"key": None}

    def jac(t, y, idx):
        # gather each member's coefficients once per active set (the integrator keeps passing the
        # same index array until the set shrinks); slicing the gathered copy is then free
        if cache["key"] is not idx:
            cache["p"] = WebParams(*(getattr(p, f)[idx] for f in WebParams.__dataclass_fields__))
            cache["c"] = Controls(*(getattr(c, f)[idx] for f in Controls.__dataclass_fields__))
            cache["key"] = idx
        return jacobian(web, cache["p"], cache["c"], y, slice(None))

    return fun, jac


def default_settings(case: Case, p: WebParams, y0: np.ndarray, **override) -> DynamicsSettings:
    """Settings from the web's own time scales (common practice, no source).

    The slowest per-capita rate (growth, mortality) sets the transient (20 of its time scales)
    and window (50); the fastest (a Gershgorin bound on the Jacobian at ``y0``) sets the
    sample interval (a tenth of its time scale), with between 200 and 1000 samples per window.
    """
    rates = np.concatenate([np.abs(p.r).ravel(), np.abs(p.m).ravel()])
    rates = rates[np.isfinite(rates) & (rates > 0)]
    slow = float(rates.min()) if rates.size else 1.0
    web = build_web(case)
    c = Controls.neutral(len(y0), web.n_species)
    ok = np.isfinite(y0).all(axis=1)
    fast = slow
    if ok.any():
        J = jacobian(web, p, c, np.maximum(y0[ok], 0.0), np.flatnonzero(ok))
        g = np.abs(J).sum(axis=2).max(axis=1)
        g = g[np.isfinite(g)]
        if g.size:
            fast = max(fast, float(np.median(g)))
    transient, window = 20.0 / slow, 50.0 / slow
    dt = float(np.clip(0.1 / fast, window / 1000, window / 200))
    base = dict(transient=transient, window=window, sample_dt=dt, lambda_tol=10.0 / window)
    base.update(override)
    return DynamicsSettings(**base)


def section_species(case: Case, name: str | None, field: str = "--section") -> tuple[int, str]:
    """Column and name of the species whose successive maxima form the Poincaré section.

    ``None`` keeps the default, the last declared species. An unknown name is a user error.
    """
    names = case.species_names
    if name is None:
        return len(names) - 1, names[-1]
    if name not in names:
        raise CaseError("command line", field, f"unknown species {name!r} for the section; allowed: {', '.join(names)}")
    return names.index(name), name


def diagnose_web(web: FoodWeb, p: WebParams, c: Controls, y0: np.ndarray, s: DynamicsSettings,
                 extinct_level: np.ndarray, members=None, section=None):
    """Regime, period, λ and horizon of each member from state ``y0`` under fixed controls.

    Parameters
    ----------
    y0 : ndarray (M, n_state)
    extinct_level : ndarray (S,)
        A species whose maximum over the window stays below this level is extinct; species
        that were already below it in ``y0`` are not counted (they were never there).
    section : int or ndarray (M,), optional
        State column whose successive maxima form the Poincaré section; default: the last
        species (see :func:`section_species` to resolve a name).

    Returns
    -------
    dict with ndarrays (M,): regime, period, lyapunov, horizon, extinct (bool), extinct_species
    (str), and ``diagnosis`` (:class:`Diagnosis`).
    """
    M = y0.shape[0]
    S = web.n_species
    members = np.arange(M) if members is None else np.asarray(members)
    fun, _ = web_functions(web, p, c)
    start = np.where(np.isfinite(y0), np.maximum(y0, 0.0), np.nan)
    if section is None:
        section = S - 1 if S else 0
    d = lyapunov_flow(fun, None, start, transient=s.transient, window=s.window, sample_dt=s.sample_dt,
                      section=section, rtol=s.rtol, atol=s.atol, members=members, jvp=WebTangent(web, p, c))
    level = np.asarray(extinct_level, float)
    with np.errstate(invalid="ignore"):
        watched = start[:, :S] >= level
        gone = watched & (d.high[:, :S] < level)
    extinct = gone.any(axis=1)
    floor = np.concatenate([level, np.zeros(web.n_state - S)])
    amp = relative_amplitude(d, floor)
    regime, period = classify(d.lyapunov, d.sections, amp, extinct, s)
    names = np.array(web.species)
    return dict(regime=regime, period=period, lyapunov=d.lyapunov,
                horizon=predictability_horizon(d.lyapunov, s.delta0, s.tolerance),
                extinct=extinct, extinct_species=np.array([";".join(names[g]) for g in gone], dtype=object),
                diagnosis=d)


# --------------------------------------------------------------------------------------------
# scans


def transitions(parameter: str, values: np.ndarray, regime, period) -> pd.DataFrame:
    """Consecutive scan values whose (regime, period) differ, with a kind for each change.

    Returns
    -------
    DataFrame with columns parameter, from_value, to_value, from_regime, to_regime, kind
    (``from_regime``/``to_regime`` carry the period for cycles, e.g. ``cycle(2)``).
    """
    def label(r, k):
        return f"cycle({k})" if r == "cycle" else r

    rows = []
    for i in range(1, len(values)):
        a, b = (regime[i - 1], int(period[i - 1])), (regime[i], int(period[i]))
        if a == b:
            continue
        rows.append(dict(parameter=parameter, from_value=float(values[i - 1]), to_value=float(values[i]),
                         from_regime=label(*a), to_regime=label(*b), kind=transition_kind(a, b)))
    return pd.DataFrame(rows, columns=["parameter", "from_value", "to_value", "from_regime", "to_regime", "kind"])


def transition_kind(a: tuple[str, int], b: tuple[str, int]) -> str:
    """Name of a change of regime (period doublings are told apart by the period ratio)."""
    (ra, ka), (rb, kb) = a, b
    if ra == "cycle" and rb == "cycle":
        return "period-doubling" if kb == 2 * ka else "period-halving" if ka == 2 * kb else "period-change"
    if ra == "equilibrium" and rb == "cycle":
        return "onset-of-cycles"
    if ra == "cycle" and rb == "equilibrium":
        return "cycles-cease"
    if rb == "chaotic":
        return "onset-of-chaos"
    if ra == "chaotic" and rb in ("cycle", "equilibrium"):
        return "return-to-order"
    if rb == "extinction":
        return "extinction"
    if ra == "extinction":
        return "persistence"
    return f"{ra}-to-{rb}"


def nominal_values(case: Case) -> dict[str, float]:
    """Every parameter at its prior median (fixed ones at their value)."""
    out = {}
    for p in case.parameters:
        out[p.name] = float(p.prior.value) if not p.uncertain else float(p.prior.ppf(np.array([0.5]))[0])
    return out


def scan_target(case: Case, name: str, option_name: str | None):
    """Resolve a scanned quantity: a declared parameter, or ``INTERVENTION.FIELD`` of the option.

    Returns a function ``value -> (case', values)`` giving the case and parameter values with
    the scanned quantity set.
    """
    base = nominal_values(case)
    if name in base:
        return lambda v: (case, {**base, name: float(v)})
    if "." in name:
        iv_name, fld = name.rsplit(".", 1)
        ivs = {iv.name: iv for iv in case.interventions}
        if iv_name in ivs:
            iv = ivs[iv_name]
            allowed = [f for f in ("rate", "fraction", "factor") if getattr(iv, f) is not None]
            if fld not in allowed:
                raise CaseError("command line", "--parameter",
                                f"intervention {iv_name!r} ({iv.kind}) has no intensity {fld!r}; use one of: {', '.join(allowed) or 'none'}")
            opt = next((o for o in case.options if o.name == option_name), None)
            if opt is None or iv_name not in opt.interventions:
                raise CaseError("command line", "--option",
                                f"scanning {name!r} needs --option naming an option that uses intervention {iv_name!r}")
            def at(v):
                new_iv = replace(iv, **{fld: float(v)})
                return replace(case, interventions=tuple(new_iv if x.name == iv_name else x for x in case.interventions)), base
            return at
    choices = sorted(base) + [f"{iv.name}.{f}" for iv in case.interventions for f in ("rate", "fraction", "factor")
                              if getattr(iv, f) is not None]
    raise CaseError("command line", "--parameter", f"unknown quantity {name!r}; choose a parameter or an intervention intensity: {', '.join(choices)}")


def steady_controls(case: Case, option_name: str | None, values: dict, M: int) -> Controls:
    """Controls with every press intervention of the option in force (events are ignored).

    ``values`` maps parameter names to ndarray (M,) or scalars.
    """
    from .simulate import _controls

    S = len(case.species)
    if option_name is None:
        return Controls.neutral(M, S)
    opt = next(o for o in case.options if o.name == option_name)
    always = tuple(replace(iv, start=-np.inf, end=np.inf) if iv.name in opt.interventions else iv
                   for iv in case.interventions)
    vals = {k: np.broadcast_to(np.asarray(v, float), (M,)).copy() for k, v in values.items()}
    return _controls(replace(case, interventions=always), opt, vals, 0.0, np.ones((M, S)), M, S)


def _scan_rows(parameter, v, out, i, keep_sections):
    d = out["diagnosis"]
    reg, per, lam = out["regime"][i], int(out["period"][i]), float(out["lyapunov"][i])
    sec = d.sections[i][-keep_sections:]
    rows = [dict(parameter=parameter, value=float(v), section_value=float(x), regime=reg, period=per, lyapunov=lam)
            for x in sec] or [dict(parameter=parameter, value=float(v), section_value=np.nan, regime=reg, period=per, lyapunov=lam)]
    pt = dict(parameter=parameter, value=float(v), regime=reg, period=per, lyapunov=lam,
              horizon=float(out["horizon"][i]), n_section=int(d.sections[i].size), failed=bool(d.failed[i]),
              failure=FAILURE_REASONS.get(int(d.reason[i]), ""))
    return rows, pt


@dataclass(frozen=True)
class ScanTask:
    """Scan values to run side by side from the case's initial state (a part of a parallel scan)."""

    case: Case
    parameter: str
    grid: np.ndarray
    settings: DynamicsSettings
    option: str | None
    section: int


def scan_values(task: ScanTask) -> tuple[list, list]:
    """Diagnose every value of a parallel scan part as one ensemble (a worker's function).

    Returns the section rows and the per-value points, as :func:`scan_web` tabulates them.
    """
    case, grid, s, option = task.case, task.grid, task.settings, task.option
    at = scan_target(case, task.parameter, option)
    web = build_web(case)
    level = np.array([sp.quasi_extinction for sp in case.species], float)
    K = grid.size
    per_value = [at(v) for v in grid]
    vals = {k: np.array([b[k] for _, b in per_value]) for k in per_value[0][1]}
    cases = [cs for cs, _ in per_value]
    p = web_params(cases[0], vals, K)
    if cases[0] is not case:  # an intervention intensity: controls differ per value
        cs_list = [steady_controls(cs, option, {k: x[i] for k, x in vals.items()}, 1) for i, cs in enumerate(cases)]
        c = Controls(*(np.concatenate([getattr(ci, f) for ci in cs_list]) for f in Controls.__dataclass_fields__))
    else:
        c = steady_controls(case, option, vals, K)
    out = diagnose_web(web, p, c, p.initial, s, level, section=task.section)
    rows, pts = [], []
    for i, v in enumerate(grid):
        r, pt = _scan_rows(task.parameter, v, out, i, 4 * s.max_period)
        rows += r
        pts.append(pt)
    return rows, pts


def scan_web(case: Case, parameter: str, grid: np.ndarray, s: DynamicsSettings, option: str | None = None,
             section: str | None = None, continuation: bool = True, progress=None, executor=None):
    """Bifurcation scan of one quantity with every other parameter at its prior median.

    ``section`` names the species whose maxima form the Poincaré section (default: the last
    declared species); an unknown name raises :class:`CaseError` for ``--section``.

    With ``continuation`` each value starts where the previous one ended (so a branch is
    followed and hysteresis shows); without it all values run side by side as one ensemble
    from the case's initial state (much faster; each value finds its own attractor), split
    among ``executor``'s workers when one is given.

    Returns
    -------
    scan : DataFrame (parameter, value, section_value, regime, period, lyapunov), one row per
        kept section point (one row with NaN section_value when there are none)
    points : DataFrame (parameter, value, regime, period, lyapunov, horizon, n_section, failed, failure)
    transitions : DataFrame, see :func:`transitions`
    """
    if option is not None and option not in [o.name for o in case.options]:
        raise CaseError("command line", "--option", f"unknown option {option!r}; declared: {', '.join(o.name for o in case.options) or 'none'}")
    grid = np.asarray(grid, float)
    section, _ = section_species(case, section)
    at = scan_target(case, parameter, option)
    web = build_web(case)
    level = np.array([sp.quasi_extinction for sp in case.species], float)
    keep = 4 * s.max_period
    rows, pts = [], []
    if continuation:
        y = None
        for i, v in enumerate(grid):
            cs, base = at(v)
            p = web_params(cs, {k: np.array([x]) for k, x in base.items()}, 1)
            c = steady_controls(cs, option, base, 1)
            y0 = p.initial if y is None or not np.isfinite(y).all() else y
            out = diagnose_web(web, p, c, y0, s, level, section=section)
            y = out["diagnosis"].final
            r, pt = _scan_rows(parameter, v, out, 0, keep)
            rows += r
            pts.append(pt)
            if progress:
                progress(f"scan {parameter}: {i + 1}/{len(grid)} ({pt['regime']}, λ={pt['lyapunov']:.3g})")
    else:
        from .execute import InProcess

        executor = executor or InProcess()
        # values are independent here: split them among the workers, put the parts back in order
        parts = [g for g in np.array_split(grid, min(executor.workers, grid.size)) if g.size]
        tasks = [ScanTask(case, parameter, g, s, option, section) for g in parts]
        done = dict(executor.map(scan_values, tasks))
        for i in range(len(parts)):
            rows += done[i][0]
            pts += done[i][1]
    points = pd.DataFrame(pts)
    return (pd.DataFrame(rows), points,
            transitions(parameter, points.value.to_numpy(), points.regime.to_numpy(), points.period.to_numpy()))


def settings_record(s: DynamicsSettings, **extra) -> dict:
    """The settings and thresholds as a JSON-ready dict (for dynamics.json)."""
    rec = asdict(s)
    rec["thresholds"] = dict(eq_tol=s.eq_tol, period_tol=s.period_tol, max_period=s.max_period, lambda_tol=s.lambda_tol)
    rec["regime_rules"] = __doc__.split("The regime follows")[1].split("The predictability")[0].strip()
    rec.update(extra)
    return rec


def refine_transitions(label, lo: np.ndarray, hi: np.ndarray, iters: int = 30) -> np.ndarray:
    """Bisect brackets [lo, hi] whose ends differ in label, all brackets at once: (B,) midpoints.

    ``label(values) -> ndarray`` gives a comparable label (e.g. the period) per value.
    """
    lo, hi = np.array(lo, float), np.array(hi, float)
    left = label(lo)
    for _ in range(iters):
        mid = 0.5 * (lo + hi)
        same = label(mid) == left
        lo = np.where(same, mid, lo)
        hi = np.where(same, hi, mid)
    return 0.5 * (lo + hi)


def logistic_map_scan(r: np.ndarray, s: DynamicsSettings, transient: int = 20000, n: int = 256):
    """Regime, period and λ of the logistic map x → r x (1 − x) for each r (vectorised).

    Every iterate is a section point; a fixed point of the map counts as a period-1 cycle.
    """
    r = np.asarray(r, float)
    lyap, orbit = lyapunov_map(lambda x: r * x * (1 - x), lambda x: r * (1 - 2 * x), np.full(r.size, 0.3),
                               transient=transient, n=n)
    regime, period = classify(lyap, list(orbit), np.ones(r.size), np.zeros(r.size, bool),
                              s, flow=False)
    return regime, period, lyap, orbit


@dataclass(frozen=True)
class DiagnoseTask:
    """One option's diagnosis in an assessment: members' parameters, controls and start states."""

    case: Case
    params: WebParams
    controls: Controls
    y0: np.ndarray
    settings: DynamicsSettings
    level: np.ndarray
    section: int


def diagnose_task(task: DiagnoseTask) -> dict:
    """:func:`diagnose_web` on one task (a worker's function)."""
    out = diagnose_web(build_web(task.case), task.params, task.controls, task.y0, task.settings, task.level,
                       section=task.section)
    out.pop("diagnosis")  # the tables need only the per-member verdicts
    return out


def assess_stage(case: Case, params: WebParams, values: dict, runs: dict, settings: DynamicsSettings | None = None,
                 progress=None, section: str | None = None, executor=None):
    """Diagnose every option's end-of-horizon state (the assessment's dynamics stage).

    ``runs`` maps option names to :class:`impact.assess.Summary` (per-member summaries).

    A capped subset of members (the first ``member_cap`` by index) is continued from each
    option's state at the horizon with the controls in force just before it, deterministically
    (noise and events off). ``section`` names the species whose maxima form the Poincaré
    section (default: the last declared species).

    Returns
    -------
    tables : dict of str -> DataFrame
        ``regimes``, ``regime_shares``, ``risk_by_regime`` (columns as in DEVELOPERS.md).
    record : dict
        Settings for dynamics.json.
    """
    from .execute import InProcess, count
    from .simulate import _controls

    sec_col, sec_name = section_species(case, section)
    web = build_web(case)
    S = web.n_species
    base = runs["baseline"]
    M = base.members
    sel = np.arange(min(M, settings.member_cap if settings else DynamicsSettings.__dataclass_fields__['member_cap'].default))
    sub = WebParams(*(getattr(params, f)[sel] for f in WebParams.__dataclass_fields__))
    if settings is None:
        # Inside an assessment the diagnosis is a screen: a few horizons of run-in and window,
        # at the integrator's usual tolerance (common practice, no source); `impact scan`
        # keeps the longer defaults.
        s0 = default_settings(case, sub, base.final[sel])
        H = case.horizon
        s = default_settings(case, sub, base.final[sel], rtol=1e-6,
                             transient=min(s0.transient, 2.0 * H), window=min(s0.window, 3.0 * H),
                             sample_dt=max(s0.sample_dt, min(s0.window, 3.0 * H) / 300),
                             lambda_tol=10.0 / min(s0.window, 3.0 * H))
    else:
        s = settings
    level = np.array([sp.quasi_extinction for sp in case.species], float)
    H = case.horizon
    t_last = H - 1e-9 * max(H, 1.0)
    opts = {None: "baseline", **{o: o.name for o in case.options}}
    reg_rows, risk_rows, share_rows = [], [], []
    counts = {}
    vals = {k: np.asarray(v)[sel] for k, v in values.items()}
    tasks = [DiagnoseTask(case, sub, _controls(case, opt, vals, t_last, np.ones((sel.size, S)), sel.size, S),
                          runs[name].final[sel], s, level, sec_col) for opt, name in opts.items()]
    results = {}
    count(progress, "dynamics: diagnosing options", 0, len(tasks), "options")
    for i, out in (executor or InProcess()).map(diagnose_task, tasks):
        results[i] = out
        count(progress, "dynamics: diagnosing options", len(results), len(tasks), "options")
    for k, (opt, name) in enumerate(opts.items()):
        run = runs[name]
        out = results[k]
        regime = np.where(run.failed[sel], "failed", out["regime"])
        counts[name] = {"diagnosed": int(sel.size), "failed": int((regime == "failed").sum())}
        frame = pd.DataFrame({"option": name, "member": sel, "regime": regime, "period": out["period"],
                              "lyapunov": out["lyapunov"], "horizon_time": out["horizon"], "extinct": out["extinct"],
                              "extinct_species": out["extinct_species"]})
        reg_rows.append(frame)
        for rg, g in frame.groupby("regime", sort=False):
            share_rows.append(dict(option=name, regime=rg, share=len(g) / len(frame), count=len(g),
                                   lyapunov_median=float(g.lyapunov.median()), horizon_median=float(g.horizon_time.median())))
            rows = sel[(frame.regime == rg).to_numpy()]
            for j, sp in enumerate(case.species):
                mins = run.minimum[rows, run.slot(H), j]
                ok = np.isfinite(mins)
                if sp.present:
                    risk_rows.append(dict(option=name, regime=rg, species=sp.name, metric="quasi_extinction",
                                          value=float((mins[ok] < sp.quasi_extinction).mean()) if ok.any() else np.nan))
                    risk_rows.append(dict(option=name, regime=rg, species=sp.name, metric="expected_minimum",
                                          value=float(mins[ok].mean()) if ok.any() else np.nan))
                fin = run.final[rows, j]
                risk_rows.append(dict(option=name, regime=rg, species=sp.name, metric="final_median",
                                      value=float(np.nanmedian(fin)) if np.isfinite(fin).any() else np.nan))
    tables = {"regimes": pd.concat(reg_rows, ignore_index=True),
              "regime_shares": pd.DataFrame(share_rows),
              "risk_by_regime": pd.DataFrame(risk_rows, columns=["option", "regime", "species", "metric", "value"])}
    record = settings_record(s, members_diagnosed=int(sel.size), member_selection="first members by index, at most member_cap",
                             start="each option's state at the horizon", controls="press controls in force just before the horizon",
                             noise="off (deterministic)", events="none after the horizon", section=f"maxima of {sec_name}",
                             counts=counts, extinct="extinct is true when a species present at the start stays below its "
                                                    "quasi-extinction level over the whole window; extinct_species names them")
    return tables, record
