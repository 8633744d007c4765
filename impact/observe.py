"""What monitoring says about a member: the observation model, its likelihood, and the constraints.

A member's deterministic spin-up is recorded at the *record times* (every monitoring time and
every time a change limit compares abundances, counted from today = 0). From those states:

* :func:`log_likelihood` weighs the member against every count series and index (Poisson,
  negative binomial with size k, lognormal on an index), with detection, scale, dispersion and
  log-SD read per member (any of them may be an uncertain parameter);
* :func:`distance` measures how far the member is from meeting every hard constraint of the
  case: persistence of the species present today, the observed ranges today and the declared
  limits on change. It is 0 exactly when all are met, and grows with the size of the breach
  (a sum of log-ratios), so a sequential sampler can approach the constraints step by step;
* :func:`draw_observations` draws replicate data sets from the observation model (posterior
  predictive bands).
"""

from __future__ import annotations

import numpy as np
from scipy import special

from .case import Case, MonitoringSeries
from .model import resolve

# log-abundance floor: a zero abundance breaches a persistence or change constraint by this much
# at most per check, so the distance stays finite and orders members (common practice, no source)
LOG_FLOOR = np.log(1e-12)


def record_times(case: Case) -> np.ndarray:
    """Times (relative to today, in [-spinup, 0]) at which spin-up states are recorded: (R,)."""
    ts = {0.0}
    for s in case.monitoring:
        ts.update(s.times)
    for lim in case.change_limits:
        ts.update(lim.check_times())
    return np.array(sorted(round(float(t), 12) for t in ts))


def has_data(case: Case) -> bool:
    """Whether the case holds monitoring data (a likelihood to weigh) or limits on change."""
    return bool(case.monitoring or case.change_limits)


def _columns(times: np.ndarray, series_times) -> np.ndarray:
    """Positions of ``series_times`` among the record times (every one of them is a record time)."""
    return np.searchsorted(times, np.round(np.asarray(series_times, float), 12))


def series_log_likelihood(s: MonitoringSeries, values: dict, abundance: np.ndarray) -> np.ndarray:
    """Log-likelihood of one series for every member.

    Parameters
    ----------
    abundance : ndarray (M, K)
        The species' model abundance at the series' times.

    Returns
    -------
    ndarray (M,)
        ``-inf`` where the data are impossible (a positive count at zero abundance).
    """
    M = abundance.shape[0]
    y = np.asarray(s.values, float)[None, :]
    scale = resolve(s.scale, values, M)[:, None]
    N = np.where(np.isfinite(abundance), np.maximum(abundance, 0.0), np.nan)
    with np.errstate(divide="ignore", invalid="ignore"):
        if s.error == "lognormal":
            sd = resolve(s.log_sd, values, M)[:, None]
            z = (np.log(y) - np.log(scale * N)) / sd
            ll = -0.5 * z ** 2 - np.log(sd) - np.log(y) - 0.5 * np.log(2 * np.pi)
        else:
            mu = resolve(s.detection, values, M)[:, None] * scale * N
            if s.error == "poisson":
                ll = special.xlogy(y, mu) - mu - special.gammaln(y + 1)
            else:
                k = resolve(s.dispersion, values, M)[:, None]
                ll = (special.gammaln(y + k) - special.gammaln(k) - special.gammaln(y + 1)
                      + k * np.log(k / (k + mu)) + special.xlogy(y, mu / (k + mu)))
    total = ll.sum(axis=1)
    return np.where(np.isnan(total), -np.inf, total)


def log_likelihood(case: Case, values: dict, recorded: np.ndarray, times: np.ndarray) -> np.ndarray:
    """Sum of every series' log-likelihood: (M,) (0 when the case has no monitoring data).

    Parameters
    ----------
    recorded : ndarray (M, R, n_state)
        Spin-up states at ``times`` (:func:`record_times`).
    """
    col = {n: i for i, n in enumerate(case.species_names)}
    out = np.zeros(recorded.shape[0])
    for s in case.monitoring:
        out += series_log_likelihood(s, values, recorded[:, _columns(times, s.times), col[s.species]])
    return out


