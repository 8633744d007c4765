"""Main effects and value of information on the plausible ensemble."""

from __future__ import annotations

import copy

import numpy as np
import pytest

from casefiles import write_case
from impact.risk.runs import assess_members
from impact.ensemble.draws import draw_ensemble
from impact.case import load_case
from impact.decision.hinges import PURPOSE_DRIVERS, drivers_table, information_table, main_effects
from impact.decision.voi import design_matrix, fitted_means


def test_main_effects_of_a_linear_model_in_correlated_normal_inputs():
    # Y = X1 + X2 + X3 with X2, X3 correlated (ρ = 0.8) and independent of X1. For jointly normal inputs
    # E[Y | X_i] is linear, so the first-order index is corr(Y, X_i)^2: 1/(3 + 2ρ) for X1 and
    # (1 + ρ)^2/(3 + 2ρ) for X2 and X3 (analytic; the linear test of Kucherenko, Tarantola & Annoni 2012,
    # Computer Physics Communications 183:937, has this form, from memory).
    rng = np.random.default_rng(4)
    M, rho = 3000, 0.8
    cov = np.array([[1, 0, 0], [0, 1, rho], [0, rho, 1]])
    X = rng.multivariate_normal(np.zeros(3), cov, size=M)
    Y = X.sum(axis=1)[:, None]
    v, lo, hi = main_effects(Y, X, resamples=100, seed=1)
    exact = np.array([1, (1 + rho) ** 2, (1 + rho) ** 2]) / (3 + 2 * rho)
    for j in range(3):
        assert lo[j, 0] - 0.02 <= exact[j] <= hi[j, 0] + 0.02, (j, v[j, 0], exact[j])
        assert abs(v[j, 0] - exact[j]) < 0.03


def test_an_unrelated_parameter_has_no_main_effect():
    rng = np.random.default_rng(5)
    X = rng.random((1000, 2))
    Y = np.sin(6 * X[:, :1]) + 0.1 * rng.normal(size=(1000, 1))
    v, lo, hi = main_effects(Y, X, resamples=100, seed=2)
    assert v[0, 0] > 0.9 and v[1, 0] < 0.01 and lo[1, 0] < 0.005


def _adjusted_r2_on_rows(Y, D):
    # the index on one resample's own rows, written out plainly (the definition the fast path must equal)
    M, K = D.shape
    with np.errstate(invalid="ignore", divide="ignore"):
        r2 = 1 - (Y - fitted_means(Y, D)).var(axis=0) / Y.var(axis=0)
    return 1 - (1 - r2) * (M - 1) / (M - K)


def test_main_effect_intervals_equal_the_resample_by_resample_estimates():
    rng = np.random.default_rng(7)
    M, R = 400, 30
    X = rng.random((M, 2))
    rare = np.zeros(M)
    rare[0] = 1.0  # missed by about 37 % of resamples: there it does not vary and its index is NaN
    Y = np.column_stack([np.sin(4 * X[:, 0]) + 0.5 * rng.normal(size=M), (rng.random(M) < X[:, 1]).astype(float), rare])
    v, lo, hi = main_effects(Y, X, resamples=R, seed=3)
    boot = np.random.Generator(np.random.PCG64(np.random.SeedSequence(3, spawn_key=(PURPOSE_DRIVERS,))))
    draws = [boot.integers(0, M, M) for _ in range(R)]
    for j in range(2):
        D = design_matrix(X[:, [j]])
        reps = np.stack([_adjusted_r2_on_rows(Y[i], D[i]) for i in draws])
        np.testing.assert_allclose(v[j], _adjusted_r2_on_rows(Y, D), rtol=0, atol=1e-12)
        np.testing.assert_allclose(lo[j], np.quantile(reps, 0.025, axis=0), rtol=0, atol=1e-12)
        np.testing.assert_allclose(hi[j], np.quantile(reps, 0.975, axis=0), rtol=0, atol=1e-12)
    assert np.isnan(lo[:, 2]).all() and np.isfinite(lo[:, :2]).all()


