"""Whether an eradication is done: the chance a target is gone, the empty surveys needed to say so,
and the chance it comes back from outside.

Definitions (each once, here):

* **gone** (:func:`gone_mask`): a member's abundance has fallen below the declared ``gone_below``
  level (e.g. one individual on the whole site, as a density) by the horizon. Below one
  individual a continuous abundance that grows again is an artefact of the continuous model, so
  the running minimum decides; a model that counts individuals feeds its own zero here.
* **reinvasion** (:func:`reinvasion_chance`): individuals arrive from outside as a Poisson process of
  rate λ per time unit, each founding a population again with chance ε (thinning a Poisson
  process gives a Poisson process of rate λ ε), so the chance of at least one founding in an
  exposure of length τ after the target is gone is 1 − exp(−λ ε τ).
* **success** by a horizon: gone, and not re-founded since.
* **absence after k empty surveys** (:func:`absence_after`): with prior chance π that the target is
  present and per-survey detection p, Bayes' rule gives 1 − π(1 − p)^k / [π(1 − p)^k + 1 − π]
  (Ramsey, Parkes & Morrison 2009 use this reasoning for eradication surveillance). Over the
  members (:func:`ensemble_absence_after`) each member's chance of presence and its own drawn
  detection enter the same sum, so an uncertain detection is averaged, not fixed.
* **surveys needed**: the fewest empty surveys after which the chance of absence reaches the
  declared confidence (:func:`surveys_needed`).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from impact.case import Case
from impact.risk import metrics as mx
from impact.store.results import ERADICATION_COLUMNS, ERADICATION_MEMBER_COLUMNS

# the most empty surveys looked for; beyond it the confidence counts as out of reach
SURVEY_LIMIT = 1000


def gone_mask(minimum: np.ndarray, level: float) -> np.ndarray:
    """Whether each member's target is gone: its lowest abundance so far is below ``level`` (or zero).

    Parameters
    ----------
    minimum : ndarray (M,)
        Running minimum of the abundance up to the horizon; NaN marks a failed member (not gone).
    level : float
        The ``gone_below`` level (0: gone means exactly no individuals left).

    Returns
    -------
    ndarray (M,) bool
    """
    m = np.asarray(minimum, float)
    with np.errstate(invalid="ignore"):
        return (m < level) | (m <= 0.0)


def absence_after(presence, detection, k):
    """Chance of absence after ``k`` empty surveys: 1 − π q / (π q + 1 − π), q = (1 − p)^k.

    Parameters
    ----------
    presence : float or ndarray
        Prior chance π that the target is present.
    detection : float or ndarray
        Chance p that one survey detects it when present.
    k : int or ndarray
        Empty surveys.
    """
    pi = np.asarray(presence, float)
    q = (1.0 - np.asarray(detection, float)) ** np.asarray(k, float)
    return 1.0 - pi * q / (pi * q + 1.0 - pi)


def ensemble_absence_after(absent: np.ndarray, detection: np.ndarray, k) -> np.ndarray:
    """Chance of absence after ``k`` empty surveys over the members: Σ a / (Σ a + Σ (1 − a)(1 − p)^k).

    Parameters
    ----------
    absent : ndarray (M,)
        Each member's chance that the target is absent (0 or 1 for a member whose target is gone or
        not; in between when re-founding is a chance).
    detection : ndarray (M,)
        Each member's per-survey detection.
    k : int or ndarray (K,)

    Returns
    -------
    float or ndarray (K,)
    """
    a = np.asarray(absent, float)
    k = np.asarray(k, float)
    q = (1.0 - np.asarray(detection, float))[:, None] ** np.atleast_1d(k)[None, :]
    present = ((1.0 - a)[:, None] * q).sum(axis=0)
    gone = a.sum()
    with np.errstate(invalid="ignore", divide="ignore"):
        out = gone / (gone + present)
    return out if k.ndim else float(out[0])


def surveys_needed(absent: np.ndarray, detection: np.ndarray, confidence: float) -> tuple[float, float]:
    """Fewest empty surveys after which the chance of absence reaches ``confidence``.

    Returns
    -------
    (k, reached) : the number (NaN when out of reach within :data:`SURVEY_LIMIT`) and the chance of
    absence it gives (NaN likewise)
    """
    ks = np.arange(SURVEY_LIMIT + 1)
    post = ensemble_absence_after(absent, detection, ks)
    ok = np.flatnonzero(post >= confidence)
    if not ok.size:
        return float("nan"), float("nan")
    return float(ks[ok[0]]), float(post[ok[0]])


def surveys_needed_closed_form(presence: float, detection: float, confidence: float) -> float:
    """:func:`surveys_needed` for one known π and p: the smallest whole k ≥ 0 with
    (1 − p)^k ≤ (1 − c)(1 − π)/(c π), from :func:`absence_after` ≥ c solved for k."""
    if presence <= 0.0 or absence_after(presence, detection, 0) >= confidence:
        return 0.0
    if presence >= 1.0 or detection <= 0.0:
        return float("nan")
    bound = np.log((1.0 - confidence) * (1.0 - presence) / (confidence * presence)) / np.log1p(-detection)
    k = float(np.ceil(bound - 1e-12))
    # the rounding guard: accept k − 1 when it already reaches the confidence
    return k - 1.0 if k >= 1 and absence_after(presence, detection, k - 1) >= confidence else k


def reinvasion_chance(rate, establishment, exposure):
    """Chance that at least one arrival founds a population in ``exposure`` time units:
    1 − exp(−λ ε τ) (a Poisson process of arrivals thinned by the founding chance)."""
    x = np.asarray(rate, float) * np.asarray(establishment, float) * np.maximum(np.asarray(exposure, float), 0.0)
    return -np.expm1(-x)


def time_gone(times: np.ndarray, trajectory: np.ndarray, gone: np.ndarray, horizon: float) -> np.ndarray:
    """When each member's target went: the first output time below the level, else (gone between
    output times) the horizon; inf when not gone by ``horizon``.

    Parameters
    ----------
    times : ndarray (T,)
    trajectory : ndarray (M, T) bool
        Whether the abundance is below the level at each output time.
    gone : ndarray (M,) bool
        :func:`gone_mask` at the horizon.
    """
    inside = times <= horizon + 1e-12
    below = trajectory[:, inside]
    first = np.where(below.any(axis=1), times[inside][np.argmax(below, axis=1)], horizon)
    return np.where(gone, first, np.inf)


def _resolve(q, values: dict, M: int) -> np.ndarray:
    return np.asarray(values[q], float) if isinstance(q, str) else np.full(M, float(q))


def eradication_tables(case: Case, values: dict, draws: np.ndarray, runs: dict) -> dict[str, pd.DataFrame]:
    """``eradication.csv`` (per option, surveyed species and risk horizon) and
    ``eradication_members.csv`` (per member), or nothing for a case without ``[[surveillance]]``.

    ``runs`` maps option names to :class:`impact.risk.runs.Summary`; ``values`` the members'
    parameter values; ``draws`` their draw indices.
    """
    if not case.surveillance:
        return {}
    rows, members = [], []
    col = {n: i for i, n in enumerate(case.species_names)}
    for opt, run in runs.items():
        M = run.members
        for sv in case.surveillance:
            j, sp = col[sv.species], case.species_by_name(sv.species)
            p = _resolve(sv.detection, values, M)
            lam, eps = _resolve(sv.arrival_rate, values, M), _resolve(sv.establishment, values, M)
            ok = ~run.failed
            below = np.asarray(run.trajectory[:, :, j], float) < sv.gone_below
            H = case.horizon
            when = time_gone(run.times, below, gone_mask(run.minimum[:, run.slot(H), j], sv.gone_below) & ok, H)
            members.append(pd.DataFrame({"member": draws, "option": opt, "species": sv.species,
                                         "gone_at": np.where(np.isfinite(when), when, np.nan), "detection": p,
                                         "arrival_rate": lam, "establishment": eps}))
            for h in case.risk.times:
                rows.append(_row(case, opt, sv, sp.unit, h, when[ok], p[ok], lam[ok], eps[ok]))
    return {"eradication.csv": pd.DataFrame(rows, columns=list(ERADICATION_COLUMNS)),
            "eradication_members.csv": pd.concat(members, ignore_index=True)[list(ERADICATION_MEMBER_COLUMNS)]}


def _row(case: Case, opt: str, sv, unit: str, h: float, when, p, lam, eps) -> dict:
    """One row of eradication.csv from the assessed members' times gone and surveillance values."""
    conf = case.risk.confidence
    n = int(when.size)
    gone = when <= h
    back = np.where(gone, reinvasion_chance(lam, eps, h - np.where(gone, when, h)), 0.0)
    success = np.where(gone, 1.0 - back, 0.0)
    k_gone = int(gone.sum())
    g_lo, g_hi = mx.clopper_pearson(k_gone, n, conf)
    s_mean = float(success.mean()) if n else np.nan
    # the members' expected count of successes in the exact binomial interval: a member's success is a
    # chance event (re-founding) when arrivals are declared, so the count need not be whole
    s_lo, s_hi = mx.clopper_pearson(success.sum(), n, conf)
    k, reached = surveys_needed(success, p, sv.confidence) if n else (np.nan, np.nan)
    return dict(option=opt, species=sv.species, horizon=h, gone_below=sv.gone_below, unit=unit,
                chance_gone=k_gone / n if n else np.nan, gone_low=float(g_lo), gone_high=float(g_hi),
                chance_reinvaded=float(back[gone].mean()) if k_gone else np.nan, chance_success=s_mean,
                success_low=float(s_lo), success_high=float(s_hi), interval="clopper_pearson", level=conf, n=n,
                detection_mean=float(p.mean()) if n else np.nan, confidence=sv.confidence, surveys_needed=k,
                absence_reached=reached, survey=sv.survey)
