"""Expected value of sample information (impact.decision.studies) against closed forms."""

import subprocess
import sys

import numpy as np
import pytest
from scipy.stats import norm

from casefiles import mesopredator_case, write_case
from impact.case import load_case
from impact.errors import CaseError
from impact.decision.studies import (PURPOSE_STUDIES, _stream, sample_values_many, simulate_summaries,
    simulate_summary, stream_words, worth_cost)


def closed_form_evsi(mu0: float, s0: float, sd: float, n: float) -> float:
    """EVSI of choosing between net benefit 0 and θ ~ N(mu0, s0²) after n normal observations of sd ``sd``.

    The posterior mean's preposterior distribution is N(mu0, s²) with s² = s0⁴ / (s0² + sd²/n) (Raiffa &
    Schlaifer 1961, ch. 5; Ades, Lu & Claxton 2004, Medical Decision Making 24:207–227, eq. for a normal
    prior and normal data), so EVSI = E[max(0, m)] − max(0, mu0) = mu0·Φ(mu0/s) + s·φ(mu0/s) − max(0, mu0).
    """
    s = s0**2 / np.sqrt(s0**2 + sd**2 / n)
    return float(mu0 * norm.cdf(mu0 / s) + s * norm.pdf(mu0 / s) - max(0.0, mu0))


def normal_study(M: int, seed: int, samples: int, log_sd: float, mu0: float = 0.2, s0: float = 1.0, resamples: int = 20):
    """A parameter v = exp(θ), θ ~ N(mu0, s0²), measured by a lognormal study: the mean log measurement is
    N(θ, log_sd²/samples), a normal–normal study. Net benefit: 0 for doing nothing, θ for the option."""
    rng = np.random.default_rng(1000 + seed)
    theta = rng.normal(mu0, s0, M)
    one = np.ones(M)
    Z = simulate_summary(np.exp(theta)[:, None], "lognormal", samples, one, one, None, log_sd * one, np.arange(M),
                         seed, 7)
    nb = np.column_stack([np.zeros(M), theta])
    evsi, ceiling = sample_values_many([nb], theta[:, None], ["theta"], {"study": (Z, ["theta"])},
                                       resamples=resamples, seed=seed)[0]["study"]
    return evsi, ceiling


def test_normal_normal_evsi_matches_closed_form_within_2_percent():
    # Raiffa & Schlaifer 1961 / Ades et al. 2004 closed form (closed_form_evsi), checked on the regression
    # estimator itself: θ ~ N(0.2, 1) and the study's mean measurement T = θ + ε, ε ~ N(0, 1/n), with (θ, ε) from
    # a scrambled Sobol' sequence of 2^14 points (≥ 10,000 members; quasi-random so the prior and the noise are
    # spread evenly and what is left is the estimator's own error). Measured over 10 scrambles: spread of one
    # estimate 0.33 % (n = 1), 0.11 % (n = 4), 0.05 % (n = 16) of the value, mean bias ≤ 0.2 %. Margin 2 % of the
    # closed form, over 5 spreads from the value: false-failure rate under 1e-6 per check by a normal approximation.
    from scipy.stats import qmc

    M, mu0, s0 = 2**14, 0.2, 1.0
    for samples in (1, 4, 16):
        u = qmc.Sobol(2, scramble=True, seed=samples).random(M)
        theta = mu0 + s0 * norm.ppf(u[:, 0])
        T = theta + norm.ppf(u[:, 1]) / np.sqrt(samples)
        nb = np.column_stack([np.zeros(M), theta])
        e, _ = sample_values_many([nb], theta[:, None], ["theta"], {"s": (T[:, None], ["theta"])}, resamples=2,
                                  seed=samples)[0]["s"]
        exact = closed_form_evsi(mu0, s0, 1.0, samples)
        assert e.value == pytest.approx(exact, rel=0.02)


def test_lognormal_study_summary_is_normal_about_the_log_truth():
    # The study data path: a lognormal study's summary is the mean of `samples` log measurements, each
    # N(log(scale · truth), log_sd²) (the lognormal observation model's definition), so the summary minus
    # log(scale · truth) is N(0, log_sd²/samples). Mean within 4 standard errors and variance within 4 standard
    # errors of its estimate (sd of a sample variance ≈ σ²·√(2/M), normal data): false-failure rate ≈ 1e-4.
    M, samples, log_sd = 4000, 4, 0.6
    truth = np.random.default_rng(5).lognormal(0.0, 1.0, M)
    one = np.ones(M)
    Z = simulate_summary(truth[:, None], "lognormal", samples, one, 2 * one, None, log_sd * one, np.arange(M), 3, 7)
    r = Z[:, 0] - np.log(2 * truth)
    var = log_sd**2 / samples
    assert abs(r.mean()) < 4 * np.sqrt(var / M)
    assert abs(r.var(ddof=1) - var) < 4 * var * np.sqrt(2 / M)


