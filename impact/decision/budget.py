"""The best affordable combination of options under a declared budget (``sensitivity/budget.csv``).

A 0–1 knapsack with conflicts: choose a set of options whose expected costs add up to at most the
budget and whose benefits add up to the most, never two options that share an intervention (an
intervention is carried out once; "cats only" and "cats and rats" are alternatives, not a pair).

* **Benefit** of an option: its expected weighted gain over doing nothing in chance of good outcomes
  (``expected_gain`` of ``weighing.csv``: benefit × chance of success, Joseph, Maloney & Possingham 2009).
  The tool simulates options, not sets of options: the benefit of a set of two or more options is
  **assumed additive** (the sum of its members' gains, as in Joseph et al.'s project prioritisation),
  and every such row says so (``benefit_basis``). Where options interact in the web (one release
  undoing another's gain) the sum is wrong; declare the combination as an option of its own so that it
  is simulated.
* **Cost**: the expected cost (the mean over the members' draws of an uncertain cost). The chance
  that the set's drawn cost exceeds the budget is reported beside it, and its interval.
* **Method**: exhaustive enumeration of every conflict-free set for up to :data:`EXHAUSTIVE_MAX`
  options (2^20 ≈ 10^6 sets); beyond, depth-first branch and bound on options in decreasing order of
  benefit per cost, pruned by the bound of the linear (fractional) relaxation of the knapsack, which
  ignores conflicts and so never undercuts the optimum (Horowitz & Sahni 1974, J. ACM 21:277–292;
  Martello & Toth 1990, Knapsack Problems, ch. 2; both from memory). Both are exact.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

EXHAUSTIVE_MAX = 20  # options: beyond this, branch and bound
TOP = 5  # best affordable sets listed in budget.csv (exhaustive enumeration); branch and bound lists the best
BUDGET_COLUMNS = ("rank", "options", "interventions", "cost", "cost_low", "cost_high", "budget", "chance_over_budget",
                  "benefit", "benefit_basis", "method", "cost_unit", "benefit_unit", "level", "n")
ADDITIVE = "assumed additive (sum of the options' simulated gains; the set was not simulated together)"
SIMULATED = "simulated (one option)"
NOTHING = "doing nothing (no option)"


def _ok_sets(masks: np.ndarray, conflicts: np.ndarray) -> np.ndarray:
    """Which bitmask sets hold no two conflicting options: bool (len(masks),)."""
    ok = np.ones(masks.shape, bool)
    for i, row in enumerate(conflicts):
        clash = int(sum(1 << j for j in np.flatnonzero(row)))
        if clash:
            ok &= ~(((masks >> i) & 1).astype(bool) & ((masks & clash) != 0))
    return ok


def enumerate_sets(benefit, cost, budget: float, conflicts=None, top: int = 1) -> list[tuple[float, float, tuple]]:
    """The ``top`` best affordable conflict-free sets by exhaustive enumeration of all 2^k.

    Parameters
    ----------
    benefit, cost : array (k,)
        Each option's benefit and (expected) cost, cost >= 0.
    budget : float
    conflicts : bool array (k, k) or None
        True where two options may not be chosen together.

    Returns
    -------
    list of (benefit, cost, chosen indices)
        Best first; ties in benefit go to the cheaper set, then the smaller one. The empty set (benefit 0)
        is always affordable.
    """
    b, c = np.asarray(benefit, float), np.asarray(cost, float)
    k = len(b)
    if k > EXHAUSTIVE_MAX:
        raise ValueError(f"exhaustive enumeration is for at most {EXHAUSTIVE_MAX} options, got {k}")
    conflicts = np.zeros((k, k), bool) if conflicts is None else np.asarray(conflicts, bool)
    masks = np.arange(1 << k, dtype=np.int64)
    tb, tc, size = np.zeros(masks.size), np.zeros(masks.size), np.zeros(masks.size)
    for j in range(k):  # one option at a time: (2^k,) arrays, never a (2^k, k) matrix
        bit = (masks >> j) & 1
        tb += bit * b[j]
        tc += bit * c[j]
        size += bit
    ok = (tc <= budget * (1 + 1e-12)) & _ok_sets(masks, conflicts)
    idx = np.flatnonzero(ok)
    order = np.lexsort((size[idx], tc[idx], -tb[idx]))[:top]
    return [(float(tb[idx[o]]), float(tc[idx[o]]), tuple(j for j in range(k) if (int(masks[idx[o]]) >> j) & 1))
            for o in order]


def branch_and_bound(benefit, cost, budget: float, conflicts=None) -> tuple[float, float, tuple]:
    """The best affordable conflict-free set by depth-first branch and bound (see module doc): exact.

    Same arguments and result as one row of :func:`enumerate_sets`. Options of benefit <= 0 are never
    chosen (they cannot raise the sum); zero-cost options of positive benefit are ordered first.
    """
    b, c = np.asarray(benefit, float), np.asarray(cost, float)
    k = len(b)
    conflicts = np.zeros((k, k), bool) if conflicts is None else np.asarray(conflicts, bool)
    items = [i for i in range(k) if b[i] > 0]
    with np.errstate(divide="ignore"):
        ratio = np.where(c > 0, b / np.where(c > 0, c, 1.0), np.inf)
    items.sort(key=lambda i: -ratio[i])
    best = [0.0, 0.0, ()]

    def bound(pos: int, room: float, value: float) -> float:
        # the linear relaxation over the items left (conflicts ignored): greedy by ratio, last one in part
        for i in items[pos:]:
            if c[i] <= room:
                room -= c[i]
                value += b[i]
            else:
                return value + b[i] * room / c[i]
        return value

    def visit(pos: int, room: float, value: float, spent: float, chosen: tuple):
        if value > best[0] + 1e-12 or (abs(value - best[0]) <= 1e-12 and spent < best[1]):
            best[:] = [value, spent, chosen]
        if pos == len(items) or bound(pos, room, value) <= best[0] + 1e-12:
            return
        i = items[pos]
        if c[i] <= room * (1 + 1e-12) + 1e-300 and not any(conflicts[i, j] for j in chosen):
            visit(pos + 1, room - c[i], value + b[i], spent + c[i], chosen + (i,))
        visit(pos + 1, room, value, spent, chosen)

    visit(0, float(budget), 0.0, 0.0, ())
    return best[0], best[1], tuple(sorted(best[2]))


def best_sets(benefit, cost, budget: float, conflicts=None) -> tuple[list[tuple[float, float, tuple]], str]:
    """The best affordable sets and the method's name: enumeration (the :data:`TOP` best) up to
    :data:`EXHAUSTIVE_MAX` options, branch and bound (the best) beyond."""
    if len(benefit) <= EXHAUSTIVE_MAX:
        return enumerate_sets(benefit, cost, budget, conflicts, top=TOP), "exhaustive enumeration"
    return [branch_and_bound(benefit, cost, budget, conflicts)], "branch and bound (linear-relaxation bound)"


def budget_table(options: list[str], interventions: list[tuple[str, ...]], gain: np.ndarray, member_costs: np.ndarray,
                 budget: float, cost_unit: str, confidence: float) -> pd.DataFrame:
    """The best affordable sets of options (see module doc).

    Parameters
    ----------
    options : list of str (k,)
    interventions : list of tuple of str (k,)
        Each option's interventions (two options sharing one conflict).
    gain : ndarray (k,)
        Each option's expected weighted gain over doing nothing.
    member_costs : ndarray (M, k)
        Each member's drawn cost of each option (equal across members for a known cost).
    """
    k = len(options)
    conflicts = np.array([[i != j and bool(set(interventions[i]) & set(interventions[j])) for j in range(k)]
                          for i in range(k)], bool).reshape(k, k)
    expected = member_costs.mean(axis=0)
    sets, method = best_sets(gain, expected, budget, conflicts)
    a = (1 - confidence) / 2
    rows = []
    for rank, (value, spent, chosen) in enumerate(sets, start=1):
        drawn = member_costs[:, list(chosen)].sum(axis=1)
        basis = NOTHING if not chosen else (SIMULATED if len(chosen) == 1 else ADDITIVE)
        rows.append(dict(rank=rank, options=" + ".join(options[i] for i in chosen) or "none (doing nothing)",
                         interventions=" + ".join(dict.fromkeys(iv for i in chosen for iv in interventions[i])),
                         cost=spent, cost_low=float(np.quantile(drawn, a)), cost_high=float(np.quantile(drawn, 1 - a)),
                         budget=budget, chance_over_budget=float(np.mean(drawn > budget)), benefit=value,
                         benefit_basis=basis, method=method, cost_unit=cost_unit,
                         benefit_unit="weighted chance of good outcomes gained over doing nothing",
                         level=confidence, n=member_costs.shape[0]))
    return pd.DataFrame(rows, columns=list(BUDGET_COLUMNS))
