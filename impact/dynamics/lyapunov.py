"""Dynamical regime diagnostics: equilibrium, cycles, chaos, predictability horizon, scans.

After a transient, each member is followed over a window cut into sub-windows while the tangent
(variational) equations ride along and are renormalised at every integration step (Benettin et
al. 1980), giving a finite-time largest Lyapunov exponent per sub-window. The trajectory is also
cut by a Poincaré section — the successive local maxima of one state variable, located inside
the step where its derivative changes sign by cubic Hermite interpolation. The verdict
(:mod:`impact.dynamics.regimes`) weighs the exponent with its uncertainty, the decay of the oscillation
envelope and the repetition of the section, and is checked by doubling the window. Transient and
window come from the web's own time scales (:mod:`impact.dynamics.timescales`) unless declared.

The predictability horizon is t = ln(Δ/δ0)/λ for λ > 0 (an initial relative error δ0 grows to
the tolerance Δ); it is infinite otherwise. All settings live in :class:`DynamicsSettings` and
are written to ``dynamics.json``. Numerics only: no file I/O here.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np

from impact.dynamics import regimes as rg
from impact.case import Case
from impact.errors import SettingError
from impact.engine.web import tolerance
from impact.engine.integrate import StepView, integrate_segment
from impact.engine.jacobian import WebTangent, jacobian, tangent
from impact.engine.stepper import libm_log
from impact.model import Controls, FoodWeb, WebParams, WebRHS
from impact.dynamics.regimes import Rules

PURPOSE_DYNAMICS = 8  # spawn-key purpose for choosing the screened members
FLOW_ENGINES = ("compiled", "numpy")  # see lyapunov_flow


@dataclass(frozen=True)
class DynamicsSettings:
    """Declared settings of the diagnostics (all times in the case's time unit).

    Attributes
    ----------
    transient, window, sample_dt : float or None
        Time discarded before diagnosing, time diagnosed (all sub-windows together) and longest
        integration step; None (the default) chooses each from the web's time scales
        (:mod:`impact.dynamics.timescales`).
    n_sub : int
        Sub-windows of the window (at least 4; the verdict is compared with that of the first
        half of them).
    doublings : int
        How many times the window of a member whose verdict changed on doubling is doubled
        again before it is left undetermined.
    max_window : float or None
        Cap on a chosen transient and window; None: ``max_window_rates`` times each member's
        slowest per-capita time scale.
    max_window_rates : float
        See ``max_window`` (2000: common practice, no source; the screen uses less to bound its cost).
    delta0, tolerance : float
        Initial relative uncertainty (e.g. a survey's relative error) and the relative error
        at which a projection stops being useful; horizon = ln(tolerance/delta0)/λ.
    eq_tol, period_tol, max_period, env_tol, confidence
        Tolerances of the verdict, see :class:`impact.dynamics.regimes.Rules`.
    rtol, atol : float
        Integrator tolerances for model and tangent.
    screen_members : int
        Members per option diagnosed in an assessment (a random subset when there are more).
    sub_relaxations : float
        Relaxation times a sub-window spans at least (precision of λ at an equilibrium).
    """

    transient: float | None = None
    window: float | None = None
    sample_dt: float | None = None
    n_sub: int = 8
    doublings: int = 1
    max_window: float | None = None
    max_window_rates: float = 2000.0
    delta0: float = 0.05
    tolerance: float = 0.5
    eq_tol: float = 1e-3
    period_tol: float = 1e-3
    max_period: int = 8
    env_tol: float = 0.05
    confidence: float = 0.99
    rtol: float = 1e-7
    atol: float = 1e-9
    screen_members: int = 300
    sub_relaxations: float = 4.0

    @property
    def rules(self) -> Rules:
        return Rules(eq_tol=self.eq_tol, period_tol=self.period_tol, max_period=self.max_period,
                     env_tol=self.env_tol, confidence=self.confidence)


@dataclass(frozen=True)
class Diagnosis:
    """Per-member outcome of :func:`lyapunov_flow`.

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
        Integrator failure code (see ``impact.engine.integrate.FAILURE_REASONS``).
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


def predictability_time(lyap, delta0: float, tolerance: float) -> np.ndarray:
    """Time for an error δ0 to grow to Δ at rate λ, ln(Δ/δ0)/λ (Lorenz 1969); inf for λ ≤ 0."""
    lyap = np.asarray(lyap, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.log(tolerance / delta0) / lyap
    return np.where(np.isnan(lyap), np.nan, np.where(lyap > 0, t, np.inf))


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
            self.lg += libm_log(norm)
            np.minimum(self.low, s.y_new, out=self.low)
            np.maximum(self.high, s.y_new, out=self.high)
            self.acc += area
        else:
            w = accept[:, None]
            self.lg[rows] += np.where(accept, libm_log(norm), 0.0)
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
                  max_steps: int = 1_000_000, blowup: float = 1e12, engine: str = "compiled") -> Diagnosis:
    """Largest Lyapunov exponent by tangent integration with renormalisation (Benettin et al. 1980).

    State and tangent vector advance together on the steps of
    :func:`impact.engine.integrate.integrate_segment`, one adaptive step size per member chosen from the
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
        :class:`impact.engine.jacobian.WebTangent`); default: ``fun`` and ``jac`` times ``v``.
    max_steps, blowup : as in :func:`impact.engine.integrate.integrate_segment` (steps per stage:
        transient, then window).
    engine : {"compiled", "numpy"}
        With ``jvp`` a :class:`impact.engine.jacobian.WebTangent` of a web the compiled J·v covers and
        ``nonnegative``: "compiled" runs the whole transient and window of each member in the
        compiled tangent flow generated for the web's structure (:mod:`impact.engine.flow`), with
        the numbers of the numpy step loop ("numpy", used for every other model) to the bit.

    Returns
    -------
    Diagnosis
        ``nfev`` counts evaluations of the right-hand side with its tangent (calls on a subset of
        the ensemble in the numpy step loop, member evaluations in the compiled flow).
    """
    y_all = np.array(y0, float)
    M, n = y_all.shape
    members = np.arange(M) if members is None else np.asarray(members)
    section_all = np.broadcast_to(np.asarray(section, int), (M,)).copy()
    if engine not in FLOW_ENGINES:
        raise ValueError(f"engine must be one of {FLOW_ENGINES}, got {engine!r}")
    if (engine != "numpy" and nonnegative and isinstance(jvp, WebTangent) and jvp.structure is not None
            and transient >= 0 and window > 0):
        return _compiled_flow(jvp, y_all, members, section_all, transient=transient, window=window,
                              sample_dt=sample_dt, rtol=rtol, atol=atol, t0=t0, max_steps=max_steps, blowup=blowup)
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


def _compiled_flow(jvp, y, members, section, *, transient, window, sample_dt, rtol, atol, t0, max_steps,
                   blowup) -> Diagnosis:
    """:func:`lyapunov_flow` by the compiled tangent flow, one kernel call for every member."""
    from impact.engine.tangent import tangent_flow

    n = y.shape[1]
    r = tangent_flow(jvp.structure, jvp.coefficient_rows(members), y, t0=t0, transient=transient, window=window,
                     hmax=sample_dt, section=section, rtol=tolerance(rtol, n, "rtol"), atol=tolerance(atol, n, "atol"),
                     max_steps=max_steps, blowup=blowup)
    ok = r["reason"] == 0
    okc = ok[:, None]
    return Diagnosis(np.where(ok, r["lg"] / window, np.nan), r["sections"], np.where(okc, r["low"], np.nan),
                     np.where(okc, r["high"], np.nan), np.where(okc, r["acc"] / (2.0 * window), np.nan), r["final"],
                     ~ok, r["reason"], r["nfev"])


def _sumsq(x):
    """Per-row sum of squares, column by column so the order never depends on the batch."""
    acc = x[:, 0] * x[:, 0]
    for j in range(1, x.shape[1]):
        acc = acc + x[:, j] * x[:, j]
    return acc


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


def slowest_rate(p: WebParams) -> np.ndarray:
    """Each member's slowest per-capita rate (growth, mortality): (M,) 1/time (1 where none)."""
    rates = np.concatenate([np.abs(p.r), np.abs(p.m)], axis=1)
    rates = np.where(np.isfinite(rates) & (rates > 0), rates, np.inf)
    slow = rates.min(axis=1)
    return np.where(np.isfinite(slow), slow, 1.0)


def declared_settings(case: Case, base: dict | None = None, **command_line) -> tuple[DynamicsSettings, dict]:
    """Settings from ``base`` defaults, then the case's ``[dynamics]`` table, then the command line.

    ``command_line`` values that are None are not declared. Returns the settings and what was
    declared where (for dynamics.json).
    """
    table = case.dynamics.declared() if case.dynamics is not None else {}
    cli = {k: v for k, v in command_line.items() if v is not None}
    return DynamicsSettings(**{**(base or {}), **table, **cli}), {"case file": table, "command line": cli}


def section_species(case: Case, name: str | None) -> tuple[int, str]:
    """Column and name of the species whose successive maxima form the Poincaré section.

    ``None`` takes the case file's ``[dynamics] section`` if declared, else the last declared
    species. An unknown name is a :class:`SettingError` for ``section``.
    """
    names = case.species_names
    if name is None and case.dynamics is not None and case.dynamics.section is not None:
        name = case.dynamics.section
    if name is None:
        return len(names) - 1, names[-1]
    if name not in names:
        raise SettingError("section", f"unknown species {name!r} for the section; allowed: {', '.join(names)}")
    return names.index(name), name


def settings_record(s: DynamicsSettings, **extra) -> dict:
    """The settings and verdict rules as a JSON-ready dict (for dynamics.json)."""
    rec = asdict(s)
    rec["thresholds"] = asdict(s.rules)
    rec["windows"] = ("declared" if s.window is not None else
                      "from each member's time scales (eigenvalues at the nearest equilibrium, else the slowest "
                      "per-capita rate), rounded up to a power of two of the time unit; checked by doubling")
    rec["regime_rules"] = rg.__doc__.split("Rules (in this order):")[1].strip()
    rec["undetermined_reasons"] = {r.value: r.text for r in rg.Reason}
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
    regime, period = rg.map_verdict(lyap, orbit, s.rules)
    return regime, period, lyap, orbit
