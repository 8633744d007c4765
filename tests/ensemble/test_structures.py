"""Structural doubts: reading them, members carrying their structure, the calibration weighing the
structures by the data (approximate Bayesian model choice), results by structure and the value of
knowing the structure."""

from __future__ import annotations

import copy

import numpy as np
import pytest

from casefiles import to_toml
from impact.risk.bystructure import choices_table, member_structures, weights_table
from impact.ensemble.calibrate import build_ensemble
from impact.case import load_case
from impact.errors import CaseError
from impact.ensemble.sample import draw_uniforms, structure_index
from impact.decision.structurevoi import structure_evppi
from structure_cases import exact_weight, simulate, toy_case, write_case

PRIOR_SD, ATTACK, LOG_SD = 0.03, 0.03, 0.1


@pytest.fixture(scope="module")
def data():
    return simulate(np.random.default_rng(0), 0.0, ATTACK, LOG_SD)


def _load(tmp_path, data, **kw):
    return load_case(write_case(tmp_path / "toy.toml", data, **{"prior_sd": PRIOR_SD, "attack": ATTACK,
                                                                 "log_sd": LOG_SD, **kw}))


def test_doubts_make_every_combination_with_multiplied_weights(tmp_path, data):
    case = _load(tmp_path, data)
    st = case.structures
    assert len(st.structures) == 4
    assert np.isclose(st.weights.sum(), 1.0)
    assert sorted(np.round(st.weights, 6)) == sorted([0.35, 0.15, 0.35, 0.15])
    # the union web holds each doubtful link once, its attack rate switched by structure
    assert len(case.feeding) == 2 and all(isinstance(f.attack_rate, str) for f in case.feeding)


def test_members_draw_structures_in_proportion_and_never_by_batch(tmp_path, data):
    case = _load(tmp_path, data)
    draws = np.arange(20000)
    u = draw_uniforms(case, 7, draws)
    idx = structure_index(case, u)
    # binomial shares of 20,000 independent draws: 4 SD is ±0.014 at p = 0.35 (false failure < 1e-4)
    shares = np.bincount(idx, minlength=4) / draws.size
    assert np.allclose(shares, case.structures.weights, atol=0.014)
    # a member's structure depends on its draw index only
    assert np.array_equal(structure_index(case, draw_uniforms(case, 7, draws[5000:5100])), idx[5000:5100])
    # and its parameters are those the same case without doubts draws
    plain = copy.deepcopy(toy_case(data, prior_sd=PRIOR_SD, attack=ATTACK, log_sd=LOG_SD))
    for item in plain["interactions"]:
        item.pop("doubt")
    (tmp_path / "plain.toml").write_text(to_toml(plain))
    assert np.array_equal(draw_uniforms(load_case(tmp_path / "plain.toml"), 7, draws)[:, 0], u[:, 0])


@pytest.mark.parametrize("doubt, field", [
    ({"label": "b eats a"}, "interactions[0].doubt"),                                      # no doubt declared
    ({"label": "b eats a", "exists": 0.5}, "interactions[0].doubt.absent"),                 # absence unnamed
    ({"label": "b eats a", "exists": 1.5, "absent": "no"}, "interactions[0].doubt.exists"),
    ({"label": "b eats a", "alternatives": [{"label": "x", "weight": 1, "response": "holling2"}]},
     "interactions[0].doubt.weight"),                                                        # written form unweighted
    ({"label": "b eats a", "weight": 1, "alternatives": [{"label": "x", "weight": 1, "prey": "e"}]},
     "interactions[0].doubt.alternatives[0].prey"),                                          # who takes part is fixed
    ({"label": "b eats a", "weight": 1, "alternatives": [{"label": "x", "weight": 1, "response": "holling9"}]},
     "interactions[0].response"),                                                            # checked as written ones
])
def test_bad_doubts_are_refused_naming_the_field(tmp_path, data, doubt, field):
    raw = toy_case(data, prior_sd=PRIOR_SD, attack=ATTACK, log_sd=LOG_SD)
    raw["interactions"][0]["doubt"] = doubt
    (tmp_path / "bad.toml").write_text(to_toml(raw))
    with pytest.raises(CaseError) as err:
        load_case(tmp_path / "bad.toml")
    assert err.value.field == field and str(tmp_path / "bad.toml") in err.value.file


