"""Regime verdicts by evidence, windows from the web's time scales, screen shares (source beside each check)."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from impact.case import load_case
from impact.cli import main
from impact.dynamics.diagnose import diagnose_web
from impact.dynamics.lyapunov import DynamicsSettings
from impact.dynamics.scan import scan_web
from impact.errors import CaseError
from impact.model import Controls, build_web, web_params
from impact.dynamics.regimes import Evidence, Rules, classify, predictability_shortfall, share_interval
from casefiles import write_case
from test_dynamics import hp_case, rm_case

# Rosenzweig–MacArthur values of tests/test_dynamics.rm_case: r=3, a=1, h=0.01, e=0.01, m=0.5.
R, A, H, E, M = 3.0, 1.0, 0.01, 0.01, 0.5
N_STAR = M / (A * (E - M * H))  # prey at the interior equilibrium (Rosenzweig 1971): 100
K_HOPF = 2 * N_STAR + 1 / (A * H)  # Hopf point K_H = 2N* + 1/(ah) (Rosenzweig 1971): 300


def leading_eigenvalue(K: float) -> complex:
    """Leading eigenvalue of the closed-form Jacobian at (N*, P*) (see test_dynamics)."""
    N = N_STAR
    P = R * (1 - N / K) * (1 + A * H * N) / A
    J = np.array([[R * (1 - 2 * N / K) - A * P / (1 + A * H * N) ** 2, -A * N / (1 + A * H * N)],
                  [E * A * P / (1 + A * H * N) ** 2, 0.0]])
    mu = np.linalg.eigvals(J)
    return mu[np.argmax(mu.real)]


def rm_diagnose(tmp_path, factors, settings: DynamicsSettings):
    """Diagnose the RM web at K = factor × K_H for each factor, side by side from the case's start."""
    case = load_case(rm_case(tmp_path, 1.0))
    web = build_web(case)
    n = len(factors)
    p = web_params(case, {"K": np.asarray(factors, float) * K_HOPF}, n)
    return diagnose_web(web, p, Controls.neutral(n, 2), p.initial, settings, np.array([1e-3, 1e-4]))


def test_damped_spiral_below_hopf_is_an_equilibrium_with_the_leading_eigenvalue(tmp_path):
    # Rosenzweig (1971): K < K_H gives a stable focus. With a short spin-up (20 time units, under one
    # relaxation time 1/|Re μ| ≈ 25) the oscillation is still large in the window, yet the verdict is
    # equilibrium and λ equals Re μ of the closed-form Jacobian (linearisation, e.g. Ott 2002, ch. 4,
    # from memory) within the 99 % interval from the sub-window spread.
    out = rm_diagnose(tmp_path, [0.95], DynamicsSettings(transient=20.0))
    mu = leading_eigenvalue(0.95 * K_HOPF)
    assert mu.imag != 0 and mu.real < 0  # a spiral, as the check intends
    assert out["regime"][0] == "equilibrium"
    assert out["amplitude"][0, 0] > 0.05 * N_STAR  # the damped oscillation is visible in the window
    assert abs(out["lyapunov"][0] - mu.real) <= 3.5 * out["lyapunov_se"][0]
    assert out["lyapunov_se"][0] < 0.1 * abs(mu.real)  # and the interval is informative


@pytest.mark.parametrize("transient", [5.0, 50.0])
def test_damped_spiral_is_never_a_cycle(tmp_path, transient):
    # Rosenzweig (1971): every K below K_H has a stable equilibrium, however slowly the spiral decays
    # near K_H (Re μ → 0). Any verdict but "cycle" is acceptable; undetermined must carry a reason.
    factors = [0.9, 0.97, 0.99]
    out = rm_diagnose(tmp_path, factors, DynamicsSettings(transient=transient))
    assert "cycle" not in set(out["regime"])
    for reg, why in zip(out["regime"], out["reason"]):
        assert reg in ("equilibrium", "undetermined") and (reg == "equilibrium" or why)


