"""Paired effects of each option, objectives judged, and options compared member by member.

Every option runs on the same members as the baseline, with the same noise and chance events,
so the effect of an option on a member is the difference between its two runs. This module
turns the per-member summaries into three tidy tables (column names defined once, below):

* ``effects.csv``: per option, species, metric and horizon, the distribution over members of
  the paired change and the probabilities that the option is worse for the species, or changes
  it materially;
* ``objectives.csv``: each declared objective judged for every option (and for the baseline
  where the requirement is a chance), with its interval and a status;
* ``comparisons.csv``: for each objective, each run's chance of a good outcome, the paired chance
  that one run has it where another does not, and which runs are best by :func:`best_choices`.

All functions are pure: summaries in, DataFrames out.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from impact.risk import metrics as mx
from impact.case import Case, Objective

BASELINE = "baseline"

# ------------------------------------------------------------------------- table columns
EFFECT_COLUMNS = ("option", "species", "role", "direct", "metric", "horizon", "statistic", "value", "low", "high",
                  "interval", "level", "n", "threshold")
OBJECTIVE_COLUMNS = ("objective", "option", "species", "measure", "horizon", "event", "requirement", "bound",
                     "statistic", "value", "low", "high", "interval", "level", "n", "status")
COMPARISON_COLUMNS = ("objective", "option", "versus", "statistic", "value", "low", "high", "interval", "level", "n")

# statistics of effects.csv, by metric
CHANGE_STATISTICS = ("median_change", "p_worse", "p_material", "p_material_increase", "p_material_decrease")
EVENT_STATISTICS = ("difference", "p_worse")
# status words of objectives.csv
MET, NOT_MET, UNDECIDED = "met", "not met", "undecided"


def _rows_to_frame(rows: list[dict], columns: tuple[str, ...]) -> pd.DataFrame:
    return pd.DataFrame(rows, columns=list(columns))


# ------------------------------------------------------------------------- paired effects

def _change_rows(base: dict, opt_mean: np.ndarray, base_mean: np.ndarray, target: bool, material: float,
                 conf: float) -> list[dict]:
    """Rows of the paired relative change of mean abundance (one species, option and horizon)."""
    d = mx.paired_relative_change(opt_mean, base_mean)
    d = d[np.isfinite(d)]
    rows = []
    if d.size:
        q = np.quantile(d, [mx.QUANTILE_BAND[0], 0.5, mx.QUANTILE_BAND[1]])
        rows.append(dict(base, statistic="median_change", value=q[1], low=q[0], high=q[2],
                         interval="member_quantiles", level=mx.QUANTILE_LEVEL, n=d.size))
    else:
        rows.append(dict(base, statistic="median_change", value=np.nan, low=np.nan, high=np.nan,
                         interval="member_quantiles", level=mx.QUANTILE_LEVEL, n=0))
    flags = {
        # a target is worse off when it ends up more abundant than without the option
        "p_worse": d > 0 if target else d < 0,
        "p_material": np.abs(d) >= material,
        "p_material_increase": d >= material,
        "p_material_decrease": d <= -material,
    }
    for stat, f in flags.items():
        v, lo, hi, n = mx.proportion(f, conf)
        rows.append(dict(base, statistic=stat, value=v, low=lo, high=hi, interval="clopper_pearson", level=conf,
                         n=n, threshold=material if stat != "p_worse" else np.nan))
    return rows


def _event_rows(base: dict, opt_event: np.ndarray, base_event: np.ndarray, event_good: bool, conf: float,
                material_risk: float) -> list[dict]:
    """Rows of a paired event (quasi-extinction, outbreak): change of its chance, P(worse)."""
    diff, lo, hi, n = mx.paired_difference_interval(opt_event, base_event, conf)
    worse = (base_event & ~opt_event) if event_good else (opt_event & ~base_event)
    v, wlo, whi, wn = mx.proportion(worse, conf)
    return [dict(base, statistic="difference", value=diff, low=lo, high=hi, interval="newcombe_paired", level=conf,
                 n=n, threshold=material_risk),
            dict(base, statistic="p_worse", value=v, low=wlo, high=whi, interval="clopper_pearson", level=conf, n=wn,
                 threshold=np.nan)]


def effects_table(case: Case, summaries: dict) -> pd.DataFrame:
    """Paired effects of every option on every species at every risk horizon (tidy; see module doc).

    Parameters
    ----------
    summaries : dict of str -> impact.risk.runs.Summary
        ``"baseline"`` and every option, on the same members in the same order.
    """
    base = summaries[BASELINE]
    conf = case.risk.confidence
    rows: list[dict] = []
    for opt in case.options:
        run = summaries[opt.name]
        touched = case.touched(opt)
        for j, sp in enumerate(case.species):
            target = sp.role == "target"
            for h in case.risk.times:
                k = run.slot(h)
                key = dict(option=opt.name, species=sp.name, role=sp.role, direct=sp.name in touched, horizon=h,
                           threshold=np.nan)
                rows += _change_rows(dict(key, metric="mean_abundance"), run.mean[:, k, j], base.mean[:, k, j],
                                     target, case.material_change(sp.name), conf)
                if sp.present:
                    ok = np.isfinite(run.minimum[:, k, j]) & np.isfinite(base.minimum[:, k, j])
                    rows += _event_rows(dict(key, metric="quasi_extinction"),
                                        run.minimum[ok, k, j] < sp.quasi_extinction,
                                        base.minimum[ok, k, j] < sp.quasi_extinction, target, conf,
                                        case.risk.material_risk)
                if sp.outbreak is not None:
                    ok = np.isfinite(run.maximum[:, k, j]) & np.isfinite(base.maximum[:, k, j])
                    rows += _event_rows(dict(key, metric="outbreak"), run.maximum[ok, k, j] > sp.outbreak,
                                        base.maximum[ok, k, j] > sp.outbreak, False, conf, case.risk.material_risk)
    return _rows_to_frame(rows, EFFECT_COLUMNS)


# ------------------------------------------------------------------------- objectives

@dataclass(frozen=True)
class Outcome:
    """One objective's per-member outcome under one run.

    Attributes
    ----------
    score : ndarray (M,)
        The quantity the objective looks at (abundance at the horizon, minimum or maximum by it);
        NaN for a failed member.
    event : ndarray (M,) bool
        The objective's event (False where ``score`` is NaN).
    lower_is_better : bool
        Direction in which the objective prefers the score.
    """

    score: np.ndarray
    event: np.ndarray
    lower_is_better: bool


def objective_outcome(case: Case, obj: Objective, summary) -> Outcome:
    """The per-member score and event of ``obj`` in one run's summary (the one definition used everywhere)."""
    j = case.species_names.index(obj.species)
    k = summary.slot(obj.time)
    sp = case.species_by_name(obj.species)
    if obj.measure == "abundance":
        score, level, below = summary.state[:, k, j], obj.level, obj.below
    elif obj.measure == "quasi_extinction":
        score, level, below = summary.minimum[:, k, j], sp.quasi_extinction, True
    else:
        score, level, below = summary.maximum[:, k, j], sp.outbreak, False
    score = np.asarray(score, float)
    with np.errstate(invalid="ignore"):
        event = (score < level) if below else (score > level)
    event &= np.isfinite(score)
    # the event lies at the low end of the score when `below`; prefer low scores if the event is wanted
    return Outcome(score, event, lower_is_better=(below == obj.event_is_good))