def _goat_case(members: int = 600) -> dict:
    return copy.deepcopy({
        "case": {"title": "goat eradication", "time_unit": "year", "horizon": 10.0, "output_step": 1.0,
                 "spinup": 0.0, "members": members, "seed": 9},
        "parameters": {
            "fail": {"distribution": "uniform", "low": 0.0, "high": 0.8, "unit": "probability", "source": "test"},
            "goat_r": {"distribution": "uniform", "low": 0.5, "high": 1.0, "unit": "1/year", "source": "test"},
        },
        "species": [{"name": "goat", "growth": "logistic", "growth_rate": "goat_r", "carrying_capacity": 100.0,
                     "initial": 100.0, "quasi_extinction": 1.0, "role": "target"}],
        "interventions": [{"name": "shoot", "kind": "eradication", "species": "goat", "time": 1.0,
                           "failure_probability": "fail", "residual_fraction": 0.5}],
        "options": [{"name": "eradicate", "interventions": ["shoot"]}],
        "objectives": [{"name": "goats gone", "species": "goat", "measure": "quasi_extinction", "horizon": 10.0,
                        "chance_at_least": 0.5}],
        "risk": {"horizons": [10.0], "min_members": 100},
    })


@pytest.fixture(scope="module")
def goats(tmp_path_factory):
    case = load_case(write_case(tmp_path_factory.mktemp("goat"), _goat_case()))
    ens = draw_ensemble(case, case.members, case.seed)
    runs = assess_members(case, ens, case.seed)
    return drivers_table(case, ens.values, runs, case.seed), information_table(case, ens.values, runs, case.seed)


def test_a_failure_probability_shows_its_influence_on_the_target(goats):
    # the goats go (good outcome) with probability 1 − f, f ~ U(0, 0.8): Var(E[good | f]) = 0.8²/12 and
    # Var(good) = 0.6 · 0.4, so the main effect of f is 0.0533/0.24 = 0.222; goat_r plays no part
    drv, _ = goats
    row = drv[(drv.output == "objective “goats gone”: good outcome") & (drv.parameter == "fail")].iloc[0]
    other = drv[(drv.output == "objective “goats gone”: good outcome") & (drv.parameter == "goat_r")].iloc[0]
    assert row.low > 0.05 and row.low - 0.03 <= 0.222 <= row.high + 0.03
    assert other.value < 0.03
    assert row.conditional_on.startswith("plausible ensemble")


def _two_method_case(members: int = 1000) -> dict:
    """Goats and pigs, each removed by shooting or by trapping. Shooting goats fails with an uncertain chance
    f ~ U(0, 1); trapping goats fails with a fixed 0.5; both methods fail with a fixed 0.5 on pigs. goat_r and
    pig_r do not decide whether a species is gone (a failed removal leaves half the animals, which persist)."""
    d = _goat_case(members)
    d["parameters"]["fail"]["high"] = 1.0
    d["parameters"]["pig_r"] = {"distribution": "uniform", "low": 0.5, "high": 1.0, "unit": "1/year", "source": "test"}
    d["species"].append({"name": "pig", "growth": "logistic", "growth_rate": "pig_r", "carrying_capacity": 100.0,
                         "initial": 100.0, "quasi_extinction": 1.0, "role": "target"})
    d["interventions"] = [
        {"name": "shoot goats", "kind": "eradication", "species": "goat", "time": 1.0, "failure_probability": "fail",
         "residual_fraction": 0.5},
        {"name": "trap goats", "kind": "eradication", "species": "goat", "time": 1.0, "failure_probability": 0.5,
         "residual_fraction": 0.5},
        {"name": "shoot pigs", "kind": "eradication", "species": "pig", "time": 1.0, "failure_probability": 0.5,
         "residual_fraction": 0.5},
        {"name": "trap pigs", "kind": "eradication", "species": "pig", "time": 1.0, "failure_probability": 0.5,
         "residual_fraction": 0.5}]
    d["options"] = [{"name": "shooting", "interventions": ["shoot goats", "shoot pigs"]},
                    {"name": "trapping", "interventions": ["trap goats", "trap pigs"]}]
    d["objectives"].append({"name": "pigs gone", "species": "pig", "measure": "quasi_extinction", "horizon": 10.0,
                            "chance_at_least": 0.5})
    return d


