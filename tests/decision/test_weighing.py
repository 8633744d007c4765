"""Weighing objectives and costs (impact.decision.weighing): SMAA against exact areas of the weight simplex, and the
cost-effectiveness ranking of Joseph, Maloney & Possingham 2009 on a hand example."""

import numpy as np
import pytest

from casefiles import mesopredator_case, write_case
from impact.case import load_case
from impact.errors import CaseError
from impact.decision.weighing import efficiency, feasible_weights, smaa, swing_values


def _rng(seed=0):
    return np.random.default_rng(seed)


def test_smaa_two_criteria_matches_the_share_of_the_weight_segment():
    # Two criteria, weights (w, 1 − w) with w uniform on [0, 1] (the 1-simplex); linear values A = (1, 0),
    # B = (0.3, 0.8). A ranks first when w > 0.8 (1 − w) + 0.3 w − ..., i.e. 0.7 w > 0.8 (1 − w): w > 8/15;
    # exact acceptability 7/15 for A, 8/15 for B (Lahdelma, Hokkanen & Salminen 1998: the share of the
    # weight space where the alternative ranks first). Tolerance 4 MC standard errors (false-failure rate
    # about 6e-5 per check by a normal approximation).
    sm = smaa(np.array([[1.0, 0.0], [0.3, 0.8]]), np.zeros(2), np.ones(2), _rng(1))
    a, se = sm.acceptability, sm.mc_se
    assert sm.n > 0 and a == pytest.approx([7 / 15, 8 / 15], abs=4 * se.max())
    # with two choices, the second rank is the complement of the first
    assert sm.ranks[:, 1] == pytest.approx(1 - a)
    # A's central weight: the mean of w on (8/15, 1) is 23/30
    assert sm.central[0, 0] == pytest.approx(23 / 30, abs=0.01)


def test_smaa_rank_acceptabilities_of_three_choices_on_two_criteria():
    # Two criteria, w uniform on [0, 1]; A = (1, 0) scores w, B = (0, 1) scores 1 − w, C = (0.6, 0.6) scores 0.6.
    # Order by w (exact arithmetic on the segment): w < 0.4: B, C, A; 0.4–0.5: C, B, A; 0.5–0.6: C, A, B;
    # w > 0.6: A, C, B. Rank acceptabilities (Lahdelma et al. 1998, b_i^r = share of weights giving rank r):
    # A (0.4, 0.1, 0.5), B (0.4, 0.1, 0.5), C (0.2, 0.8, 0). Tolerance 4 MC standard errors (as above).
    sm = smaa(np.array([[1.0, 0.0], [0.0, 1.0], [0.6, 0.6]]), np.zeros(2), np.ones(2), _rng(4))
    exact = np.array([[0.4, 0.1, 0.5], [0.4, 0.1, 0.5], [0.2, 0.8, 0.0]])
    assert np.abs(sm.ranks - exact).max() <= 4 * max(sm.ranks_se.max(), 1e-3)
    assert np.allclose(sm.ranks.sum(axis=0), 1) and np.allclose(sm.ranks.sum(axis=1), 1)


def test_tied_choices_share_their_ranks():
    from impact.decision.weighing import rank_shares

    s = rank_shares(np.array([[1.0, 1.0, 0.0]]))[0]
    assert s == pytest.approx(np.array([[0.5, 0.5, 0], [0.5, 0.5, 0], [0, 0, 1.0]]))


def test_smaa_three_criteria_matches_the_area_of_the_simplex():
    # Three criteria, weights uniform on the 2-simplex; A − B = (2, −1, 0) on the values, so B is first where
    # w2 > 2 w1: in the (w1, w2) triangle of area 1/2 that is the triangle (0,0), (0,1), (1/3, 2/3) of area 1/6,
    # a share of 1/3; A's acceptability is 2/3 (exact plane geometry).
    V = np.array([[2.0, 0.0, 0.5], [0.0, 1.0, 0.5]])
    sm = smaa(V, np.zeros(3), np.ones(3), _rng(2))
    a, se = sm.acceptability, sm.mc_se
    assert a == pytest.approx([2 / 3, 1 / 3], abs=4 * se.max())


def test_feasible_weights_keep_fixed_shares_and_ranges():
    W = feasible_weights(np.array([0.3, 0.3, 0.0]), np.array([0.3, 0.6, 1.0]), _rng(3), 5000)
    assert W.shape == (5000, 3)
    assert np.allclose(W.sum(axis=1), 1) and np.allclose(W[:, 0], 0.3)
    assert (W[:, 1] >= 0.3 - 1e-12).all() and (W[:, 1] <= 0.6 + 1e-12).all()
    # w2 is uniform on [0.3, 0.6] here (w2 + w3 = 0.7 uniform split, w2 ≥ 0.3 rejected below): mean 0.45
    assert W[:, 1].mean() == pytest.approx(0.45, abs=0.01)


def test_joseph_ranking_on_a_hand_example():
    # Joseph, Maloney & Possingham 2009: rank by benefit × probability of success ÷ cost. Hand example
    # (our own numbers): A 10 × 0.5 / 2 = 2.5; B 8 × 0.9 / 4 = 1.8; C 3 × 1.0 / 1 = 3.0 → order C, A, B,
    # although A has the largest benefit and B the largest expected benefit per project.
    e = efficiency(np.array([10, 8, 3.0]), np.array([0.5, 0.9, 1.0]), np.array([2, 4, 1.0]))
    assert e == pytest.approx([2.5, 1.8, 3.0])
    assert list(np.argsort(-e)) == [2, 0, 1]
    assert np.isnan(efficiency(1.0, 1.0, 0.0))


