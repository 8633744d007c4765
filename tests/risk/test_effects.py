"""Paired effects, objectives and comparisons against closed forms and a published ecological result."""

from __future__ import annotations

import numpy as np
import pytest

from casefiles import decline_case, mesopredator_case, write_case
from impact.risk import metrics as mx
from impact.risk.runs import assess_members
from impact.ensemble.draws import draw_ensemble
from impact.case import load_case
from impact.risk.effects import comparisons_table, effects_table, judge, objectives_table

N0, NC, LOW, HIGH, HARVEST, MATERIAL = 100.0, 10.0, -0.2, -0.05, 0.05, 0.2


def _decline_with_known_harvest(tmp_path, members=2000):
    d = decline_case(members=members)
    d["parameters"]["q"] = {"distribution": "fixed", "value": HARVEST, "unit": "1/year"}
    d["case"]["output_step"] = 0.25  # trapezoid error of the time mean ~ (dt r)^2 / 12 < 3e-4
    d["objectives"] = [{"name": "newt kept", "species": "newt", "measure": "quasi_extinction", "horizon": 20.0,
                        "increase_at_most": 0.5}]
    return load_case(write_case(tmp_path, d))


@pytest.fixture(scope="module")
def decline(tmp_path_factory):
    case = _decline_with_known_harvest(tmp_path_factory.mktemp("decline"))
    ens = draw_ensemble(case, case.members, case.seed)
    runs = assess_members(case, ens, case.seed)
    return case, effects_table(case, runs), objectives_table(case, runs)


def _stat(e, metric, stat, h):
    return e[(e.option == "harvest") & (e.metric == metric) & (e.statistic == stat) & np.isclose(e.horizon, h)].iloc[0]


def _time_mean(r, h):
    # exact time mean of N0 e^{r t} over [0, h]
    return N0 * np.expm1(r * h) / (r * h)


@pytest.mark.parametrize("h", [10.0, 20.0, 40.0])
def test_paired_quasi_extinction_change_matches_the_rate_distribution(decline, h):
    # N = N0 e^{rt}, r ~ U(−0.2, −0.05); the harvest adds a known rate q. The baseline is below N_c by h iff
    # r < c = ln(N_c/N0)/h, the option iff r < c + q, so the paired change of the chance is the uniform
    # mass of [c, c + q] and every member that changes gets worse (closed form of the decline model).
    case, e, _ = decline
    c = np.log(NC / N0) / h
    exact = (np.clip(c + HARVEST, LOW, HIGH) - np.clip(c, LOW, HIGH)) / (HIGH - LOW)
    n = 2000
    margin = 4 * np.sqrt(max(exact * (1 - exact), 1e-12) / n) + 1e-12  # 4 binomial SDs: false alarm < 1e-4
    d = _stat(e, "quasi_extinction", "difference", h)
    assert abs(d.value - exact) <= margin
    assert d.interval == "newcombe_paired" and d.level == 0.95 and d.n == n
    assert abs(_stat(e, "quasi_extinction", "p_worse", h).value - exact) <= margin


@pytest.mark.parametrize("h", [10.0, 20.0, 40.0])
def test_material_change_probability_matches_the_rate_distribution(decline, h):
    # paired change of the time mean: d(r) = M(r − q)/M(r) − 1 with M(r) = N0 (e^{rh} − 1)/(r h); material when
    # |d| ≥ 0.2. P is the uniform mass of {r : |d(r)| ≥ 0.2}, found on a fine grid of the exact expression.
    case, e, _ = decline
    grid = np.linspace(LOW, HIGH, 200_001)
    dr = _time_mean(grid - HARVEST, h) / _time_mean(grid, h) - 1
    exact = float(np.mean(np.abs(dr) >= MATERIAL))
    margin = 4 * np.sqrt(max(exact * (1 - exact), 1e-12) / 2000) + 2e-3  # 4 SDs, plus grid and trapezoid error
    row = _stat(e, "mean_abundance", "p_material", h)
    assert abs(row.value - exact) <= margin
    assert row.interval == "clopper_pearson" and row.threshold == MATERIAL
    # a harvest only lowers abundance: never better, worse in every member
    assert _stat(e, "mean_abundance", "p_worse", h).value == 1.0
    assert _stat(e, "mean_abundance", "p_material_increase", h).value == 0.0
    # d(r) is monotone in r, so the median change is d at the median rate; the sample median rate lies within
    # 4 SDs of the order statistic, (0.5 ± 4·0.5/√n) in probability
    med = _stat(e, "mean_abundance", "median_change", h)
    q = 4 * 0.5 / np.sqrt(2000)
    r_lo, r_hi = LOW + (HIGH - LOW) * (0.5 - q), LOW + (HIGH - LOW) * (0.5 + q)
    bounds = sorted(_time_mean(r - HARVEST, h) / _time_mean(r, h) - 1 for r in (r_lo, r_hi))
    assert bounds[0] - 1e-3 <= med.value <= bounds[1] + 1e-3
    assert med.interval == "member_quantiles" and abs(med.level - 0.9) < 1e-12