@pytest.mark.slow
def test_scan_puts_the_onset_of_cycles_at_the_hopf_point(tmp_path):
    # Rosenzweig (1971): onset of cycles at K_H = 300; grid step 20 straddling it. The windows are
    # the scan's defaults (from the web's time scales), so this also checks their choice.
    case = load_case(rm_case(tmp_path, 1.0))
    grid = np.arange(250.0, 351.0, 20.0)
    _, points, trans = scan_web(case, "K", grid, DynamicsSettings(), continuation=False)
    onset = trans[trans.kind == "onset-of-cycles"]
    assert len(onset) == 1
    assert onset.from_value.iloc[0] == 290.0 and onset.to_value.iloc[0] == 310.0
    assert set(points.regime[points.value < K_HOPF]) == {"equilibrium"}
    assert set(points.regime[points.value > K_HOPF]) == {"cycle"}
    # amplitude output: every species has a column, and cycles oscillate much more than equilibria
    assert {"amplitude_prey", "amplitude_pred"} <= set(points.columns)
    assert points.amplitude_prey[points.value > K_HOPF].min() > 10 * points.amplitude_prey[points.value == 250.0].iloc[0]


@pytest.mark.slow
def test_limit_cycle_amplitude_grows_like_the_square_root_past_hopf(tmp_path):
    # Hopf normal form (Kuznetsov 2004, Elements of Applied Bifurcation Theory, 3rd ed., Sec. 3.4):
    # past a supercritical Hopf point the cycle's amplitude is ∝ √(K − K_H) to leading order, so
    # quadrupling K − K_H doubles it. Margin ±15 % for the O(K − K_H) correction at 1–4 % past
    # K_H, and the extrapolated zero of amplitude² is K_H within 1 %.
    eps = np.array([0.01, 0.02, 0.04])
    out = rm_diagnose(tmp_path, list(1 + eps), DynamicsSettings(transient=4000.0, window=400.0, sample_dt=0.25))
    amp = out["amplitude"][:, 0]
    assert amp[2] / amp[0] == pytest.approx(2.0, rel=0.15)
    slope, icpt = np.polyfit(K_HOPF * (1 + eps), amp ** 2, 1)
    assert -icpt / slope == pytest.approx(K_HOPF, rel=0.01)


@pytest.mark.slow
@pytest.mark.parametrize("horizon", [20.0, 500.0])
def test_hastings_powell_verdict_does_not_depend_on_the_case_horizon(tmp_path, horizon):
    # Hastings & Powell (1991): b1 = 3 is chaotic. Inside `impact assess` the screen's windows come
    # from the web's time scales, so the verdict is the same for a 20- and a 500-unit horizon.
    path = hp_case(tmp_path)
    path.write_text(path.read_text().replace("horizon = 10.0", f"horizon = {horizon}"))
    assert f"horizon = {horizon}" in path.read_text()
    out = tmp_path / "res"
    # one member is too thin for a verdict (exit 3), but every table, the dynamics ones included, is written
    assert main(["assess", str(path), "--out", str(out), "--members", "1", "--no-report", "--quiet"]) == 3
    reg = pd.read_csv(out / "dynamics" / "regimes.csv")
    assert set(reg.regime) == {"chaotic"}
    assert (reg.lyapunov - 3.5 * reg.lyapunov_se > 0).all()
    # the horizon shortfall compares the predictability horizon with the assessment horizon
    expected = np.maximum(horizon - reg.horizon_time, 0.0)
    np.testing.assert_allclose(reg.shortfall, expected)


def synthetic(lyap, amp, k=8, sections=None, T=100.0, leading=None):
    """Evidence of one member with given sub-window exponents and amplitudes of a 1-state system.

    ``leading``: Re μ₁ at the equilibrium found from the window (None: none found).
    """
    lyap = np.asarray(lyap, float).reshape(1, k)
    amp = np.asarray(amp, float).reshape(1, k, 1)
    secs = sections if sections is not None else [[np.array([]) for _ in range(k)]]
    return Evidence(lyap, 10.0 - amp / 2, 10.0 + amp / 2, np.full((1, 1), 10.0), np.zeros(1), secs,
                    np.zeros(1, int), (np.arange(k) + 0.5) * T, np.zeros(1, bool), np.zeros(1, bool), T,
                    None if leading is None else np.array([leading], float))


