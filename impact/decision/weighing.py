"""Weighing the objectives against each other and the options against their costs (``sensitivity/weighing.csv``).

Without ``[weighing]`` in the case nothing here runs: each objective is judged on its own, as elsewhere.

* **Value of a choice on one objective** (doing nothing or an option): linear in its chance of a good
  outcome (the objective's good outcome averaged over the plausible members, as in ``comparisons.csv``),
  rescaled so the worst choice scores 0 and the best 1: the swing over the choices at hand, to which
  swing weights refer (Gregory et al. 2012, Structured Decision Making, ch. 9, from memory; an objective on
  which every choice has the same chance swings nothing and scores 0 everywhere).
* **Weights** are shares of the whole (they sum to 1), declared per objective: a number, a range, or
  "unknown" (any share). The weighted value of a choice is ``Σ_j w_j v_j``.
* **Uncertain weights: SMAA** (Lahdelma, Hokkanen & Salminen 1998, European Journal of Operational Research
  106:137–143): weight vectors are drawn uniformly over the feasible weights (the simplex, declared weights
  fixed, ranges respected; by uniform draws on the free part of the simplex, those outside a range
  rejected); a choice's rank acceptability index ``b^r`` is the share of them under which it ranks r-th
  (r = 1 .. number of choices; ``b^1`` its acceptability), with Monte Carlo standard error
  ``sqrt(b(1 − b)/N)``; its central weight vector is the mean of the weights that make it first. The scores are the ensemble's expected chances; their own sampling uncertainty is in the
  risk and comparison tables, not here.
* **Cost-effectiveness** (Joseph, Maloney & Possingham 2009, Conservation Biology 23:328–338): projects are
  ranked by benefit × chance of success ÷ cost. Here an option's benefit × chance of success is its expected
  gain over doing nothing in weighted chance of good outcomes, ``Σ_j w_j (p_dj − p_0j)``, with the declared
  weights (the centre of the feasible weights when some are uncertain), and per objective its cost per
  percentage point of gain in that objective's chance. An uncertain cost (a prior) is drawn per member;
  the cost, cost per point and efficiency rows carry the interval of those draws (``low``, ``high``, at the
  case's confidence level), the gain held at its expectation; their ``value`` is at the expected cost.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from impact.decision.budget import budget_table
from impact.ensemble.sample import cost_uniforms
from impact.risk.effects import BASELINE, good_outcome
from impact.store.results import WEIGHTED

PURPOSE_WEIGHING = 14  # spawn-key purpose of the SMAA weight draws
SMAA_DRAWS = 20_000  # accepted weight vectors: the acceptability's MC error is at most 0.0035 (0.5/√N)
MAX_TRIES = 200  # rounds of draws before a nearly empty feasible set is reported as such
WEIGHING_COLUMNS = ("option", "objective", "statistic", "value", "low", "high", "mc_se", "rank", "unit", "level", "n")


def swing_values(P: np.ndarray) -> np.ndarray:
    """Chances ``P`` (D choices, J objectives) rescaled per objective to 0 (worst choice) .. 1 (best): (D, J)."""
    P = np.asarray(P, float)
    lo, hi = P.min(axis=0), P.max(axis=0)
    span = np.where(hi > lo, hi - lo, 1.0)
    return np.where(hi > lo, (P - lo) / span, 0.0)


def efficiency(benefit: np.ndarray, success: np.ndarray, cost: np.ndarray) -> np.ndarray:
    """Joseph, Maloney & Possingham (2009): benefit × chance of success ÷ cost (NaN at zero cost)."""
    cost = np.asarray(cost, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(cost > 0, np.asarray(benefit, float) * np.asarray(success, float) / cost, np.nan)


def feasible_weights(low: np.ndarray, high: np.ndarray, rng: np.random.Generator, n: int) -> np.ndarray:
    """``n`` weight vectors (n, J) uniform on ``{w ≥ 0, Σ w = 1, low ≤ w ≤ high}``.

    Fixed weights (``low == high``) are set; the rest share what is left uniformly (flat Dirichlet, the
    uniform law on a simplex), and vectors outside a range are rejected. Fewer than ``n`` rows come back
    when the feasible set is so thin that MAX_TRIES rounds do not fill it.
    """
    low, high = np.asarray(low, float), np.asarray(high, float)
    free = low < high
    left = 1.0 - low[~free].sum()
    out = []
    got = 0
    for _ in range(MAX_TRIES):
        w = np.tile(np.where(free, 0.0, low), (n, 1))
        if free.any():
            w[:, free] = left * rng.dirichlet(np.ones(int(free.sum())), size=n)
        ok = ((w >= low - 1e-12) & (w <= high + 1e-12)).all(axis=1)
        out.append(w[ok])
        got += int(ok.sum())
        if got >= n:
            break
    return np.vstack(out)[:n]


@dataclass(frozen=True)
class Smaa:
    """SMAA of D choices over n feasible weight vectors (Lahdelma, Hokkanen & Salminen 1998).

    Attributes
    ----------
    ranks, ranks_se : ndarray (D, D)
        ``ranks[d, r]``: share of the weight vectors under which choice d ranks ``r + 1`` (the rank
        acceptability index ``b_d^(r+1)``), and its Monte Carlo standard error ``sqrt(b(1 − b)/n)``.
        Tied choices share the ranks they span evenly. Rows and columns each sum to 1.
    central : ndarray (D, J)
        Mean of the weights that make each choice first (NaN where none does).
    n : int
        Weight vectors drawn.
    """

    ranks: np.ndarray
    ranks_se: np.ndarray
    central: np.ndarray
    n: int

    @property
    def acceptability(self) -> np.ndarray:
        """Rank-1 acceptability of each choice: (D,)."""
        return self.ranks[:, 0]

    @property
    def mc_se(self) -> np.ndarray:
        return self.ranks_se[:, 0]


def rank_shares(score: np.ndarray, tol: float = 1e-12) -> np.ndarray:
    """Each choice's share of each rank under each weight vector: (n, D, D), ``[k, d, r]``.

    ``score`` (n, D) is the weighted value of every choice under every weight vector; a choice with ``b``
    better and ``t`` equal (itself included) spans ranks ``b + 1 .. b + t`` and takes ``1/t`` of each.
    """
    n, D = score.shape
    diff = score[:, None, :] - score[:, :, None]  # [k, d, e] = score_e − score_d
    better = (diff > tol).sum(axis=2)
    tied = (np.abs(diff) <= tol).sum(axis=2)
    r = np.arange(D)
    inside = (r[None, None, :] >= better[:, :, None]) & (r[None, None, :] < (better + tied)[:, :, None])
    return inside / tied[:, :, None]


def smaa(values: np.ndarray, low: np.ndarray, high: np.ndarray, rng: np.random.Generator,
         draws: int = SMAA_DRAWS) -> Smaa:
    """Rank acceptabilities of every choice under weights uniform on the feasible set (Lahdelma et al. 1998).

    Parameters
    ----------
    values : ndarray (D, J)
        Value of each choice on each objective (linear value functions).
    low, high : ndarray (J,)
        Feasible range of each weight (shares summing to 1).
    """
    W = feasible_weights(low, high, rng, draws)
    n = W.shape[0]
    D = values.shape[0]
    if n == 0:
        nan = np.full((D, D), np.nan)
        return Smaa(nan, nan, np.full(values.shape, np.nan), 0)
    share = rank_shares(W @ np.asarray(values, float).T)  # (n, D, D)
    b = share.mean(axis=0)
    first = share[:, :, 0]
    with np.errstate(invalid="ignore", divide="ignore"):
        central = (first.T @ W) / first.sum(axis=0)[:, None]
    return Smaa(b, np.sqrt(b * (1 - b) / n), central, n)


def member_costs(case, draws: np.ndarray, seed: int) -> np.ndarray:
    """Each member's drawn cost of doing nothing (0) and of every option: (M, 1 + options).

    A known cost is the same in every member; an uncertain one is its prior's ``ppf`` of the member's
    uniform from the stream ``(draw, PURPOSE_COSTS, crc32(option))`` (:func:`impact.ensemble.sample.cost_uniforms`).
    NaN columns for options without a cost (none declared).
    """
    draws = np.asarray(draws)
    cost = dict(case.weighing.option_costs)
    cols = [np.zeros(len(draws))]
    for o in case.options:
        prior = cost.get(o.name)
        cols.append(np.full(len(draws), np.nan) if prior is None else
                    np.asarray(prior.ppf(cost_uniforms(seed, draws, o.name)), float))
    return np.column_stack(cols)


def weighing_tables(case, summaries: dict, seed: int, draws: np.ndarray) -> dict[str, pd.DataFrame]:
    """``sensitivity/weighing.csv`` (:func:`weighing_table`) and, with a declared budget, ``sensitivity/budget.csv``
    (the best affordable sets of options, :mod:`impact.decision.budget`, on the same gains and cost draws)."""
    t = weighing_table(case, summaries, seed, draws)
    out = {"sensitivity/weighing.csv": t}
    wg = case.weighing
    if wg.budget is not None:
        gain = t[t.statistic == "expected_gain"].set_index("option").value
        names = [o.name for o in case.options]
        ok = np.all([np.isfinite(good_outcome(case, o, summaries[c])) for o in case.objectives
                     for c in [BASELINE, *names]], axis=0)
        C = member_costs(case, np.asarray(draws)[ok], seed)[:, 1:]
        out["sensitivity/budget.csv"] = budget_table(names, [o.interventions for o in case.options],
                                                     gain.reindex(names).to_numpy(float), C, wg.budget, wg.cost_unit,
                                                     case.risk.confidence)
    return out


def weighing_table(case, summaries: dict, seed: int, draws: np.ndarray) -> pd.DataFrame:
    """Costs, weighted values, cost-effectiveness and SMAA acceptabilities of every choice (see module doc).

    ``draws`` (M,) are the members' draw indices, for their draws of uncertain costs; a cost's and a
    cost-effectiveness's interval (``low``, ``high``) is over those draws, the gain held at its expectation.
    """
    wg = case.weighing
    choices = [BASELINE, *(o.name for o in case.options)]
    objs = [o.name for o in case.objectives]
    nbs = [np.column_stack([good_outcome(case, o, summaries[c]) for c in choices]) for o in case.objectives]
    ok = np.all([np.isfinite(nb).all(axis=1) for nb in nbs], axis=0) if nbs else np.zeros(0, bool)
    n = int(ok.sum())
    P = np.column_stack([nb[ok].mean(axis=0) for nb in nbs]) if nbs else np.zeros((len(choices), 0))  # (D, J)
    C = member_costs(case, np.asarray(draws)[ok] if len(draws) == len(ok) else np.asarray(draws), seed)  # (M, D), doing nothing first
    costs = C.mean(axis=0) if C.shape[0] else np.full(len(choices), np.nan)
    q = (1 - case.risk.confidence) / 2
    given = {k: (lo, hi) for k, lo, hi in wg.weights}
    low = np.array([given.get(o, (0.0, 0.0))[0] for o in objs])
    high = np.array([given.get(o, (0.0, 0.0))[1] for o in objs])
    rows = []

    def add(option, objective, statistic, value, se=np.nan, unit="", rank=np.nan, over=None):
        # `over`: the statistic in each member's draw of the costs, for its interval (the costs' uncertainty only)
        lo, hi = (np.nan, np.nan) if over is None or not len(over) else np.quantile(over, [q, 1 - q])
        rows.append(dict(option=option, objective=objective, statistic=statistic, value=float(value), low=float(lo),
                         high=float(hi), mc_se=float(se), rank=float(rank), unit=unit, level=case.risk.confidence, n=n))

    for d, c in enumerate(choices):
        if wg.option_costs:
            add(c, "", "cost", costs[d], unit=wg.cost_unit, over=C[:, d])
        for j, o in enumerate(objs):
            add(c, o, "chance", P[d, j], unit="probability of a good outcome")
            if d and wg.option_costs:
                gain = P[d, j] - P[0, j]
                add(c, o, "cost_per_point", costs[d] / (100 * gain) if gain > 0 else np.nan,
                    unit=f"{wg.cost_unit} per percentage point gained over doing nothing",
                    over=C[:, d] / (100 * gain) if gain > 0 else None)
    if not wg.weights:
        return pd.DataFrame(rows, columns=list(WEIGHING_COLUMNS))
    V = swing_values(P)
    rng = np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed, spawn_key=(PURPOSE_WEIGHING,))))
    sm = smaa(V, low, high, rng)
    a, se, central, drawn = sm.acceptability, sm.mc_se, sm.central, sm.n
    # the declared weights, or the centre of the feasible ones when some are uncertain
    w = feasible_weights(low, high, rng, SMAA_DRAWS).mean(axis=0) if wg.uncertain else low
    for j, o in enumerate(objs):
        add("", o, "weight" if not wg.uncertain else "central_weight", w[j], unit="share of the whole")
    for d, c in enumerate(choices):
        add(c, WEIGHTED, "weighted_value", V[d] @ w, unit="swing value (0 worst .. 1 best choice)")
        if d and wg.option_costs:
            gain = (P[d] - P[0]) @ w
            add(c, WEIGHTED, "expected_gain", gain, unit="weighted chance of good outcomes over doing nothing")
            add(c, WEIGHTED, "efficiency", efficiency(gain, 1.0, costs[d]),
                unit=f"weighted chance gained per {wg.cost_unit}", over=efficiency(gain, 1.0, C[:, d]))
        if wg.uncertain:
            add(c, WEIGHTED, "acceptability", a[d], se[d], unit=f"share of {drawn} feasible weight vectors ranking it first")
            for r in range(len(choices)):
                add(c, WEIGHTED, "rank_acceptability", sm.ranks[d, r], sm.ranks_se[d, r], rank=r + 1,
                    unit=f"share of {drawn} feasible weight vectors ranking it at this rank")
            for j, o in enumerate(objs):
                add(c, o, "central_weight_if_first", central[d, j], unit="share of the whole")
    if wg.option_costs:
        eff = [r for r in rows if r["statistic"] == "efficiency"]
        order = sorted(range(len(eff)), key=lambda k: -np.nan_to_num(eff[k]["value"], nan=-np.inf))
        for rank, k in enumerate(order, start=1):
            add(eff[k]["option"], WEIGHTED, "efficiency_rank", rank, unit="1 = most cost-effective")
    return pd.DataFrame(rows, columns=list(WEIGHING_COLUMNS))