def event_text(case: Case, obj: Objective) -> str:
    """Plain words for the objective's event, e.g. ``"rat abundance below 30 rats/ha in year 10"``."""
    sp = case.species_by_name(obj.species)
    h = f"{case.time_unit} {obj.time:g}"
    if obj.measure == "abundance":
        return f"{sp.name} abundance {'below' if obj.below else 'above'} {obj.level:g} {sp.unit} in {h}"
    if obj.measure == "quasi_extinction":
        return f"{sp.name} falls below its quasi-extinction level ({sp.quasi_extinction:g} {sp.unit}) by {h}"
    return f"{sp.name} exceeds its outbreak level ({sp.outbreak:g} {sp.unit}) by {h}"


def judge(requirement: str, bound: float, low: float, high: float) -> str:
    """Status of a requirement from the interval of its statistic: met only when the whole interval complies."""
    if not (np.isfinite(low) and np.isfinite(high)):
        return UNDECIDED
    if requirement in ("chance_at_least", "decrease_at_least"):
        return MET if low >= bound else (NOT_MET if high < bound else UNDECIDED)
    return MET if high <= bound else (NOT_MET if low > bound else UNDECIDED)


def _objective_row(case: Case, obj: Objective, option: str, summaries: dict) -> dict:
    conf = case.risk.confidence
    run = objective_outcome(case, obj, summaries[option])
    key = dict(objective=obj.name, option=option, species=obj.species, measure=obj.measure, horizon=obj.time,
               event=event_text(case, obj), requirement=obj.requirement, bound=obj.bound)
    if obj.requirement.startswith("chance"):
        ok = np.isfinite(run.score)
        v, lo, hi, n = mx.proportion(run.event[ok], conf)
        stat, kind = "chance", "clopper_pearson"
    else:
        base = objective_outcome(case, obj, summaries[BASELINE])
        ok = np.isfinite(run.score) & np.isfinite(base.score)
        first, second = run.event[ok], base.event[ok]
        if obj.requirement == "decrease_at_least":
            first, second = second, first  # baseline minus option: a fall is positive
        v, lo, hi, n = mx.paired_difference_interval(first, second, conf)
        stat, kind = ("increase" if obj.requirement == "increase_at_most" else "decrease"), "newcombe_paired"
    return dict(key, statistic=stat, value=v, low=lo, high=hi, interval=kind, level=conf, n=n,
                status=judge(obj.requirement, obj.bound, lo, hi))