def test_verdict_damped_oscillation_is_equilibrium():
    # Linear stability: an envelope decaying as e^{−0.005 t} with λ = −0.005 is a stable focus
    # (common practice, no source). Sub-window exponents scatter ±10 %.
    t = (np.arange(8) + 0.5) * 100.0
    v = classify(synthetic(-0.005 * (1 + 0.1 * np.sin(np.arange(8))), np.exp(-0.005 * t)), Rules())
    assert v.regime[0] == "equilibrium" and v.envelope_rate[0] == pytest.approx(-0.005)


def test_verdict_slow_decay_with_unresolved_lambda_is_undetermined():
    # An envelope that shrinks by 30 % over the window while λ scatters around zero: neither a
    # settled cycle nor shown to be an equilibrium (common practice, no source).
    t = (np.arange(8) + 0.5) * 100.0
    v = classify(synthetic(0.002 * np.array([1, -1, 1, -1, 1, -1, 1, -1]), np.exp(-0.0005 * t)), Rules())
    assert v.regime[0] == "undetermined" and v.reason[0] == "slow-decay"


def test_verdict_periodic_section_with_steady_envelope_is_a_cycle():
    # Period-2 section (alternating maxima 10.5, 10.2), steady amplitude, λ ≈ 0: a period-2 cycle
    # (definition of a period-k orbit on a Poincaré section, common practice, no source).
    secs = [[np.array([10.5, 10.2] * 10) for _ in range(8)]]
    v = classify(synthetic(0.0005 * np.array([1, -1, 1, -1, 1, -1, 1, -1]), np.ones(8), sections=secs), Rules())
    assert (v.regime[0], v.period[0]) == ("cycle", 2)


def test_verdict_changing_on_doubling_is_undetermined():
    # First half: a steady envelope with λ scattered around zero and no section points
    # (undetermined); whole window: at rest by the last sub-window near a stable equilibrium
    # (equilibrium). The verdict changed when the window doubled, so it is not reported as
    # settled (the doubling check of the method).
    amp = np.array([1.0, 1.0, 1.0, 1.0, 0.1, 0.01, 0.001, 1e-4])
    lam = 0.003 * np.array([1, -1, 1, -1, 1, -1, 1, -1])
    assert classify(synthetic(lam, amp, leading=-0.01).head(8), Rules()).regime[0] == "undetermined"
    v = classify(synthetic(lam, amp, leading=-0.01), Rules())
    assert v.regime[0] == "undetermined" and v.reason[0] == "window-doubling"


def test_verdict_at_rest_near_an_unstable_equilibrium_is_not_equilibrium():
    # Linear stability (e.g. Strogatz 2015, Nonlinear Dynamics and Chaos, Sec. 6.3): a state at
    # rest next to an equilibrium whose Jacobian has Re μ₁ > 0 will leave it; the same evidence
    # next to a stable one (Re μ₁ < 0) is an equilibrium. A decaying envelope on a window too
    # short to show the departure is not enough either.
    t = (np.arange(8) + 0.5) * 100.0
    lam = 0.001 * np.array([1, -1, 1, -1, 1, -1, 1, -1])
    rest = np.full(8, 1e-6)
    assert classify(synthetic(lam, rest, leading=-0.01), Rules()).regime[0] == "equilibrium"
    v = classify(synthetic(lam, rest, leading=0.002), Rules())
    assert v.regime[0] == "undetermined" and v.reason[0] == "at-rest-near-unstable-equilibrium"
    decaying = np.exp(-0.005 * t)
    assert classify(synthetic(lam - 0.005, decaying, leading=-0.005), Rules()).regime[0] == "equilibrium"
    assert classify(synthetic(lam - 0.005, decaying, leading=0.001), Rules()).regime[0] != "equilibrium"


