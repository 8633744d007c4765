"""Value of information against the closed forms of a normal net benefit."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

import impact.voi as voi
from impact.voi import design_matrix, evpi, evppi, evppi_from_design, information_values


def unit_normal_loss(z: float) -> float:
    # L(z) = φ(z) − z (1 − Φ(z)), the unit normal linear loss integral (Raiffa & Schlaifer 1961)
    return float(stats.norm.pdf(z) - z * stats.norm.sf(z))


@pytest.mark.parametrize("mu, sigma", [(0.0, 1.0), (0.5, 1.0), (-1.0, 2.0)])
def test_evpi_of_a_two_option_choice_is_the_normal_loss_integral(mu, sigma):
    # options 0 and 1 with NB1 − NB0 ~ N(μ, σ²): EVPI = σ L(|μ|/σ) (Raiffa & Schlaifer 1961)
    rng = np.random.default_rng(3)
    M = 20_000
    d = rng.normal(mu, sigma, M)
    nb = np.column_stack([np.zeros(M), d])
    exact = sigma * unit_normal_loss(abs(mu) / sigma)
    est = information_values(nb, d[:, None], [], resamples=200, seed=1)["all parameters"]
    # the bootstrap interval covers the closed form; also within 4 standard errors of max(0, d) (false alarm < 1e-4)
    se = np.std(np.maximum(d, 0)) / np.sqrt(M)
    assert abs(est.value - exact) <= 4 * se
    assert est.low - 4 * se <= exact <= est.high + 4 * se


def test_evppi_of_a_linear_normal_net_benefit():
    # NB1 − NB0 = μ + b1 x1 + b2 x2 + ε with x, ε independent N(0, 1): E(NB1 − NB0 | x_k) is normal with sd |b_k|,
    # so EVPPI_k = |b_k| L(|μ|/|b_k|) (Strong, Oakley & Brennan 2014, on the loss integral of Raiffa & Schlaifer
    # 1961); x3 does not enter the net benefit, so its EVPPI is 0.
    rng = np.random.default_rng(8)
    M = 4000
    mu, b1, b2 = 0.3, 1.0, 0.5
    x = rng.normal(size=(M, 3))
    d = mu + b1 * x[:, 0] + b2 * x[:, 1] + rng.normal(size=M)
    nb = np.column_stack([np.zeros(M), d])
    vals = information_values(nb, x, ["x1", "x2", "x3"], groups={"x1 and x2": ["x1", "x2"]}, resamples=100, seed=2)
    for name, b in (("x1", b1), ("x2", b2)):
        exact = b * unit_normal_loss(mu / b)
        e = vals[name]
        assert e.low - 0.02 <= exact <= e.high + 0.02, (name, e, exact)
        assert abs(e.value - exact) < 0.05
    s12 = np.hypot(b1, b2)
    assert abs(vals["x1 and x2"].value - s12 * unit_normal_loss(mu / s12)) < 0.05
    assert vals["x3"].value < 0.02 and vals["x3"].low <= 0.01
    # EVPPI never exceeds EVPI (a theorem: partial information is worth at most perfect information)
    assert all(v.value <= vals["all parameters"].value + 1e-9 for v in vals.values())


def test_evppi_is_zero_when_one_option_dominates():
    rng = np.random.default_rng(1)
    x = rng.random((500, 1))
    nb = np.column_stack([x[:, 0], x[:, 0] + 1.0])
    assert evpi(nb) == pytest.approx(0.0, abs=1e-12)
    assert evppi(nb, x) == pytest.approx(0.0, abs=1e-9)


def test_evppi_never_exceeds_evpi_even_where_the_regression_overfits():
    """EVPPI <= EVPI holds by definition (the expected value of partial perfect information cannot
    exceed that of perfect information; Strong, Oakley & Brennan 2014, Sec. 2). With a rare binary
    outcome and a nearly dominant option, the regression's own estimate can overshoot; the
    estimator must not. Checked on 20 seeds (a property, not a statistical bound)."""
    for seed in range(20):
        rng = np.random.default_rng(seed)
        M = 400
        x = rng.random((M, 3))
        good = np.column_stack([rng.random(M) < 0.999, (rng.random(M) < 0.002) & (x[:, 0] > 0.99)]).astype(float)
        res = information_values(good, x, ["a", "b", "c"], resamples=20, seed=seed)
        top = res["all parameters"].value
        assert all(res[k].value <= top + 1e-15 for k in ("a", "b", "c")), (seed, top, [res[k].value for k in "abc"])


@pytest.mark.parametrize("batch", [None, 1000])
def test_resamples_as_member_weights_equal_the_fits_on_gathered_rows(monkeypatch, batch):
    # the bootstrap computes every resample at once as member counts; each must equal the estimate on the
    # resample's own rows (an identity of least squares, checked to rounding), also when the members are
    # summed in slices
    if batch:
        monkeypatch.setattr(voi, "BATCH_VALUES", batch)
    rng = np.random.default_rng(6)
    M = 300
    x = rng.random((M, 2))
    nb = np.column_stack([np.zeros(M), x[:, 0] - 0.5 + 0.3 * rng.normal(size=M), (rng.random(M) < x[:, 1]) * 0.4])
    design = design_matrix(x)
    draws = rng.integers(0, M, size=(7, M))
    W = voi.resample_counts(draws, M)
    assert (W.sum(axis=1) == M).all()
    np.testing.assert_allclose(voi.weighted_evpi(nb, W), [evpi(nb[i]) for i in draws], rtol=0, atol=1e-13)
    np.testing.assert_allclose(voi.weighted_evppi(nb, design, W), [evppi_from_design(nb[i], design[i]) for i in draws],
                               rtol=0, atol=1e-12)


def test_bootstrap_draws_one_resample_after_another():
    # one draw of (R, M) from the stream gives the numbers R draws of M would, so intervals do not
    # depend on how the draws are batched
    a, b = np.random.default_rng(4), np.random.default_rng(4)
    counts = voi.bootstrap_counts(a, 101, 5)
    np.testing.assert_array_equal(counts, voi.resample_counts(np.stack([b.integers(0, 101, 101) for _ in range(5)]), 101))
