"""Regime diagnostics against published results (source beside each check)."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from casefiles import write_case
from impact.case import load_case
from impact.cli import main
from impact.dynamics.diagnose import diagnose_web, evidence, run_subwindows
from impact.dynamics.lyapunov import (DynamicsSettings, _hermite_max, logistic_map_scan, lyapunov_flow,
    predictability_time, refine_transitions)
from impact.dynamics.scan import nominal_values, scan_web, transitions
from impact.dynamics.regimes import Rules, classify, detect_period
from impact.dynamics.timescales import WindowPlan
from impact.engine.jacobian import WebTangent
from impact.model import Controls, build_web, web_params


def lorenz(t, y, m):
    x, v, z = y[:, 0], y[:, 1], y[:, 2]
    return np.stack([10.0 * (v - x), x * (28.0 - z) - v, x * v - 8.0 / 3.0 * z], axis=1)


def lorenz_jac(t, y, m):
    J = np.zeros((len(y), 3, 3))
    x, v, z = y[:, 0], y[:, 1], y[:, 2]
    J[:, 0, 0], J[:, 0, 1] = -10.0, 10.0
    J[:, 1, 0], J[:, 1, 1], J[:, 1, 2] = 28.0 - z, -1.0, -x
    J[:, 2, 0], J[:, 2, 1], J[:, 2, 2] = v, x, -8.0 / 3.0
    return J


def lorenz_jvp(t, y, v, m):
    J = lorenz_jac(t, y, m)
    return lorenz(t, y, m), np.einsum("mij,mj->mi", J, v)


LORENZ_Y0 = np.array([[1.0, 1.0, 1.0], [2.0, 1.0, 3.0], [-1.0, 2.0, 20.0], [5.0, 5.0, 25.0]])


def test_lorenz_largest_lyapunov_exponent():
    # Sprott (2003), Chaos and Time-Series Analysis, table of Lyapunov exponents: λ1 ≈ 0.9056 for
    # σ=10, ρ=28, β=8/3. Tolerance 0.04: finite-time estimates over 200 time units scatter by ~0.02.
    d = lyapunov_flow(lorenz, lorenz_jac, LORENZ_Y0, transient=20.0, window=200.0, sample_dt=0.1, section=2,
                      nonnegative=False)
    assert np.mean(d.lyapunov) == pytest.approx(0.9056, abs=0.04)
    assert np.all(d.lyapunov > 0.8)


def test_lorenz_is_chaotic_by_evidence():
    # Lorenz (1963) at σ=10, ρ=28, β=8/3: λ1 ≈ 0.9056 > 0 (Sprott 2003) and the z-maxima never repeat
    # (Lorenz's own return map of successive z maxima is a tent-like map). Eight sub-windows of 25.
    plan = WindowPlan(transient=20.0, sub_window=25.0, n_sub=8, align=2.0, sample_dt=0.1)
    run = run_subwindows(lorenz_jvp, LORENZ_Y0, plan, first_transient=20.0, section=np.full(4, 2),
                         members=np.arange(4), rtol=1e-7, atol=1e-9, nonnegative=False)
    ev, _ = evidence(run, LORENZ_Y0, np.array([]), np.zeros(3), np.full(4, 2), plan.sub_window)
    v = classify(ev, Rules())
    assert list(v.regime) == ["chaotic"] * 4
    # the interval from the sub-window spread covers the published value (99 % two-sided t interval)
    assert np.all(np.abs(v.lyapunov - 0.9056) <= 3.5 * v.lyapunov_se + 0.05)


@pytest.mark.parametrize("dt", [2.0, 0.5])
def test_hermite_maximum_is_exact_on_a_cubic(dt):
    # Cubic Hermite interpolation reproduces any cubic exactly (e.g. Burden & Faires, Numerical
    # Analysis, Sec. 3.4), so the located maximum is that of the cubic itself:
    # y(s) = 3s − s³ on s = t/dt ∈ [0, 1.5] peaks at s = 1 with y = 2.
    T = 1.5 * dt
    y = lambda t: 3 * (t / dt) - (t / dt) ** 3
    dy = lambda t: (3 - 3 * (t / dt) ** 2) / dt
    peak = _hermite_max(np.array([y(0.0)]), np.array([y(T)]), np.array([dy(0.0)]), np.array([dy(T)]), np.array([T]))
    assert peak[0] == pytest.approx(2.0, rel=1e-12)


def test_lyapunov_does_not_depend_on_batch_composition(tmp_path):
    # DEVELOPERS.md contract (common practice, no source): a member's numbers are the same alone or
    # in a batch, to the last bit.
    case = load_case(hp_case(tmp_path))
    web = build_web(case)
    vals = {k: np.full(3, v) for k, v in nominal_values(case).items()}
    vals["h1"] = np.array([2.2, 3.0, 2.6]) / 5.0
    p = web_params(case, vals, 3)
    c = Controls.neutral(3, 3)
    kw = dict(transient=50.0, window=150.0, sample_dt=2.0, section=2, jvp=WebTangent(web, p, c))
    all3 = lyapunov_flow(None, None, p.initial, **kw)
    one = lyapunov_flow(None, None, p.initial[1:2], members=np.array([1]), **kw)
    assert one.lyapunov[0] == all3.lyapunov[1]
    np.testing.assert_array_equal(one.sections[0], all3.sections[1])
    np.testing.assert_array_equal(one.mean[0], all3.mean[1])


MAP = DynamicsSettings(period_tol=1e-6, max_period=64)


def test_logistic_map_lyapunov_at_r4_is_ln2():
    # Exact: the r=4 logistic map is conjugate to the tent map, λ = ln 2 (e.g. Ott 2002, Sec. 2.3).
    _, _, lam, _ = logistic_map_scan(np.full(4, 4.0), MAP, transient=100, n=100_000)
    assert lam.mean() == pytest.approx(np.log(2.0), abs=0.01)


@pytest.fixture(scope="module")
def logistic_doublings():
    r = np.linspace(2.9, 3.5699, 2000)
    regime, period, _, _ = logistic_map_scan(r, MAP)
    tr = transitions("r", r, regime, period)
    d = tr[tr.kind == "period-doubling"].head(5)
    return refine_transitions(lambda x: logistic_map_scan(x, MAP)[1], d.from_value.to_numpy(), d.to_value.to_numpy())


@pytest.mark.parametrize("k,exact", [(0, 3.0), (1, 1.0 + np.sqrt(6.0))])
def test_logistic_map_period_doubling_points(logistic_doublings, k, exact):
    # Exact: r1 = 3 and r2 = 1 + √6 (e.g. Strogatz 1994, Nonlinear Dynamics and Chaos, Sec. 10.2).
    # Tolerance 1e-3: convergence is slow next to a doubling, so a finite transient detects it early.
    assert logistic_doublings[k] == pytest.approx(exact, abs=1e-3)


def test_logistic_map_feigenbaum_ratio(logistic_doublings):
    # Feigenbaum (1978): (r_k − r_{k−1})/(r_{k+1} − r_k) → δ = 4.6692; from r3, r4, r5 the ratio is
    # already 4.66 (Strogatz 1994, Sec. 10.6, from memory). Tolerance 0.05.
    r = logistic_doublings
    assert len(r) == 5
    ratios = np.diff(r)[:-1] / np.diff(r)[1:]
    assert ratios[-1] == pytest.approx(4.6692, abs=0.05)


@pytest.mark.parametrize("seq,expected", [([1.0, 1.0 + 1e-9] * 4, 1), ([1.0, 2.0] * 6, 2), ([1, 2, 3, 4] * 4, 4),
                                           (list(np.linspace(1, 2, 20)), 0), ([1.0], 0)])
def test_detect_period(seq, expected):
    # Definition of a period-k orbit on a Poincaré section (common practice, no source); values
    # are compared against the oscillation's amplitude (here 1).
    assert detect_period(np.array(seq, float), 1.0, 1e-6, 8) == expected


def test_detect_period_damped_maxima_do_not_repeat():
    # Maxima of a damped oscillation, 10 + e^{−0.01 k}: they converge (successive ones differ by
    # 1e-4 of their size) but by 1 % of the oscillation's amplitude, so they are not a cycle.
    s = 10.0 + np.exp(-0.01 * np.arange(40))
    assert detect_period(s, 1.0, 1e-3, 8) == 0


@pytest.mark.parametrize("lam,expected", [(0.1, np.log(10.0) / 0.1), (0.0, np.inf), (-0.2, np.inf)])
def test_predictability_horizon(lam, expected):
    # Lorenz (1969): errors grow as δ0 e^{λt}, so δ0 reaches Δ at t = ln(Δ/δ0)/λ.
    assert predictability_time(np.array([lam]), 0.05, 0.5)[0] == pytest.approx(expected)


# Hastings & Powell (1991, Ecology 72:896–903), nondimensional food chain with f_i(u) = a_i u/(1 + b_i u):
# a1=5, b1=3, a2=0.1, b2=2, d1=0.4, d2=0.01; in the case, attack=a_i, handling=b_i/a_i, efficiency=1.
def hp_case(tmp_path):
    a1, a2, b2, d1, d2 = 5.0, 0.1, 2.0, 0.4, 0.01
    data = {"case": {"title": "Hastings-Powell", "time_unit": "t", "horizon": 10.0, "spinup": 0.0, "members": 1},
            "parameters": {"h1": {"distribution": "fixed", "value": 3.0 / a1}},
            "species": [{"name": "x", "growth": "logistic", "growth_rate": 1.0, "carrying_capacity": 1.0, "initial": 0.76, "quasi_extinction": 1e-6},
                        {"name": "y", "growth": "none", "mortality": d1, "initial": 0.16, "quasi_extinction": 1e-6},
                        {"name": "z", "growth": "none", "mortality": d2, "initial": 9.9, "quasi_extinction": 1e-6}],
            "interactions": [{"type": "predation", "predator": "y", "prey": "x", "response": "holling2", "attack_rate": a1, "handling_time": "h1", "efficiency": 1.0},
                             {"type": "predation", "predator": "z", "prey": "y", "response": "holling2", "attack_rate": a2, "handling_time": b2 / a2, "efficiency": 1.0}],
            "interventions": [{"name": "top harvest", "kind": "press-harvest", "species": "z", "rate": 0.0}],
            "options": [{"name": "harvest", "interventions": ["top harvest"]}]}
    return write_case(tmp_path, data)


HP = DynamicsSettings(transient=3000.0, window=16000.0, sample_dt=2.0, max_period=16)

# Hastings & Powell (1991), Fig. 3 (bifurcation diagram of the z maxima against b1; figure as recalled
# from memory): a simple limit cycle at low b1, period doubling as b1 grows, chaos at b1 = 3, and
# periodic windows inside the chaotic range. Which b1 fall where was measured on this model with a
# parallel scan from the initial state above (transient 10000, window 8000, grid step 0.005 on
# 2.27–2.41, 0.02 on 2.1–2.8): period 1 up to b1 ≈ 2.29, period 2 on 2.295–2.375, period 4 on
# 2.38–2.39, period 8 at 2.395, chaos from 2.41; a period-6 window at b1 = 3.1 was found from every
# one of three random starts. Grid points are taken well inside each band except period 4, whose
# band is only ~0.015 wide. Not checked: a return to order near b1 ≈ 6 (remembered from the figure
# but not reproduced: every point of a 0.025 grid on 4.6–6.4, and 0.05 grid from four random
# starts on 4.9–6.3, was chaotic but one marginal period-14 point).
HP_ROUTE = [(2.2, "cycle", 1), (2.33, "cycle", 2), (2.385, "cycle", 4), (3.0, "chaotic", 0), (3.1, "cycle", 6)]


@pytest.fixture(scope="module")
def hp_scan(tmp_path_factory):
    case = load_case(hp_case(tmp_path_factory.mktemp("hp")))
    b1 = np.array([b for b, _, _ in HP_ROUTE])
    scan, points, trans = scan_web(case, "h1", b1 / 5.0, HP, continuation=False)
    points["b1"] = b1
    return points, trans


@pytest.mark.slow
def test_hastings_powell_chaotic_at_published_parameters(hp_scan):
    # HP 1991: b1 = 3 gives the chaotic "teacup" attractor; here λ > 0 and no period on the z-maxima section.
    points, _ = hp_scan
    row = points[points.b1 == 3.0].iloc[0]
    assert row.regime == "chaotic"
    assert row.lyapunov - 3.5 * row.lyapunov_se > 0


@pytest.mark.slow
@pytest.mark.parametrize("b1,regime,period", HP_ROUTE)
def test_hastings_powell_route_to_chaos(hp_scan, b1, regime, period):
    # Regime and period at each b1 (see HP_ROUTE above); a cycle has a zero exponent along the
    # flow (its interval, widened by the flow allowance, covers 0), chaos a positive one.
    points, _ = hp_scan
    row = points[points.b1 == b1].iloc[0]
    assert (row.regime, row.period) == (regime, period)
    allowance = Rules().flow_allowance / (HP.window / HP.n_sub)
    if regime == "cycle":
        assert abs(row.lyapunov) <= 3.5 * row.lyapunov_se + allowance
    else:
        assert row.lyapunov - 3.5 * row.lyapunov_se > allowance


@pytest.mark.slow
def test_hastings_powell_transitions_in_order(hp_scan):
    # 1 → 2 → 4 by period doubling, then chaos, then a periodic window (period 6).
    _, trans = hp_scan
    assert list(trans.kind) == ["period-doubling", "period-doubling", "onset-of-chaos", "periodic-window"]


def rm_case(tmp_path, factor):
    # Rosenzweig (1971): N* = m/(a(e − m h)); stable equilibrium for K < 2N* + 1/(a h), limit cycle above.
    r, a, h, e, m = 3.0, 1.0, 0.01, 0.01, 0.5
    n_star = m / (a * (e - m * h))
    K = factor * (2 * n_star + 1 / (a * h))
    data = {"case": {"title": "RM", "time_unit": "year", "horizon": 10.0, "spinup": 0.0, "members": 1},
            "parameters": {"K": {"distribution": "fixed", "value": K}},
            "species": [{"name": "prey", "growth": "logistic", "growth_rate": r, "carrying_capacity": "K", "initial": 0.8 * n_star, "quasi_extinction": 1e-3},
                        {"name": "pred", "growth": "none", "mortality": m, "initial": 1.0, "quasi_extinction": 1e-4}],
            "interactions": [{"type": "predation", "predator": "pred", "prey": "prey", "response": "holling2",
                              "attack_rate": a, "handling_time": h, "efficiency": e}],
            "interventions": [{"name": "trap", "kind": "press-harvest", "species": "prey", "rate": 0.2}],
            "options": [{"name": "trapping", "interventions": ["trap"]}]}
    return write_case(tmp_path, data)


@pytest.mark.parametrize("factor,regime,period", [(0.7, "equilibrium", 0), (1.5, "cycle", 1)])
def test_rosenzweig_macarthur_regimes(tmp_path, factor, regime, period):
    case = load_case(rm_case(tmp_path, factor))
    web = build_web(case)
    p = web_params(case, {k: np.array([v]) for k, v in nominal_values(case).items()}, 1)
    out = diagnose_web(web, p, Controls.neutral(1, 2), p.initial, DynamicsSettings(), np.array([1e-3, 1e-4]))
    assert (out["regime"][0], out["period"][0]) == (regime, period)
    lam, se = out["lyapunov"][0], out["lyapunov_se"][0]
    if regime == "equilibrium":
        assert lam + 3.5 * se < 0
    else:
        assert abs(lam) <= 3.5 * se + Rules().flow_allowance / (out["window"][0] / 8)


def test_scan_cli_writes_tables_and_finds_the_hopf_point(tmp_path):
    # Rosenzweig (1971): onset of cycles at K = 2N* + 1/(a h) = 2·100 + 100 = 300 for these values.
    path = rm_case(tmp_path, 1.0)
    out = tmp_path / "scan"
    rc = main(["scan", str(path), "--parameter", "K", "--from", "210", "--to", "390", "--steps", "4",
               "--transient", "200", "--window", "150", "--sample-dt", "0.25", "--out", str(out), "--quiet"])
    assert rc == 0
    scan = pd.read_csv(out / "dynamics" / "scan.csv")
    assert list(scan.columns) == ["parameter", "value", "section_value", "regime", "period", "lyapunov"]
    tr = pd.read_csv(out / "dynamics" / "transitions.csv")
    hopf = tr[tr.kind == "onset-of-cycles"]
    assert len(hopf) == 1 and hopf.from_value.iloc[0] < 300 < hopf.to_value.iloc[0]
    assert "thresholds" in json.loads((out / "dynamics" / "dynamics.json").read_text())


@pytest.mark.parametrize("args", [["--parameter", "nope"], ["--parameter", "trap.rate"],
                                  ["--parameter", "K", "--option", "nope"]])
def test_scan_cli_bad_input_exits_2(tmp_path, args):
    path = rm_case(tmp_path, 1.0)
    rc = main(["scan", str(path), *args, "--from", "1", "--to", "2", "--steps", "2", "--out", str(tmp_path / "o"), "--quiet"])
    assert rc == 2
    assert not (tmp_path / "o").exists()


def test_assess_writes_dynamics_for_every_option(tmp_path):
    path = rm_case(tmp_path, 1.5)
    out = tmp_path / "res"
    rc = main(["assess", str(path), "--out", str(out), "--members", "3", "--quiet"])
    assert rc == 3  # three members are too thin for a verdict; every table is still written

    reg = pd.read_csv(out / "dynamics" / "regimes.csv")
    assert list(reg.columns)[:9] == ["option", "member", "regime", "period", "lyapunov", "lyapunov_se", "horizon_time",
                                     "extinct", "extinct_species"]
    assert {"amplitude_prey", "amplitude_pred", "reason", "shortfall"} <= set(reg.columns)
    assert set(reg.option) == {"baseline", "trapping"}
    shares = pd.read_csv(out / "dynamics" / "regime_shares.csv")
    assert shares.groupby("option").share.sum().to_numpy() == pytest.approx([1.0, 1.0])
    assert (shares.share_low <= shares.share).all() and (shares.share <= shares.share_high).all()
    # 1.5× the Hopf threshold without harvest: cycles (Rosenzweig 1971)
    assert set(reg[reg.option == "baseline"].regime) == {"cycle"}
    assert "dynamics" in json.loads((out / "manifest.json").read_text())["stages"]


def test_scan_cli_unknown_section_species_exits_2(tmp_path, capsys):
    # CLI contract (DEVELOPERS.md): bad input names the field and what is allowed, exit 2, no output.
    path = rm_case(tmp_path, 1.0)
    rc = main(["scan", str(path), "--parameter", "K", "--from", "1", "--to", "2", "--steps", "2",
               "--section", "wolf", "--out", str(tmp_path / "o"), "--quiet"])
    assert rc == 2
    err = capsys.readouterr().err
    assert "--section" in err and "allowed: prey, pred" in err
    assert not (tmp_path / "o").exists()


@pytest.fixture(scope="module")
def rm_sections(tmp_path_factory):
    # 1.5× the Hopf threshold of Rosenzweig (1971): a limit cycle, so both species have maxima.
    tmp = tmp_path_factory.mktemp("rmsec")
    path = rm_case(tmp, 1.5)
    out = {}
    for name, extra in (("default", []), ("prey", ["--section", "prey"])):
        d = tmp / name
        rc = main(["scan", str(path), "--parameter", "K", "--from", "440", "--to", "460", "--steps", "2", *extra,
                   "--transient", "60", "--window", "400", "--sample-dt", "0.25", "--parallel", "--out", str(d), "--quiet"])
        assert rc == 0
        out[name] = (pd.read_csv(d / "dynamics" / "scan.csv"), json.loads((d / "dynamics" / "dynamics.json").read_text()))
    return out


@pytest.mark.parametrize("name,species", [("default", "pred"), ("prey", "prey")])
def test_scan_records_the_section_species(rm_sections, name, species):
    assert rm_sections[name][1]["section"] == f"maxima of {species}"


def test_scan_section_species_changes_section_values(rm_sections):
    # On a limit cycle the prey maxima lie far above the predator maxima for these parameters
    # (prey equilibrium N* = 100 against predator numbers of order 1–10; Rosenzweig 1971 model).
    pred, prey = rm_sections["default"][0], rm_sections["prey"][0]
    assert pred.section_value.notna().all() and prey.section_value.notna().all()
    assert prey.section_value.min() > 10 * pred.section_value.max()


@pytest.mark.parametrize("factor", [0.5, 0.9])
def test_lyapunov_at_a_stable_equilibrium_is_the_leading_eigenvalue(tmp_path, factor):
    # At a stable fixed point the largest Lyapunov exponent is the largest real part of the
    # Jacobian's eigenvalues there (linearisation; e.g. Ott 2002, "Chaos in Dynamical Systems",
    # ch. 4, from memory). Jacobian of Rosenzweig–MacArthur at (N*, P*) in closed form:
    # J11 = r(1 − 2N*/K) − aP*/(1 + ahN*)², J12 = −aN*/(1 + ahN*), J21 = eaP*/(1 + ahN*)², J22 = 0.
    case = load_case(rm_case(tmp_path, factor))
    r, a, h, e, m = 3.0, 1.0, 0.01, 0.01, 0.5
    N = m / (a * (e - m * h))
    K = factor * (2 * N + 1 / (a * h))
    P = r * (1 - N / K) * (1 + a * h * N) / a
    J = np.array([[r * (1 - 2 * N / K) - a * P / (1 + a * h * N) ** 2, -a * N / (1 + a * h * N)],
                  [e * a * P / (1 + a * h * N) ** 2, 0.0]])
    leading = float(np.linalg.eigvals(J).real.max())
    web = build_web(case)
    p = web_params(case, {k: np.array([v]) for k, v in nominal_values(case).items()}, 1)
    out = diagnose_web(web, p, Controls.neutral(1, 2), p.initial, DynamicsSettings(window=2048.0),
                       np.array([1e-3, 1e-4]))
    # the 99 % interval from the spread of eight sub-window exponents covers the eigenvalue
    assert out["regime"][0] == "equilibrium"
    assert abs(out["lyapunov"][0] - leading) <= 3.5 * out["lyapunov_se"][0]


def test_scan_settings_errors_name_the_parameter_and_the_cli_its_flag(tmp_path, capsys):
    """The library speaks of parameters (``stop``, ``start``); the command line of its flags."""
    from impact.errors import SettingError
    from impact.pipeline import ScanSettings

    with pytest.raises(SettingError) as err:
        ScanSettings(parameter="K", start=2.0, stop=1.0, steps=3).check()
    assert err.value.parameter == "stop" and "start (2)" in err.value.render({})
    path = rm_case(tmp_path, 1.0)
    rc = main(["scan", str(path), "--parameter", "K", "--from", "2", "--to", "1", "--steps", "3",
               "--out", str(tmp_path / "o"), "--quiet"])
    err_text = capsys.readouterr().err
    assert rc == 2 and "error: command line: --to: must be greater than --from (2)" in err_text
    assert not (tmp_path / "o").exists()
