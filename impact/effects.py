"""Paired effects of each option, objectives judged, and options compared member by member.

Every option runs on the same members as the baseline, with the same noise and chance events,
so the effect of an option on a member is the difference between its two runs. This module
turns the per-member summaries into three tidy tables (column names defined once, below):

* ``effects.csv``: per option, species, metric and horizon, the distribution over members of
  the paired change and the probabilities that the option is worse for the species, or changes
  it materially;
* ``objectives.csv``: each declared objective judged for every option (and for the baseline
  where the requirement is a chance), with its interval and a status;
* ``comparisons.csv``: for each objective, the chance that one option beats another in a member,
  and the share of members in which each option (or doing nothing) is best.

All functions are pure: summaries in, DataFrames out.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from . import metrics as mx
from .case import Case, Objective

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
# relative tolerance under which two members' outcomes count as a tie (float noise, not ecology)
TIE_RTOL = 1e-9


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
    summaries : dict of str -> impact.assess.Summary
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
            for h in case.risk.horizons:
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
    k = summary.slot(obj.horizon)
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
    """Plain words for the objective's event, e.g. ``"rat abundance below 30 rats/ha at 10 year"``."""
    sp = case.species_by_name(obj.species)
    h = f"{obj.horizon:g} {case.time_unit}"
    if obj.measure == "abundance":
        return f"{sp.name} abundance {'below' if obj.below else 'above'} {obj.level:g} {sp.unit} at {h}"
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
    key = dict(objective=obj.name, option=option, species=obj.species, measure=obj.measure, horizon=obj.horizon,
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

def _better(a: np.ndarray, b: np.ndarray, lower_is_better: bool) -> tuple[np.ndarray, np.ndarray]:
    """Per member: a strictly better than b, and a tie (within TIE_RTOL)."""
    tie = np.abs(a - b) <= TIE_RTOL * np.maximum(np.abs(a), np.abs(b))
    better = (a < b) if lower_is_better else (a > b)
    return better & ~tie, tie


def comparisons_table(case: Case, summaries: dict) -> pd.DataFrame:
    """For each objective: P(A beats B) for every ordered pair of runs, and each run's share of members where it is best.

    The baseline (doing nothing) takes part as a run like the options. A member counts for a
    pair only when neither run failed; ties count as neither better nor worse (``p_tie`` rows).
    """
    conf = case.risk.confidence
    names = [BASELINE, *(o.name for o in case.options)]
    rows = []
    for obj in case.objectives:
        out = {n: objective_outcome(case, obj, summaries[n]) for n in names}
        lower = out[BASELINE].lower_is_better
        scores = np.stack([out[n].score for n in names], axis=1)
        ok_all = np.isfinite(scores).all(axis=1)
        for a in names:
            for b in names:
                if a == b:
                    continue
                ok = np.isfinite(out[a].score) & np.isfinite(out[b].score)
                better, tie = _better(out[a].score[ok], out[b].score[ok], lower)
                for stat, flags in (("p_better", better), ("p_tie", tie)):
                    v, lo, hi, n = mx.proportion(flags, conf)
                    rows.append(dict(objective=obj.name, option=a, versus=b, statistic=stat, value=v, low=lo,
                                     high=hi, interval="clopper_pearson", level=conf, n=n))
        s = scores[ok_all]
        best_value = s.min(axis=1) if lower else s.max(axis=1)
        for i, a in enumerate(names):
            _, tie = _better(s[:, i], best_value, lower)
            v, lo, hi, n = mx.proportion(tie, conf)
            rows.append(dict(objective=obj.name, option=a, versus="all", statistic="share_best", value=v, low=lo,
                             high=hi, interval="clopper_pearson", level=conf, n=n))
    return _rows_to_frame(rows, COMPARISON_COLUMNS)

