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

from impact.case import Case, MonitoringSeries
from impact.model import resolve

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


def constraint_labels(case: Case) -> list[tuple[str, str]]:
    """Every hard constraint as ``(field, words)``, in the order of :func:`constraint_terms`."""
    out = [(f"species[{j}].quasi_extinction", f"{s.name} stays above {s.quasi_extinction:g} {s.unit} through the "
            "second half of spin-up") for j, s in enumerate(case.species) if s.present and s.quasi_extinction > 0]
    out += [(f"observed[{i}]", f"{ob.species} {ob.low:g}–{ob.high:g} today") for i, ob in enumerate(case.observed)]
    for i, lim in enumerate(case.change_limits):
        if lim.up is not None:
            out.append((f"change_limits[{i}].up_at_most",
                        f"{lim.species} grows at most ×{lim.up:g} per {lim.step:g}"))
        if lim.down is not None:
            out.append((f"change_limits[{i}].down_at_most",
                        f"{lim.species} falls at most ÷{lim.down:g} per {lim.step:g}"))
    return out


def constraint_terms(case: Case, recorded: np.ndarray, times: np.ndarray, late_min: np.ndarray):
    """Each hard constraint's breach per member, in the order :func:`distance` adds them.

    Yields ``(part, breach)``: the part of the distance (``extinct``, ``range``, ``change``) and the
    breach, ndarray (M,), a log-ratio (0 where met); :func:`constraint_labels` names them in the same
    order. A limit on change yields its growth and its fall bound as two terms.
    """
    col = {n: i for i, n in enumerate(case.species_names)}
    today = recorded[:, -1]
    for j, s in enumerate(case.species):
        if s.present and s.quasi_extinction > 0:
            yield "extinct", np.maximum(0.0, np.log(s.quasi_extinction) - _log(late_min[:, j]))
    for ob in case.observed:
        x = _log(today[:, col[ob.species]])
        low = np.log(ob.low) if ob.low > 0 else -np.inf
        yield "range", np.maximum(0.0, low - x) + np.maximum(0.0, x - np.log(ob.high))
    for lim in case.change_limits:
        idx = _columns(times, lim.check_times())
        x = _log(recorded[:, idx, col[lim.species]])
        dt = np.diff(times[idx]) / lim.step
        step = np.diff(x, axis=1)
        if lim.up is not None:
            yield "change", np.maximum(0.0, step - dt * np.log(lim.up)).sum(axis=1)
        if lim.down is not None:
            yield "change", np.maximum(0.0, -step - dt * np.log(lim.down)).sum(axis=1)


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
    dict of ndarray
        ``distance`` (M,) (the sum), and its parts ``extinct``, ``range``, ``change`` (M,) (each a
        sum of log-ratios by which a bound is breached) for the counts of rejections; ``breaches``
        (M, K), every term of :func:`constraint_terms` (0 for a failed member), for a refusal's message.
    """
    M = recorded.shape[0]
    parts = {k: np.zeros(M) for k in ("extinct", "range", "change")}
    terms = []
    for part, breach in constraint_terms(case, recorded, times, late_min):
        parts[part] += breach
        terms.append(breach)
    total = parts["extinct"] + parts["range"] + parts["change"]
    bad = failed | np.isnan(total)
    total = np.where(bad, np.inf, total)
    breaches = np.where(bad[:, None], 0.0, np.column_stack(terms)) if terms else np.zeros((M, 0))
    return {"distance": total, "failed": bad, "breaches": breaches,
            **{k: np.where(bad, 0.0, v) for k, v in parts.items()}}


# a refusal names at most this many constraints, those furthest from being met
UNMET_SHOWN = 3


def unmet_constraints(case: Case, breaches: np.ndarray, failed: np.ndarray | None = None) -> str:
    """The constraints furthest from being met by a population, and how close its closest members come.

    Parameters
    ----------
    breaches : ndarray (M, K)
        :func:`distance`'s ``breaches`` of the population.
    failed : ndarray (M,) bool, optional
        Members that failed numerically (left out).

    Returns
    -------
    str
        ``"observed[2] (cat 500–600 today): 0 of 1000 members meet it; the closest is a factor 1.8
        outside"``, for the constraints with the largest smallest breach; empty when there is none.
    """
    ok = np.ones(breaches.shape[0], bool) if failed is None else ~np.asarray(failed, bool)
    b = breaches[ok]
    if b.size == 0:
        return ""
    labels = constraint_labels(case)
    closest, met = b.min(axis=0), (b <= 0).sum(axis=0)
    order = [k for k in np.argsort(-closest, kind="stable") if closest[k] > 0][:UNMET_SHOWN]
    if not order:  # each is met by some member, never all at once: name those met by the fewest
        order = list(np.argsort(met, kind="stable")[:UNMET_SHOWN])
    return "; ".join(f"{labels[k][0]} ({labels[k][1]}): {int(met[k])} of {len(b)} members meet it"
                     + (f", the closest is a factor {np.exp(closest[k]):.3g} outside" if closest[k] > 0 else "")
                     for k in order)


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
