"""Expected value of sample information (impact.studies) against closed forms."""

import numpy as np
import pytest
from scipy.stats import norm

from impact.studies import sample_values_many, simulate_summary, worth_cost


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


def test_normal_normal_evsi_matches_closed_form():
    # Raiffa & Schlaifer 1961 / Ades et al. 2004 closed form (closed_form_evsi). Mean of 4 seeds at 10,000
    # members; the spread of one estimate was measured at sd ≈ 0.008 (5 seeds), so the mean's SE is ≈ 0.004;
    # tolerance 0.014 (≈ 3.5 SE, false-failure rate under 0.1 % by a normal approximation), i.e. ≈ 5 % of the value.
    for samples in (1, 4):
        est = [normal_study(10_000, seed, samples, 1.0)[0].value for seed in range(4)]
        assert np.mean(est) == pytest.approx(closed_form_evsi(0.2, 1.0, 1.0, samples), abs=0.014)


def test_evsi_rises_to_evppi_and_falls_to_zero():
    # With large samples the study tells θ almost exactly: EVSI → EVPPI (definition of the EVPPI as the
    # limit of the EVSI, Ades et al. 2004); with a hopeless measurement (log-SD 100, i.e. sd²/n → ∞) → 0.
    big, ceiling = normal_study(4000, 1, 10_000, 1.0)
    assert big.value == pytest.approx(ceiling.value, abs=0.01)
    assert big.value == pytest.approx(closed_form_evsi(0.2, 1.0, 1.0, 1e12), abs=0.03)
    tiny, _ = normal_study(4000, 1, 1, 100.0)
    # the closed form is 0.0013 here; the cross-fitted estimate is at most the value of the learned rule
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


def test_worth_cost_words():
    assert worth_cost(1.0, 5.0) == "yes"
    assert worth_cost(-1.0, -0.5) == "no"
    assert worth_cost(-1.0, 2.0) == "undetermined"
    assert worth_cost(np.nan, np.nan) == "no value scale"