@pytest.mark.parametrize("rho,least", [(0.0, 0.98), (0.5, 0.93)])
def test_lyapunov_interval_covers_under_correlated_sub_windows(rho, least):
    # Variance of a mean of AR(1) data: s²/k × (1 + ρ)/(1 − ρ) (e.g. Wilks 2011, Statistical Methods
    # in the Atmospheric Sciences, Sec. 5.2.4; from memory). Sub-window exponents drawn as a
    # stationary AR(1) series around a true λ = 0 (k = 8): the nominal 99 % interval covers it in
    # about 99 % (ρ = 0) and 94.5 % (ρ = 0.5) of 4000 series (the uncorrected spread gives 90 % at
    # ρ = 0.5 and fails). Margin ≥ 4 binomial standard errors (sd ≤ 0.0036): false-failure rate
    # below 1e-4 per case (the seed is fixed only to make a failure reproducible).
    from impact.dynamics.regimes import lyapunov_estimate, t_quantile
    rng = np.random.default_rng(2024)
    N, k, burn = 4000, 8, 50
    e = rng.standard_normal((N, k + burn))
    x = np.zeros_like(e)
    for j in range(1, k + burn):
        x[:, j] = rho * x[:, j - 1] + np.sqrt(1 - rho ** 2) * e[:, j]
    lam, se, dof = lyapunov_estimate(0.01 * x[:, burn:])
    covered = np.abs(lam) <= t_quantile(0.99, dof) * se
    assert covered.mean() >= least


def test_wilson_interval_matches_newcombe_worked_example():
    # Newcombe (1998), Statistics in Medicine 17:857–872, Table I (from memory): 81/263 gives the
    # Wilson score 95 % interval 0.2553–0.3662, and 0/10 gives 0–0.2775.
    lo, hi = share_interval(np.array([81, 0]), np.array([263, 10]), 0.95)
    assert lo[0] == pytest.approx(0.2553, abs=1e-4) and hi[0] == pytest.approx(0.3662, abs=1e-4)
    assert lo[1] == 0.0 and hi[1] == pytest.approx(0.2775, abs=1e-4)


def test_predictability_shortfall_only_when_shorter_than_the_assessment():
    # Lorenz (1969) horizon against the assessment horizon (40): a warning only where shorter.
    s = predictability_shortfall(np.array([10.0, 40.0, 1000.0, np.inf, np.nan]), 40.0)
    np.testing.assert_array_equal(s[:4], [30.0, 0.0, 0.0, 0.0])
    assert np.isnan(s[4])


def _with_dynamics_table(tmp_path, table):
    path = rm_case(tmp_path, 1.5)
    path.write_text(path.read_text() + "\n[dynamics]\n" + "\n".join(f"{k} = {v}" for k, v in table.items()) + "\n")
    return path


def test_case_file_dynamics_table_is_read_and_recorded(tmp_path):
    path = _with_dynamics_table(tmp_path, {"window": 800.0, "max_period": 4, "section": '"prey"'})
    case = load_case(path)
    assert case.dynamics.window == 800.0 and case.dynamics.section == "prey"
    out = tmp_path / "scan"
    assert main(["scan", str(path), "--parameter", "K", "--from", "440", "--to", "460", "--steps", "2",
                 "--parallel", "--transient", "100", "--out", str(out), "--quiet"]) == 0
    rec = json.loads((out / "dynamics" / "dynamics.json").read_text())
    assert rec["window"] == 800.0 and rec["max_period"] == 4 and rec["section"] == "maxima of prey"
    assert rec["declared"] == {"case file": {"window": 800.0, "max_period": 4}, "command line": {"transient": 100.0}}


@pytest.mark.parametrize("table,field", [({"window": -1.0}, "dynamics.window"), ({"section": '"wolf"'}, "dynamics.section"),
                                         ({"windw": 3.0}, "dynamics.windw")])
def test_case_file_dynamics_table_bad_input(tmp_path, table, field, capsys):
    # CLI contract (DEVELOPERS.md): one message naming file and field, exit 2, nothing written.
    path = _with_dynamics_table(tmp_path, table)
    with pytest.raises(CaseError):
        load_case(path)
    rc = main(["scan", str(path), "--parameter", "K", "--from", "1", "--to", "2", "--steps", "2",
               "--out", str(tmp_path / "o"), "--quiet"])
    assert rc == 2 and field in capsys.readouterr().err
    assert not (tmp_path / "o").exists()


# --------------------------------------------------------------------------------------------
# Beddington–DeAngelis predator–prey: the Hopf point from the trace of the Jacobian

BD = dict(r=1.0, K=1.0, a=5.0, h=1.0, e=0.5, m=0.25)