def test_objective_status_follows_its_interval(decline):
    # at h = 20 the exact increase is 1/3 (see above), well under the allowed 0.5: met
    case, _, o = decline
    row = o[o.option == "harvest"].iloc[0]
    assert row.statistic == "increase" and row.status == "met" and row.high <= 0.5
    assert abs(row.value - 1 / 3) <= 4 * np.sqrt(2 / 9 / 2000)


def test_judge_needs_the_whole_interval():
    assert judge("chance_at_least", 0.8, 0.81, 0.9) == "met"
    assert judge("chance_at_least", 0.8, 0.7, 0.9) == "undecided"
    assert judge("chance_at_least", 0.8, 0.5, 0.79) == "not met"
    assert judge("increase_at_most", 0.05, -0.01, 0.04) == "met"
    assert judge("increase_at_most", 0.05, 0.06, 0.2) == "not met"
    assert judge("decrease_at_least", 0.1, 0.12, 0.3) == "met"


def _paired(a: int, b: int, c: int, d: int):
    """Two paired runs with a members where both show the event, b only the first, c only the second, d neither."""
    first = np.r_[np.ones(a + b, bool), np.zeros(c + d, bool)]
    second = np.r_[np.ones(a, bool), np.zeros(b, bool), np.ones(c, bool), np.zeros(d, bool)]
    return first, second


# Method 10 of Newcombe (1998b, Statistics in Medicine 17:2635–2650) is the square-and-add of Wilson
# limits, corrected by the phi coefficient of the pairs. Where phi is 0 (ad − bc between 0 and n/2, or a
# margin empty) it is the independent-samples method 10 of Newcombe (1998a, Statistics in Medicine
# 17:873–890), whose Table II gives worked examples; the ones with equal group sizes are paired here so
# that phi = 0. Values to the 4 decimals printed in Table II (quoted from memory).
NEWCOMBE_1998A_TABLE_II = [
    # (a, b, c, d), proportions of Table II, (low, high) of method 10
    ((3, 6, 0, 1), "9/10 − 3/10", (0.1705, 0.8090)),
    ((2, 4, 0, 1), "6/7 − 2/7", (0.0582, 0.8062)),
    ((0, 0, 0, 10), "0/10 − 0/10", (-0.2775, 0.2775)),
    ((0, 10, 0, 0), "10/10 − 0/10", (0.6075, 1.0)),
]


@pytest.mark.parametrize("cells,label,limits", NEWCOMBE_1998A_TABLE_II, ids=[t[1] for t in NEWCOMBE_1998A_TABLE_II])
def test_newcombe_interval_matches_the_published_worked_examples(cells, label, limits):
    d, lo, hi, n = mx.paired_difference_interval(*_paired(*cells), 0.95)
    assert n == sum(cells) and d == pytest.approx((cells[1] - cells[2]) / n, abs=1e-12)
    assert lo == pytest.approx(limits[0], abs=6e-5) and hi == pytest.approx(limits[1], abs=6e-5)  # half the last digit


def test_newcombe_paired_interval_matches_its_worked_example():
    # Newcombe (1998b), Table II, example (a): 36 pairs concordant positive, 12 and 2 discordant, 0 concordant
    # negative; difference 0.2, method 10 limits 0.0569 to 0.3404 (quoted from memory). Here phi is not 0, so
    # the correlation term of the method is exercised; without it (phi = 0) the limits would be 0.0645 to
    # 0.3372 (the square-and-add of the two Wilson intervals), outside the tolerance.
    d, lo, hi, n = mx.paired_difference_interval(*_paired(36, 12, 2, 0), 0.95)
    assert (d, n) == (pytest.approx(0.2), 50)
    assert lo == pytest.approx(0.0569, abs=6e-5) and hi == pytest.approx(0.3404, abs=6e-5)


def test_newcombe_interval_of_identical_runs_is_narrow_and_symmetric():
    # identical runs (a = 30, b = c = 0, d = 70): the difference is 0 and the interval symmetric, ±√(L² − 2φLU + U²)
    # with L, U the distances from 0.3 to its Wilson limits (0.21893, 0.39583; Wilson 1927) and Newcombe's
    # corrected phi = (ad − n/2)/√(product of the margins) = 2050/2100. By hand: ±0.02425, against ±0.126 were
    # the pairing ignored (phi = 0): a paired interval must use the pairing.
    x = np.r_[np.ones(30, bool), np.zeros(70, bool)]
    d, lo, hi, n = mx.paired_difference_interval(x, x)
    assert d == 0 and n == 100
    assert lo == pytest.approx(-hi, abs=1e-15) and hi == pytest.approx(0.02425, abs=5e-5)