def test_named_webs_replace_the_combinations(tmp_path, data):
    raw = toy_case(data, prior_sd=PRIOR_SD, attack=ATTACK, log_sd=LOG_SD)
    raw["webs"] = [{"name": "full web", "weight": 3, "choices": {"b eats a": "b eats a"}},
                   {"name": "no predation", "weight": 1, "choices": {"b eats a": "b does not eat a",
                                                                      "c eats e": "c does not eat e"}}]
    (tmp_path / "webs.toml").write_text(to_toml(raw))
    st = load_case(tmp_path / "webs.toml").structures
    assert [s.name for s in st.structures] == ["full web", "no predation"]
    assert np.allclose(st.weights, [0.75, 0.25]) and st.structures[1].choices == (1, 1)
    raw["webs"][1]["choices"] = {"b eats a": "b never eats a"}
    (tmp_path / "webs.toml").write_text(to_toml(raw))
    with pytest.raises(CaseError) as err:
        load_case(tmp_path / "webs.toml")
    assert err.value.field == "webs[1].choices.b eats a"


def test_smc_model_choice_matches_the_closed_form_evidence(tmp_path, data):
    """Posterior probability of a structure against the exact one of two linear-Gaussian models
    (Bishop 2006, PRML §3.4: closed-form evidence). The SMC population's share has a Monte Carlo
    error of about √(p(1−p)/n_eff) ≈ 0.022 at n_eff ≈ 500 of 1,000 members; the margin 0.07 is
    about 3 of those (false failure ≈ 0.3 % per run if the sampler is right); two seeds gave
    0.619 and 0.604 against the exact 0.620 when this test was written."""
    case = _load(tmp_path, data)
    exact = exact_weight(np.log(data), 0.5, ATTACK, PRIOR_SD, LOG_SD)
    assert 0.2 < exact < 0.8  # the data leave real doubt: a test of the weights, not of a certainty
    ens, cal = build_ensemble(case, 1000, 1)
    assert cal.sampler == "smc"
    table = choices_table(case, member_structures(case, ens.unit), cal.generations)
    eats = table[(table.doubt == "b eats a") & (table.choice == "b eats a")].iloc[0]
    assert abs(eats.weight - exact) < 0.07
    # the doubt nothing observes keeps its prior weight (0.7) within the same error, and says so
    other = table[(table.doubt == "c eats e") & (table.choice == "c eats e")].iloc[0]
    assert abs(other.weight - 0.7) < 0.07
    assert other.low <= 0.7 <= other.high and other.evidence == "keeps its prior weight"


@pytest.mark.parametrize("seed", [1, 2])
def test_data_favour_the_structure_that_made_them(tmp_path, seed):
    """Counts from the web where b eats a (slope −0.05 a year), a prior on r narrow enough (sd 0.01)
    that the other web cannot fit them: the exact posterior weight is above 0.999 for both data
    seeds, so a share of at least 0.9 leaves a margin of about 4 Monte Carlo SDs at 400 members
    (n_eff ≈ 200: SD √(0.1·0.9/200) ≈ 0.02 at a share of 0.9). Data seeds 1, 2 and 3 gave shares of
    1.0 (exact 0.99983, 0.99992, 0.99994) when this test was written."""
    values = simulate(np.random.default_rng(seed), 0.0, 0.05, LOG_SD)
    case = load_case(write_case(tmp_path / "toy.toml", values, prior_sd=0.01, attack=0.05, log_sd=LOG_SD))
    assert exact_weight(np.log(values), 0.5, 0.05, 0.01, LOG_SD) > 0.999
    ens, cal = build_ensemble(case, 400, seed)
    w = weights_table(case, member_structures(case, ens.unit), cal.generations)
    eats = w[w.structure.str.startswith("b eats a")].weight.sum()
    assert eats >= 0.9


def test_structure_evppi_is_the_value_of_knowing_the_web():
    rng = np.random.default_rng(3)
    M = 2000
    index = rng.integers(0, 3, M)
    # choice 0 is best under structures 0 and 1, choice 1 under structure 2: knowing the web is worth
    # the exact Σ_k w_k max_d E[nb_d | k] − max_d E[nb_d] (Strong & Oakley 2014, eq. 3), and at most the EVPI
    p = np.array([[0.8, 0.3], [0.6, 0.5], [0.2, 0.7]])
    nb = (rng.random((M, 2)) < p[index]).astype(float)
    e = structure_evppi(nb, index, seed=1)
    # with the true chances p and equal shares: (0.8 + 0.6 + 0.7)/3 − max(0.533, 0.5) = 0.1667. The estimate is
    # cross-fitted on 0/1 outcomes: its standard error is about 0.009 at M = 2000 (gain variance ≈ 0.17 / M);
    # 4 SE is the margin (false failure ≈ 6e-5), and the interval must cover the exact value
    exact = float(p.max(axis=1).mean() - p.mean(axis=0).max())
    assert e.value == pytest.approx(exact, abs=0.04)
    assert e.low <= exact + 0.01 and e.low <= e.value <= e.high
    # every web with the same best choice: 0 within its interval
    same = (rng.random((M, 2)) < np.array([[0.8, 0.3], [0.7, 0.4], [0.6, 0.2]])[index]).astype(float)
    e0 = structure_evppi(same, index, seed=1)
    assert e0.low <= 1e-12 and e0.value < 0.01