def _log(x: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.maximum(np.log(x), LOG_FLOOR)


def distance(case: Case, recorded: np.ndarray, times: np.ndarray, late_min: np.ndarray,
             failed: np.ndarray) -> dict[str, np.ndarray]:
    """How far each member is from meeting the case's hard constraints (0: all met).

    Parameters
    ----------
    recorded : ndarray (M, R, n_state)
        States at ``times``; the last time is today (0).
    late_min : ndarray (M, n_state)
        Minimum over the second half of spin-up (persistence is judged on it).
    failed : ndarray (M,) bool
        Numerical failures: distance ``inf``.

    Returns
    -------
    dict of ndarray (M,)
        ``distance`` (the sum), and its parts ``extinct``, ``range``, ``change`` (each a sum of
        log-ratios by which a bound is breached) for the counts of rejections.
    """
    col = {n: i for i, n in enumerate(case.species_names)}
    M = recorded.shape[0]
    today = recorded[:, -1]
    parts = {k: np.zeros(M) for k in ("extinct", "range", "change")}
    for j, s in enumerate(case.species):
        if s.present and s.quasi_extinction > 0:
            parts["extinct"] += np.maximum(0.0, np.log(s.quasi_extinction) - _log(late_min[:, j]))
    for ob in case.observed:
        x = _log(today[:, col[ob.species]])
        low = np.log(ob.low) if ob.low > 0 else -np.inf
        parts["range"] += np.maximum(0.0, low - x) + np.maximum(0.0, x - np.log(ob.high))
    for lim in case.change_limits:
        idx = _columns(times, lim.check_times())
        x = _log(recorded[:, idx, col[lim.species]])
        dt = np.diff(times[idx]) / lim.step
        step = np.diff(x, axis=1)
        if lim.up is not None:
            parts["change"] += np.maximum(0.0, step - dt * np.log(lim.up)).sum(axis=1)
        if lim.down is not None:
            parts["change"] += np.maximum(0.0, -step - dt * np.log(lim.down)).sum(axis=1)
    total = parts["extinct"] + parts["range"] + parts["change"]
    bad = failed | np.isnan(total)
    total = np.where(bad, np.inf, total)
    return {"distance": total, "failed": bad, **{k: np.where(bad, 0.0, v) for k, v in parts.items()}}


def draw_observations(case: Case, values: dict, recorded: np.ndarray, times: np.ndarray,
                      rng: np.random.Generator) -> dict[str, np.ndarray]:
    """One replicate data set per member from the observation model (posterior predictive).

    Returns
    -------
    dict of species -> ndarray (M, K)
        Replicate counts or index values at the series' times (NaN for a failed member).
    """
    col = {n: i for i, n in enumerate(case.species_names)}
    out = {}
    for s in case.monitoring:
        N = recorded[:, _columns(times, s.times), col[s.species]]
        M, K = N.shape
        ok = np.isfinite(N).all(axis=1)
        N = np.where(np.isfinite(N), np.maximum(N, 0.0), 0.0)
        scale = resolve(s.scale, values, M)[:, None]
        if s.error == "lognormal":
            sd = resolve(s.log_sd, values, M)[:, None]
            rep = scale * N * np.exp(sd * rng.standard_normal((M, K)))
        else:
            mu = resolve(s.detection, values, M)[:, None] * scale * N
            if s.error == "negative-binomial":
                k = resolve(s.dispersion, values, M)[:, None]
                mu = rng.gamma(np.broadcast_to(k, (M, K)), np.where(mu > 0, mu, 0.0) / k)
            rep = rng.poisson(mu).astype(float)
        rep[~ok] = np.nan
        out[s.species] = rep
    return out