def bd_equilibrium(g: float) -> tuple[float, float]:
    """Interior equilibrium (N*, P*) of the Beddington–DeAngelis predator–prey model at interference g.

    dN/dt = r N (1 − N/K) − a N P / D, dP/dt = e a N P / D − m P, D = 1 + a h N + g P
    (Beddington 1975; DeAngelis et al. 1975). Derivation: dP/dt = 0 gives e a N = m D; with it,
    dN/dt = 0 gives P = e r N (1 − N/K)/m; putting both into D = 1 + a h N + g P gives
    (g e r/K) N² + (e a − m a h − g e r) N − m = 0, whose positive root is N*.
    """
    r, K, a, h, e, m = (BD[k] for k in ("r", "K", "a", "h", "e", "m"))
    A2, B = g * e * r / K, e * a - m * a * h - g * e * r
    N = (-B + np.sqrt(B * B + 4 * A2 * m)) / (2 * A2)
    return N, e * r * N * (1 - N / K) / m


def bd_trace(g: float) -> float:
    """Trace of the Jacobian at (N*, P*): r(1 − 2N/K) − a P (1 + g P)/D² − e a g N P/D².

    ∂Ṅ/∂N = r(1 − 2N/K) − aP/D + a²hNP/D² = r(1 − 2N/K) − aP(1 + gP)/D²; ∂Ṗ/∂P = eaN/D − m −
    eagNP/D², and eaN/D = m at the equilibrium. The determinant is positive there, so the
    equilibrium loses stability (a Hopf point) where the trace crosses zero.
    """
    N, P = bd_equilibrium(g)
    a, h, e, r, K = BD["a"], BD["h"], BD["e"], BD["r"], BD["K"]
    D = 1 + a * h * N + g * P
    return r * (1 - 2 * N / K) - a * P * (1 + g * P) / D ** 2 - e * a * g * N * P / D ** 2


def bd_hopf() -> float:
    from scipy.optimize import brentq
    return brentq(bd_trace, 1e-3, 50.0)


def bd_case(tmp_path):
    fixed = lambda v: {"distribution": "fixed", "value": v}
    data = {"case": {"title": "BD", "time_unit": "year", "horizon": 10.0, "spinup": 0.0, "members": 1},
            "parameters": {"g": fixed(1.0), "r": fixed(BD["r"]), "m": fixed(BD["m"]), "a": fixed(BD["a"]),
                           "h": fixed(BD["h"])},
            "species": [{"name": "prey", "growth": "logistic", "growth_rate": "r", "carrying_capacity": BD["K"],
                         "initial": 0.5, "quasi_extinction": 1e-4},
                        {"name": "pred", "growth": "none", "mortality": "m", "initial": 0.1, "quasi_extinction": 1e-5}],
            "interactions": [{"type": "predation", "predator": "pred", "prey": "prey", "response": "beddington-deangelis",
                              "attack_rate": "a", "handling_time": "h", "efficiency": BD["e"], "interference": "g"}],
            "interventions": [{"name": "trap", "kind": "press-harvest", "species": "prey", "rate": 0.2}],
            "options": [{"name": "trapping", "interventions": ["trap"]}]}
    return write_case(tmp_path, data)


def bd_diagnose(tmp_path, g, speed):
    """The regime screen's diagnosis (its settings) of BD members at interference g, time sped up by ``speed``.

    Multiplying r, a and m by c and dividing h by c runs the same orbits c times faster (time
    rescaling t → t/c), so the members of a batch differ only in their time scales.
    """
    from impact.dynamics.lyapunov import declared_settings
    from impact.dynamics.regime_screen import SCREEN

    case = load_case(bd_case(tmp_path))
    g, c = np.asarray(g, float), np.asarray(speed, float)
    n = g.size
    p = web_params(case, {"g": g, "r": BD["r"] * c, "m": BD["m"] * c, "a": BD["a"] * c, "h": BD["h"] / c}, n)
    s, _ = declared_settings(case, SCREEN)
    return diagnose_web(build_web(case), p, Controls.neutral(n, 2), p.initial, s, np.array([1e-4, 1e-5]))


BD_BAND = 0.1  # relative band around the Hopf point where any verdict is accepted (slow spiral or small cycle)