def test_newcombe_interval_covers_at_its_nominal_level_and_is_not_wider_than_needed():
    # Newcombe (1998b) reports method 10's coverage close to nominal. Cells of the pair: both 0.20, first only
    # 0.15, second only 0.05, neither 0.60, so P(first) − P(second) = 0.1; 2000 samples of 200 pairs.
    # Two-sided: coverage within 4 binomial SDs of 0.95 (SD 0.0049: [0.930, 0.970]); 20,000 samples put this
    # method's coverage here at 0.951, so a false failure has chance < 1e-4. An interval that is too wide
    # covers too often, and its width is also checked: the mean width must lie within 10 % of 2·z·SD of the
    # paired difference, 2·1.96·√((0.15 + 0.05 − 0.1²)/200) = 0.1208 (the width a correct large-sample interval
    # approaches; this method's mean width here is 0.1218, its sampling SD of the mean < 0.001). Ignoring the
    # pairing gives 0.178, [−1, 1] gives 2.
    rng = np.random.default_rng(12)
    cells = rng.choice(4, size=(2000, 200), p=[0.20, 0.15, 0.05, 0.60])
    hits, widths = 0, []
    for k in cells:
        d, lo, hi, n = mx.paired_difference_interval(k <= 1, (k == 0) | (k == 2), 0.95)
        hits += lo <= 0.1 <= hi
        widths.append(hi - lo)
    sd = 4 * np.sqrt(0.95 * 0.05 / 2000)
    assert 0.95 - sd <= hits / 2000 <= 0.95 + sd
    expected = 2 * 1.959964 * np.sqrt((0.15 + 0.05 - 0.1 ** 2) / 200)
    assert abs(np.mean(widths) / expected - 1) <= 0.10


@pytest.fixture(scope="module")
def meso(tmp_path_factory):
    case = load_case(write_case(tmp_path_factory.mktemp("meso"), mesopredator_case(members=150)))
    ens = draw_ensemble(case, case.members, case.seed)
    runs = assess_members(case, ens, case.seed)
    return case, effects_table(case, runs), objectives_table(case, runs), comparisons_table(case, runs)


def _e(e, option, species, stat, h=40.0):
    return e[(e.option == option) & (e.species == species) & (e.metric == "mean_abundance")
             & (e.statistic == stat) & np.isclose(e.horizon, h)].iloc[0]


def test_removing_the_apex_releases_the_mesopredator_and_lowers_the_bird(meso):
    # Mesopredator release (Courchamp, Langlais & Sugihara 1999; Crooks & Soulé 1999): removing the top predator
    # alone lets the mesopredator rise and its prey fall. Both effects are indirect (only the apex is removed).
    case, e, _, _ = meso
    m_up, b_down = _e(e, "apex only", "meso", "p_material_increase"), _e(e, "apex only", "bird", "p_material_decrease")
    assert m_up.value >= 0.95 and b_down.value >= 0.95
    assert str(m_up.direct) == "False" and str(b_down.direct) == "False"
    assert _e(e, "apex only", "meso", "median_change").value > 0.2
    assert _e(e, "apex only", "bird", "median_change").value < -0.2


def test_removing_both_predators_does_not_lower_the_bird(meso):
    case, e, o, c = meso
    assert _e(e, "apex and meso", "bird", "p_worse").value == 0.0
    assert _e(e, "apex and meso", "bird", "median_change").value > 0
    # the objective (bird above 60 at year 40 in at least 80 % of members) is met only when both go
    status = dict(zip(o.option, o.status))
    assert status["apex and meso"] == "met" and status["apex only"] == "not met"
    # one notion of best: the highest chance of a good outcome (here the objective's event), ties all named
    good = c[c.statistic == "p_good"].set_index("option").value
    best = c[c.statistic == "best"].set_index("option").value
    assert good["apex and meso"] > good["apex only"]
    assert best["apex and meso"] == 1.0 and best["apex only"] == 0.0
    assert set(best[best == 1.0].index) == {k for k, v in good.items() if v == good.max()}


def test_paired_only_chances_count_members_one_run_wins_and_the_other_loses(meso):
    """p_only(A, B) − p_only(B, A) = p_good(A) − p_good(B) on the same members (the discordant pairs of a
    paired 2×2 table; McNemar 1947), and p_only(A, B) ≤ p_good(A)."""
    _, _, _, c = meso
    good = c[c.statistic == "p_good"].set_index(["objective", "option"]).value
    only = c[c.statistic == "p_only"].set_index(["objective", "option", "versus"]).value
    for (obj, a, b), v in only.items():
        assert v <= good[(obj, a)] + 1e-12
        assert abs((v - only[(obj, b, a)]) - (good[(obj, a)] - good[(obj, b)])) < 1e-12