def test_a_doubt_that_changes_no_number_changes_no_table(tmp_path, data):
    """No doubts, no change: the same case with an inert doubt (an alternative form with the written
    numbers) draws the same members, runs the same numbers and writes the same tables, plus its own."""
    from impact.api import AssessSettings, assess

    raw = toy_case(data, prior_sd=PRIOR_SD, attack=ATTACK, log_sd=LOG_SD)
    raw.pop("monitoring")  # drawn by rejection, as a case without data is
    for item in raw["interactions"]:
        item.pop("doubt")
    (tmp_path / "plain.toml").write_text(to_toml(raw))
    raw["interactions"][0]["doubt"] = {"label": "b eats a", "weight": 1, "alternatives": [
        {"label": "b eats a alike", "weight": 1, "attack_rate": ATTACK}]}
    (tmp_path / "inert.toml").write_text(to_toml(raw))
    settings = AssessSettings(members=60, dynamics=False, sensitivity=False)
    plain, inert = (assess(load_case(tmp_path / f"{n}.toml"), settings) for n in ("plain", "inert"))
    assert plain.ensemble.counts == inert.ensemble.counts
    for rel in ("risk.csv", "effects.csv", "objectives.csv", "comparisons.csv", "bands.csv", "members.csv"):
        assert plain.tables[rel].equals(inert.tables[rel]), rel
    assert "structures/weights.csv" not in plain.tables and "structure" not in plain.tables["parameters.csv"]
    w = inert.tables["structures/weights.csv"]
    assert w.members.sum() == 60 and set(w.evidence) == {"keeps its prior weight"}


def test_page_one_names_the_doubt_a_statement_hinges_on():
    import pandas as pd

    from impact.dossier.structures_verdict import _sentence

    weights = pd.DataFrame({"structure": ["A1", "A2", "B1", "B2"], "weight": [0.4, 0.3, 0.2, 0.1]})
    cmap = {"A1": {"d": "rats eat skinks", "e": "x"}, "A2": {"d": "rats eat skinks", "e": "y"},
            "B1": {"d": "rats do not eat skinks", "e": "x"}, "B2": {"d": "rats do not eat skinks", "e": "y"}}
    choices = pd.DataFrame({"doubt": ["d", "d", "e", "e"], "choice": ["rats eat skinks", "rats do not eat skinks", "x", "y"],
                            "weight": [0.7, 0.3, 0.6, 0.4], "low": [0.6, 0.2, 0.5, 0.3], "high": [0.8, 0.4, 0.7, 0.5]})
    webs = list(weights.structure)
    same = _sentence("objective “o”", "MET", dict.fromkeys(webs, "MET"), webs, weights, cmap, choices)
    assert "holds under every web with material weight (4 of 4)" in same
    hinge = _sentence("objective “o”", "MET", {"A1": "MET", "A2": "MET", "B1": "NOT MET", "B2": "NOT MET"}, webs,
                      weights, cmap, choices)
    assert "holds unless rats do not eat skinks (weight 30.0\u00a0%" in hinge and "then NOT MET" in hinge
    mixed = _sentence("objective “o”", "MET", {"A1": "MET", "A2": "NOT MET", "B1": "NOT MET", "B2": "MET"}, webs,
                      weights, cmap, choices)
    assert "depends on the web" in mixed and "“A2” (30.0\u00a0%): NOT MET" in mixed
    thin = _sentence("objective “o”", "MET", {"A1": "MET", "A2": "UNDECIDED", "B1": "MET", "B2": "UNDECIDED"}, webs,
                     weights, cmap, choices)
    assert "no web with material weight contradicts it" in thin and "within the webs where y" in thin


def test_an_error_in_one_web_names_the_interaction_of_the_file(tmp_path, data):
    raw = toy_case(data, prior_sd=PRIOR_SD, attack=ATTACK, log_sd=LOG_SD)
    raw["interactions"][1]["doubt"] = {"label": "c eats e", "weight": 1, "alternatives": [
        {"label": "c eats e slowly", "weight": 1, "response": "holling2"}]}  # holling2 needs a handling time
    raw["webs"] = [{"name": "only", "weight": 1, "choices": {"b eats a": "b does not eat a",
                                                             "c eats e": "c eats e slowly"}}]
    (tmp_path / "bad.toml").write_text(to_toml(raw))
    with pytest.raises(CaseError) as err:  # in that web, without interaction 0, this is the web's first
        load_case(tmp_path / "bad.toml")
    assert err.value.field == "interactions[1].handling_time" and "in the web where" in err.value.message
