"""Sobol sensitivity: published analytic indices, design layout, failure and plausibility handling."""

from __future__ import annotations

import copy
import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from casefiles import write_case
from impact.case import load_case
from impact.cli import main
from impact.case.priors import Uniform
import impact.decision.sensitivity.estimators as estimators
from impact.decision.sensitivity import (CONV_COLUMNS, INDEX_COLUMNS, RANK_COLUMNS, S2_COLUMNS, Settings,
    morris_design, morris_effects, sensitivity_stage, sobol_design, sobol_indices, sobol_study, through_priors)

HERE = Path(__file__).parents[1]  # tests/
ISHIGAMI_A, ISHIGAMI_B = 7.0, 0.1
G_A = np.array([0.0, 1.0, 4.5, 9.0, 99.0, 99.0, 99.0, 99.0])


# ---- Ishigami function (Ishigami & Homma 1990), indices from the closed-form partial variances ----

def ishigami(X):
    a, b = ISHIGAMI_A, ISHIGAMI_B
    return np.sin(X[:, 0]) + a * np.sin(X[:, 1]) ** 2 + b * X[:, 2] ** 4 * np.sin(X[:, 0])


def ishigami_analytic():
    """S1, ST and S13 from the partial variances of Saltelli et al. 2008 (The Primer), sec. 4.9 / Table 4.2."""
    a, b, pi = ISHIGAMI_A, ISHIGAMI_B, math.pi
    V = a**2 / 8 + b * pi**4 / 5 + b**2 * pi**8 / 18 + 0.5
    V1 = 0.5 * (1 + b * pi**4 / 5) ** 2
    V2 = a**2 / 8
    V13 = b**2 * pi**8 * (1 / 18 - 1 / 50)
    S1 = np.array([V1, V2, 0.0]) / V
    ST = np.array([V1 + V13, V2, V13]) / V
    return S1, ST, V13 / V


@pytest.fixture(scope="module")
def ishigami_study():
    priors = [Uniform(-math.pi, math.pi)] * 3
    return sobol_study(through_priors(lambda X: ishigami(X)[:, None], priors), ["x1", "x2", "x3"], 4096,
                       second_order=True, seed=0)


def test_ishigami_closed_form_matches_the_primer_table():
    # Saltelli et al. 2008, The Primer, Table 4.2 (values quoted to three decimals)
    S1, ST, _ = ishigami_analytic()
    np.testing.assert_allclose(S1, [0.314, 0.442, 0.0], atol=5e-4)
    np.testing.assert_allclose(ST, [0.558, 0.442, 0.244], atol=5e-4)


@pytest.mark.parametrize("kind", ["S1", "ST"])
@pytest.mark.parametrize("j", [0, 1, 2])
def test_ishigami_indices_recovered_within_bootstrap_ci(ishigami_study, kind, j):
    # N = 4096 base samples, second-order design; analytic values: Ishigami & Homma 1990 via the Primer
    S1, ST, _ = ishigami_analytic()
    ind = ishigami_study.indices[0]
    est, conf = getattr(ind, kind)[j], getattr(ind, f"{kind}_conf")[j]
    assert abs(est - {"S1": S1, "ST": ST}[kind][j]) <= conf


def test_ishigami_second_order_x1_x3_within_ci(ishigami_study):
    # S13 = V13 / V (Saltelli et al. 2008, sec. 4.9); the only non-zero interaction of the function
    _, _, S13 = ishigami_analytic()
    ind = ishigami_study.indices[0]
    assert abs(ind.S2[0, 2] - S13) <= ind.S2_conf[0, 2]
    assert abs(ind.S2[0, 1]) <= ind.S2_conf[0, 1]


# ---- Sobol G-function (Saltelli & Sobol 1995) ----

def g_function(X):
    return np.prod((np.abs(4 * X - 2) + G_A) / (1 + G_A), axis=1)


