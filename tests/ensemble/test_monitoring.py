"""Monitoring series, limits on change and the sampler choice: reading, validation and behaviour."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest

from casefiles import decline_case, write_case
from impact.ensemble.calibrate import CalibrationError, build_ensemble
from impact.case import load_case, unused_parameters
from impact.errors import CaseError, ReadError


def growth_case(members: int = 200) -> dict:
    """One logistic species with an uncertain growth rate, a count series and a limit on change."""
    d = decline_case(members)
    d["case"]["spinup"] = 20.0
    d["parameters"]["r"] = {"distribution": "uniform", "low": 0.1, "high": 1.0, "unit": "1/year"}
    d["parameters"]["detect"] = {"distribution": "uniform", "low": 0.3, "high": 0.7, "unit": "fraction"}
    d["species"][0].update({"growth": "logistic", "carrying_capacity": 500.0, "initial": 20.0,
                            "quasi_extinction": 1.0})
    d["monitoring"] = [{"species": "newt", "kind": "count", "error": "negative-binomial", "dispersion": 20.0,
                        "detection": "detect", "times": [-8.0, -6.0, -4.0, -2.0, 0.0],
                        "values": [90, 110, 150, 160, 200], "source": "invented transect"}]
    return d


def test_a_count_series_is_read_inline_or_from_a_csv_beside_the_case(tmp_path):
    d = growth_case()
    inline = load_case(write_case(tmp_path, d)).monitoring[0]
    assert (inline.species, inline.kind, inline.error, inline.detection) == ("newt", "count", "negative-binomial", "detect")
    assert inline.times == (-8.0, -6.0, -4.0, -2.0, 0.0) and inline.values[-1] == 200.0
    (tmp_path / "data").mkdir()
    (tmp_path / "data" / "newts.csv").write_text("time,value\n-8,90\n-6,110\n-4,150\n-2,160\n0,200\n")
    del d["monitoring"][0]["times"], d["monitoring"][0]["values"]
    d["monitoring"][0]["file"] = "data/newts.csv"
    other = tmp_path / "elsewhere"
    other.mkdir()
    from_file = load_case(write_case(other.parent, d, name="case2.toml")).monitoring[0]
    assert from_file.times == inline.times and from_file.values == inline.values
    assert from_file.file == "data/newts.csv"
    assert "detect" not in unused_parameters(load_case(write_case(tmp_path, d)))


BAD = [
    ("unknown species", ("species",), "frog", "monitoring[0].species", "unknown species 'frog'"),
    ("counts must be whole", ("values",), [90, 110.5, 150, 160, 200], "monitoring.newt.values", "whole numbers"),
    ("times before the spin-up", ("times",), [-30.0, -6.0, -4.0, -2.0, 0.0], "monitoring.newt.times", "[-20, 0]"),
    ("times after today", ("times",), [-8.0, -6.0, -4.0, -2.0, 1.0], "monitoring.newt.times", "[-20, 0]"),
    ("times not increasing", ("times",), [-8.0, -4.0, -6.0, -2.0, 0.0], "monitoring.newt.times", "strictly increasing"),
    ("one value per time", ("values",), [1, 2], "monitoring.newt.values", "5 times but 2 values"),
    ("lognormal is for an index", ("error",), "lognormal", "monitoring.newt.error", "poisson, negative-binomial"),
    ("negative binomial needs a dispersion", ("dispersion",), ..., "monitoring.newt.dispersion", "required"),
    ("detection above one", ("detection",), 1.5, "monitoring.newt.detection", "<= 1"),
    ("unknown key", ("detections",), 0.5, "monitoring.newt.detections", "unknown key"),
    ("unknown kind", ("kind",), "biomass", "monitoring.newt.kind", "count, index"),
]


@pytest.mark.parametrize("desc,path,value,field,words", BAD, ids=[b[0] for b in BAD])
def test_bad_monitoring_names_file_field_and_what_is_allowed(tmp_path, desc, path, value, field, words):
    d = growth_case()
    if value is ...:
        del d["monitoring"][0][path[0]]
    else:
        d["monitoring"][0][path[0]] = value
    f = write_case(tmp_path, d)
    with pytest.raises(CaseError) as err:
        load_case(f)
    assert (err.value.file, err.value.field) == (str(f), field)
    assert words in err.value.message


def test_a_detection_prior_reaching_above_one_is_refused(tmp_path):
    d = growth_case()
    d["parameters"]["detect"]["high"] = 1.2
    with pytest.raises(CaseError) as err:
        load_case(write_case(tmp_path, d))
    assert err.value.field == "monitoring.newt.detection" and "up to 1.2" in err.value.message


@pytest.mark.parametrize("content,field,words", [
    ("when,count\n-8,90\n", "line 1, column 1", "time,value"),
    ("time,value\n-8,90\n-6,lots\n", "line 3, column value", "must be a number"),
    ("time,value\n-8,90,1\n", "line 2", "2 cells"),
])
def test_a_bad_csv_names_the_csv_file_and_line(tmp_path, content, field, words):
    d = growth_case()
    del d["monitoring"][0]["times"], d["monitoring"][0]["values"]
    d["monitoring"][0]["file"] = "newts.csv"
    (tmp_path / "newts.csv").write_text(content)
    with pytest.raises(CaseError) as err:
        load_case(write_case(tmp_path, d))
    assert (err.value.file, err.value.field) == (str(tmp_path / "newts.csv"), field)
    assert words in err.value.message


def test_a_missing_csv_or_both_sources_are_refused(tmp_path):
    d = growth_case()
    d["monitoring"][0]["file"] = "nowhere.csv"
    with pytest.raises(CaseError) as err:
        load_case(write_case(tmp_path, d))
    assert "not both" in err.value.message and err.value.field == "monitoring.newt.times"
    del d["monitoring"][0]["times"], d["monitoring"][0]["values"]
    with pytest.raises(ReadError) as err:
        load_case(write_case(tmp_path, d))
    assert err.value.file == str(tmp_path / "nowhere.csv") and "relative to the case file" in err.value.message


def test_bad_change_limits_and_calibration_settings(tmp_path):
    d = growth_case()
    for entry, field, words in [({"species": "newt"}, "change_limits.newt.up_at_most", "down_at_most"),
                                ({"species": "newt", "up_at_most": 0.5}, "change_limits.newt.up_at_most", "> 1"),
                                ({"species": "newt", "up_at_most": 2.0, "start": -1.0, "step": 2.0},
                                 "change_limits.newt.end", "at least one step")]:
        d["change_limits"] = [entry]
        with pytest.raises(CaseError) as err:
            load_case(write_case(tmp_path, d))
        assert err.value.field == field and words in err.value.message
    d.pop("change_limits")
    d["calibration"] = {"sampler": "mcmc"}
    with pytest.raises(CaseError) as err:
        load_case(write_case(tmp_path, d))
    assert err.value.field == "calibration.sampler" and "auto, rejection, smc" in err.value.message


def test_check_refuses_a_bad_series_with_exit_2_and_no_traceback(tmp_path):
    d = growth_case()
    d["monitoring"][0]["values"] = [90, -1, 150, 160, 200]
    f = write_case(tmp_path, d)
    proc = subprocess.run([sys.executable, "-m", "impact.cli", "check", str(f)], capture_output=True, text=True)
    assert proc.returncode == 2 and "Traceback" not in proc.stderr
    assert str(f) in proc.stderr and "monitoring.newt.values" in proc.stderr


# ---- behaviour ------------------------------------------------------------------------------------

def test_every_member_meets_the_limits_on_change(tmp_path):
    d = growth_case(300)
    del d["monitoring"]
    # logistic growth from 20 to 500: the fastest-growing draws more than double in a year early on
    d["change_limits"] = [{"species": "newt", "up_at_most": 1.5, "start": -20.0, "end": 0.0, "step": 1.0}]
    case = load_case(write_case(tmp_path, d))
    ens, cal = build_ensemble(case, 300, case.seed)
    assert cal.sampler in ("rejection", "smc")
    rec = cal.recorded[:, :, 0]
    assert (np.diff(np.log(rec), axis=1) <= np.log(1.5) + 1e-9).all()
    # the limit binds: the prior's fastest rates are gone (logistic r near 1 grows ×2.7 a year at first)
    assert ens.values["r"].max() < 0.5


def test_a_plain_case_with_low_acceptance_is_drawn_by_smc_and_meets_its_ranges(tmp_path):
    d = decline_case(300)
    d["case"]["spinup"] = 20.0
    d["species"][0]["quasi_extinction"] = 1.0
    # today = 100 exp(20 r) lies in [10, 10.5] for r in [-0.1151, -0.1127]: 1.6 % of the prior
    d["observed"] = [{"species": "newt", "low": 10.0, "high": 10.5}]
    case = load_case(write_case(tmp_path, d))
    ens, cal = build_ensemble(case, 300, case.seed)
    assert cal.sampler == "smc" and cal.prior_acceptance < 0.05
    assert ((ens.today[:, 0] >= 10.0) & (ens.today[:, 0] <= 10.5)).all()
    assert ens.counts["kept"] == 300 and ens.counts["tried"] == cal.simulations


def test_a_high_acceptance_case_stays_on_rejection_with_the_same_members(tmp_path):
    from impact.ensemble.draws import draw_ensemble

    case = load_case(write_case(tmp_path, decline_case(100)))
    ens, cal = build_ensemble(case, 100, case.seed)
    assert cal.sampler == "rejection"
    assert np.array_equal(ens.draws, draw_ensemble(case, 100, case.seed).draws)


def test_an_impossible_constraint_is_refused_with_a_clear_message(tmp_path):
    d = decline_case(100)
    d["observed"] = [{"species": "newt", "low": 5000.0, "high": 6000.0}]  # no spin-up: today is always 100
    case = load_case(write_case(tmp_path, d))
    with pytest.raises(CalibrationError) as err:
        build_ensemble(case, 100, case.seed)
    assert "did not converge" in err.value.message and "No posterior ensemble is presented" in err.value.message
    # the message names the constraint that cannot be met (file and field) and how close the members come:
    # today is 100 for every member, a factor 5000 / 100 = 50 below the range's lower end
    msg = err.value.message
    assert "observed[0] (newt 5000–6000 today): 0 of 100 members meet it, the closest is a factor 50 outside" in msg
    assert str(err.value.file) == str(case.path)


def test_a_constraint_met_alone_but_not_together_is_named_by_how_few_members_meet_it():
    """Each constraint met by some member but never all at once: those met by the fewest are named."""
    from types import SimpleNamespace

    from impact.ensemble.observe import unmet_constraints

    case = SimpleNamespace(species=(), observed=(SimpleNamespace(species="a", low=1.0, high=2.0),
                                                 SimpleNamespace(species="b", low=3.0, high=4.0)),
                           change_limits=())
    b = np.array([[0.0, 0.5], [0.5, 0.0], [0.2, 0.0]])
    text = unmet_constraints(case, b)
    assert text.startswith("observed[0] (a 1–2 today): 1 of 3 members meet it")
    assert "observed[1] (b 3–4 today): 2 of 3 members meet it" in text and "factor" not in text


def test_monitoring_data_move_the_posterior_towards_the_truth(tmp_path):
    case = load_case(write_case(tmp_path, growth_case(300)))
    ens, cal = build_ensemble(case, 300, case.seed)
    assert cal.sampler == "smc" and cal.converged and cal.distinct >= 0.5
    gens = cal.generations
    assert gens[-1]["temperature"] == 1.0 and all(g["ess"] > 0 for g in gens)
    # the invented counts rise by about 20 % a year near 200 of 500: fast growth rates are ruled out,
    # while the harvest rate q (not acting before today) stays at its prior
    from impact.ensemble.posterior import posterior_table

    table = posterior_table(case, ens).set_index("parameter")
    assert np.quantile(ens.values["r"], 0.95) < 0.6 < table.loc["r", "prior_q95"]
    assert table.loc["r", "contraction"] > 0.5 and table.loc["r", "informed"]
    assert not table.loc["q", "informed"]


# ---- results folder and report ----------------------------------------------------------------------

@pytest.fixture(scope="module")
def calibrated_folder(tmp_path_factory):
    import impact.api as api

    d = tmp_path_factory.mktemp("calibrated")
    case = load_case(write_case(d, growth_case(120)))
    result = api.assess(case, api.AssessSettings(members=120, sensitivity=False, dynamics=False))
    return api.save(result, d / "out")


def test_the_results_folder_says_which_sampler_built_the_ensemble(calibrated_folder):
    import json

    from impact.store.dictionary import check_folder

    m = json.loads((calibrated_folder / "manifest.json").read_text())
    assert m["calibration"]["sampler"] == "smc" and m["calibration"]["converged"]
    assert m["calibration"]["simulations"] == m["counts"]["tried"] > 120
    assert 0 < m["calibration"]["acceptance"] < 1 and m["monitoring"][0]["species"] == "newt"
    for name in ("posterior", "generations", "predictive"):
        assert (calibrated_folder / "calibration" / f"{name}.csv").is_file()
    assert check_folder(calibrated_folder) == []


def test_the_report_shows_data_against_the_posterior_predictive(calibrated_folder):
    from pypdf import PdfReader

    text = " ".join(p.extract_text() for p in PdfReader(str(calibrated_folder / "report.pdf")).pages)
    assert "What the monitoring data taught" in text
    assert "Monitoring of newt against the calibrated ensemble" in text
    assert "Prior against posterior" in text and "Diagnostics of the sampler" in text


def test_a_caution_when_the_data_inform_little_or_do_not_fit(calibrated_folder):
    from impact.dossier.cautions import cautions
    from impact.dossier import load_results

    res = load_results(calibrated_folder)
    texts = [c.text for c in cautions(res.manifest, res.objectives, "", None, None, res.calibration)]
    assert not any("informed little" in t or "does not reproduce" in t for t in texts)
    cal = dict(res.calibration)
    cal["posterior"] = cal["posterior"].assign(informed="False")
    pred = cal["predictive"].copy()
    pred["observed"] = pred["q95"] * 10 + 1  # every observation far above its band
    cal["predictive"] = pred
    texts = [c.text for c in cautions(res.manifest, res.objectives, "", None, None, cal)]
    assert any("informed little" in t for t in texts)
    assert any("newt 5 of 5" in t and "does not reproduce" in t for t in texts)


def test_a_saved_posterior_ensemble_is_reused_with_the_same_tables(tmp_path):
    import impact.api as api

    case = load_case(write_case(tmp_path, growth_case(100)))
    settings = api.AssessSettings(sensitivity=False, dynamics=False)
    direct = api.assess(case, settings)
    folder = api.save_ensemble(api.calibrate(case, 100), tmp_path / "posterior")
    assert (folder / "ensemble.npz").is_file() and (folder / "calibration" / "predictive.csv").is_file()
    reused = api.assess(case, settings, ensemble=api.load_ensemble(folder, case))
    for name in ("risk.csv", "effects.csv", "bands.csv", "parameters.csv"):
        assert reused.tables[name].equals(direct.tables[name]), name
    assert reused.manifest.calibration["reused_from"] == str(folder.resolve())
    assert reused.manifest.calibration["simulations"] == direct.manifest.calibration["simulations"]


def test_the_command_line_calibrates_then_assesses_and_refuses_another_case(tmp_path, capsys):
    from impact.cli import main

    f = write_case(tmp_path, growth_case(100))
    assert main(["calibrate", str(f), "--out", str(tmp_path / "post"), "--quiet", "--workers", "1"]) == 0
    assert "built by smc" in capsys.readouterr().out
    flags = ["--quiet", "--workers", "1", "--no-sensitivity", "--no-dynamics", "--no-report"]
    assert main(["assess", str(f), "--ensemble", str(tmp_path / "post"), "--out", str(tmp_path / "a"), *flags]) == 0
    d = growth_case(100)
    d["monitoring"][0]["values"][0] = 91
    g = write_case(tmp_path, d, name="changed.toml")
    capsys.readouterr()
    assert main(["assess", str(g), "--ensemble", str(tmp_path / "post"), "--out", str(tmp_path / "b"), *flags]) == 2
    err = capsys.readouterr().err
    assert "--ensemble" in err and "another version of the case file" in err
    assert not (tmp_path / "b").exists()


def test_a_budget_too_small_is_refused_not_presented(tmp_path):
    d = growth_case(100)
    d["calibration"] = {"max_simulations": 1500}
    case = load_case(write_case(tmp_path, d))
    with pytest.raises(CalibrationError) as err:
        build_ensemble(case, 100, case.seed)
    assert "budget of 1500 simulations ran out" in err.value.message


def test_check_describes_the_monitoring_and_the_limits(tmp_path, capsys):
    from impact.cli import main

    d = growth_case()
    d["change_limits"] = [{"species": "newt", "up_at_most": 2.0}]
    assert main(["check", str(write_case(tmp_path, d))]) == 0
    out = capsys.readouterr().out
    assert "monitoring of newt: 5 count values from -8 to 0 year (negative-binomial; detection detect" in out
    assert "limit on change of newt: grows at most ×2 per 1 year from -10 to 0" in out


@pytest.mark.parametrize("kind", ["processes", "threads"])
def test_the_calibrated_ensemble_does_not_depend_on_the_executor(tmp_path, kind):
    from impact.run.execute import LocalPool, LocalThreads

    case = load_case(write_case(tmp_path, growth_case(150)))
    here, _ = build_ensemble(case, 150, case.seed)
    pool = LocalPool(2) if kind == "processes" else LocalThreads(2)
    try:
        there, _ = build_ensemble(case, 150, case.seed, executor=pool)
    finally:
        pool.close()
    assert np.array_equal(here.unit, there.unit) and np.array_equal(here.today, there.today)


def test_the_observation_models_agree_with_scipy():
    """Poisson, negative binomial with size k (variance μ + μ²/k: n = k, p = k/(k + μ) in scipy's
    parametrisation) and lognormal on an index (median scale × N), against scipy.stats."""
    from scipy import stats

    from impact.case import MonitoringSeries
    from impact.ensemble.observe import series_log_likelihood

    N = np.array([[10.0, 20.0, 0.5], [3.0, 7.0, 40.0]])
    y = (4.0, 15.0, 0.0)
    values = {"det": np.array([0.4, 0.9]), "k": np.array([2.0, 30.0])}
    mu = values["det"][:, None] * 1.5 * N
    pois = MonitoringSeries("a", "count", (0.0, 1.0, 2.0), y, "poisson", "det", 1.5)
    assert np.allclose(series_log_likelihood(pois, values, N), stats.poisson.logpmf(y, mu).sum(1))
    nb = MonitoringSeries("a", "count", (0.0, 1.0, 2.0), y, "negative-binomial", "det", 1.5, dispersion="k")
    k = values["k"][:, None]
    assert np.allclose(series_log_likelihood(nb, values, N), stats.nbinom.logpmf(y, k, k / (k + mu)).sum(1))
    yi = (4.0, 15.0, 0.7)
    ln = MonitoringSeries("a", "index", (0.0, 1.0, 2.0), yi, "lognormal", 1.0, 1.5, log_sd=0.3)
    assert np.allclose(series_log_likelihood(ln, values, N), stats.lognorm.logpdf(yi, 0.3, scale=1.5 * N).sum(1))
    # a positive count where the model has no animals is impossible
    one = {"det": np.array([0.4])}
    assert series_log_likelihood(pois, one, np.array([[10.0, 0.0, 1.0]])).tolist() == [-np.inf]
