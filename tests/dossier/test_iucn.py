"""Criterion E reading against the published thresholds.

Source of every threshold and window below: IUCN (2012) IUCN Red List Categories and Criteria,
version 3.1, second edition, section V, criterion E (CR: >= 50 % in 10 years or 3 generations,
EN: >= 20 % in 20 years or 5 generations, whichever is longer, up to a maximum of 100 years;
VU: >= 10 % in 100 years).
"""

import pytest

from impact.dossier.iucn import criterion_e, criterion_e_in_units, window_years


@pytest.mark.parametrize("years, generations, gen_time, expected", [
    (10, 3, 2.0, 10.0),     # 3 x 2 = 6 < 10: the 10 years win (IUCN 2012, E, "whichever is longer")
    (10, 3, 5.0, 15.0),     # 3 x 5 = 15 > 10: three generations win
    (20, 5, 3.0, 20.0),     # 5 x 3 = 15 < 20
    (20, 5, 8.0, 40.0),     # 5 x 8 = 40 > 20
    (10, 3, 40.0, 100.0),   # 3 x 40 = 120, capped at 100 years (IUCN 2012, E, "up to a maximum of 100 years")
    (20, 5, 25.0, 100.0),   # 5 x 25 = 125, capped
    (100, None, 50.0, 100.0),  # VU window is 100 years regardless of generation length
])
def test_window_whichever_longer_and_cap(years, generations, gen_time, expected):
    assert window_years(years, generations, gen_time) == pytest.approx(expected)


# Species with a 1-year generation: windows are CR 10, EN 20, VU 100 years.
@pytest.mark.parametrize("probs, expected", [
    ({10: 0.50, 20: 0.6, 100: 0.7}, "CR"),    # exactly at the CR threshold (">= 50 %")
    ({10: 0.499, 20: 0.6, 100: 0.7}, "EN"),   # just below CR, EN met at 20 years
    ({10: 0.10, 20: 0.20, 100: 0.3}, "EN"),   # exactly at the EN threshold (">= 20 %")
    ({10: 0.10, 20: 0.199, 100: 0.3}, "VU"),  # just below EN
    ({10: 0.01, 20: 0.05, 100: 0.10}, "VU"),  # exactly at the VU threshold (">= 10 %")
    ({10: 0.01, 20: 0.05, 100: 0.099}, "below VU"),
])
def test_category_thresholds(probs, expected):
    assert criterion_e(probs, 1.0).category == expected


def test_generations_lengthen_the_window():
    # generation 5 years: the CR window is 15 years (3 x 5), read at the 15-year horizon;
    # the EN window is 25 years (5 x 5), read at the next declared horizon, 30 years.
    r = criterion_e({10: 0.40, 15: 0.45, 30: 0.48, 100: 0.5}, 5.0)
    cr, en, vu = r.tests
    assert (cr.window, cr.horizon, cr.met) == (15.0, 15.0, False)
    assert (en.window, en.horizon, en.met) == (25.0, 30.0, True)
    assert r.category == "EN"


def test_cap_reads_the_100_year_horizon():
    # generation 40 years: 3 generations = 120 years, capped to 100 (IUCN 2012, E)
    r = criterion_e({50: 0.2, 100: 0.55, 150: 0.9}, 40.0)
    assert r.tests[0].window == 100.0
    assert r.tests[0].horizon == 100.0
    assert r.category == "CR"


def test_horizon_too_short():
    # horizons only up to 40 years: the VU window (100 years) cannot be judged
    r = criterion_e({10: 0.01, 20: 0.05, 40: 0.08}, 3.0)
    assert r.category == "horizon too short"
    assert r.tests[2].met is None


def test_short_horizon_that_already_meets_counts():
    # 12 % by 40 years means at least 12 % by 100 years: VU holds without a 100-year horizon
    r = criterion_e({10: 0.01, 20: 0.05, 40: 0.12}, 3.0)
    assert r.category == "VU"


def test_unjudged_more_threatened_category_is_noted():
    # generation 10: CR window 30 years, EN window 50 years; horizons stop at 20
    r = criterion_e({10: 0.25, 20: 0.3}, 10.0)
    assert r.category == "EN"
    assert "CR" in r.note


@pytest.mark.parametrize("unit, horizons, gen, expected", [
    ("month", {120: 0.55, 240: 0.6}, 12.0, "CR"),   # 120 months = 10 years, generation 1 year
    ("week", {522: 0.55}, 52.0, "CR"),              # 522 weeks ~ 10.005 years
    ("day", {3652.5: 0.55}, 365.25, "CR"),
])
def test_time_units_convert(unit, horizons, gen, expected):
    assert criterion_e_in_units(horizons, gen, unit).category == expected


@pytest.mark.parametrize("unit, gen", [("season", 1.0), ("year", None)])
def test_not_applicable(unit, gen):
    assert criterion_e_in_units({10: 0.9}, gen, unit).category == "not applicable"