def g_analytic():
    """V_i = 1/(3(1+a_i)^2), V = prod(1+V_i) - 1; ST_i = V_i prod_{j!=i}(1+V_j) / V (Saltelli & Sobol 1995)."""
    Vi = 1.0 / (3.0 * (1.0 + G_A) ** 2)
    V = np.prod(1 + Vi) - 1
    ST = Vi * np.prod(1 + Vi) / (1 + Vi) / V
    return Vi / V, ST


@pytest.fixture(scope="module")
def g_study():
    names = [f"x{i + 1}" for i in range(8)]
    return sobol_study(through_priors(lambda X: g_function(X)[:, None], [Uniform(0.0, 1.0)] * 8), names, 4096, seed=1)


@pytest.mark.parametrize("j", range(8))
def test_g_function_first_and_total_order_within_ci(g_study, j):
    S1, ST = g_analytic()
    ind = g_study.indices[0]
    assert abs(ind.S1[j] - S1[j]) <= ind.S1_conf[j]
    assert abs(ind.ST[j] - ST[j]) <= ind.ST_conf[j]


def test_g_function_converges_within_tolerance(g_study):
    assert g_study.convergence[0]["converged"]


def test_morris_screens_out_the_unimportant_g_factors():
    # Morris 1991 elementary effects; on the G-function factors with a_i = 99 are negligible
    # (Saltelli et al. 2008, The Primer, ch. 3 uses this function for the Morris method)
    d = morris_design([f"x{i + 1}" for i in range(8)], 40, seed=3)
    mu = morris_effects(d, g_function(d.unit))["mu_star"]
    assert mu[4:].max() < 0.1 * mu[:2].min()


# ---- the vectorised Saltelli estimator against SALib ----

@pytest.mark.parametrize("D, N, second", [(5, 64, False), (3, 32, True), (1, 16, False)])
def test_sobol_estimates_equal_salibs_sobol_analyze_on_the_same_draws(D, N, second):
    # SALib 1.6 sobol.analyze is the reference implementation of the Saltelli et al. 2010 first-order,
    # Jansen total-order and Saltelli 2002 second-order estimators; the same generator draws the same
    # resamples, so the point values must agree exactly (same summation order) and the half-widths to rounding
    from SALib.analyze import sobol as salib_sobol

    design = sobol_design([f"x{j}" for j in range(D)], N, second, seed=D)
    X = design.unit
    y = 30.0 + np.sin(6 * X[:, 0]) + X[:, -1] ** 2 * (1 + X[:, 0])
    ref = salib_sobol.analyze(design.problem(), y, calc_second_order=second, num_resamples=50, seed=41)
    got = estimators.saltelli_estimates(y, D, second, np.random.default_rng(41), resamples=50)
    assert set(got) == ({"S1", "S1_conf", "ST", "ST_conf"} | ({"S2", "S2_conf"} if second else set()))
    for key in ("S1", "ST") + (("S2",) if second else ()):
        np.testing.assert_array_equal(got[key], np.asarray(ref[key], float), err_msg=key)
    for key in ("S1_conf", "ST_conf") + (("S2_conf",) if second else ()):
        np.testing.assert_allclose(got[key], np.asarray(ref[key], float), rtol=0, atol=1e-13, err_msg=key)


def test_sobol_estimates_are_the_same_in_any_stack_of_parameters(monkeypatch):
    design = sobol_design(["a", "b", "c", "d"], 32, True, seed=9)
    y = design.unit[:, 0] * design.unit[:, 1] + design.unit[:, 2]
    whole = estimators.saltelli_estimates(y, 4, True, np.random.default_rng(3), resamples=20)
    monkeypatch.setattr(estimators, "SALTELLI_CHUNK", 1)  # one parameter per resample stack
    parts = estimators.saltelli_estimates(y, 4, True, np.random.default_rng(3), resamples=20)
    for key, v in whole.items():
        np.testing.assert_allclose(parts[key], v, rtol=0, atol=1e-14, err_msg=key)