def test_evsi_rises_to_evppi_and_falls_to_zero():
    # With large samples the study tells θ almost exactly: EVSI → EVPPI (definition of the EVPPI as the
    # limit of the EVSI, Ades et al. 2004); with a hopeless measurement (log-SD 100, i.e. sd²/n → ∞) → 0.
    big, ceiling = normal_study(4000, 1, 10_000, 1.0)
    assert big.value == pytest.approx(ceiling.value, abs=0.01)
    assert big.value == pytest.approx(closed_form_evsi(0.2, 1.0, 1.0, 1e12), abs=0.03)
    tiny, _ = normal_study(4000, 1, 1, 100.0)
    # the closed form is 0 to float precision here (mu0/s = 20); a cross-fitted estimate cannot invent value
    assert tiny.value < 0.01 and tiny.low == 0.0


def test_evsi_never_exceeds_its_ceiling():
    # EVSI ≤ EVPPI of what the study measures ≤ EVPI, by definition (data on θ can at most tell θ); the cap
    # holds resample by resample, so also for the limits
    for samples in (1, 30, 3000):
        e, cap = normal_study(2000, 3, samples, 0.5)
        assert e.value <= cap.value and e.low <= cap.low + 1e-12 and e.high <= cap.high + 1e-12


def test_study_of_a_parameter_without_influence_is_never_worth_its_cost():
    # the net benefit does not depend on φ: the EVSI's lower limit is 0, so value × low − cost < 0 for any
    # positive cost and any value scale. Checked over 10 seeds (a property of the clipping and cross-fitting,
    # not of one seed).
    M = 1000
    for seed in range(10):
        rng = np.random.default_rng(seed)
        phi, theta = rng.uniform(0.5, 2.0, M), rng.normal(0.1, 1.0, M)
        nb = np.column_stack([rng.binomial(1, 0.5, M), rng.binomial(1, 0.5, M)]).astype(float)
        one = np.ones(M)
        Z = simulate_summary(phi[:, None], "poisson", 50, one, one, None, None, np.arange(M), seed, 3)
        e, _ = sample_values_many([nb], np.column_stack([phi, theta]), ["phi", "theta"], {"s": (Z, ["phi"])},
                                  resamples=100, seed=seed)[0]["s"]
        assert e.low == 0.0
        value, cost = 1e6, 1.0
        assert worth_cost(value * e.low - cost, value * e.high - cost) != "yes"


def test_study_data_are_the_members_own():
    # a member's simulated data depend on its draw index, the seed and the study, never on the other members
    truth = np.array([[3.0], [5.0], [8.0]])
    one = np.ones(3)
    a = simulate_summary(truth, "negative-binomial", 5, one, one, 4 * one, None, np.array([10, 11, 12]), 9, 1)
    b = simulate_summary(truth[::-1], "negative-binomial", 5, one, one, 4 * one, None, np.array([12, 11, 10]), 9, 1)
    assert np.array_equal(a, b[::-1])
    c = simulate_summary(truth[1:], "negative-binomial", 5, one[1:], one[1:], 4 * one[1:], None, np.array([11, 12]), 9, 1)
    assert np.array_equal(a[1:], c)


def _one_size_reference(truth, error, samples, detection, scale, dispersion, log_sd, draws, seed, key):
    """The observation model as declared, one member and one size at a time from a fresh stream (the reference)."""
    M, k = truth.shape
    out = np.full((M, k), np.nan)
    for i in range(M):
        if not np.isfinite(truth[i]).all():
            continue
        rng = _stream(seed, draws[i], key)
        if error == "lognormal":
            out[i] = np.log(scale[i] * truth[i]) + log_sd[i] * rng.standard_normal((k, samples)).mean(axis=1)
            continue
        mu = np.broadcast_to(detection[i] * scale[i] * np.maximum(truth[i], 0.0)[:, None], (k, samples))
        if error == "negative-binomial":
            mu = rng.gamma(dispersion[i], mu / dispersion[i])
        out[i] = np.log(rng.poisson(mu).mean(axis=1) + 0.5 / samples)
    return out


