"""The food-web builder and the simulation against closed-form results.

Each check runs a case through case → model → simulate with the ensemble integrator,
so it tests the built right-hand side, the schedule of interventions and the integrator together.
"""

from __future__ import annotations

import numpy as np
import pytest

from casefiles import write_case
from impact.case import load_case
from impact.model import Controls, build_web, rhs, web_params
from impact.sample import parameter_values
from impact.simulate import run_option

RTOL = 1e-8


def one_species_case(species: dict, horizon=20.0, interventions=(), options=None, extra=None, parameters=None):
    data = {
        "case": {"title": "t", "time_unit": "year", "horizon": horizon, "output_step": 1.0, "rtol": RTOL, "atol": 1e-10},
        "parameters": parameters or {},
        "species": [species] if isinstance(species, dict) else list(species),
        "interventions": list(interventions) or [{"name": "none", "kind": "press-harvest", "species": (species if isinstance(species, dict) else species[0])["name"], "rate": 0.0}],
        "options": options or [{"name": "opt", "interventions": [list(interventions)[0]["name"] if interventions else "none"]}],
    }
    if extra:
        data.update(extra)
    return data


def simulate(tmp_path, data, option="opt", members=3, values=None):
    case = load_case(write_case(tmp_path, data))
    web = build_web(case)
    vals = parameter_values(case, np.full((members, len(case.uncertain)), 0.5)) if values is None else values
    p = web_params(case, vals, members)
    opt = None if option is None else next(o for o in case.options if o.name == option)
    u = {iv.name: np.full(members, 0.5) for iv in case.interventions}
    return case, run_option(case, web, p, vals, p.initial.copy(), opt, None, u)


def rel_err_tol_units(x, ref, tol):
    """Error in units of the requested relative tolerance."""
    return np.max(np.abs(x - ref) / (np.abs(ref) + 1e-300)) / tol


def test_logistic_matches_verhulst(tmp_path):
    # Verhulst (1838): N(t) = K / (1 + ((K − N0)/N0) e^{−rt})
    r, K, N0 = 0.7, 500.0, 10.0
    case, run = simulate(tmp_path, one_species_case(
        {"name": "n", "growth": "logistic", "growth_rate": r, "carrying_capacity": K, "initial": N0, "quasi_extinction": 1.0}), option=None)
    t = run.times
    exact = K / (1 + (K - N0) / N0 * np.exp(-r * t))
    assert rel_err_tol_units(run.states[0, :, 0], exact, RTOL) < 100


@pytest.mark.parametrize("r", [0.3, -0.15])
def test_exponential_matches_e_to_the_rt(tmp_path, r):
    # Malthus: N(t) = N0 e^{rt}
    case, run = simulate(tmp_path, one_species_case(
        {"name": "n", "growth": "exponential", "growth_rate": r, "initial": 5.0, "quasi_extinction": 0.0}), option=None)
    assert rel_err_tol_units(run.states[0, :, 0], 5.0 * np.exp(r * run.times), RTOL) < 100


def test_press_harvest_and_fertility_control_scale_the_exponent(tmp_path):
    # dN/dt = (r(1−f) − q) N on [2, 10], r N elsewhere: N(t) piecewise exponential (closed form)
    r, f, q = 0.4, 0.5, 0.1
    data = one_species_case(
        {"name": "n", "growth": "exponential", "growth_rate": r, "initial": 1.0, "quasi_extinction": 0.0},
        interventions=[{"name": "h", "kind": "press-harvest", "species": "n", "rate": q, "start": 2.0, "end": 10.0},
                       {"name": "s", "kind": "fertility-control", "species": "n", "fraction": f, "start": 2.0, "end": 10.0}],
        options=[{"name": "opt", "interventions": ["h", "s"]}])
    case, run = simulate(tmp_path, data)
    t = run.times
    g = np.where(t <= 2, r * t, np.where(t <= 10, 2 * r + (r * (1 - f) - q) * (t - 2), 2 * r + 8 * (r * (1 - f) - q) + r * (t - 10)))
    assert rel_err_tol_units(run.states[0, :, 0], np.exp(g), RTOL) < 100