def test_resamples_from_counts_equal_the_gathered_resamples_to_rounding():
    # the bootstrap's resample means are count-weighted sums over the base samples (one matrix product) instead
    # of sums over gathered (N, R, D) stacks, and the resample variance is the one-pass form: the same sums in
    # another order. Against the gathered form written out here (the former path), on a demo-sized design
    # (N = 128, D = 13, 100 resamples) with a 0/1 output and a smooth one: half-widths equal to rtol 1e-12
    # (measured on the demo's 166 outputs: 8e-15 at most), point values identical. Deterministic: no false failures.
    from scipy.stats import norm

    D, N, R = 13, 128, 100
    design = sobol_design([f"x{j}" for j in range(D)], N, False, seed=4)
    X = design.unit
    for y in (30.0 + np.sin(6 * X[:, 0]) + X[:, 3] ** 2 * (1 + X[:, 0]), (X[:, 1] + 0.3 * X[:, 2] > 0.8).astype(float)):
        got = estimators.saltelli_estimates(y, D, False, np.random.default_rng(7), resamples=R)
        z = (y - y.mean()) / y.std()
        blocks = z.reshape(-1, D + 2)
        A, B, AB = blocks[:, 0], blocks[:, -1], blocks[:, 1:D + 1]
        draws = np.random.default_rng(7).integers(N, size=(N, R))
        Ar, Br, ABr = A[draws][..., None], B[draws][..., None], AB[draws]
        var = np.var(np.r_[A[draws], B[draws]], axis=0)[:, None]
        half = norm.ppf(0.975)
        first = half * (np.mean(Br * (ABr - Ar), axis=0) / var).std(axis=0, ddof=1)
        total = half * (0.5 * np.mean((Ar - ABr) ** 2, axis=0) / var).std(axis=0, ddof=1)
        np.testing.assert_allclose(got["S1_conf"], first, rtol=1e-12, atol=0)
        np.testing.assert_allclose(got["ST_conf"], total, rtol=1e-12, atol=0)


# ---- given-data first-order indices (random balance designs) ----

def _rbd_data(n: int, D: int, seed: int):
    rng = np.random.default_rng(seed)
    X = rng.random((n, D))
    # an offset far from zero: the spectrum must not depend on the output's level
    y = 50.0 + np.sin(2 * np.pi * X[:, 0]) + X[:, 1] ** 2 + 0.3 * rng.normal(size=n)
    return X, y


@pytest.mark.parametrize("n, D", [(256, 4), (255, 3), (64, 2)])
def test_given_data_estimator_equals_salibs_rbd_fast_on_the_same_draws(n, D):
    # SALib 1.6 rbd_fast.analyze is the reference implementation of Tarantola, Gatelli & Mara 2006 with
    # Plischke's 2010 ordering and Tissot & Prieur's 2012 bias correction; given the same generator it
    # draws the same resamples, so point values and half-widths must agree to rounding
    from SALib.analyze import rbd_fast

    X, y = _rbd_data(n, D, seed=n)
    names = [f"x{j}" for j in range(D)]
    ref = rbd_fast.analyze({"num_vars": D, "names": names, "bounds": [[0, 1]] * D}, X, y, seed=77)
    s1, conf = estimators.rbd_first_order(X, y, np.random.default_rng(77))
    np.testing.assert_allclose(s1, ref["S1"], rtol=0, atol=1e-12)
    np.testing.assert_allclose(conf, ref["S1_conf"], rtol=0, atol=1e-12)


def test_given_data_estimator_is_the_same_in_any_batch_of_parameters(monkeypatch):
    X, y = _rbd_data(300, 5, seed=2)
    whole = estimators.rbd_first_order(X, y, np.random.default_rng(5))
    monkeypatch.setattr(estimators, "RBD_CHUNK", 1)  # one parameter per FFT batch
    np.testing.assert_array_equal(estimators.rbd_first_order(X, y, np.random.default_rng(5)), whole)