@pytest.mark.parametrize("error", ["lognormal", "poisson", "negative-binomial"])
@pytest.mark.parametrize("k", [1, 2])
def test_every_size_at_once_gives_the_numbers_of_one_size_at_a_time(error, k):
    # the sizes of study_sizes.csv are drawn together (one stream per member, shared draws where they are the
    # first draws of the largest size); each size must equal its own fresh draw to the bit
    rng = np.random.default_rng(8)
    M = 60
    truth = rng.gamma(2.0, 3.0, (M, k))
    truth[4] = np.nan
    args = (rng.uniform(0.2, 1, M), rng.uniform(0.5, 3, M), rng.uniform(0.5, 5, M), rng.uniform(0.1, 0.8, M),
            rng.permutation(500)[:M], 4, 17)
    sizes = [1, 2, 5, 10, 40, 129, 160]
    got = simulate_summaries(truth, error, sizes, *args)
    for n in sizes:
        assert np.array_equal(got[n], _one_size_reference(truth, error, n, *args), equal_nan=True)


def test_members_seed_words_are_those_of_numpys_seed_sequence():
    # the members' streams are seeded from words computed for all members at once; they must be the words
    # numpy's SeedSequence(seed, spawn_key=(draw, PURPOSE_STUDIES, key)).generate_state(4, uint64) gives (the
    # definition of the stream), for seeds of one to five 32-bit words and draws and keys at their limits
    rng = np.random.default_rng(2)
    draws = np.r_[0, 1, 2**32 - 1, rng.integers(0, 2**32, 20)]
    for seed in (0, 2026, 2**32, 2**100 + 3, 2**130 + 5):
        for key in (0, 2**32 - 1, 123456789):
            want = np.stack([np.random.SeedSequence(seed, spawn_key=(int(d), PURPOSE_STUDIES, key)).generate_state(4, np.uint64)
                             for d in draws])
            assert np.array_equal(stream_words(seed, draws, key), want)
    assert stream_words(1, np.array([2**32]), 1) is None  # a draw of two words: each member's own SeedSequence


def test_worth_cost_words():
    assert worth_cost(1.0, 5.0) == "yes"
    assert worth_cost(-1.0, -0.5) == "no"
    assert worth_cost(-1.0, 2.0) == "undetermined"
    assert worth_cost(np.nan, np.nan) == "no value scale"


# --- the case file's [[studies]] and [outcome_values] -----------------------------------------------


GOOD_STUDY = {"name": "diet", "measures": "parameter", "parameter": "meso_attack", "error": "lognormal", "samples": 20,
              "log_sd": 0.3, "cost": 500, "cost_unit": "dollars"}


def _with(**changes) -> dict:
    d = mesopredator_case()
    d["studies"] = [{**GOOD_STUDY, **changes}]
    return {k: v for k, v in d.items()}


def test_a_declared_study_is_read(tmp_path):
    d = _with()
    d["studies"].append({"name": "birds", "measures": "species", "species": "bird", "error": "negative-binomial",
                         "samples": 5, "dispersion": 10, "detection": 0.5, "cost": 100, "cost_unit": "dollars"})
    d["outcome_values"] = {"unit": "dollars", "objectives": {"bird spared": 1e5}}
    case = load_case(write_case(tmp_path, d))
    s, b = case.studies
    assert (s.measures, s.parameters, s.error, s.samples, s.log_sd, s.cost) == ("parameter", ("meso_attack",),
                                                                              "lognormal", 20, 0.3, 500.0)
    assert (b.target, b.parameters, b.dispersion, b.detection) == ("bird", (), 10.0, 0.5)
    assert case.outcome_values.of("bird spared") == 1e5


@pytest.mark.parametrize("changes, field, words", [
    (dict(measures="survey"), "studies.diet.measures", "choose one of: species, parameter, group"),
    (dict(parameter="nope"), "studies.diet.parameter", "not an uncertain parameter"),
    (dict(error="normal"), "studies.diet.error", "poisson, negative-binomial, lognormal"),
    (dict(samples=0), "studies.diet.samples", ">= 1"),
    (dict(cost=-1), "studies.diet.cost", ">= 0"),
    (dict(log_sd=None), "studies.diet.log_sd", "required"),
    (dict(dispersion=3), "studies.diet.dispersion", "unknown key"),
    (dict(measures="group", group="nope"), "studies.diet.group", "not a declared parameter group"),
])
def test_bad_study_names_file_and_field(tmp_path, changes, field, words):
    d = _with(**{k: v for k, v in changes.items() if v is not None})
    if "log_sd" in changes and changes["log_sd"] is None:
        del d["studies"][0]["log_sd"]
    f = write_case(tmp_path, d)
    with pytest.raises(CaseError) as err:
        load_case(f)
    assert err.value.file == str(f) and err.value.field == field and words in err.value.message