@pytest.fixture(scope="module")
def two_methods(tmp_path_factory):
    case = load_case(write_case(tmp_path_factory.mktemp("two"), _two_method_case()))
    ens = draw_ensemble(case, case.members, case.seed)
    runs = assess_members(case, ens, case.seed)
    return information_table(case, ens.values, runs, case.seed)


def test_information_values_of_the_eradication_choice(two_methods):
    """Goats go with chance 1 − f by shooting (f ~ U(0, 1)) and 0.5 by trapping; doing nothing never removes them.
    Now both methods give 0.5 on average (E[1 − f] = 0.5); knowing f, one shoots when f < 0.5:
    E[max(1 − f, 0.5)] = ∫₀^0.5 (1 − f) df + 0.5 · 0.5 = 0.375 + 0.25 = 0.625, so EVPI = EVPPI(fail) = 0.125
    (closed form of the definition, Strong, Oakley & Brennan 2014, eq. 1; the methods' failures are chance).
    goat_r and pig_r cannot change the choice: EVPPI 0.

    One ensemble of 1,000 members (the case's seed). Margins: the estimator's sd here is about 2.2 points (0/1
    outcomes of the half of the members where the rule switches: √(0.5 · 0.5 / 1000) ≈ 0.016, plus the bootstrap's
    own spread, read off the interval's width when the test was written). The interval must cover 0.125 within
    2 points (about 3 sd with the interval's own 2 sd: false failure ~0.5 %) and the lower limit be above 0
    (0.125 is 5.7 sd from 0: false failure ~1e-4). The pig objective (chance only) and the irrelevant parameters
    have lower limit 0 (one-sided level 2.5 % each, ~7 % for the four together, an upper bound: these estimates
    are below 0 on average under their null) and value below 3 points (4 sd of a null estimate of sd ~0.7 points)."""
    info = two_methods.set_index(["objective", "parameter"])
    assert set(two_methods.parameter) == {"all parameters", "fail", "goat_r", "pig_r"}
    for key in ("all parameters", "fail"):
        r = info.loc[("goats gone", key)]
        assert r.low - 0.02 <= 0.125 <= r.high + 0.02 and r.low > 0, (key, r.value, r.low, r.high)
    for key in ("goat_r", "pig_r"):
        r = info.loc[("goats gone", key)]
        assert r.low == 0.0 and r.value < 0.03, (key, r.value)
    # chance only: each method removes the pigs with a fixed 0.5, whatever the parameters: EVPI 0 within its interval
    # (the member-by-member maximum of outcomes would give about 0.25)
    r = info.loc[("pigs gone", "all parameters")]
    assert r.low == 0.0 and r.value < 0.03, (r.value, r.low, r.high)
    goats = two_methods[two_methods.objective == "goats gone"]
    assert set(goats.best_choice.iloc[0].split("; ")) <= {"shooting", "trapping"}
    assert abs(goats.best_chance.iloc[0] - 0.5) < 0.06


def test_the_summary_names_only_a_number_distinguishable_from_no_value(two_methods):
    """The sentence names "the single number most worth measuring" only when its EVPPI's lower limit is above 0:
    fail for the goats (EVPPI 0.125, above), never pig_r or goat_r; for the pigs it says the value is not detectable."""
    from types import SimpleNamespace

    from impact.dossier import hinges_text
    text = hinges_text(SimpleNamespace(sensitivity={"information": two_methods}))
    goats, pigs = (line for line in text.splitlines() if line.startswith("Choosing now"))
    assert "the single number most worth measuring is fail" in goats
    assert "most worth measuring" not in pigs and "would not" in pigs
    assert "pig_r" not in text.replace("the largest EVPPI, pig_r", "") or "distinguishable from none" in pigs


