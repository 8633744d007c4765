"""Whether an eradication is done (impact.risk.eradication): absence after empty surveys, the surveys
needed, reinvasion as a thinned Poisson process, and the chance a declining target is gone."""

from __future__ import annotations

import math

import numpy as np
import pytest

import impact
from casefiles import decline_case, write_case
from impact.errors import CaseError
from impact.risk.eradication import (SURVEY_LIMIT, absence_after, ensemble_absence_after, gone_mask,
    reinvasion_chance, surveys_needed, surveys_needed_closed_form)


def test_absence_after_empty_surveys_is_bayes_rule():
    # Issue's formula (Bayes' rule; Ramsey, Parkes & Morrison 2009 reason this way): with prior
    # presence π and detection p, P(absent | k empty) = 1 − π(1 − p)^k / [π(1 − p)^k + 1 − π].
    # Worked by hand: π = 0.5, p = 0.5, k = 2 -> q = 0.25, 1 − 0.125/(0.125 + 0.5) = 0.8.
    assert absence_after(0.5, 0.5, 2) == pytest.approx(0.8, abs=1e-15)
    # π = 0.9, p = 0.3, k = 5: q = 0.16807, 1 − 0.151263/(0.151263 + 0.1) = 0.397986...
    q = 0.7 ** 5
    assert absence_after(0.9, 0.3, 5) == pytest.approx(1 - 0.9 * q / (0.9 * q + 0.1), rel=1e-15)
    assert absence_after(0.9, 0.3, 0) == pytest.approx(0.1, rel=1e-15)  # no survey: the prior
    assert absence_after(0.9, 1.0, 1) == 1.0  # a perfect survey settles it


@pytest.mark.parametrize("pi, p, c", [(0.5, 0.5, 0.95), (0.9, 0.3, 0.95), (0.2, 0.1, 0.99), (0.99, 0.6, 0.9)])
def test_surveys_needed_is_the_first_k_reaching_the_confidence(pi, p, c):
    # Solving the formula above for k: (1 − p)^k ≤ (1 − c)(1 − π)/(c π) (derived from it); the
    # ensemble search with every member at the same π and p must find the same whole k.
    k = surveys_needed_closed_form(pi, p, c)
    assert absence_after(pi, p, k) >= c
    assert k == 0 or absence_after(pi, p, k - 1) < c
    M = 1000
    absent = np.r_[np.zeros(round(pi * M)), np.ones(M - round(pi * M))]  # a share π present
    got, reached = surveys_needed(absent, np.full(M, p), c)
    assert got == k
    assert reached == pytest.approx(absence_after(pi, p, k), rel=1e-12)


def test_uncertain_detection_is_averaged_over_members():
    # With detection p_i drawn per member and presence per member, P(absent | k empty) is
    # Σ a / (Σ a + Σ (1 − a)(1 − p)^k) (Bayes' rule over the members); with one p it is the formula.
    absent = np.array([1.0, 0.0, 0.0, 1.0])
    assert ensemble_absence_after(absent, np.full(4, 0.4), 3) == pytest.approx(absence_after(0.5, 0.4, 3), rel=1e-14)
    p = np.array([0.2, 0.9, 0.1, 0.5])
    assert ensemble_absence_after(absent, p, 2) == pytest.approx(2.0 / (2.0 + 0.1 ** 2 + 0.9 ** 2), rel=1e-14)
    # nobody gone: absence is out of reach
    assert math.isnan(surveys_needed(np.zeros(4), p, 0.95)[0])
    assert SURVEY_LIMIT >= 100


def test_reinvasion_matches_a_simulated_poisson_process():
    # A Poisson process of rate r has at least one event by t with chance 1 − e^{−rt}; thinning it by
    # ε (each event kept independently) leaves a Poisson process of rate r ε (Ross, Introduction to
    # Probability Models, the thinning property; from memory). Simulated with exponential gaps:
    # within 4 standard errors of the closed form (false-failure rate about 6e-5 per check).
    rng = np.random.default_rng(24)
    n, r, eps = 100_000, 0.3, 0.4
    for t in (1.0, 5.0):
        gaps = rng.exponential(1.0 / r, size=(n, 40))
        times = np.cumsum(gaps, axis=1)
        kept = rng.random((n, 40)) < eps
        founded = ((times <= t) & kept).any(axis=1)
        want = float(reinvasion_chance(r, eps, t))
        assert want == pytest.approx(1 - math.exp(-r * eps * t), rel=1e-14)
        se = math.sqrt(want * (1 - want) / n)
        assert abs(founded.mean() - want) < 4 * se
    assert reinvasion_chance(0.3, 0.4, -2.0) == 0.0  # no exposure before the target is gone