def test_outputs_on_the_same_points_share_their_resamples_without_changing_numbers():
    # given_data_first_order reuses the sort orders and resamples of the last set of points (they depend on the
    # points and the stream alone); each output must still get the numbers of its own fresh stream, to the bit
    from impact.decision.sensitivity.designs import salib_seed

    X, y = _rbd_data(200, 4, seed=8)
    for out in (y, y**2, np.where(y > y.mean(), 1.0, 0.0), y):
        want = estimators.rbd_first_order(X, out, np.random.default_rng(salib_seed(3, 4)))
        got = estimators.given_data_first_order(X, out, list("abcd"), seed=3)
        assert all(np.array_equal(g, w, equal_nan=True) for g, w in zip(got, want))
    other = X[::-1].copy()  # other points: a plan of their own
    want = estimators.rbd_first_order(other, y, np.random.default_rng(salib_seed(3, 4)))
    assert all(np.array_equal(g, w) for g, w in zip(estimators.given_data_first_order(other, y, list("abcd"), 3), want))


def test_given_data_first_order_of_the_ishigami_function():
    # S1 from the closed-form partial variances (Ishigami & Homma 1990; Saltelli et al. 2008, Table 4.2) on
    # 2,000 uniform points. Margin 1.25 x the 95 % bootstrap half-width: over 1,000 data seeds the
    # estimate left it for some input in 1 seed (false-failure rate about 0.1 %).
    rng = np.random.default_rng(11)
    X = rng.uniform(-math.pi, math.pi, (2000, 3))
    S1, _, _ = ishigami_analytic()
    s1, conf = estimators.rbd_first_order(X, ishigami(X), np.random.default_rng(12))
    assert np.all(np.abs(s1 - S1) <= 1.25 * conf), (s1, conf)
    assert np.all(conf < 0.06)


def test_given_data_first_order_needs_enough_finite_points():
    X, y = _rbd_data(70, 2, seed=3)
    y[:10] = np.nan  # 60 finite points left, fewer than 64
    assert np.isnan(estimators.given_data_first_order(X, y, ["a", "b"], seed=0)[0]).all()
    with pytest.raises(ValueError, match="names"):
        estimators.given_data_first_order(X, y, ["a"], seed=0)


# ---- design layout and the failure rule ----

def test_design_prefix_is_the_smaller_design():
    big = sobol_design(["a", "b", "c"], 64, True, seed=5)
    small = sobol_design(["a", "b", "c"], 32, True, seed=5)
    assert big.step == 2 * 3 + 2 and big.runs == 64 * 8
    np.testing.assert_array_equal(big.head(32).unit, small.unit)


@pytest.mark.parametrize("n", [0, 7])
def test_outputs_must_match_the_design_layout(n):
    d = sobol_design(["a", "b"], 16, False, seed=0)
    with pytest.raises(ValueError):
        sobol_indices(d, np.zeros(d.runs + n if n else d.runs - 1))


def _linear(d):
    return d.unit @ np.array([1.0, 2.0, 3.0])


def test_a_few_failed_points_drop_their_base_samples_and_are_counted():
    d = sobol_design(["a", "b", "c"], 256, False, seed=2)
    y = _linear(d)
    y[[3, 400]] = np.nan  # two points in two different base samples
    ind = sobol_indices(d, y, failure_limit=0.05)
    assert (ind.status, ind.failed_points, ind.blocks_used) == ("ok", 2, 254)
    # additive model: S_i = c_i^2 / sum c^2 for uniform inputs (variance decomposition, Sobol 1993)
    np.testing.assert_allclose(ind.S1, np.array([1, 4, 9]) / 14, atol=0.05)


def test_too_many_failures_are_refused_with_a_message():
    d = sobol_design(["a", "b", "c"], 64, False, seed=2)
    y = _linear(d)
    y[::10] = np.nan  # 10 % of points
    ind = sobol_indices(d, y, failure_limit=0.05)
    assert ind.status == "refused" and np.isnan(ind.ST).all() and "limit" in ind.message


