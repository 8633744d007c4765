"""Individuals at low numbers: the case keys, the gains/losses split and the event simulation,
checked against published results of birth–death processes.

Statistical checks state their margin: 3 standard errors (a false-failure rate of about 0.3 % per
check under the normal approximation); each runs on fixed seeds, so it either always passes or
always fails for a given code (the margin is what makes a pass meaningful, not the seed).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from casefiles import web_case, write_case
from impact.case import load_case
from impact.engine.individuals import TAU_EPSILON, count_events, leap_size
from impact.errors import CaseError
from impact.model import Controls, build_web, pack_coefficients, segment_coefficients
from impact.model.split import numpy_split
from impact.model.terms import numpy_rhs, pack_structure
from impact.ensemble.draws import plausibility_of_draws
from impact.ensemble.sample import draw_uniforms


def _rng(i: int) -> np.random.Generator:
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(2026, spawn_key=(i,))))


def _linear(lam, mu):
    return lambda x, t: (lam * x.astype(float), mu * x.astype(float))


def _extinct_share(lam, mu, n0, t, runs, eps=TAU_EPSILON):
    rates = _linear(lam, mu)
    ext = [count_events(np.array([n0]), 0.0, t, rates, _rng(i), eps=eps)[0][0] == 0 for i in range(runs)]
    return float(np.mean(ext))


def kendall_p0(lam, mu, n0, t):
    """P(extinct by t) of a linear birth–death process from n0 (Kendall 1948, Ann. Math. Stat. 19:1–15,
    eq. for p0(t); also Bailey 1964, The Elements of Stochastic Processes, eq. 8.47)."""
    e = math.exp((lam - mu) * t)
    return (mu * (e - 1.0) / (lam * e - mu)) ** n0


def test_finite_time_extinction_follows_kendall():
    lam, mu, n0, t, runs = 1.0, 0.8, 3, 2.0, 1500
    p = kendall_p0(lam, mu, n0, t)
    se = math.sqrt(p * (1 - p) / runs)
    assert abs(_extinct_share(lam, mu, n0, t, runs) - p) < 3 * se


def test_ultimate_extinction_is_mu_over_lambda_to_the_n0():
    # (μ/λ)^n0 for μ < λ (Kendall 1948; Bailey 1964, eq. 8.59). A run that reaches 20 individuals
    # is stopped as a survivor: from there it would still die out with chance (1/2)^20, negligible
    lam, mu, n0, runs, top = 1.0, 0.5, 2, 1000, 20

    def rates(x, t):
        alive = float(x[0] < top)
        return lam * x * alive, mu * x * alive

    p = (mu / lam) ** n0
    ext = [count_events(np.array([n0]), 0.0, 1e6, rates, _rng(i))[0][0] == 0 for i in range(runs)]
    se = math.sqrt(p * (1 - p) / runs)
    assert abs(np.mean(ext) - p) < 3 * se


def test_pure_death_time_to_extinction_mean_and_variance():
    # time to extinction from n0 is a sum of independent exponentials of rates kμ, k = 1..n0:
    # mean Σ 1/(kμ), variance Σ 1/(kμ)² (Bailey 1964, section 8.4; Renshaw 2011, Stochastic
    # Population Processes, section 2.3)
    mu, n0, runs = 0.5, 20, 1500
    mean = sum(1 / (k * mu) for k in range(1, n0 + 1))
    var = sum(1 / (k * mu) ** 2 for k in range(1, n0 + 1))
    times = []
    for i in range(runs):
        last = [0.0]

        def flow(t, dt, x, last=last):
            if x.sum() > 0:
                last[0] = t + dt

        x, low, ok = count_events(np.array([n0]), 0.0, 200.0, _linear(0.0, mu), _rng(i), flow)
        assert ok and x[0] == 0 and low[0] == 0
        times.append(last[0])
    times = np.array(times)
    assert abs(times.mean() - mean) < 3 * math.sqrt(var / runs)
    # the sample variance's standard error for a sum of exponentials, bounded by that of an
    # exponential of the same variance (fourth moment 9σ⁴): sqrt(8/runs)·σ²
    assert abs(times.var(ddof=1) - var) < 3 * math.sqrt(8 / runs) * var


def test_tau_leaping_agrees_with_exact_simulation_on_a_logistic_birth_death():
    # births λx, deaths μx + κx² (a logistic birth–death process, Nåsell 2001): tau-leaping with
    # ε = 0.1 (leaps of ~25 events at x ≈ 100) against exact simulation (ε = 0 forces every event).
    # Margin: means within 3 combined standard errors; standard deviations within 20 % (each
    # sample sd has a ~4 % standard error at 300 runs, their ratio ~6 %: 3 standard errors)
    lam, mu, kappa, x0, t, runs = 2.0, 1.0, 0.01, 100, 0.5, 300

    def rates(x, _t):
        xf = x.astype(float)
        return lam * xf, mu * xf + kappa * xf * xf

    x = np.array([x0])
    assert leap_size(x, *rates(x, 0.0), eps=0.1) * sum(v.sum() for v in rates(x, 0.0)) > 10  # leaps do happen
    leap = np.array([count_events(x, 0.0, t, rates, _rng(i), eps=0.1)[0][0] for i in range(runs)], float)
    exact = np.array([count_events(x, 0.0, t, rates, _rng(10_000 + i), eps=0.0)[0][0] for i in range(runs)], float)
    se = math.sqrt(leap.var(ddof=1) / runs + exact.var(ddof=1) / runs)
    assert abs(leap.mean() - exact.mean()) < 3 * se
    assert abs(leap.std(ddof=1) / exact.std(ddof=1) - 1.0) < 0.20


def test_leap_size_is_the_cao_gillespie_petzold_bound():
    # Cao, Gillespie & Petzold (2006) eq. 33: τ = min(max(εx/g, 1)/|μ|, max(εx/g, 1)²/σ²)
    x, up, down = np.array([1000]), np.array([300.0]), np.array([100.0])
    b = max(0.03 * 1000 / 2.0, 1.0)
    assert leap_size(x, up, down, 0.03) == pytest.approx(min(b / 200.0, b * b / 400.0))


@pytest.mark.parametrize("case_name", ["island_mesopredator", "orchard_biocontrol", "moth_pollinator",
                                       "predator_prey"])
def test_gains_minus_losses_is_the_right_hand_side(case_name):
    from pathlib import Path

    case = load_case(Path(__file__).parents[2] / "casework" / f"{case_name}.toml")
    web = build_web(case)
    values, p, today, _ = plausibility_of_draws(case, web, draw_uniforms(case, 0, np.arange(4)))
    cf = np.ascontiguousarray(pack_coefficients(segment_coefficients(web, p, Controls.neutral(4, web.n_species))).T)
    y = np.where(np.isfinite(today), today, p.initial)
    out, g, l = (np.empty_like(y) for _ in range(3))
    t = np.full(4, 0.3)
    st = pack_structure(web)
    numpy_rhs(st)(t, y, cf, out)
    numpy_split(st)(t, y, cf, g, l)
    assert (g >= 0).all() and (l >= 0).all()
    np.testing.assert_allclose(g - l, out, rtol=1e-12, atol=1e-9 * np.abs(out).max())


def _case_with(tmp_path, individuals):
    data = web_case()
    data["individuals"] = individuals
    return write_case(tmp_path, data)


def test_the_case_reads_area_or_individuals_per_unit(tmp_path):
    case = load_case(_case_with(tmp_path, {"fox": {"area": 400.0, "switch_below": 30.0},
                                           "hare": {"per_unit": 50.0, "switch_below": 10.0}}))
    assert [(x.species, x.per_unit, x.switch_below, x.stated_as) for x in case.individuals] == [
        ("hare", 50.0, 10.0, "per_unit"), ("fox", 400.0, 30.0, "area")]


@pytest.mark.parametrize("individuals,field,words", [
    ({"wolf": {"area": 4.0, "switch_below": 5.0}}, "individuals.wolf", "not a declared species"),
    ({"fox": {"area": 4.0, "per_unit": 4.0, "switch_below": 5.0}}, "individuals.fox", "exactly one"),
    ({"fox": {"switch_below": 5.0}}, "individuals.fox", "exactly one"),
    ({"fox": {"area": 4.0}}, "individuals.fox.switch_below", "required"),
    ({"fox": {"area": 4.0, "switch_below": 0.5}}, "individuals.fox.switch_below", ">= 1"),
    ({"fox": {"area": -4.0, "switch_below": 5.0}}, "individuals.fox.area", "> 0"),
    ({"fox": {"area": 4.0, "switch_below": 5.0, "method": "x"}}, "individuals.fox.method", "unknown key"),
])
def test_bad_individuals_tables_name_the_field(tmp_path, individuals, field, words):
    with pytest.raises(CaseError) as err:
        load_case(_case_with(tmp_path, individuals))
    assert err.value.field == field and words in str(err.value)


def test_risk_table_reports_zero_individuals_beside_quasi_extinction(tmp_path):
    # a fox removal that fails leaves 20 % of 40 foxes (area 20, 2 foxes/ha): counted below 30, they
    # can die out by chance; none left is the 'extinct' row, defined once in impact.risk.metrics
    from impact.ensemble.draws import draw_ensemble
    from impact.risk.metrics import NONE_BELOW
    from impact.risk.runs import risk_table, run_options, summarise

    data = web_case(members=40)
    data["case"]["horizon"] = 10.0
    data["risk"]["horizons"] = [10.0]
    data["interventions"][2]["end"] = 10.0
    data["individuals"] = {"fox": {"area": 20.0, "switch_below": 30.0}}
    case = load_case(write_case(tmp_path, data))
    ens = draw_ensemble(case, 40, case.seed)
    runs = summarise(case, run_options(case, ens, case.seed))
    risk = risk_table(case, runs)
    ext = risk[(risk.metric == "extinct")]
    assert set(ext.species) == {"fox"} and set(ext.option) == {"baseline", "cull", "remove", "nothing"}
    for _, row in ext.iterrows():
        fox = case.species_names.index("fox")
        low = runs[row.option].minimum[:, runs[row.option].slot(row.horizon), fox]
        assert row.value == pytest.approx(np.mean(low[np.isfinite(low)] * 20.0 < NONE_BELOW))
        q = risk[(risk.metric == "quasi_extinction") & (risk.option == row.option) & (risk.species == "fox")]
        assert row.value <= float(q.value.iloc[0])  # none left is below any quasi-extinction level (0.05/ha = 1 fox)
    assert float(ext[ext.option == "remove"].value.iloc[0]) > 0.0


@pytest.mark.parametrize("area,switch", [(20.0, 30.0), (2000.0, 6000.0)])
def test_compiled_counting_repeats_the_reference_loop_to_the_bit(tmp_path, monkeypatch, area, switch):
    # the compiled counting kernel (impact.engine.individuals.counted_run) runs the reference loop's
    # operations and random draws in its order: every counted member's numbers are the same as
    # those of reference_counted_segment (the Python loop, with the compiled segments), to the bit;
    # a few dozen foxes go event by event, thousands by leaps
    import impact.engine.simulate as simulate
    from impact.engine.individuals import compiled_counted_members, reference_counted_segment
    from impact.ensemble.draws import draw_ensemble
    from impact.risk.runs import run_options

    data = web_case(members=40)
    data["case"]["horizon"] = 10.0
    data["risk"]["horizons"] = [10.0]
    data["interventions"][2]["end"] = 10.0
    data["individuals"] = {"fox": {"area": area, "switch_below": switch}}
    case = load_case(write_case(tmp_path, data))
    ens = draw_ensemble(case, 40, case.seed)
    counted = []

    def compiled(st, coef, t0, t1, y, counting, rngs, **tol):
        counted.append(len(rngs))
        return compiled_counted_members(st, coef, t0, t1, y, counting, rngs, **tol)

    monkeypatch.setattr(simulate, "compiled_counted_members", compiled)
    fast = run_options(case, ens, case.seed)
    web = build_web(case)

    def reference(st, coef, t0, t1, y, counting, rngs, *, rtol, atol):
        parts = [reference_counted_segment(web, None, None, coef[r:r + 1], t0, t1, y[r], r, counting, rngs[r],
                                           rtol=rtol, atol=atol, engine="compiled") for r in range(len(rngs))]
        return (*(np.array([part[i] for part in parts]) for i in range(4)), sum(part[4] for part in parts))

    monkeypatch.setattr(simulate, "compiled_counted_members", reference)
    slow = run_options(case, ens, case.seed)
    assert sum(counted) > 20  # the comparison covers many counted member-segments
    for name, run in fast.items():
        for field in ("states", "cummin", "cummax", "reason"):
            assert np.array_equal(getattr(run, field), getattr(slow[name], field), equal_nan=True), (name, field)
