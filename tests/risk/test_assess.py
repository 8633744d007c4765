"""The assessment spine end to end: draws, filter, paired runs and risk metrics."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from casefiles import decline_case, web_case, write_case
from impact.risk import metrics as mx
from impact.ensemble.draws import draw_ensemble
from impact.risk.runs import risk_table, run_options
from impact.case import load_case


@pytest.fixture(scope="module")
def decline(tmp_path_factory):
    case = load_case(write_case(tmp_path_factory.mktemp("decline"), decline_case(members=2000)))
    ens = draw_ensemble(case, case.members, case.seed)
    runs = run_options(case, ens, case.seed)
    return case, ens, runs, risk_table(case, runs)


@pytest.mark.parametrize("h", [10.0, 20.0, 40.0])
def test_quasi_extinction_matches_the_analytic_hitting_time(decline, h):
    # N = N0 e^{rt} with r ~ U(−0.2, −0.05) falls below N_c by time h iff r < ln(N_c/N0)/h, so
    # P(h) = F_r(ln(N_c/N0)/h) exactly (quasi-extinction in the sense of Ginzburg et al. 1982).
    case, ens, runs, risk = decline
    crit = np.log(10.0 / 100.0) / h
    p = float(np.clip((crit + 0.2) / 0.15, 0.0, 1.0))
    row = risk[(risk.option == "baseline") & (risk.metric == "quasi_extinction") & (risk.horizon == h)].iloc[0]
    n = row["n"]
    assert n == 2000
    sd = np.sqrt(max(p * (1 - p), 1e-12) / n)
    assert abs(row["value"] - p) <= 4 * sd + 1e-12  # 4 binomial SDs: false alarm < 1e-4
    assert row["low"] <= p <= row["high"] or p in (0.0, 1.0)


@pytest.mark.parametrize("H", [10.0, 20.0, 40.0])
def test_expected_minimum_matches_closed_form(decline, H):
    # The minimum of N0 e^{rt} over [0, H] is N0 e^{rH} (r < 0). Over r ~ U(−0.2, −0.05) its mean is
    # N0 (e^{−0.05H} − e^{−0.2H}) / (0.15 H) and its second moment N0² (e^{−0.1H} − e^{−0.4H}) / (0.3 H)
    # (integrals of an exponential; the metric of McCarthy & Thompson 2001). The sample mean of n = 2000
    # members lies within 4 standard errors σ/√n of the mean (central limit theorem: false failure < 1e-4
    # per horizon), and the table's 95 % interval is the mean ± 1.96 s/√n (normal approximation), its half
    # width within 10 % of 1.96 σ/√n (the sample SD's relative error, √((κ − 1)/4n) with the kurtosis κ of
    # N0 e^{rH}, is 1.2 % to 2.3 % at these horizons: 10 % is over 4 of its SDs).
    case, ens, runs, risk = decline
    n = 2000
    mean = 100 * (np.exp(-0.05 * H) - np.exp(-0.2 * H)) / (0.15 * H)
    sigma = np.sqrt(100 ** 2 * (np.exp(-0.1 * H) - np.exp(-0.4 * H)) / (0.3 * H) - mean ** 2)
    row = risk[(risk.option == "baseline") & (risk.metric == "expected_minimum") & (risk.horizon == H)].iloc[0]
    assert row["n"] == n and row["interval"] == "mean_normal"
    assert abs(row["value"] - mean) <= 4 * sigma / np.sqrt(n)
    half = 1.959964 * sigma / np.sqrt(n)
    assert row["high"] - row["value"] == pytest.approx(half, rel=0.10)
    assert row["value"] - row["low"] == pytest.approx(half, rel=0.10)


def test_harvest_option_is_paired_and_only_worse(decline):
    case, ens, runs, risk = decline
    b = runs["baseline"].states[:, -1, 0]
    h = runs["harvest"].states[:, -1, 0]
    assert np.all(h <= b * (1 + 1e-9))
    ch = risk[(risk.option == "harvest") & (risk.metric == "mean_change") & (risk.horizon == 40.0)].iloc[0]
    assert ch["high"] <= 0 and ch["low"] < ch["value"] < 0


def test_clopper_pearson_zero_successes_closed_form():
    # k = 0: upper limit 1 − (α/2)^{1/n} (Clopper & Pearson 1934, exact binomial interval)
    lo, hi = mx.clopper_pearson(0, 10, 0.95)
    assert lo == 0.0 and hi == pytest.approx(1 - 0.025 ** (1 / 10), rel=1e-12)
    lo, hi = mx.clopper_pearson(10, 10, 0.95)
    assert hi == 1.0 and lo == pytest.approx(0.025 ** (1 / 10), rel=1e-12)


@pytest.mark.parametrize("k, n", [(1, 10), (7, 40), (250, 1000), (999, 1000)])
def test_clopper_pearson_agrees_with_scipy_exact_interval(k, n):
    # the vectorised beta-quantile form equals scipy's exact (Clopper-Pearson) interval of binomtest
    lo, hi = mx.clopper_pearson(k, n, 0.95)
    ci = stats.binomtest(k, n).proportion_ci(confidence_level=0.95, method="exact")
    assert lo == pytest.approx(ci.low, rel=1e-9) and hi == pytest.approx(ci.high, rel=1e-9)


def test_recovery_times_on_a_constructed_series():
    t = np.arange(6.0)
    base = np.full((3, 6), 10.0)
    opt = np.array([[10, 5, 5, 9, 10, 10],   # drops at 1, back at 3 → 2
                    [10, 10, 10, 10, 10, 10],  # never drops → 0
                    [10, 5, 5, 5, 5, 5]], float)  # never recovers → inf
    np.testing.assert_array_equal(mx.recovery_times(t, opt, base, 0.8), [2.0, 0.0, np.inf])


@pytest.fixture(scope="module")
def web(tmp_path_factory):
    case = load_case(write_case(tmp_path_factory.mktemp("web"), web_case(members=60)))
    ens = draw_ensemble(case, 60, case.seed)
    return case, ens, run_options(case, ens, case.seed)


def test_no_effect_option_reproduces_the_baseline_exactly(web):
    # pairing: same draws, same noise, same chance events ⇒ an option that changes nothing is identical
    case, ens, runs = web
    np.testing.assert_array_equal(runs["nothing"].states, runs["baseline"].states)


def test_options_differ_only_after_their_first_action(web):
    case, ens, runs = web
    t = runs["baseline"].times
    before = t < 2.0
    np.testing.assert_array_equal(runs["cull"].states[:, before], runs["baseline"].states[:, before])
    assert not np.array_equal(runs["cull"].states[:, ~before], runs["baseline"].states[:, ~before])


def test_eradication_failure_share_is_binomial(web):
    # each member fails independently with probability 0.3 (declared); 99.9 % binomial interval
    case, ens, runs = web
    fox_after = runs["remove"].states[:, list(runs["remove"].times).index(5.0), 2]
    failed = int((fox_after > 0).sum())
    lo, hi = stats.binom.ppf([0.0005, 0.9995], 60, 0.3)
    assert lo <= failed <= hi


def test_member_numbers_do_not_depend_on_ensemble_size(web):
    case, ens, runs = web
    small = draw_ensemble(case, 20, case.seed)
    np.testing.assert_array_equal(small.draws, ens.draws[:20])
    runs_small = run_options(case, small, case.seed)
    for name in runs:
        np.testing.assert_array_equal(runs_small[name].states, runs[name].states[:20])


def test_seed_changes_draws_and_seed_zero_is_a_seed(web):
    case, ens, runs = web
    a = draw_ensemble(case, 10, 0)
    b = draw_ensemble(case, 10, 0)
    c = draw_ensemble(case, 10, 1)
    np.testing.assert_array_equal(a.unit, b.unit)
    assert not np.array_equal(a.unit, c.unit)


def test_plausibility_filter_counts_and_keeps_only_plausible(tmp_path):
    # an observed range that only half the grass growth rates can meet: some draws are rejected
    data = web_case(members=40)
    data["observed"] = [{"species": "hare", "low": 0.0, "high": 1e9}]
    case = load_case(write_case(tmp_path, data))
    ens = draw_ensemble(case, 40, 5)
    c = ens.counts
    assert c["kept"] == 40 and c["tried"] >= 40
    assert c["tried"] >= c["kept"] + c["failed"] + c["extinct"] + c["out_of_range"] - 0
    assert np.all(ens.today[:, :4] >= 0)


def test_environmental_noise_is_mean_one_lognormal(tmp_path):
    # dN/dt = φ_k r N with φ_k = exp(σz − σ²/2) per time unit ⇒ ln(N_T/N0)/r = Σ φ_k,
    # mean T and variance T (e^{σ²} − 1) (lognormal moments)
    data = decline_case(members=800)
    data["parameters"]["r"] = {"distribution": "fixed", "value": 0.05}
    data["species"][0]["noise_sd"] = 0.3
    data["species"][0]["growth_rate"] = "r"
    case = load_case(write_case(tmp_path, data))
    ens = draw_ensemble(case, 800, 1)
    run = run_options(case, ens, 1)["baseline"]
    T = 40
    s = np.log(run.states[:, -1, 0] / 100.0) / 0.05
    var = T * (np.exp(0.09) - 1)
    assert abs(s.mean() - T) < 4 * np.sqrt(var / 800)
    assert 0.8 * var < s.var() < 1.25 * var


def test_cli_assess_writes_tables_and_manifest(tmp_path, capsys):
    from impact.cli import main

    f = write_case(tmp_path, web_case(members=30))
    out = tmp_path / "out"
    assert main(["assess", str(f), "--out", str(out), "--quiet", "--no-sensitivity", "--no-dynamics", "--no-report"]) in (0,)
    text = capsys.readouterr().out
    assert "quasi-extinction" in text and "CAUTION" in text
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["counts"]["kept"] == 30 and len(manifest["case"]["sha256"]) == 64
    risk = pd.read_csv(out / "risk.csv")
    assert set(risk.option) == {"baseline", "cull", "remove", "nothing"}
    assert {"quasi_extinction", "expected_minimum", "mean_change", "outbreak", "recovery_time"} <= set(risk.metric)
    bands = pd.read_csv(out / "bands.csv")
    assert (bands.q05 <= bands.q50).all() and (bands.q50 <= bands.q95).all()
    assert not any(p.name.startswith(".") for p in tmp_path.iterdir())  # no temporary directory left