def test_constant_output_is_reported_not_divided_by_zero():
    d = sobol_design(["a", "b"], 32, False, seed=2)
    ind = sobol_indices(d, np.ones(d.runs))
    assert ind.status == "constant" and (ind.ST == 0).all()


# ---- the food web: a parameter that provably does not enter a metric ----

def _two_islands(N_members=50):
    """Two species that never interact; the newt's rate cannot reach the vole and vice versa."""
    return copy.deepcopy({
        "case": {"title": "two disconnected species (test)", "time_unit": "year", "horizon": 10.0, "output_step": 1.0,
                 "spinup": 10.0, "members": N_members, "seed": 4, "invented": True},
        "parameters": {
            "vole_r": {"distribution": "uniform", "low": 1.0, "high": 2.0, "unit": "1/year"},
            "vole_K": {"distribution": "log-uniform", "low": 50.0, "high": 200.0, "unit": "voles/ha"},
            "newt_r": {"distribution": "triangular", "low": 0.5, "mode": 0.8, "high": 1.5, "unit": "1/year"},
            "trap": {"distribution": "uniform", "low": 0.1, "high": 0.5, "unit": "1/year"},
        },
        "species": [
            {"name": "vole", "growth": "logistic", "growth_rate": "vole_r", "carrying_capacity": "vole_K",
             "initial": 60.0, "quasi_extinction": 5.0},
            {"name": "newt", "growth": "logistic", "growth_rate": "newt_r", "carrying_capacity": 30.0,
             "initial": 10.0, "quasi_extinction": 1.0},
        ],
        "observed": [{"species": "vole", "low": 20.0, "high": 150.0, "source": "test"}],
        "interventions": [{"name": "trap", "kind": "press-harvest", "species": "vole", "rate": "trap",
                           "start": 0.0, "end": 10.0}],
        "options": [{"name": "trapping", "interventions": ["trap"]}],
        "risk": {"horizons": [10.0]},
    })


@pytest.fixture(scope="module")
def islands(tmp_path_factory):
    path = write_case(tmp_path_factory.mktemp("islands"), _two_islands())
    case = load_case(path)
    return path, sensitivity_stage(case, Settings(base_samples=64, seed=0, given_data=False))


@pytest.mark.parametrize("option,metric,species,absent", [
    ("baseline", "final", "vole", "newt_r"),
    ("trapping", "mean_change", "vole", "newt_r"),
    ("trapping", "final", "newt", "vole_K"),
    ("trapping", "final", "newt", "trap"),
    ("baseline", "plausible", "all", "newt_r"),
])
def test_parameter_outside_a_metric_has_zero_total_index(islands, option, metric, species, absent):
    # a factor that does not enter f has S_Ti = 0 (Homma & Saltelli 1996, definition of the total effect)
    ix = islands[1].indices
    row = ix[(ix.option == option) & (ix.metric == metric) & (ix.species == species) & (ix.parameter == absent)]
    assert len(row) == 1
    assert abs(row.ST.iloc[0]) <= max(row.ST_conf.iloc[0], 1e-12)


def test_carrying_capacity_drives_plausibility_of_the_vole(islands):
    # the observed vole range cuts the K prior, so K must explain most of the indicator's variance
    rk = islands[1].ranking
    top = rk[(rk.metric == "plausible") & (rk["rank"] == 1)]
    assert top.parameter.iloc[0] == "vole_K"


def test_ranking_is_ordered_by_total_index_with_interaction_share(islands):
    rk = islands[1].ranking
    for _, g in rk.groupby(["option", "metric", "species"]):
        assert (np.diff(g.sort_values("rank").ST.to_numpy()) <= 1e-12).all()
    np.testing.assert_allclose(rk.interaction, rk.ST - rk.S1)