def test_bad_outcome_values_name_the_field(tmp_path):
    d = _with()
    d["outcome_values"] = {"unit": "dollars", "objectives": {"no such objective": 1.0}}
    with pytest.raises(CaseError) as err:
        load_case(write_case(tmp_path, d))
    assert err.value.field == "outcome_values.objectives.no such objective"
    d["outcome_values"] = {"unit": "euros", "objectives": {"bird spared": 1.0}}
    with pytest.raises(CaseError) as err:
        load_case(write_case(tmp_path, d))
    assert err.value.field == "studies.diet.cost_unit" and "no conversion" in err.value.message


def test_bad_study_exits_2_and_writes_nothing(tmp_path):
    f = write_case(tmp_path, _with(samples=2.5))
    out = tmp_path / "results"
    proc = subprocess.run([sys.executable, "-m", "impact.cli", "assess", str(f), "--out", str(out)],
                          capture_output=True, text=True)
    assert proc.returncode == 2 and "Traceback" not in proc.stderr
    assert str(f) in proc.stderr and "studies.diet.samples" in proc.stderr
    assert list(tmp_path.iterdir()) == [f]


def test_assessment_writes_the_studies_table(tmp_path):
    from impact.api import assess
    from impact.decision.studies import STUDY_COLUMNS, VALUED_TOGETHER

    d = _with()
    d["studies"].append({"name": "birds", "measures": "species", "species": "bird", "error": "poisson",
                         "samples": 5, "cost": 100, "cost_unit": "dollars"})
    d["outcome_values"] = {"unit": "dollars", "objectives": {"bird spared": 1e4}}
    d["weighing"] = {"cost_unit": "dollars", "option_costs": {"apex only": 10, "apex and meso": {
                     "distribution": "uniform", "low": 20, "high": 40}}, "weights": {"bird spared": "unknown"}, "budget": 35}
    res = assess(load_case(write_case(tmp_path, d)), members=150, dynamics=False, base_samples=16)
    t = res.tables["sensitivity/studies.csv"]
    assert tuple(t.columns) == STUDY_COLUMNS
    assert set(t.objective) == {"bird spared", VALUED_TOGETHER} and set(t.study) == {"diet", "birds"}
    assert (t.evsi <= t.ceiling + 1e-12).all() and (t.low >= 0).all()
    info = res.tables["sensitivity/information.csv"]
    # the ceiling of a one-parameter study is the EVPPI printed in information.csv (the same resamples)
    row = t[(t.study == "diet") & (t.objective == "bird spared")].iloc[0]
    evppi = info[(info.objective == "bird spared") & (info.parameter == "meso_attack")].iloc[0]
    assert row.ceiling == pytest.approx(evppi.value) and row.ceiling_low == pytest.approx(evppi.low)
    valued = t[t.objective == VALUED_TOGETHER]
    assert np.allclose(valued.enbs, valued.evsi - valued.cost)
    # the weighing table: with one objective weighing everything, efficiency is the gain in its chance per cost
    w = res.tables["sensitivity/weighing.csv"].set_index(["option", "statistic"])
    chance = {o: w.loc[(o, "chance"), "value"] for o in ("baseline", "apex only", "apex and meso")}
    assert w.loc[("apex only", "efficiency"), "value"] == pytest.approx((chance["apex only"] - chance["baseline"]) / 10)
    # the uncertain cost: its expected value near the prior's mean 30 (150 members, sd of the mean ≈ 0.5:
    # margin 2, four sd), its interval inside the prior's range
    cost = w.loc[("apex and meso", "cost")]
    assert cost.value == pytest.approx(30, abs=2) and 20 <= cost.low < cost.value < cost.high <= 40
    assert w.loc[("apex only", "cost"), "low"] == w.loc[("apex only", "cost"), "high"] == 10
    # the budget: the two options share "apex removal", so the best set is one of them or none
    b = res.tables["sensitivity/budget.csv"]
    assert b.iloc[0].benefit == pytest.approx(max(0.0, *(w.loc[(o, "expected_gain"), "value"]
                                                         for o in ("apex only", "apex and meso")
                                                         if w.loc[(o, "cost"), "value"] <= 35)))
    assert " + " not in b.options.str.cat()
    acc = w.xs("acceptability", level="statistic")
    assert acc.value.sum() == pytest.approx(1.0) and (acc.mc_se >= 0).all()

    sizes = res.tables["sensitivity/study_sizes.csv"]
    at = sizes[sizes.declared].merge(t, on=["study", "objective"], suffixes=("", "_t"))
    # the declared size's row is the studies.csv estimate (same data stream, members and resamples)
    assert np.allclose(at.evsi, at.evsi_t) and (at.samples == at.samples_t).all()
    assert (sizes.evsi <= sizes.ceiling + 1e-12).all() and set(sizes[sizes.study == "diet"].samples) == {5, 10, 20, 40, 80}

    # the saved tables read back and the report's section reads them: every study named, the sentence says
    # which study is worth its cost only when one is
    from impact.api import save
    from impact.dossier import load_results
    from impact.dossier.sections import studies_context, weighing_context

    folder = save(res, tmp_path / "out", report=False)
    back = load_results(folder)
    ctx = studies_context(back)
    worth = set(valued[valued.worth_cost == "yes"].study)
    assert ("Worth its cost" in ctx["sentence"]) == bool(worth)
    # every study is named: worth its cost, of value but not enough, or without value distinguishable from none
    assert all(f"“{s}”" in ctx["sentence"] for s in valued.study)
    assert weighing_context(back)["uncertain"] and "ranks first" in weighing_context(back)["sentence"]