def test_pulse_cull_eradication_and_introduction_jump_the_state(tmp_path):
    # r = 0: the state only changes by the declared jumps
    sp = [{"name": "a", "growth": "exponential", "growth_rate": 0.0, "initial": 100.0, "quasi_extinction": 0.0},
          {"name": "b", "growth": "exponential", "growth_rate": 0.0, "initial": 100.0, "quasi_extinction": 0.0},
          {"name": "c", "growth": "exponential", "growth_rate": 0.0, "initial": 0.0, "present": False, "quasi_extinction": 0.0}]
    ivs = [{"name": "cull", "kind": "pulse-cull", "species": "a", "times": [3.0, 6.0], "fraction": 0.5},
           {"name": "erad", "kind": "eradication", "species": "b", "time": 4.0, "failure_probability": 0.6, "residual_fraction": 0.25},
           {"name": "intro", "kind": "introduction", "species": "c", "time": 5.0, "amount": 7.0}]
    data = one_species_case(sp, interventions=ivs, options=[{"name": "opt", "interventions": ["cull", "erad", "intro"]}])
    case, run = simulate(tmp_path, data)  # event uniforms are 0.5 < 0.6: the eradication fails
    t = run.times
    np.testing.assert_allclose(run.states[0, :, 0], np.where(t < 3, 100, np.where(t < 6, 50, 25)), rtol=1e-12)
    np.testing.assert_allclose(run.states[0, :, 1], np.where(t < 4, 100, 25), rtol=1e-12)
    np.testing.assert_allclose(run.states[0, :, 2], np.where(t < 5, 0, 7), rtol=1e-12)
    assert run.cummin[0, -1, 0] == 25


def test_carrion_pool_closed_form(tmp_path):
    # N = N0 e^{−mt}; dC/dt = y m N − δ C  ⇒  C = y m N0 (e^{−mt} − e^{−δt}) / (δ − m)  (linear ODE, variation of constants)
    m, d, y, N0 = 0.3, 1.5, 0.8, 50.0
    data = one_species_case({"name": "n", "growth": "none", "mortality": m, "initial": N0, "quasi_extinction": 0.0, "carrion_yield": y},
                            extra={"carrion": {"decay_rate": d}})
    case, run = simulate(tmp_path, data, option=None)
    t = run.times
    exact = y * m * N0 * (np.exp(-m * t) - np.exp(-d * t)) / (d - m)
    np.testing.assert_allclose(run.states[0, 1:, 1], exact[1:], rtol=1e-6)


def test_mutualism_raises_the_equilibrium_by_the_saturating_benefit(tmp_path):
    # dN/dt = rN(1 + βP/(H+P)) − rN²/K with P constant  ⇒  N* = K (1 + βP/(H+P))
    K, beta, H, P = 200.0, 0.6, 30.0, 20.0
    sp = [{"name": "plant", "growth": "logistic", "growth_rate": 1.0, "carrying_capacity": K, "initial": 50.0, "quasi_extinction": 0.0},
          {"name": "bee", "growth": "exponential", "growth_rate": 0.0, "initial": P, "quasi_extinction": 0.0}]
    data = one_species_case(sp, horizon=60.0, extra={"interactions": [
        {"type": "mutualism", "beneficiary": "plant", "partner": "bee", "max_benefit": beta, "half_saturation": H}]})
    case, run = simulate(tmp_path, data, option=None)
    assert run.states[0, -1, 0] == pytest.approx(K * (1 + beta * P / (H + P)), rel=1e-6)


def test_lotka_volterra_competition_equilibrium(tmp_path):
    # Coexistence equilibrium of two LV competitors (Gause & Witt 1935):
    # N1* = (K1 − α12 K2)/(1 − α12 α21), N2* = (K2 − α21 K1)/(1 − α12 α21)
    K1, K2, a12, a21 = 100.0, 80.0, 0.5, 0.4
    sp = [{"name": "x", "growth": "logistic", "growth_rate": 1.0, "carrying_capacity": K1, "initial": 10.0, "quasi_extinction": 0.0},
          {"name": "z", "growth": "logistic", "growth_rate": 0.8, "carrying_capacity": K2, "initial": 10.0, "quasi_extinction": 0.0}]
    data = one_species_case(sp, horizon=80.0, extra={"interactions": [
        {"type": "competition", "species": "x", "competitor": "z", "coefficient": a12},
        {"type": "competition", "species": "z", "competitor": "x", "coefficient": a21}]})
    case, run = simulate(tmp_path, data, option=None)
    den = 1 - a12 * a21
    np.testing.assert_allclose(run.states[0, -1, :2], [(K1 - a12 * K2) / den, (K2 - a21 * K1) / den], rtol=1e-6)


