"""Main effects and value of information on the plausible ensemble."""

from __future__ import annotations

import copy

import numpy as np
import pytest

from casefiles import write_case
from impact.assess import assess_members, draw_ensemble
from impact.case import load_case
from impact.decision import PURPOSE_DRIVERS, drivers_table, information_table, main_effects
from impact.voi import design_matrix, fitted_means


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


def test_information_values_of_the_eradication_choice(goats):
    # choosing between doing nothing (goats never go) and eradicating (they go with chance 1 − f): eradicating is
    # better in every member whatever f, so knowing f cannot change the choice: EVPI = EVPPI = 0
    _, info = goats
    assert set(info.parameter) == {"all parameters", "fail", "goat_r"}
    assert (info.value.abs() < 1e-9).all()
    assert (info.best_choice == "eradicate").all() and abs(info.best_chance.iloc[0] - 0.6) < 0.06


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
    end = next(i for i, t in enumerate(pages) if "How far ahead the projection holds" in t and i > start)
    assert end - start <= 2
    assert (out / "sensitivity" / "drivers.csv").exists() and (out / "sensitivity" / "information.csv").exists()


def test_choices_tied_for_best_are_all_named(tmp_path):
    """Two options made of the same intervention give the same outcome in every member (the paired
    design: one member, one chance of failure): neither is "the" best choice, and the table and sentence must say they are tied."""
    from impact.report import hinges_text, load_results
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