@pytest.mark.slow
def test_beddington_deangelis_verdicts_change_at_the_hopf_point(tmp_path):
    # Hopf point g_H where the trace of the Jacobian at (N*, P*) vanishes (derivation in bd_trace;
    # g_H ≈ 1.2355 for these values). Below it (less interference) the equilibrium is unstable and
    # the members are stable limit cycles (period 1); above it they are equilibria. Within ±10 %
    # of g_H the slow approach may leave a member undetermined, but an unstable equilibrium is
    # never called "equilibrium".
    gH = bd_hopf()
    assert gH == pytest.approx(1.2355, abs=1e-3)
    factors = np.array([0.3, 0.6, 0.8, 0.95, 1.05, 1.2, 1.5, 2.5])
    out = bd_diagnose(tmp_path, factors * gH, np.ones(factors.size))
    for f, reg, per, why in zip(factors, out["regime"], out["period"], out["reason"]):
        if f < 1 - BD_BAND:
            assert (reg, per) == ("cycle", 1), (f, reg, why)
        elif f > 1 + BD_BAND:
            assert reg == "equilibrium", (f, reg, why)
        elif f < 1:
            assert reg != "equilibrium", (f, reg, why)
    assert (bd_trace(0.8 * gH) > 0) and (bd_trace(1.2 * gH) < 0)


@pytest.mark.slow
@pytest.mark.parametrize("factor", [0.95, 1.05])
def test_a_members_verdict_is_the_same_alone_and_in_any_batch(tmp_path, factor):
    # A member's numbers never depend on the members beside it: the same BD member just below
    # (a slow cycle) or just above (a slow spiral) the Hopf point, alone, in a batch with members
    # four times faster and in one with members four times slower (time rescaling), gets the same
    # verdict, λ, standard error and window, to the bit.
    gH = bd_hopf()
    g = factor * gH
    alone = bd_diagnose(tmp_path, [g], [1.0])
    fast = bd_diagnose(tmp_path, [1.5 * gH, g, 0.5 * gH, g], [4.0, 1.0, 4.0, 4.0])
    slow = bd_diagnose(tmp_path, [0.5 * gH, 2.0 * gH, g], [0.25, 0.25, 1.0])
    for batch, row in ((fast, 1), (slow, 2)):
        for key in ("regime", "period", "reason", "lyapunov", "lyapunov_se", "window", "transient"):
            assert batch[key][row] == alone[key][0], (key, batch[key][row], alone[key][0])
    if factor < 1:
        assert alone["regime"][0] != "equilibrium"
    # the rescaled copy in the fast batch (same g, 4× faster) has the same regime
    assert fast["regime"][3] == alone["regime"][0]


@pytest.mark.slow
def test_continuation_scan_past_the_rosenzweig_hopf_point_finds_period_one_cycles(tmp_path):
    # Rosenzweig (1971): onset of cycles at K_H = 2N* + 1/(a h) = 300 for tests/test_dynamics.rm_case;
    # past it the interior equilibrium is an unstable focus surrounded by one stable limit cycle
    # (period 1 on the prey-maxima section). A continuation scan (each value starting where the
    # previous one ended, the default of `impact scan`) grows a value's window until the section
    # holds enough points, so no value beyond the onset is left undetermined (far past it, at 2 and
    # 3 K_H, the cycle's period is long against the web's rates; a window fixed by the first pass
    # saw too few maxima there). Below 0.9 K_H every value is an equilibrium; the values at
    # 1.05–3 K_H are all checked (no band past the onset).
    case = load_case(rm_case(tmp_path, 1.0))
    grid = K_HOPF * np.array([0.8, 0.9, 1.05, 1.2, 1.6, 2.0, 3.0])
    _, points, _ = scan_web(case, "K", grid, DynamicsSettings(), continuation=True)
    beyond = points[points.value > K_HOPF]
    assert list(beyond.regime) == ["cycle"] * len(beyond), beyond[["value", "regime", "reason", "n_section"]]
    assert (beyond.period == 1).all()
    assert set(points.regime[points.value < 0.95 * K_HOPF]) == {"equilibrium"}