def test_swing_values_run_from_worst_to_best():
    V = swing_values(np.array([[0.2, 0.5], [0.6, 0.5], [0.4, 0.5]]))
    assert V[:, 0] == pytest.approx([0, 1, 0.5]) and (V[:, 1] == 0).all()


def _case(weighing):
    d = mesopredator_case()
    d["weighing"] = weighing
    return d


@pytest.mark.parametrize("weighing, field, words", [
    ({"option_costs": {"apex only": 1}}, "weighing.option_costs", "missing: apex and meso"),
    ({"option_costs": {"nope": 1}}, "weighing.option_costs.nope", "unknown option"),
    ({"weights": {"bird spared": 0.5}}, "weighing.weights", "must be able to sum to 1"),
    ({"weights": {"bird spared": [0.5]}}, "weighing.weights.bird spared", "two numbers"),
    ({"weights": {"bird spared": "maybe"}}, "weighing.weights.bird spared", "unknown"),
    ({"weights": {"nope": 1}}, "weighing.weights.nope", "unknown objective"),
    ({"source": "x"}, "weighing", "declare option_costs, weights, or both"),
    ({"option_costs": {"apex only": 1, "apex and meso": {"distribution": "normal", "mean": 1}}},
     "weighing.option_costs.apex and meso.distribution", "uniform"),
    ({"option_costs": {"apex only": 1, "apex and meso": {"distribution": "uniform", "low": -1, "high": 2}}},
     "weighing.option_costs.apex and meso", "cannot be negative"),
    ({"option_costs": {"apex only": 1, "apex and meso": {"distribution": "uniform", "low": 3, "high": 2}}},
     "weighing.option_costs.apex and meso.high", ""),
    ({"option_costs": {"apex only": 1, "apex and meso": 2}, "budget": 5}, "weighing.budget", "needs option_costs and weights"),
    ({"option_costs": {"apex only": 1, "apex and meso": 2}, "weights": {"bird spared": 1}, "budget": -5},
     "weighing.budget", ">= 0"),
])
def test_bad_weighing_names_file_and_field(tmp_path, weighing, field, words):
    f = write_case(tmp_path, _case(weighing))
    with pytest.raises(CaseError) as err:
        load_case(f)
    assert err.value.file == str(f) and err.value.field == field and words in err.value.message


def test_weighing_is_read(tmp_path):
    c = load_case(write_case(tmp_path, _case({"cost_unit": "dollars", "option_costs": {"apex only": 10, "apex and meso": 20},
                                              "weights": {"bird spared": "unknown"}})))
    assert [(o, p.describe()) for o, p in c.weighing.option_costs] == [("apex only", "10"), ("apex and meso", "20")]
    assert not c.weighing.uncertain_costs and c.weighing.budget is None
    assert c.weighing.weights == (("bird spared", 0.0, 1.0),) and c.weighing.uncertain


def test_uncertain_costs_are_drawn_per_member_on_their_own_stream(tmp_path):
    # a cost prior is read with the parameters' syntax and drawn from each member's own stream: the same
    # member gets the same cost whatever the other members, and the draws follow the prior (uniform on
    # [10, 30]: mean 20 within 4 standard errors, sd 20/√12/√M; false-failure rate ≈ 6e-5)
    from impact.decision.weighing import member_costs

    c = load_case(write_case(tmp_path, _case({"cost_unit": "dollars", "budget": 25, "weights": {"bird spared": 1},
                                              "option_costs": {"apex only": 10, "apex and meso":
                                                               {"distribution": "uniform", "low": 10, "high": 30}}})))
    assert c.weighing.uncertain_costs and c.weighing.budget == 25
    draws = np.arange(4000)
    C = member_costs(c, draws, 7)
    assert (C[:, 0] == 0).all() and (C[:, 1] == 10).all()
    assert abs(C[:, 2].mean() - 20) < 4 * 20 / np.sqrt(12 * len(draws)) and C[:, 2].min() >= 10
    assert np.array_equal(member_costs(c, draws[::-7], 7), C[::-7])
    assert not np.array_equal(member_costs(c, draws, 8)[:, 2], C[:, 2])


def test_the_cost_stream_has_a_purpose_of_its_own():
    # a new purpose is added, never an existing one shifted: every spawn-key purpose of the project is distinct
    from impact.decision.hinges import PURPOSE_DRIVERS
    from impact.decision.sensitivity.designs import PURPOSE_SENSITIVITY
    from impact.decision.structurevoi import PURPOSE_STRUCTURE_VOI
    from impact.decision.studies import PURPOSE_STUDIES
    from impact.decision.voi import PURPOSE_VOI
    from impact.decision.weighing import PURPOSE_WEIGHING
    from impact.dynamics.lyapunov import PURPOSE_DYNAMICS
    from impact.ensemble import sample

    purposes = [sample.PURPOSE_PARAMETERS, sample.PURPOSE_NOISE, sample.PURPOSE_EVENTS, sample.PURPOSE_STRUCTURE,
                PURPOSE_SENSITIVITY, PURPOSE_DYNAMICS, PURPOSE_VOI, PURPOSE_DRIVERS, PURPOSE_STUDIES, PURPOSE_WEIGHING,
                PURPOSE_STRUCTURE_VOI, sample.PURPOSE_COSTS, sample.PURPOSE_INDIVIDUALS]
    assert (sample.PURPOSE_PARAMETERS, sample.PURPOSE_NOISE, sample.PURPOSE_EVENTS, sample.PURPOSE_STRUCTURE) == (0, 1, 2, 3)
    assert len(set(purposes)) == len(purposes)
