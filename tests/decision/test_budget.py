"""The budget optimiser (impact.decision.budget) against a textbook knapsack and plain brute force."""

import itertools

import numpy as np
import pytest

from impact.decision.budget import ADDITIVE, SIMULATED, branch_and_bound, budget_table, enumerate_sets


def brute_force(b, c, budget, conflicts):
    """The best value over every subset, by itertools (an independent check of both methods)."""
    k, best = len(b), 0.0
    for r in range(1, k + 1):
        for s in itertools.combinations(range(k), r):
            if sum(c[i] for i in s) <= budget and not any(conflicts[i, j] for i in s for j in s):
                best = max(best, sum(b[i] for i in s))
    return best


def test_textbook_knapsack():
    # Cormen, Leiserson, Rivest & Stein, Introduction to Algorithms (3rd ed. 2009), §16.2, Fig. 16.2 (from
    # memory): items of weight 10, 20, 30 and value 60, 100, 120, capacity 50. The 0–1 optimum takes items 2
    # and 3, value 220, although item 1 has the best value per weight (greedy by ratio gets only 160 or 180).
    b, c = [60.0, 100.0, 120.0], [10.0, 20.0, 30.0]
    value, spent, chosen = enumerate_sets(b, c, 50)[0]
    assert (value, spent, chosen) == (220.0, 50.0, (1, 2))
    assert branch_and_bound(b, c, 50) == (220.0, 50.0, (1, 2))


@pytest.mark.parametrize("k", [1, 3, 6, 9, 12])
def test_both_methods_equal_brute_force_on_random_instances(k):
    # exact methods must reach the brute-force optimum on every instance (not a statistical check: any
    # difference beyond float rounding is a bug); 20 random instances per size, with random conflicts
    rng = np.random.default_rng(k)
    for _ in range(20 if k < 12 else 5):
        b = rng.uniform(-0.2, 1.0, k)
        c = rng.choice([0.0, 1.0, 2.0, 5.0], k) * rng.uniform(0.5, 2.0, k)
        conf = np.triu(rng.random((k, k)) < 0.15, 1)
        conf = conf | conf.T
        budget = rng.uniform(0, c.sum())
        want = brute_force(b, c, budget, conf)
        assert enumerate_sets(b, c, budget, conf)[0][0] == pytest.approx(want, abs=1e-9)
        value, spent, chosen = branch_and_bound(b, c, budget, conf)
        assert value == pytest.approx(want, abs=1e-9) and spent <= budget + 1e-9
        assert not any(conf[i, j] for i in chosen for j in chosen)


def test_branch_and_bound_beyond_enumeration():
    # 40 options (2^40 sets: no enumeration); without conflicts and with equal costs the optimum is the
    # `budget` options of largest benefit (exact by exchange argument)
    rng = np.random.default_rng(3)
    b = rng.uniform(0, 1, 40)
    value, spent, chosen = branch_and_bound(b, np.ones(40), 7)
    assert value == pytest.approx(np.sort(b)[-7:].sum()) and len(chosen) == 7


def test_budget_table_labels_additive_sets_and_overruns():
    # two options sharing an intervention are alternatives; a third adds to either. Costs drawn per member:
    # the chance over budget is the share of members whose drawn cost of the set exceeds it
    opts = ["a", "a and b", "c"]
    ivs = [("A",), ("A", "B"), ("C",)]
    costs = np.column_stack([np.full(100, 2.0), np.full(100, 3.0), np.linspace(0.5, 1.5, 100)])
    t = budget_table(opts, ivs, np.array([0.1, 0.3, 0.05]), costs, 4.0, "units", 0.9)
    best = t.iloc[0]
    assert best.options == "a and b + c" and best.benefit == pytest.approx(0.35)
    assert best.benefit_basis == ADDITIVE and best.chance_over_budget == pytest.approx(0.5, abs=0.02)
    assert not ((t.options.str.contains("a \\+ a and b")).any())
    assert SIMULATED in set(t.benefit_basis)
