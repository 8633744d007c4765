"""Dynamical regime diagnostics: equilibrium, cycles, chaos, predictability horizon, scans.

After a transient, each member is followed over a window while the tangent (variational)
equations ride along and are renormalised at every sample (Benettin et al. 1980), giving the
largest Lyapunov exponent λ. At every sample the trajectory is also cut by a Poincaré
section — the successive local maxima of one state variable, located between samples by cubic
Hermite interpolation — and the period k is the smallest shift under which the section
sequence repeats. The regime follows from the section, λ and the amplitude:

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
from .integrate import FAILURE_REASONS, integrate_segment
from .jacobian import jacobian, tangent
from .model import Controls, FoodWeb, WebParams, WebRHS, build_web, rhs, web_params

REGIMES = ("equilibrium", "cycle", "irregular", "chaotic", "extinction")


@dataclass(frozen=True)
class DynamicsSettings:
    """Declared settings of the diagnostics (all times in the case's time unit).

    Attributes
    ----------
    transient, window : float
        Time discarded before diagnosing, and time diagnosed.
    sample_dt : float
        Interval between samples (tangent renormalisation and section checks); must be well
        below half the shortest oscillation period.
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


def _hermite_max(y0, y1, f0, f1, dt, iters=40):
    """Maximum of the cubic Hermite interpolant on [0, dt] where f0 > 0 ≥ f1: (k,) arrays."""
    c1 = dt * f0
    c2 = 3.0 * (y1 - y0) - dt * (2.0 * f0 + f1)
    c3 = 2.0 * (y0 - y1) + dt * (f0 + f1)
    lo, hi = np.zeros_like(y0), np.ones_like(y0)
    for _ in range(iters):  # p'(s) goes from + to − on [0, 1]: bisect its sign change
        mid = 0.5 * (lo + hi)
        pos = c1 + mid * (2.0 * c2 + 3.0 * c3 * mid) > 0
        lo = np.where(pos, mid, lo)
        hi = np.where(pos, hi, mid)
    x = 0.5 * (lo + hi)
    return y0 + x * (c1 + x * (c2 + x * c3))


# --------------------------------------------------------------------------------------------
# Lyapunov exponent of a flow (Benettin et al. 1980) on the ensemble integrator


def lyapunov_flow(fun, jac, y0, *, transient: float, window: float, sample_dt: float, section=0,
                  rtol=1e-7, atol=1e-9, members=None, nonnegative=True, t0: float = 0.0) -> Diagnosis:
    """Largest Lyapunov exponent by tangent integration with renormalisation (Benettin et al. 1980).

    Parameters
    ----------
    fun : callable ``fun(t, y, members) -> (m, n)``
    jac : callable ``jac(t, y, members) -> (m, n, n)``
    y0 : ndarray (M, n)
    transient, window, sample_dt : float
        Discarded time, diagnosed time, and the renormalisation / sampling interval.
    section : int or int ndarray (M,)
        State column whose successive maxima form the Poincaré section.
    members : int ndarray (M,), optional
        Member indices passed on to ``fun`` and ``jac``.
    nonnegative : bool
        Evaluate the model at max(y, 0) (abundances) and clip states at samples.

    Returns
    -------
    Diagnosis
    """
    y = np.array(y0, float)
    M, n = y.shape
    members = np.arange(M) if members is None else np.asarray(members)
    section = np.broadcast_to(np.asarray(section, int), (M,))
    rows = np.arange(M)

    def aug(t, Y, mem):
        x = Y[:, :n]
        if nonnegative:
            x = np.maximum(x, 0.0)
        f = fun(t, x, mem)
        V = Y[:, n:]
        if nonnegative:
            # An absent species stays absent (the model is of Kolmogorov form and the web is
            # closed), so perturbations are confined to the face of present species: otherwise
            # the invasion rate of an eradicated species would pass for chaos.
            present = x > 0
            V = np.where(present, V, 0.0)
            return np.concatenate([f, np.where(present, tangent(jac(t, x, mem), V), 0.0)], axis=1)
        return np.concatenate([f, tangent(jac(t, x, mem), V)], axis=1)

    v = np.arange(1.0, n + 1.0)
    v = np.tile(v / np.sqrt((v * v).sum()), (M, 1))
    Y = np.concatenate([y, v], axis=1)
    atol_aug = np.concatenate([np.broadcast_to(np.asarray(atol, float), (n,)), np.full(n, max(rtol, 1e-9))])
    failed = ~np.isfinite(Y).all(axis=1)
    reason = np.where(failed, 1, 0).astype(np.int8)
    h = np.full(M, np.nan)
    nfev = 0
    total = transient + window
    n_samples = max(int(np.ceil(total / sample_dt)), 1)
    dt = total / n_samples
    n_skip = int(round(transient / dt))
    log_growth = np.zeros(M)
    low = np.full((M, n), np.inf)
    high = np.full((M, n), -np.inf)
    acc = np.zeros((M, n))
    sections: list[list[float]] = [[] for _ in range(M)]
    f_prev = None
    y_sec_prev = None
    t = t0
    for k in range(n_samples):
        active = np.flatnonzero(~failed)
        if not active.size:
            break
        h0 = h[active]
        seg = integrate_segment(aug, t, t + dt, Y[active], rtol=rtol, atol=atol_aug,
                                h0=None if np.isnan(h0).any() else h0, members=members[active],
                                nonnegative=False)
        nfev += seg.nfev
        t += dt
        Y[active] = seg.y
        h[active] = seg.h
        newly = seg.failed
        failed[active[newly]] = True
        reason[active[newly]] = seg.reason[newly]
        Y[failed] = np.nan
        if nonnegative:
            Y[:, :n] = np.maximum(Y[:, :n], 0.0)
            tan = Y[:, n:]
            tan[Y[:, :n] <= 0] = 0.0
        norm = np.sqrt((Y[:, n:] * Y[:, n:]).sum(axis=1))
        dead = (norm == 0) & ~failed
        if dead.any():  # nothing left to perturb: restart the vector on the present face, no growth
            fresh = np.where(Y[dead, :n] > 0, 1.0, 0.0)
            fresh[fresh.sum(axis=1) == 0] = 1.0
            Y[dead, n:] = fresh
            norm[dead] = np.sqrt((fresh * fresh).sum(axis=1))
        Y[:, n:] /= norm[:, None]
        if dead.any():
            norm[dead] = 1.0
        # section variable and its derivative at this sample, for maxima between samples
        x = Y[:, :n]
        f_now = np.full((M, n), np.nan)
        ok = np.flatnonzero(~failed)
        if ok.size:
            f_now[ok] = fun(np.full(ok.size, t), x[ok], members[ok])
            nfev += 1
        y_sec = x[rows, section]
        df = f_now[rows, section]
        if k >= n_skip:
            log_growth += np.log(norm)
            np.minimum(low, x, out=low)
            np.maximum(high, x, out=high)
            acc += x
            if f_prev is not None:
                hit = np.flatnonzero((f_prev > 0) & (df <= 0))
                if hit.size:
                    peaks = _hermite_max(y_sec_prev[hit], y_sec[hit], f_prev[hit], df[hit], dt)
                    for j, val in zip(hit, peaks):
                        sections[j].append(float(val))
        f_prev, y_sec_prev = df, y_sec
    used = max(n_samples - n_skip, 1)
    lyap = np.where(failed, np.nan, log_growth / (used * dt))
    mean = acc / used
    low[failed], high[failed], mean[failed] = np.nan, np.nan, np.nan
    return Diagnosis(lyap, [np.array(s) for s in sections], low, high, mean, Y[:, :n].copy(),
                     failed, reason, nfev)


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
    fun, jac = web_functions(web, p, c)
    start = np.where(np.isfinite(y0), np.maximum(y0, 0.0), np.nan)
    if section is None:
        section = S - 1 if S else 0
    d = lyapunov_flow(fun, jac, start, transient=s.transient, window=s.window, sample_dt=s.sample_dt,
                      section=section, rtol=s.rtol, atol=s.atol, members=members)
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


def scan_web(case: Case, parameter: str, grid: np.ndarray, s: DynamicsSettings, option: str | None = None,
             section: str | None = None, continuation: bool = True, progress=None):
    """Bifurcation scan of one quantity with every other parameter at its prior median.

    ``section`` names the species whose maxima form the Poincaré section (default: the last
    declared species); an unknown name raises :class:`CaseError` for ``--section``.

    With ``continuation`` each value starts where the previous one ended (so a branch is
    followed and hysteresis shows); without it all values run side by side as one ensemble
    from the case's initial state (much faster; each value finds its own attractor).

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
        out = diagnose_web(web, p, c, p.initial, s, level, section=section)
        for i, v in enumerate(grid):
            r, pt = _scan_rows(parameter, v, out, i, keep)
            rows += r
            pts.append(pt)
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


def assess_stage(case: Case, params: WebParams, values: dict, runs: dict, settings: DynamicsSettings | None = None,
                 progress=None, section: str | None = None):
    """Diagnose every option's end-of-horizon state (the assessment's dynamics stage).

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
    from .simulate import _controls

    sec_col, sec_name = section_species(case, section)
    web = build_web(case)
    S = web.n_species
    base = runs["baseline"]
    M = base.states.shape[0]
    sel = np.arange(min(M, settings.member_cap if settings else DynamicsSettings.__dataclass_fields__['member_cap'].default))
    sub = WebParams(*(getattr(params, f)[sel] for f in WebParams.__dataclass_fields__))
    if settings is None:
        # Inside an assessment the diagnosis is a screen: a few horizons of run-in and window,
        # at the integrator's usual tolerance (common practice, no source); `impact scan`
        # keeps the longer defaults.
        s0 = default_settings(case, sub, base.states[sel, -1])
        H = case.horizon
        s = default_settings(case, sub, base.states[sel, -1], rtol=1e-6,
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
    for opt, name in opts.items():
        run = runs[name]
        y0 = run.states[sel, -1]
        vals = {k: np.asarray(v)[sel] for k, v in values.items()}
        c = _controls(case, opt, vals, t_last, np.ones((sel.size, S)), sel.size, S)
        if progress:
            progress(f"dynamics: {name} on {sel.size} members", True)
        out = diagnose_web(web, sub, c, y0, s, level, section=sec_col)
        d = out["diagnosis"]
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
                mins = run.cummin[rows, -1, j]
                ok = np.isfinite(mins)
                if sp.present:
                    risk_rows.append(dict(option=name, regime=rg, species=sp.name, metric="quasi_extinction",
                                          value=float((mins[ok] < sp.quasi_extinction).mean()) if ok.any() else np.nan))
                    risk_rows.append(dict(option=name, regime=rg, species=sp.name, metric="expected_minimum",
                                          value=float(mins[ok].mean()) if ok.any() else np.nan))
                fin = run.states[rows, -1, j]
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
