"""Checks of the ensemble Dormand-Prince integrator against closed forms, invariants and scipy."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from impact.engine.integrate import FAILURE_REASONS, SegmentResult, integrate, integrate_segment

RTOL, ATOL = 1e-8, 1e-12


def tolerance_units(y, exact, rtol=RTOL, atol=ATOL):
    """Global error measured in units of the requested local tolerance."""
    return np.abs(y - exact) / (atol + rtol * np.abs(exact))


# --- logistic growth -----------------------------------------------------------------------

LOGISTIC = [  # (r, K, N0): invented values spanning growth towards K from below and above
    (0.5, 1.0, 0.01),
    (1.3, 10.0, 0.5),
    (2.0, 3.0, 5.0),
    (0.8, 100.0, 1.0),
]


def logistic_rhs(p):
    r, K = p[:, 0], p[:, 1]

    def fun(t, y, members):
        return (np.take(r, members) * y[:, 0] * (1.0 - y[:, 0] / np.take(K, members)))[:, None]

    return fun


def test_logistic_matches_verhulst_closed_form():
    p = np.array(LOGISTIC)
    t = np.linspace(0.0, 15.0, 31)
    Y, summary = integrate(logistic_rhs(p), t, p[:, 2:3], rtol=RTOL, atol=ATOL)
    r, K, N0 = (p[:, i : i + 1] for i in range(3))
    # Verhulst (1838): N(t) = K / (1 + ((K - N0)/N0) exp(-r t)).
    exact = K / (1.0 + ((K - N0) / N0) * np.exp(-r * t[None, :]))
    assert not summary.failed.any()
    # A global error of a few hundred local tolerances over ~15 growth times is common practice,
    # no source; observed values are far below.
    assert tolerance_units(Y[:, :, 0], exact).max() < 100


@pytest.mark.parametrize("rate", [-3.0, -0.7, 0.4, 1.5])
def test_exponential_growth_and_decline(rate):
    rates = np.array([rate, 0.5 * rate])

    def fun(t, y, members):
        return np.take(rates, members)[:, None] * y

    t = np.linspace(0.0, 5.0, 11)
    Y, summary = integrate(fun, t, np.ones((2, 1)), rtol=RTOL, atol=ATOL)
    # Malthus (1798): N(t) = N0 exp(r t).
    exact = np.exp(rates[:, None] * t[None, :])
    assert tolerance_units(Y[:, :, 0], exact).max() < 100
    assert summary.nfev > 0 and np.all(summary.nsteps > 0)


# --- Lotka-Volterra first integral ----------------------------------------------------------

ALPHA, BETA, GAMMA, DELTA = 1.0, 0.5, 0.75, 0.25  # invented rates


def lotka_volterra(t, y, members):
    x, z = y[:, 0], y[:, 1]
    out = np.empty_like(y)
    out[:, 0] = ALPHA * x - BETA * x * z
    out[:, 1] = DELTA * x * z - GAMMA * z
    return out


def lv_invariant(Y):
    x, z = Y[..., 0], Y[..., 1]
    return DELTA * x - GAMMA * np.log(x) + BETA * z - ALPHA * np.log(z)


def test_lotka_volterra_first_integral_conserved():
    y0 = np.array([[4.0, 1.0], [2.0, 3.0], [6.0, 0.5]])
    # Small-amplitude period is 2 pi / sqrt(alpha gamma) (Volterra 1926); larger orbits are
    # slower, so 20 small-amplitude periods is a lower bound of ~20 cycles.
    period = 2 * np.pi / np.sqrt(ALPHA * GAMMA)
    t = np.linspace(0.0, 20 * period, 401)
    Y, summary = integrate(lotka_volterra, t, y0, rtol=1e-10, atol=1e-12)
    assert not summary.failed.any()
    # Count prey maxima to be sure at least ~20 cycles were integrated.
    x = Y[0, :, 0]
    assert np.sum((x[1:-1] > x[:-2]) & (x[1:-1] > x[2:])) >= 15
    # Lotka (1925), Volterra (1926): V = delta x - gamma ln x + beta y - alpha ln y is constant.
    V = lv_invariant(Y)
    drift = np.abs(V - V[:, :1]) / np.abs(V[:, :1])
    assert drift.max() < 1e-7


# --- four-species web against scipy ----------------------------------------------------------


def web_parameters(members, seed=0):
    """Invented parameter rows: plant growth r, capacity K, attack a, handling h, efficiency e,
    mortality m, competition c between the two plants."""
    rng = np.random.default_rng(np.random.SeedSequence(seed))
    base = np.array([1.0, 0.8, 5.0, 1.2, 0.6, 0.5, 0.15, 0.4, 0.8, 0.1, 0.3, 0.5])
    return base * rng.uniform(0.8, 1.2, size=(members, base.size))


def web_rhs_rows(p):
    """Two competing plants, a Holling type II herbivore (Holling 1959) and a top predator."""

    def rates(y, q):
        P1, P2, H, Z = y[:, 0], y[:, 1], y[:, 2], y[:, 3]
        r1, r2, K, a, h, e, m, c, aZ, hZ, eZ, mZ = (q[:, i] for i in range(12))
        f1 = a * P1 / (1.0 + a * h * (P1 + P2))
        f2 = a * P2 / (1.0 + a * h * (P1 + P2))
        g = aZ * H / (1.0 + aZ * hZ * H)
        out = np.empty_like(y)
        out[:, 0] = r1 * P1 * (1.0 - (P1 + c * P2) / K) - f1 * H
        out[:, 1] = r2 * P2 * (1.0 - (P2 + c * P1) / K) - f2 * H
        out[:, 2] = e * (f1 + f2) * H - m * H - g * Z
        out[:, 3] = eZ * g * Z - mZ * Z
        return out

    def ensemble(t, y, members):
        return rates(y, np.take(p, members, axis=0))

    def single(k):
        return lambda t, y: rates(y[None, :], p[k : k + 1])[0]

    return ensemble, single


WEB_Y0 = np.array([1.0, 1.5, 0.5, 0.2])


WEB_T = np.linspace(0.0, 30.0, 16)


@pytest.fixture(scope="module")
def web_run():
    p = web_parameters(4)
    ensemble, single = web_rhs_rows(p)
    Y, summary = integrate(ensemble, WEB_T, np.tile(WEB_Y0, (4, 1)), rtol=1e-10, atol=1e-12)
    return single, Y, summary


@pytest.mark.parametrize("member", [0, 1, 2, 3])
def test_four_species_web_matches_solve_ivp(web_run, member):
    single, Y, summary = web_run
    assert not summary.failed[member]
    # Reference implementation: scipy.integrate.solve_ivp (Virtanen et al. 2020), DOP853.
    ref = solve_ivp(single(member), (0.0, 30.0), WEB_Y0, method="DOP853", t_eval=WEB_T,
                    rtol=1e-10, atol=1e-12).y.T
    # Plants dip to ~1e-9 in troughs where only atol governs; below 1e-3 (far under any
    # quasi-extinction level) the error is judged absolutely. Common practice, no source.
    rel = np.abs(Y[member] - ref) / np.maximum(np.abs(ref), 1e-3)
    assert rel.max() < 1e-6


# --- independence of batch composition -------------------------------------------------------

BATCH = 1000


@pytest.fixture(scope="module")
def batch_run():
    p = web_parameters(BATCH, seed=3)
    ensemble, _ = web_rhs_rows(p)
    rng = np.random.default_rng(np.random.SeedSequence(7))
    y0 = WEB_Y0 * rng.uniform(0.5, 1.5, size=(BATCH, 4))
    t = np.array([0.0, 3.0, 10.0, 20.0])
    Y, summary = integrate(ensemble, t, y0, rtol=1e-6, atol=1e-9)
    return ensemble, t, y0, Y, summary


@pytest.mark.parametrize("member", [0, 17, 503, 999])
def test_member_alone_equals_member_in_batch(batch_run, member):
    # Design requirement of the ensemble engine (no published source): bit-identical rows.
    ensemble, t, y0, Y, summary = batch_run
    Y1, s1 = integrate(ensemble, t, y0[member : member + 1], rtol=1e-6, atol=1e-9,
                       members=np.array([member]))
    assert np.array_equal(Y1[0], Y[member])
    assert np.array_equal(s1.ymin[0], summary.ymin[member])
    assert np.array_equal(s1.ymax[0], summary.ymax[member])
    assert np.array_equal(s1.h[0], summary.h[member])
    assert s1.nsteps[0] == summary.nsteps[member]


# --- failures ---------------------------------------------------------------------------------

GOOD_R = np.array([0.5, 1.0, 0.0, 2.0])  # member 2 is the bad one in the failure tests


def mixed_rhs(kind):
    def fun(t, y, members):
        out = (np.take(GOOD_R, members) * y[:, 0] * (1.0 - y[:, 0]))[:, None]
        bad = members == 2
        if kind == "blowup":
            out[bad] = y[bad] ** 2  # y' = y^2, y(0)=1 blows up at t = 1
        elif kind == "nan":
            out[bad] = np.nan
        elif kind == "nan_later":
            out[bad & (t > 0.4)] = np.nan
        return out

    return fun


@pytest.mark.parametrize("kind, allowed", [
    ("blowup", {1, 2}),
    ("nan", {1}),
    ("nan_later", {1}),
])
def test_failed_member_flagged_and_others_unaffected(kind, allowed):
    y0 = np.array([[0.1], [0.2], [1.0], [0.05]])
    res = integrate_segment(mixed_rhs(kind), 0.0, 2.0, y0, rtol=RTOL, atol=ATOL)
    assert res.failed.tolist() == [False, False, True, False]
    assert int(res.reason[2]) in allowed
    assert np.isnan(res.y[2]).all()
    # Good members: Verhulst (1838) logistic closed form with K = 1.
    good = np.array([0, 1, 3])
    N0, r = y0[good, 0], GOOD_R[good]
    exact = 1.0 / (1.0 + ((1.0 - N0) / N0) * np.exp(-r * 2.0))
    assert tolerance_units(res.y[good, 0], exact).max() < 100
    # ... and identical to a run without the bad member.
    alone = integrate_segment(mixed_rhs(kind), 0.0, 2.0, y0[good], rtol=RTOL, atol=ATOL,
                              members=good)
    assert np.array_equal(alone.y, res.y[good])
    assert np.array_equal(alone.nsteps, res.nsteps[good])


def test_too_many_steps_flagged():
    y0 = np.array([[0.1], [0.2]])
    res = integrate_segment(mixed_rhs("none"), 0.0, 50.0, y0, rtol=RTOL, atol=ATOL, max_steps=5)
    assert res.reason.tolist() == [4, 4]
    assert FAILURE_REASONS[4] == "too many steps"
    assert np.all(res.nsteps == 5)


# --- nonnegativity ----------------------------------------------------------------------------


def saturating_loss(t, y, members):
    # Prey eaten by a fixed predator density with a Holling (1959) type II response:
    # the loss stays near its maximum until the prey is almost gone, so steps overshoot zero.
    return -5.0 * y / (y + 1e-3)


@pytest.mark.parametrize("nonnegative", [True, False])
def test_rapid_decline_stays_nonnegative_only_when_projected(nonnegative):
    t = np.linspace(0.0, 5.0, 51)
    Y, summary = integrate(saturating_loss, t, np.ones((3, 1)), rtol=1e-3, atol=1e-8,
                           nonnegative=nonnegative)
    assert not summary.failed.any()
    if nonnegative:
        assert Y.min() >= 0.0 and summary.ymin.min() >= 0.0
        # Separating variables gives y + 1e-3 ln y = 1 - 5 t, so y(5) ~ exp(-24000) ~ 0
        # (derived here by hand from the Holling (1959) type II loss).
        assert np.all(Y[:, -1, 0] < 1e-6)
    else:
        assert summary.ymin.min() < 0.0  # shows the projected check above can fail


# --- Lorenz system through the generic entry point --------------------------------------------

SIGMA, RHO, BETA_L = 10.0, 28.0, 8.0 / 3.0  # Lorenz (1963) classic values


def lorenz_rows(y):
    x, u, z = y[:, 0], y[:, 1], y[:, 2]
    out = np.empty_like(y)
    out[:, 0] = SIGMA * (u - x)
    out[:, 1] = x * (RHO - z) - u
    out[:, 2] = x * u - BETA_L * z
    return out


LORENZ_Y0 = np.array([[1.0, 1.0, 1.0], [-5.0, 2.0, 20.0], [0.1, 0.0, 0.0]])
LORENZ_T = np.linspace(0.0, 2.0, 21)


@pytest.fixture(scope="module")
def lorenz_run():
    return integrate(lambda t, y, m: lorenz_rows(y), LORENZ_T, LORENZ_Y0, rtol=1e-11,
                     atol=1e-12, nonnegative=False)


def test_lorenz_generic_path_does_not_project(lorenz_run):
    Y, summary = lorenz_run
    assert isinstance(summary, SegmentResult) and not summary.failed.any()
    assert Y.min() < 0.0  # x and y of Lorenz (1963) change sign; nothing may clip them


@pytest.mark.parametrize("member", [0, 1, 2])
def test_lorenz_short_time_matches_solve_ivp(lorenz_run, member):
    Y, _ = lorenz_run
    # Lorenz (1963) equations; reference: scipy solve_ivp DOP853 (Virtanen et al. 2020).
    ref = solve_ivp(lambda t, y: lorenz_rows(y[None, :])[0], (0.0, 2.0), LORENZ_Y0[member],
                    method="DOP853", t_eval=LORENZ_T, rtol=1e-12, atol=1e-14).y.T
    err = np.abs(Y[member] - ref) / np.maximum(np.abs(ref), 1.0)
    assert err.max() < 1e-6


# --- a failing member must not change the projection of the others -----------------------------


def decline_or_nan(t, y, members):
    """Member 0: the Holling (1959) type II loss of ``saturating_loss`` (steps overshoot zero);
    member 1: logistic growth whose right-hand side turns NaN after t = 0.15, while member 0
    is about to overshoot zero (so both are active in the same iterations)."""
    out = saturating_loss(t, y, members)
    other = members == 1
    out[other] = (y[other] * (1.0 - y[other]))
    out[other & (t > 0.15)] = np.nan
    return out


def test_nan_member_does_not_switch_off_projection_of_others():
    # Design requirement (DEVELOPERS.md, no published source): a member's numbers never depend on
    # which members share its batch, also when one of them fails. A NaN in another row once hid
    # this member's negative overshoot from the projection (its minimum fell to about -0.48, "ok").
    y0 = np.array([[1.0], [0.5]])
    both = integrate_segment(decline_or_nan, 0.0, 0.5, y0, rtol=1e-3, atol=1e-8)
    alone = integrate_segment(decline_or_nan, 0.0, 0.5, y0[:1], rtol=1e-3, atol=1e-8,
                              members=np.array([0]))
    assert both.failed.tolist() == [False, True]
    assert not alone.failed[0]
    # y + 1e-3 ln y = 1 - 5 t (hand derivation, see above) is below zero at t = 0.5: projected to 0.
    assert alone.y[0, 0] == 0.0 and alone.ymin[0, 0] == 0.0
    assert np.array_equal(both.y[0], alone.y[0])
    assert np.array_equal(both.ymin[0], alone.ymin[0])
    assert both.nsteps[0] == alone.nsteps[0]


# --- the tangent rides on the state's steps ----------------------------------------------------


def test_tangent_of_logistic_growth_is_the_derivative_of_the_closed_form():
    # Verhulst (1838): N(t) = K / (1 + ((K - N0)/N0) e^{-rt}), so the variational solution started
    # from v0 = 1 is dN(t)/dN0 = e^{-rt} (N(t)/N0)^2 (differentiated here by hand).
    p = np.array(LOGISTIC)
    r, K, N0 = p[:, 0], p[:, 1], p[:, 2]

    def fun(t, y, v, members):
        rr, KK = np.take(r, members)[:, None], np.take(K, members)[:, None]
        return rr * y * (1.0 - y / KK), rr * (1.0 - 2.0 * y / KK) * v

    res = integrate_segment(fun, 0.0, 6.0, N0[:, None], rtol=1e-10, atol=1e-12,
                            tangent=np.ones((len(p), 1)))
    N = K / (1.0 + ((K - N0) / N0) * np.exp(-r * 6.0))
    exact = np.exp(-r * 6.0) * (N / N0) ** 2
    assert not res.failed.any()
    # The tangent is outside the error norm (it follows the state's steps); 1e-6 relative, or
    # 1e-9 of its starting length where it has decayed, is common practice, no source.
    np.testing.assert_allclose(res.v[:, 0], exact, rtol=1e-6, atol=1e-9)
    plain = integrate_segment(lambda t, y, m: fun(t, y, y, m)[0], 0.0, 6.0, N0[:, None],
                              rtol=1e-10, atol=1e-12)
    assert np.array_equal(plain.y, res.y) and np.array_equal(plain.nsteps, res.nsteps)