def objectives_table(case: Case, summaries: dict) -> pd.DataFrame:
    """Every objective judged under every option (and the baseline for a chance requirement)."""
    rows = []
    for obj in case.objectives:
        names = ([BASELINE] if obj.requirement.startswith("chance") else []) + [o.name for o in case.options]
        rows += [_objective_row(case, obj, name, summaries) for name in names]
    return _rows_to_frame(rows, OBJECTIVE_COLUMNS)


# ------------------------------------------------------------------------- comparisons

def good_outcome(case: Case, obj: Objective, summary) -> np.ndarray:
    """Per member, 1 when the outcome goes the objective's way under this run, else 0 (NaN if failed).

    The good outcome is the objective's event when the requirement asks for a high chance of it
    (``chance_at_least``), and its absence otherwise (a cap on a chance, on a rise, or a required fall).
    """
    o = objective_outcome(case, obj, summary)
    good = o.event if obj.event_is_good else ~o.event
    return np.where(np.isfinite(o.score), good.astype(float), np.nan)


def best_choices(choices, chances) -> tuple[str, ...]:
    """The one rule for "best" under a yes/no objective: the choices with the highest chance of a good outcome.

    Every page and table that names a best choice (page 1, ``comparisons.csv``, the value-of-information
    page) applies this rule to chances computed on the same members, so they cannot disagree.

    Parameters
    ----------
    choices : sequence of str, length D
        Doing nothing (``"baseline"``) and the options.
    chances : array_like (D,)
        Each choice's chance of a good outcome, on the same members (members where every choice ran).

    Returns
    -------
    tuple of str
        Every choice whose chance equals the highest (ties are exact: the chances are counts over the
        same members divided by the same number), in the order given.
    """
    p = np.asarray(chances, float)
    if p.size == 0 or not np.isfinite(p).any():
        return ()
    top = np.nanmax(p)
    return tuple(c for c, v in zip(choices, p) if v == top)


def comparisons_table(case: Case, summaries: dict) -> pd.DataFrame:
    """For each objective, doing nothing and every option compared by their chance of a good outcome.

    Every objective the case language declares is a yes/no event (a level and a requirement on the
    chance of crossing it), so runs are compared on that event alone, never on the continuous score
    behind it (an option that leaves one more cat alive in every member is no worse for "cats
    removed" when both stay below the level). Rows, on the members where every run succeeded:

    * ``p_good`` (``versus`` = ``none``): the run's chance of a good outcome, exact binomial interval;
    * ``p_only`` (``versus`` = the other run): the paired chance that the run has a good outcome in a
      member where the other does not;
    * ``best`` (``versus`` = ``all``): 1 for the runs :func:`best_choices` names, 0 for the others
      (no interval).
    """
    conf = case.risk.confidence
    names = [BASELINE, *(o.name for o in case.options)]
    rows = []
    for obj in case.objectives:
        good = np.column_stack([good_outcome(case, obj, summaries[n]) for n in names])
        g = good[np.isfinite(good).all(axis=1)] > 0.5
        key = dict(objective=obj.name, interval="clopper_pearson", level=conf)
        for i, a in enumerate(names):
            v, lo, hi, n = mx.proportion(g[:, i], conf)
            rows.append(dict(key, option=a, versus="none", statistic="p_good", value=v, low=lo, high=hi, n=n))
        for i, a in enumerate(names):
            for j, b in enumerate(names):
                if i != j:
                    v, lo, hi, n = mx.proportion(g[:, i] & ~g[:, j], conf)
                    rows.append(dict(key, option=a, versus=b, statistic="p_only", value=v, low=lo, high=hi, n=n))
        best = best_choices(names, g.mean(axis=0) if len(g) else np.full(len(names), np.nan))
        for a in names:
            rows.append(dict(key, option=a, versus="all", statistic="best", value=float(a in best), low=np.nan,
                             high=np.nan, interval="none", level=np.nan, n=len(g)))
    return _rows_to_frame(rows, COMPARISON_COLUMNS)