def mutualist_case(tmp_path):
    """A plant and its only pollinator, each an obligate mutualist of the other, beside an unrelated grass."""
    data = {"case": {"title": "Obligate pair", "time_unit": "year", "horizon": 40.0, "spinup": 0.0, "members": 1},
            "parameters": {"grass_rate": {"distribution": "fixed", "value": 0.5}},
            "species": [{"name": "plant", "growth": "logistic", "growth_rate": 1.0, "carrying_capacity": 100.0,
                         "mortality": 0.3, "initial": 50.0, "quasi_extinction": 1.0},
                        {"name": "moth", "growth": "logistic", "growth_rate": 2.0, "carrying_capacity": 50.0,
                         "mortality": 0.2, "initial": 20.0, "quasi_extinction": 0.5},
                        {"name": "grass", "growth": "logistic", "growth_rate": "grass_rate", "carrying_capacity": 30.0,
                         "initial": 10.0, "quasi_extinction": 0.5}],
            "interactions": [{"kind": "mutualism", "dependence": "obligate", "beneficiary": "plant", "partner": "moth",
                              "half_saturation": 5.0},
                             {"kind": "mutualism", "dependence": "obligate", "beneficiary": "moth", "partner": "plant",
                              "half_saturation": 5.0}],
            "interventions": [{"name": "moth spray", "kind": "press-harvest", "species": "moth", "rate": 5.0}],
            "options": [{"name": "spray", "interventions": ["moth spray"]}]}
    return write_case(tmp_path, data)


def test_an_obligate_mutualist_losing_its_only_partner_is_extinct_with_it(tmp_path):
    # Obligate mutualism (births ∝ P/(H + P), none without the partner; Holland & DeAngelis 2010,
    # Ecology Letters 13:1467): harvesting the moth at 5/year, above its largest birth rate (2/year),
    # drives it out, and the plant, left without its only pollinator, then declines at its
    # mortality or faster (0.3/year: from 50 to below its level 1 within ln 50/0.3 ≈ 13 years of a
    # 40-year horizon). The regime table marks both as extinct and reports the regime of what
    # remains (the grass alone: a logistic equilibrium), not "equilibrium" of the whole web.
    out = tmp_path / "res"
    assert main(["assess", str(mutualist_case(tmp_path)), "--out", str(out), "--members", "3", "--quiet",
                 "--no-report", "--no-sensitivity"]) in (0, 3)
    reg = pd.read_csv(out / "dynamics" / "regimes.csv", keep_default_na=False)
    spray, base = reg[reg.option == "spray"], reg[reg.option == "baseline"]
    assert spray.extinct.all() and set(spray.extinct_species) == {"plant;moth"}
    assert set(spray.regime) == {"equilibrium"}
    assert set(spray.verdict) == {"equilibrium of the remaining web; plant and moth extinct"}
    assert not base.extinct.any() and set(base.verdict) == {"equilibrium"}
    shares = pd.read_csv(out / "dynamics" / "regime_shares.csv", keep_default_na=False)
    row = shares[shares.option == "spray"]
    assert list(row.verdict) == ["equilibrium of the remaining web; plant and moth extinct"] and row.share.iloc[0] == 1.0


@pytest.mark.slow
def test_regime_table_does_not_depend_on_chunks_or_workers(tmp_path):
    # The same rule end to end: an ensemble of BD members with interference on both sides of the
    # Hopf point (uniform prior over 0.5–2 g_H) gives the same regimes.csv, to the byte, whether
    # the option runs go in chunks of 1 or of 8 members, on one worker or two.
    path = bd_case(tmp_path)
    gH = bd_hopf()
    text = path.read_text()
    path.write_text(text.replace('[parameters.g]\ndistribution = "fixed"\nvalue = 1.0',
                                 f'[parameters.g]\ndistribution = "uniform"\nlow = {0.5 * gH}\nhigh = {2 * gH}'))
    assert "uniform" in path.read_text()
    tables = []
    for k, extra in enumerate((["--chunk-members", "1", "--workers", "1"], ["--chunk-members", "8", "--workers", "2"])):
        out = tmp_path / f"res{k}"
        assert main(["assess", str(path), "--out", str(out), "--members", "8", "--quiet", "--no-report",
                     "--no-sensitivity", *extra]) in (0, 3)
        tables.append((out / "dynamics" / "regimes.csv").read_bytes())
    assert tables[0] == tables[1]
    reg = pd.read_csv(tmp_path / "res0" / "dynamics" / "regimes.csv")
    assert len(reg) == 16 and set(reg.regime) <= {"cycle", "equilibrium", "undetermined"}