def test_gone_mask_reads_the_running_minimum():
    m = np.array([0.5, 0.001, np.nan, 0.0, 0.0025])
    np.testing.assert_array_equal(gone_mask(m, 0.0025), [False, True, False, True, False])
    np.testing.assert_array_equal(gone_mask(m, 0.0), [False, False, False, True, False])


def _surveyed(members=60):
    data = decline_case(members)
    data["parameters"]["p"] = {"distribution": "uniform", "low": 0.3, "high": 0.6, "unit": "probability"}
    data["surveillance"] = [{"species": "newt", "gone_below": 1.0, "detection": "p", "confidence": 0.95,
                             "arrival_rate": 0.05, "establishment": 0.5, "survey": "night count"}]
    return data


def test_a_declining_target_is_gone_when_its_closed_form_says(tmp_path):
    # newt: N(t) = 100 e^{(r − q) t} (exponential decline and harvest, both drawn per member), so
    # it is below 1 by horizon h iff (q − r) h > ln 100, first below at output time
    # floor(ln 100/(q − r)) + 1 (derived from the closed form).
    result = impact.assess(str(write_case(tmp_path, _surveyed())), seed=0, sensitivity=False, dynamics=False)
    er = result.tables["eradication.csv"]
    mem = result.tables["eradication_members.csv"]
    pars = result.tables["parameters.csv"].set_index("member")
    harvest = mem[mem.option == "harvest"].set_index("member")
    rate = pars.loc[harvest.index, "q"] - pars.loc[harvest.index, "r"]
    crossing = np.log(100.0) / rate
    clear = np.abs(crossing - np.round(crossing)) > 1e-6  # members crossing at an output time are left out
    want = np.where(crossing < 40, np.floor(crossing) + 1, np.nan)
    np.testing.assert_array_equal(harvest.gone_at[clear].to_numpy(), want[clear])
    for h in (10.0, 20.0, 40.0):
        row = er[(er.option == "harvest") & (er.horizon == h)].iloc[0]
        assert row.chance_gone == pytest.approx(np.mean(crossing < h), abs=1e-12)
        gone = crossing < h
        # success: gone and not re-founded, e^{−λ ε (h − t_gone)} per gone member (λ = 0.05, ε = 0.5);
        # t_gone from the closed form, or as written for a member crossing at an output time
        t_gone = np.where(clear, np.floor(crossing) + 1, harvest.gone_at.to_numpy())
        s = np.where(gone, np.exp(-0.05 * 0.5 * (h - np.where(gone, t_gone, h))), 0.0)
        assert row.chance_success == pytest.approx(s.mean(), rel=1e-9)
        assert row.gone_low <= row.chance_gone <= row.gone_high
    assert set(er.option) == {"baseline", "harvest"}
    assert result.tables["eradication.csv"].surveys_needed.notna().any()


BAD = [
    ("unknown species", {"species": "toad"}, "surveillance[0].species", "unknown species"),
    ("level above quasi-extinction", {"gone_below": 20.0}, "surveillance.newt.gone_below", "below the species"),
    ("detection above 1", {"detection": 1.5}, "surveillance.newt.detection", "<= 1"),
    ("confidence of 1", {"confidence": 1.0}, "surveillance.newt.confidence", "below 1"),
    ("negative arrivals", {"arrival_rate": -1.0}, "surveillance.newt.arrival_rate", ">= 0"),
    ("typo", {"detections": 0.5}, "surveillance.newt.detections", "unknown key"),
]


@pytest.mark.parametrize("desc, edit, field, words", BAD, ids=[b[0] for b in BAD])
def test_bad_surveillance_names_the_field(tmp_path, desc, edit, field, words):
    data = _surveyed()
    data["surveillance"][0].update(edit)
    with pytest.raises(CaseError) as err:
        impact.load_case(write_case(tmp_path, data))
    assert err.value.field == field
    assert words in err.value.message