def test_two_state_decision_evpi_and_a_perfect_study():
    # Two options, two equally likely states: A gives 55 or 135, B gives 100 either way. Choosing now, B (100 >
    # 0.5·55 + 0.5·135 = 95); knowing the state, A in the good one: EVPI = 0.5·100 + 0.5·135 − 100 = 17.5 (a figure
    # from memory of a published amphibian translocation example; the arithmetic checks itself). A study whose
    # data reveal the state is worth exactly that (EVSI = EVPPI = EVPI); one whose data are independent of the
    # state is worth nothing. Exact up to float rounding: the states alternate, so every fold is balanced.
    M = 1000
    state = np.arange(M) % 2
    nb = np.column_stack([np.where(state == 1, 135.0, 55.0), np.full(M, 100.0)])
    noise = np.random.default_rng(0).normal(size=M)
    out = sample_values_many([nb], state[:, None].astype(float), ["state"],
                             {"perfect": (state[:, None] + 0.0, ["state"]), "useless": (noise[:, None], ["state"])},
                             resamples=20, seed=1)[0]
    evsi, ceiling = out["perfect"]
    assert evsi.value == pytest.approx(17.5, abs=1e-9) and ceiling.value == pytest.approx(17.5, abs=1e-9)
    assert out["useless"][0].value < 1.0 and out["useless"][0].low == 0.0


def test_page_one_names_a_study_only_when_its_value_is_material():
    # the rule of impact.dossier.studyline (ours, common practice with no source): valued outcomes: the study
    # worth its cost at the lower limit of its value; otherwise one whose EVSI's lower limit is above 0 and which
    # reaches the case's material change in a chance. The interval is always quoted.
    import pandas as pd

    from impact.dossier.studyline import best_study_sentence
    from impact.decision.studies import STUDY_COLUMNS, VALUED_TOGETHER

    def rows(*specs):
        base = dict.fromkeys(STUDY_COLUMNS, 0.0)
        return pd.DataFrame([{**base, "cost_unit": "$", "unit": "p", **s} for s in specs], columns=list(STUDY_COLUMNS))

    per = rows(dict(study="a", objective="o", evsi=0.08, low=0.02, high=0.12, cost=5),
               dict(study="b", objective="o", evsi=0.03, low=0.01, high=0.05, cost=1))
    line = best_study_sentence(per, 0.05)
    assert "“a”" in line and "+8.0\u00a0points [+2.0, +12.0]" in line and "board's call" in line
    assert best_study_sentence(per, 0.10) == ""  # not material
    assert best_study_sentence(per.assign(low=0.0), 0.05) == ""  # not distinguishable from none
    valued = rows(dict(study="a", objective=VALUED_TOGETHER, evsi=900, low=300, high=1500, cost=100, enbs=800,
                       worth_cost="yes", unit="$"),
                  dict(study="b", objective=VALUED_TOGETHER, evsi=90, low=0, high=150, cost=10, enbs=80,
                       worth_cost="undetermined", unit="$"))
    line = best_study_sentence(valued, 0.05)
    assert "“a”" in line and "900 [300, 1" in line and "“b”" not in line
    assert best_study_sentence(valued.assign(worth_cost="undetermined"), 0.05) == ""