def test_the_sensitivity_section_keeps_its_page_budget(tmp_path):
    # Budget (README): the section "What the decision hinges on" fits in two pages for up to three objectives and
    # four choices, whatever the number of species (tables are capped; every row is in sensitivity/*.csv).
    from pypdf import PdfReader

    from casefiles import web_case
    from impact.cli import main

    d = web_case(members=120)
    d["objectives"] = [
        {"name": "fox stays", "species": "fox", "measure": "quasi_extinction", "horizon": 20.0, "increase_at_most": 0.1},
        {"name": "hares kept down", "species": "hare", "measure": "abundance", "horizon": 20.0, "below": 200.0,
         "chance_at_least": 0.5},
        {"name": "no hare plague", "species": "hare", "measure": "outbreak", "horizon": 10.0, "chance_at_most": 0.2},
    ]
    out = tmp_path / "out"
    assert main(["assess", str(write_case(tmp_path, d)), "--out", str(out), "--quiet", "--workers", "1",
                 "--no-dynamics", "--base-samples", "16"]) == 0
    pages = [p.extract_text() for p in PdfReader(str(out / "report.pdf")).pages]
    start = next(i for i, t in enumerate(pages) if "Worth measuring" in t)
    # the section ends where the next one starts (the press signs; the dynamics, collapsed to a line when not run)
    following = ("What the structure alone decides", "How far ahead the projection holds", "Dynamics diagnostics: not run")
    end = next(i for i, t in enumerate(pages) if i > start and any(f in t for f in following))
    assert end - start <= 2
    assert (out / "sensitivity" / "drivers.csv").exists() and (out / "sensitivity" / "information.csv").exists()


def test_choices_tied_for_best_are_all_named(tmp_path):
    """Two options made of the same intervention give the same outcome in every member (the paired
    design: one member, one chance of failure): neither is "the" best choice, and the table and sentence must say they are tied."""
    from impact.dossier import hinges_text, load_results
    from impact.cli import main

    d = _goat_case(members=150)
    d["options"].append({"name": "eradicate twice over", "interventions": ["shoot"]})
    out = tmp_path / "out"
    assert main(["assess", str(write_case(tmp_path, d)), "--out", str(out), "--quiet", "--workers", "1",
                 "--no-dynamics", "--no-report", "--base-samples", "16"]) == 0
    res = load_results(out)
    info = res.sensitivity["information"]
    assert set(info.best_choice.iloc[0].split("; ")) == {"eradicate", "eradicate twice over"}
    assert "“eradicate” and “eradicate twice over”, tied" in hinges_text(res)


def test_the_prior_screen_beside_the_rest_gives_the_tables_of_one_after_another(tmp_path):
    # with worker threads api.decision_stage runs the prior screen's simulations beside the press signs and what
    # the decision hinges on; neither reads the other, so every table and record must equal the in-process
    # stage's (one part after another), to the bit
    from casefiles import mesopredator_case
    from impact.api import AssessSettings, decision_stage
    from impact.run.execute import make_executor

    data = mesopredator_case(members=120)
    data["parameters"]["meso_mortality"] = {"distribution": "uniform", "low": 0.27, "high": 0.33, "unit": "1/year",
                                            "source": "test"}
    data["species"][1]["mortality"] = "meso_mortality"
    case = load_case(write_case(tmp_path, data))
    ens = draw_ensemble(case, 120, case.seed)
    runs = assess_members(case, ens, case.seed)
    settings = AssessSettings(base_samples=16).resolved(case)
    apart = decision_stage(case, settings, case.seed, ens, runs)
    with make_executor(2) as executor:
        beside = decision_stage(case, settings, case.seed, ens, runs, executor=executor)
    assert "sensitivity/indices.csv" in beside.tables and apart.tables.keys() == beside.tables.keys()
    for key, table in apart.tables.items():
        assert table.equals(beside.tables[key]), key
    drop = {"seconds", "seconds_total"}  # (how long it took)
    assert ({k: v for k, v in apart.records["sensitivity/sensitivity.json"].items() if k not in drop}
            == {k: v for k, v in beside.records["sensitivity/sensitivity.json"].items() if k not in drop})
    assert apart.entry == beside.entry