@pytest.mark.parametrize("response,expected", [
    # Holling (1959) functional responses, per-capita intake of prey R by one consumer:
    ("holling1", lambda a, h, R: a * R),
    ("holling2", lambda a, h, R: a * R / (1 + a * h * R)),
    ("holling3", lambda a, h, R: a * R**2 / (1 + a * h * R**2)),
])
def test_functional_responses(tmp_path, response, expected):
    a, h, R, P, e = 0.02, 0.5, 40.0, 3.0, 0.25
    sp = [{"name": "prey", "growth": "exponential", "growth_rate": 0.0, "initial": R, "quasi_extinction": 0.0},
          {"name": "pred", "growth": "none", "initial": P, "quasi_extinction": 0.0}]
    data = one_species_case(sp, extra={"interactions": [
        {"type": "predation", "predator": "pred", "prey": "prey", "response": response, "attack_rate": a,
         "handling_time": h, "efficiency": e}]})
    case = load_case(write_case(tmp_path, data))
    web = build_web(case)
    p = web_params(case, {}, 1)
    dy = rhs(web, p, Controls.neutral(1, 2), p.initial, np.array([0]))
    I = expected(a, h, R)
    np.testing.assert_allclose(dy[0], [-I * P, e * I * P], rtol=1e-14)


def test_omnivore_shares_handling_time_across_resources(tmp_path):
    # multi-prey Holling II (Murdoch 1973 form): I_k = a_k R_k / (1 + Σ_j a_j h_j R_j)
    sp = [{"name": "p1", "growth": "exponential", "growth_rate": 0.0, "initial": 30.0, "quasi_extinction": 0.0},
          {"name": "p2", "growth": "exponential", "growth_rate": 0.0, "initial": 10.0, "quasi_extinction": 0.0},
          {"name": "omni", "growth": "none", "initial": 2.0, "quasi_extinction": 0.0}]
    inter = [{"type": "predation", "predator": "omni", "prey": "p1", "response": "holling2", "attack_rate": 0.1, "handling_time": 0.2, "efficiency": 0.1},
             {"type": "predation", "predator": "omni", "prey": "p2", "response": "holling2", "attack_rate": 0.3, "handling_time": 0.5, "efficiency": 0.2}]
    case = load_case(write_case(tmp_path, one_species_case(sp, extra={"interactions": inter})))
    web = build_web(case)
    p = web_params(case, {}, 1)
    dy = rhs(web, p, Controls.neutral(1, 3), p.initial, np.array([0]))
    D = 1 + 0.1 * 0.2 * 30 + 0.3 * 0.5 * 10
    I1, I2 = 0.1 * 30 / D, 0.3 * 10 / D
    np.testing.assert_allclose(dy[0], [-I1 * 2, -I2 * 2, (0.1 * I1 + 0.2 * I2) * 2], rtol=1e-14)


# Rosenzweig (1971), "paradox of enrichment": prey logistic (r, K), predator Holling II (a, h, e, m).
# N* = m / (a (e − m h)); the equilibrium is stable for K < 2N* + 1/(a h) and a limit cycle appears above.
RM = dict(r=3.0, a=1.0, h=0.01, e=0.01, m=0.5)
N_STAR = RM["m"] / (RM["a"] * (RM["e"] - RM["m"] * RM["h"]))
K_HOPF = 2 * N_STAR + 1 / (RM["a"] * RM["h"])


def rm_case(K, horizon=400.0):
    sp = [{"name": "prey", "growth": "logistic", "growth_rate": RM["r"], "carrying_capacity": K, "initial": 0.8 * N_STAR, "quasi_extinction": 0.0},
          {"name": "pred", "growth": "none", "mortality": RM["m"], "initial": 1.0, "quasi_extinction": 0.0}]
    return one_species_case(sp, horizon=horizon, extra={"interactions": [
        {"type": "predation", "predator": "pred", "prey": "prey", "response": "holling2", "attack_rate": RM["a"],
         "handling_time": RM["h"], "efficiency": RM["e"]}]})


@pytest.mark.parametrize("factor,oscillates", [(0.85, False), (1.15, True)])
def test_rosenzweig_macarthur_hopf_threshold(tmp_path, factor, oscillates):
    case, run = simulate(tmp_path, rm_case(factor * K_HOPF), option=None, members=1)
    prey = run.states[0, :, 0]
    late = prey[run.times >= 300]
    amplitude = (late.max() - late.min()) / N_STAR
    if oscillates:
        assert amplitude > 0.2  # sustained cycle
    else:
        assert amplitude < 1e-3  # settled
        assert late[-1] == pytest.approx(N_STAR, rel=1e-3)