def test_every_index_states_what_it_is_conditional_on(islands):
    ix = islands[1].indices
    assert ix.conditional_on.str.contains("plausibility not applied").all()
    assert "plausibility filter is NOT applied" in islands[1].info["policy"]


# ---- the command line ----

def test_cli_sensitivity_writes_the_contract_tables(islands, tmp_path, capsys):
    out = tmp_path / "res"
    assert main(["sensitivity", str(islands[0]), "--out", str(out), "--base-samples", "32", "--second-order",
                 "--quiet"]) == 0
    d = out / "sensitivity"
    for name, cols in (("indices", INDEX_COLUMNS), ("second_order", S2_COLUMNS), ("ranking", RANK_COLUMNS),
                       ("convergence", CONV_COLUMNS)):
        assert list(pd.read_csv(d / f"{name}.csv").columns) == cols
    info = json.loads((d / "sensitivity.json").read_text())
    for key in ("N", "D", "second_order", "runs", "failures", "failure_limit", "policy", "method", "screening"):
        assert key in info
    assert info["runs"] == 32 * (2 * 4 + 2) and info["second_order"] is True
    assert "sensitivity" in json.loads((out / "manifest.json").read_text())["stages"]
    assert "converged" in capsys.readouterr().out


@pytest.mark.parametrize("flag,value", [("--base-samples", "100"), ("--base-samples", "8"), ("--tolerance", "0")])
def test_cli_rejects_bad_settings_and_writes_nothing(islands, tmp_path, flag, value, capsys):
    out = tmp_path / "res"
    assert main(["sensitivity", str(islands[0]), "--out", str(out), flag, value, "--quiet"]) == 2
    assert not out.exists()
    assert flag in capsys.readouterr().err


def test_demo_case_stage_runs_at_small_n():
    case = load_case(HERE.parent / "casework" / "predator_prey.toml")
    res = sensitivity_stage(case, Settings(base_samples=16, seed=0, given_data=True))
    assert res.info["runs"] == 16 * (4 + 2)
    # the verdict on convergence follows the recorded shift and width against the declared tolerance, and
    # an output that never varies (its indices 0 by definition) is the only kind converged at N = 16
    conv = res.convergence
    tol = res.info["tolerance"]
    assert (conv.converged == ((conv.max_shift <= tol) & (conv.max_ci_width <= tol))).all()
    constant = {f"{r.option}/{r.metric}/{r.species}" for r in conv.itertuples() if r.converged}
    assert constant == set(res.info["constant_outputs"]) and res.info["not_converged"] == int((~conv.converged).sum())
    # the trap rate acts only in the trapping option: on the baseline's outputs every index of it is exactly 0
    # (the Saltelli 2010 estimators difference f(A_B^i) and f(A), identical when f ignores column i)
    idx = res.indices[res.indices.option == "baseline"]
    trap, other = idx[idx.parameter == "trap_rate"], idx[idx.parameter != "trap_rate"]
    assert len(trap) and (trap[["S1", "ST", "S1_conf", "ST_conf"]].to_numpy() == 0).all()
    assert (other.ST.abs() > 0).any()
    ranked = res.ranking[(res.ranking.option == "baseline") & (res.ranking.metric == "mean_abundance")
                         & (res.ranking.species == "vole")]
    assert list(ranked.ST) == sorted(ranked.ST, reverse=True) and ranked.parameter.iloc[-1] == "trap_rate"


def test_morris_screening_runs_before_sobol_when_asked(islands):
    # screening keeps every factor whose mu* reaches SCREEN_KEEP of the largest (common practice, no source)
    case = load_case(islands[0])
    res = sensitivity_stage(case, Settings(base_samples=16, seed=0, screen=True, screen_trajectories=6, given_data=False))
    scr = res.info["screening"]
    assert scr["runs"] == 6 * (4 + 1)
    assert set(scr["kept"]) | set(scr["dropped"]) == {"vole_r", "vole_K", "newt_r", "trap"}
    assert res.info["D"] == len(scr["kept"])
