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
from impact.ensemble.sample import parameter_values
from impact.engine.simulate import run_option

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


# --- obligate mutualism, interference, crowding, sterile releases, seasons -------------------------


def _rhs_of(tmp_path, data, members=1, controls=None):
    case = load_case(write_case(tmp_path, data))
    web = build_web(case)
    p = web_params(case, {}, members)
    c = controls or Controls.neutral(members, web.n_species)
    return rhs(web, p, c, p.initial, np.arange(members))


def test_obligate_plant_persists_only_above_the_pollinator_threshold(tmp_path):
    # Obligate, saturating benefit on births (the consumer–resource form of Holland & DeAngelis 2010):
    # dN/dt = r N P/(H+P) − r N²/K − m N with P constant. Persistence iff r P/(H+P) > m, i.e.
    # P > P_c = H m/(r − m); then N* = K (P/(H+P) − m/r). Threshold and equilibrium derived here
    # from the plant's isocline (closed form).
    r, K, H, m = 1.0, 200.0, 30.0, 0.25
    P_c = H * m / (r - m)

    def run(P):
        sp = [{"name": "plant", "growth": "logistic", "growth_rate": r, "carrying_capacity": K, "mortality": m,
               "initial": 50.0, "quasi_extinction": 0.0},
              {"name": "bee", "growth": "exponential", "growth_rate": 0.0, "initial": P, "quasi_extinction": 0.0}]
        data = one_species_case(sp, horizon=400.0, extra={"interactions": [
            {"kind": "mutualism", "dependence": "obligate", "beneficiary": "plant", "partner": "bee", "half_saturation": H}]})
        return simulate(tmp_path, data, option=None)[1].states[0, -1, 0]

    assert run(1.5 * P_c) == pytest.approx(K * (1.5 * P_c / (H + 1.5 * P_c) - m / r), rel=1e-6)
    assert run(0.8 * P_c) < 1e-3 * 50.0  # below the threshold the plant dies out
    # and with no pollinator there are no births at all: dN/dt = −r N²/K − m N
    sp = [{"name": "plant", "growth": "logistic", "growth_rate": r, "carrying_capacity": K, "initial": 40.0, "quasi_extinction": 0.0},
          {"name": "bee", "growth": "exponential", "growth_rate": 0.0, "initial": 0.0, "quasi_extinction": 0.0}]
    data = one_species_case(sp, extra={"interactions": [
        {"kind": "mutualism", "dependence": "obligate", "beneficiary": "plant", "partner": "bee", "half_saturation": H}]})
    np.testing.assert_allclose(_rhs_of(tmp_path, data)[0, 0], -r * 40.0 ** 2 / K, rtol=1e-14)


def test_two_obligate_pollinators_pollinate_independently(tmp_path):
    # Two pollinators visiting independently: a flower stays unpollinated with chance
    # Π H_o/(H_o + P_o), so births are r N (1 − Π H_o/(H_o + P_o)) and, with P constant,
    # N* = K (1 − Π H_o/(H_o + P_o) − m/r) (derived here; closed form).
    r, K, m = 1.0, 200.0, 0.1
    sp = [{"name": "plant", "growth": "logistic", "growth_rate": r, "carrying_capacity": K, "mortality": m,
           "initial": 50.0, "quasi_extinction": 0.0},
          {"name": "bee", "growth": "exponential", "growth_rate": 0.0, "initial": 10.0, "quasi_extinction": 0.0},
          {"name": "moth", "growth": "exponential", "growth_rate": 0.0, "initial": 4.0, "quasi_extinction": 0.0}]
    inter = [{"kind": "mutualism", "dependence": "obligate", "beneficiary": "plant", "partner": "bee", "half_saturation": 30.0},
             {"kind": "mutualism", "dependence": "obligate", "beneficiary": "plant", "partner": "moth", "half_saturation": 5.0}]
    case, run = simulate(tmp_path, one_species_case(sp, horizon=300.0, extra={"interactions": inter}), option=None)
    unpollinated = 30.0 / 40.0 * 5.0 / 9.0
    assert run.states[0, -1, 0] == pytest.approx(K * (1 - unpollinated - m / r), rel=1e-6)


def _obligate_pair(N0, P0, horizon=400.0):
    """Plant and pollinator that each breed only with the other (saturating, obligate both ways)."""
    sp = [{"name": "plant", "growth": "logistic", "growth_rate": 1.0, "carrying_capacity": 100.0, "mortality": 0.2,
           "initial": float(N0), "quasi_extinction": 0.0},
          {"name": "moth", "growth": "logistic", "growth_rate": 2.0, "carrying_capacity": 50.0, "mortality": 0.5,
           "initial": float(P0), "quasi_extinction": 0.0}]
    return one_species_case(sp, horizon=horizon, extra={"interactions": [
        {"kind": "mutualism", "dependence": "obligate", "beneficiary": "plant", "partner": "moth", "half_saturation": 10.0},
        {"kind": "mutualism", "dependence": "obligate", "beneficiary": "moth", "partner": "plant", "half_saturation": 20.0}]})


def _obligate_pair_equilibria():
    """Interior equilibria of :func:`_obligate_pair` from its isoclines (a quadratic in N).

    Plant: P/(H+P) = N/K + μ (μ = m/r); moth: P = Kp (N/(G+N) − ν). Eliminating P:
    H (N/K + μ)(G + N) = Kp (N − ν (G + N)) (1 − N/K − μ). Obligate–obligate pairs with saturating
    benefits have two interior equilibria, a saddle (the Allee-like threshold) and a stable node,
    besides a stable origin (Holland & DeAngelis 2010 discuss this threshold; from memory).
    """
    K, mu, H, Kp, nu, G = 100.0, 0.2, 10.0, 50.0, 0.25, 20.0
    # expand both sides as polynomials in N and subtract
    left = np.polymul([H / K, H * mu], [1.0, G])
    right = np.polymul([Kp * (1 - nu), -Kp * nu * G], [-1 / K, 1 - mu])
    roots = np.sort(np.roots(np.polysub(left, right)).real)
    return [(N, Kp * (N / (G + N) - nu)) for N in roots if N > 0]


def test_obligate_pair_threshold_and_coexistence_equilibrium(tmp_path):
    (N_lo, P_lo), (N_hi, P_hi) = _obligate_pair_equilibria()
    assert 0 < N_lo < N_hi and P_lo > 0
    case, run = simulate(tmp_path, _obligate_pair(1.2 * N_lo, 1.2 * P_lo), option=None)
    np.testing.assert_allclose(run.states[0, -1, :2], [N_hi, P_hi], rtol=1e-6)
    case, run = simulate(tmp_path, _obligate_pair(0.8 * N_lo, 0.8 * P_lo), option=None)
    assert np.all(run.states[0, -1, :2] < 1e-3)  # below the saddle both collapse


def test_beddington_deangelis_reduces_to_holling2_and_matches_its_equilibrium(tmp_path):
    # Beddington (1975), DeAngelis, Goldstein & O'Neill (1975): I = a R / (1 + a h R + γ C).
    # With γ = 0 it is Holling type II (Holling 1959).
    def web(response, gamma, N0=40.0, P0=3.0, horizon=20.0):
        sp = [{"name": "prey", "growth": "logistic", "growth_rate": 1.0, "carrying_capacity": 100.0, "initial": N0,
               "quasi_extinction": 0.0},
              {"name": "pred", "growth": "none", "mortality": 0.4, "initial": P0, "quasi_extinction": 0.0}]
        link = {"kind": "predation", "predator": "pred", "prey": "prey", "response": response, "attack_rate": 0.1,
                "handling_time": 0.5, "efficiency": 0.6}
        if response == "beddington-deangelis":
            link["interference"] = gamma
        return one_species_case(sp, horizon=horizon, extra={"interactions": [link]})

    np.testing.assert_array_equal(_rhs_of(tmp_path, web("beddington-deangelis", 0.0)), _rhs_of(tmp_path, web("holling2", 0.0)))
    a, h, e, m, r, K, g = 0.1, 0.5, 0.6, 0.4, 1.0, 100.0, 0.3
    N, P = 40.0, 3.0
    I = a * N / (1 + a * h * N + g * P)
    np.testing.assert_allclose(_rhs_of(tmp_path, web("beddington-deangelis", g))[0],
                               [r * N * (1 - N / K) - I * P, e * I * P - m * P], rtol=1e-14)
    # Interior equilibrium from the isoclines: on the predator isocline e a N / D = m, so the prey
    # isocline r(1 − N/K) = a P / D gives P = e r N (1 − N/K)/m, and D = e a N/m gives
    # γ e r N²/K + (e a − m a h − γ e r) N − m = 0 (derived here; the model's isocline analysis is in
    # Cantrell & Cosner 2001, J. Math. Anal. Appl. 257:206–222, from memory).
    # the predator isocline itself: e a N/(1 + a h N + γ P) = m  ⇔  P = ((e a − m a h) N − m)/(m γ)
    P_iso = ((e * a - m * a * h) * N - m) / (m * g)
    data = web("beddington-deangelis", g, P0=P_iso)
    assert abs(_rhs_of(tmp_path, data)[0, 1]) < 1e-14 * m * P_iso
    N_star = max(np.roots([g * e * r / K, e * a - m * a * h - g * e * r, -m]).real)
    P_star = e * r * N_star * (1 - N_star / K) / m
    case, run = simulate(tmp_path, web("beddington-deangelis", g, horizon=600.0), option=None, members=1)
    np.testing.assert_allclose(run.states[0, -1, :2], [N_star, P_star], rtol=1e-5)


def test_crowding_mortality_gives_verhulst_logistic(tmp_path):
    # dN/dt = (b − d) N − μ N²: Verhulst (1838) with r = b − d, K = (b − d)/μ
    b, d, mu, N0 = 0.9, 0.2, 0.002, 5.0
    data = one_species_case({"name": "n", "growth": "exponential", "growth_rate": b, "mortality": d,
                             "crowding_mortality": mu, "initial": N0, "quasi_extinction": 0.0})
    case, run = simulate(tmp_path, data, option=None)
    r, K = b - d, (b - d) / mu
    exact = K / (1 + (K - N0) / N0 * np.exp(-r * run.times))
    assert rel_err_tol_units(run.states[0, :, 0], exact, RTOL) < 100


def _sterile_case(N0, S, b=0.6, d=0.2):
    sp = {"name": "fly", "growth": "exponential", "growth_rate": b, "mortality": d, "initial": float(N0), "quasi_extinction": 0.0}
    return one_species_case(sp, horizon=40.0, interventions=[
        {"name": "sit", "kind": "sterile-release", "species": "fly", "sterile_density": S, "competitiveness": 0.5}],
        options=[{"name": "opt", "interventions": ["sit"]}])


def test_sterile_release_threshold_matches_knipling(tmp_path):
    # Knipling (1955, J. Econ. Entomol. 48:459–462; from memory): with random mating a wild female's
    # mate is fertile with chance N/(N + S); the population declines once the sterile-to-wild ratio
    # S/N exceeds (rate of increase − 1). In continuous time, births b N·N/(N+S) against deaths d N:
    # decline iff S/N > b/d − 1, i.e. below N_c = S d/(b − d). S = density × competitiveness.
    b, d, S = 0.6, 0.2, 0.5 * 100.0
    N_c = S * d / (b - d)
    for N0, grows in ((1.05 * N_c, True), (0.95 * N_c, False)):
        case, run = simulate(tmp_path, _sterile_case(N0, 100.0, b, d))
        final = run.states[0, -1, 0]
        assert (final > 10 * N0) if grows else (final < 0.05 * N0)
    # the right-hand side itself, at one point
    data = _sterile_case(30.0, 100.0, b, d)
    c = Controls.neutral(1, 1)
    c.sterile[0, 0] = S
    np.testing.assert_allclose(_rhs_of(tmp_path, data, controls=c)[0, 0], b * 30.0 * 30.0 / (30.0 + S) - d * 30.0, rtol=1e-14)


def _seasonal_logistic(outside, first=10, last=30, horizon=30.0):
    sp = {"name": "plant", "growth": "logistic", "growth_rate": 2.0, "carrying_capacity": 100.0, "initial": 20.0,
          "quasi_extinction": 0.0, "breeding_season": {"first": first, "last": last, "outside": outside}}
    data = one_species_case(sp, horizon=horizon, extra={"seasons": {"length": 1.0, "parts": 52, "part_name": "week"}})
    data["case"]["output_step"] = 1.0 / 52
    return data


@pytest.mark.parametrize("outside", [0.0, 0.3])
def test_seasonal_logistic_periodic_solution(tmp_path, outside):
    # dN/dt = r s(t) N − r N²/K with s = 1 in weeks 10–30 and `outside` elsewhere. With u = 1/N the
    # equation is linear, du/dt = −r s u + r/K (Bernoulli's substitution; for the periodically forced
    # logistic see Nisbet & Gurney 1982, Modelling Fluctuating Populations, ch. 5, from memory), so the
    # season map u → A u + B is affine and the periodic solution starts at u* = B/(1 − A).
    # Also, ln N is periodic, so the season mean of N is exactly K · mean(s) (integrate d ln N/dt).
    r, K = 2.0, 100.0
    case, run = simulate(tmp_path, _seasonal_logistic(outside), option=None, members=1)
    w0, w1 = 9 / 52, 30 / 52  # the window [start of week 10, end of week 30)

    def flow(u, s, dt):  # exact solution of du/dt = −r s u + r/K over dt
        if s == 0:
            return u + r * dt / K
        return 1 / (K * s) + (u - 1 / (K * s)) * np.exp(-r * s * dt)

    A_B = [flow(flow(flow(u, outside, w0), 1.0, w1 - w0), outside, 1 - w1) for u in (0.0, 1.0)]
    B, A = A_B[0], A_B[1] - A_B[0]
    u_star = B / (1 - A)
    t = run.times
    N = run.states[0, :, 0]
    starts = np.isclose(t % 1.0, 0.0) & (t >= 20)
    np.testing.assert_allclose(N[starts], 1 / u_star, rtol=1e-6)
    mid = np.isclose(t, 25.0 + w1)  # end of the window: u from the window's own flow
    np.testing.assert_allclose(N[mid], 1 / flow(flow(u_star, outside, w0), 1.0, w1 - w0), rtol=1e-6)
    last = t >= 29.0 - 1e-9
    mean_s = (w1 - w0) + outside * (1 - (w1 - w0))
    # the trapezoid rule on 52 weekly points is O(h²): the mean agrees to ~1e-4 (3e-5 seen)
    assert np.trapezoid(N[last], t[last]) == pytest.approx(K * mean_s, rel=5e-4)


def test_harvest_scheduled_by_season_acts_only_in_its_weeks(tmp_path):
    # dN/dt = (r − q·1[weeks 10–14]) N: N(t) = N0 exp(r t − q · time spent inside the weeks so far)
    r, q = 0.1, 2.0
    data = one_species_case({"name": "n", "growth": "exponential", "growth_rate": r, "initial": 10.0, "quasi_extinction": 0.0},
                            horizon=5.0, interventions=[{"name": "spray", "kind": "press-harvest", "species": "n", "rate": q,
                                                         "start": 1.0, "end": 4.0, "season_parts": [10, 14]}],
                            extra={"seasons": {"length": 1.0, "parts": 52, "part_name": "week"}})
    data["case"]["output_step"] = 0.25
    case, run = simulate(tmp_path, data)
    assert case.intervention("spray").windows == tuple((k + 9 / 52, k + 14 / 52) for k in (1, 2, 3))
    from impact.engine.simulate import segment_times  # the time line is cut at every window edge (step control)

    cuts = set(segment_times(case, case.options[0], False).tolist())
    assert {t for w in case.intervention("spray").windows for t in w} <= cuts
    t = run.times
    inside = sum(np.clip(t - (k + 9 / 52), 0, 5 / 52) for k in (1, 2, 3))
    assert rel_err_tol_units(run.states[0, :, 0], 10.0 * np.exp(r * t - q * inside), RTOL) < 100


def test_alternative_food_is_a_constant_resource_in_the_shared_denominator(tmp_path):
    # multi-resource Holling II (Murdoch 1973 form) with one resource held constant at F:
    # I_R = a1 R / (1 + a1 h1 R + a2 h2 F), I_F = a2 F / (same); the food is never depleted.
    a1, h1, e1, a2, h2, e2, F, m = 0.1, 0.2, 0.1, 0.05, 0.5, 0.3, 40.0, 0.3
    sp = [{"name": "prey", "growth": "exponential", "growth_rate": 0.0, "initial": 30.0, "quasi_extinction": 0.0},
          {"name": "cat", "growth": "none", "mortality": m, "initial": 2.0, "quasi_extinction": 0.0}]
    inter = [{"kind": "predation", "predator": "cat", "prey": "prey", "response": "holling2", "attack_rate": a1,
              "handling_time": h1, "efficiency": e1},
             {"kind": "alternative-food", "consumer": "cat", "density": F, "response": "holling2", "attack_rate": a2,
              "handling_time": h2, "efficiency": e2}]
    D = 1 + a1 * h1 * 30.0 + a2 * h2 * F
    I1, I2 = a1 * 30.0 / D, a2 * F / D
    np.testing.assert_allclose(_rhs_of(tmp_path, one_species_case(sp, extra={"interactions": inter}))[0],
                               [-I1 * 2.0, (e1 * I1 + e2 * I2) * 2.0 - m * 2.0], rtol=1e-14)
    # on the alternative food alone the consumer grows exponentially: P0 exp((e a F/(1 + a h F) − m) t)
    case, run = simulate(tmp_path, one_species_case(sp[1:], extra={"interactions": inter[1:]}), option=None)
    rate = e2 * a2 * F / (1 + a2 * h2 * F) - m
    assert rel_err_tol_units(run.states[0, :, 0], 2.0 * np.exp(rate * run.times), RTOL) < 100


def test_season_averaged_controls_keep_the_forced_webs_mean(tmp_path):
    # For dN/dt = r s(t) N − r N²/K the season mean of the periodic solution is K·mean(s) (see the
    # periodic-solution test above), which is the equilibrium of the season-averaged web that the
    # regime diagnostics follow (births × mean(s)); a seasonal harvest averages to rate × share.
    from impact.engine.simulate import controls_at, season_mean_phi

    data = _seasonal_logistic(0.3)
    data["interventions"][0].update(rate=2.0, season_parts=[50, 3])  # weeks 50–52 and 1–3: 6 of 52
    case = load_case(write_case(tmp_path, data))
    w = 21 / 52
    np.testing.assert_allclose(season_mean_phi(case, 2), w + 0.3 * (1 - w), rtol=1e-15)
    c = controls_at(case, case.options[0], {}, 0.5, season_mean_phi(case, 2), 2, 1, season_averaged=True)
    np.testing.assert_allclose(c.harvest, 2.0 * 6 / 52, rtol=1e-15)
    assert controls_at(case, case.options[0], {}, 0.5, np.ones((2, 1)), 2, 1).harvest.max() == 0.0  # week 27: off


def test_suppressing_the_pollinator_lowers_seed_set_and_raises_the_plants_risk():
    # The invented casework/moth_pollinator.toml: the primrose's births are r·s(t)·N·P/(H + P), increasing
    # in the moth P, so an option that lowers the moth in every member must lower the primrose's
    # pollination share and its abundance in that member (a consequence of the model, no published
    # source); releases that drive the moth out leave the primrose without births, and it falls below
    # its quasi-extinction level as dN/dt = −r N²/K − m N requires.
    from dataclasses import replace
    from pathlib import Path

    from impact.engine.simulate import plausibility, spin_up

    case = load_case(Path(__file__).resolve().parents[2] / "casework" / "moth_pollinator.toml")
    web = build_web(case)
    M = 12
    vals = parameter_values(case, np.random.default_rng(np.random.SeedSequence(16)).random((M, len(case.uncertain))))
    p = web_params(case, vals, M)
    today, late, failed, _ = spin_up(case, web, p)
    kept = plausibility(case, web, today, late, failed)["kept"]
    assert kept.sum() >= M // 2
    u = {iv.name: np.full(M, 0.5) for iv in case.interventions}
    runs = {o.name if o else "baseline": run_option(case, web, p, vals, today, o, None, u) for o in [None, *case.options]}
    runs = {k: replace(r, states=r.states[kept], cummin=r.cummin[kept]) for k, r in runs.items()}
    moth, plant = case.species_names.index("hawkmoth"), case.species_names.index("primrose")
    H = p.obH[kept, 0]  # the case's one obligate mutualism

    def share(run):  # time-mean pollination share P/(H + P) per member
        P = run.states[:, :, moth]
        return (P / (H[:, None] + P)).mean(axis=1)

    base = runs["baseline"]
    for name in ("spray", "sterile release"):
        run = runs[name]
        assert np.all(run.states[:, :, moth].mean(axis=1) < base.states[:, :, moth].mean(axis=1))
        assert np.all(share(run) < share(base))
        assert np.all(run.states[:, :, plant].mean(axis=1) < base.states[:, :, plant].mean(axis=1))
    level = case.species_by_name("primrose").quasi_extinction
    assert np.all(base.cummin[:, -1, plant] > level)
    assert np.all(runs["sterile release"].cummin[:, -1, plant] < level)


def test_two_stage_equilibrium(tmp_path):
    # Juveniles J born from adults at b, maturing at μ, dying at d_J; adults with deaths d_A and
    # crowding c: J' = b A − (μ + d_J) J, A' = μ J − d_A A − c A². From J' = A' = 0:
    # A* = (b μ/(μ + d_J) − d_A)/c, J* = b A*/(μ + d_J); the adults persist iff
    # R0 = b μ/((μ + d_J) d_A) > 1 (the stage-structured net reproductive number, e.g. de Roos &
    # Persson 2013, ch. 3; from memory).
    b, mu, dJ, dA, c = 3.0, 0.5, 0.4, 0.6, 0.01
    sp = [{"name": "larva", "growth": "none", "mortality": dJ, "initial": 10.0, "quasi_extinction": 0.0,
           "matures_into": "adult", "maturation_rate": mu},
          {"name": "adult", "growth": "exponential", "growth_rate": b, "mortality": dA, "crowding_mortality": c,
           "initial": 5.0, "quasi_extinction": 0.0}]
    case, run = simulate(tmp_path, one_species_case(sp, horizon=200.0), option=None)
    A = (b * mu / (mu + dJ) - dA) / c
    np.testing.assert_allclose(run.states[0, -1, :2], [b * A / (mu + dJ), A], rtol=1e-6)
    # below R0 = 1 both stages die out (slowest rate here about −0.21 per year)
    sp[1]["growth_rate"] = 0.5 * dA * (mu + dJ) / mu  # R0 = 0.5
    case, run = simulate(tmp_path, one_species_case(sp, horizon=200.0), option=None)
    assert np.all(run.states[0, -1, :2] < 1e-3)


def test_sinusoidal_breeding_logistic_periodic_solution(tmp_path):
    # dN/dt = r (1 + A cos(ω(t − t_p))) N − r N²/K. With u = 1/N, du/dt = −r s(t) u + r/K is linear
    # (Bernoulli's substitution, as for the window above; Nisbet & Gurney 1982, from memory): with
    # R(t) = ∫₀ᵗ r s, the periodic solution has u(0) = ∫₀ᵀ (r/K) e^{R(τ) − R(T)} dτ / (1 − e^{−R(T)}),
    # and the season mean of N is K·mean(s) = K exactly.
    from scipy.integrate import quad

    r, K, A, peak = 1.5, 100.0, 0.8, 20  # the peak in the middle of week 20
    sp = {"name": "plant", "growth": "logistic", "growth_rate": r, "carrying_capacity": K, "initial": 20.0,
          "quasi_extinction": 0.0, "breeding_season": {"amplitude": A, "peak": peak}}
    data = one_species_case(sp, horizon=30.0, extra={"seasons": {"length": 1.0, "parts": 52, "part_name": "week"}})
    data["case"]["output_step"] = 1.0 / 52
    case, run = simulate(tmp_path, data, option=None, members=1)
    w, tp = 2 * np.pi, (peak - 0.5) / 52

    def R(t):
        return r * (t + A / w * (np.sin(w * (t - tp)) + np.sin(w * tp)))

    u0 = quad(lambda s: r / K * np.exp(R(s) - R(1.0)), 0.0, 1.0, epsabs=1e-14, epsrel=1e-13)[0] / (1 - np.exp(-R(1.0)))
    t, N = run.times, run.states[0, :, 0]
    starts = np.isclose(t % 1.0, 0.0) & (t >= 20)
    np.testing.assert_allclose(N[starts], 1 / u0, rtol=1e-6)
    last = t >= 29.0 - 1e-9
    assert np.trapezoid(N[last], t[last]) == pytest.approx(K, rel=5e-4)


def test_member_streams_are_numpy_generators_random_numbers():
    # The parameter and event streams take PCG64's bits directly; they must be exactly
    # Generator(PCG64(SeedSequence(seed, spawn_key=(draw, purpose, ...)))).random(), the documented
    # random path (numpy's Generator.random: 53 high bits of each 64-bit output, times 2⁻⁵³).
    import zlib

    from impact.ensemble.sample import PURPOSE_EVENTS, PURPOSE_PARAMETERS, event_uniforms, member_uniforms

    def stream(seed, *key):
        return np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed, spawn_key=key)))

    draws = np.array([0, 1, 7, 123_456, 2**40])
    for seed in (0, 1, 2026):
        ref = np.array([stream(seed, int(i), PURPOSE_PARAMETERS).random(5) for i in draws])
        assert np.array_equal(member_uniforms(seed, draws, 5), ref)
        tag = zlib.crc32("cull".encode("utf-8"))
        ref = np.array([stream(seed, int(i), PURPOSE_EVENTS, tag).random() for i in draws])
        assert np.array_equal(event_uniforms(seed, draws, "cull"), ref)


def test_streams_stepped_together_are_numpys_streams():
    # impact.ensemble.streams re-implements numpy's SeedSequence and PCG64 over whole arrays of members;
    # the reference is numpy's own objects (the documented random path), to the bit, for small
    # and multi-word seeds and spawn keys of one to three words, and the draws of every purpose.
    import zlib

    from impact.ensemble.sample import (PURPOSE_EVENTS, PURPOSE_NOISE, PURPOSE_PARAMETERS, event_uniforms,
        member_uniforms, noise_multipliers)
    from impact.ensemble.streams import PCG64Block, seed_words

    def bits(seed, *key):
        return np.random.PCG64(np.random.SeedSequence(seed, spawn_key=key))

    draws = np.r_[np.arange(40), np.random.default_rng(7).integers(0, 2**32, 60)]
    for seed in (0, 1, 2026, 2**32, 2**100 + 3):
        for key in ((), (PURPOSE_PARAMETERS,), (PURPOSE_EVENTS, 2**32 - 1)):
            keys = np.column_stack([draws, *[np.full(draws.size, k) for k in key]])
            ref = [bits(seed, int(i), *key) for i in draws]
            assert np.array_equal(seed_words(seed, keys), [b.seed_seq.generate_state(4, np.uint64) for b in ref])
            block = PCG64Block(seed_words(seed, keys))
            assert [block.state(m) for m in range(draws.size)] == [b.state for b in ref]
            for _ in range(3):
                assert np.array_equal(block.next(), [b.random_raw() for b in ref])
        gen = [np.random.Generator(bits(seed, int(i), PURPOSE_PARAMETERS)) for i in draws]
        assert np.array_equal(member_uniforms(seed, draws, 4), [g.random(4) for g in gen])
        tag = zlib.crc32("cull".encode("utf-8"))
        gen = [np.random.Generator(bits(seed, int(i), PURPOSE_EVENTS, tag)) for i in draws]
        assert np.array_equal(event_uniforms(seed, draws, "cull"), [g.random() for g in gen])
        sd = np.tile([0.0, 0.1, 0.4], (draws.size, 1))
        z = np.array([np.random.Generator(bits(seed, int(i), PURPOSE_NOISE)).standard_normal((5, 3)) for i in draws])
        assert np.array_equal(noise_multipliers(seed, draws, sd, 5), np.exp(sd[:, None, :] * z - 0.5 * sd[:, None, :] ** 2))
        # the regime screen's choice of members: the smallest first uniform of each member's stream
        from impact.dynamics.lyapunov import PURPOSE_DYNAMICS
        from impact.dynamics.regime_screen import screened_members

        keys = [np.random.Generator(bits(seed, i, PURPOSE_DYNAMICS)).random() for i in range(300)]
        assert np.array_equal(screened_members(seed, 300, 40), np.sort(np.argsort(keys, kind="stable")[:40]))
    with pytest.raises(ValueError, match="2\\*\\*32"):
        seed_words(0, np.array([[2**32]]))


def test_truncated_normal_prior_is_scipys_truncated_normal():
    # Reference: scipy.stats.truncnorm.ppf (scipy 1.17: the log-space method of
    # impact.case.priors.standard_truncated_normal_ppf; identical to the bit there), to 1e-12 relative
    # so that a later scipy's last-bit changes do not fail it. Central, one-sided, far-tail and
    # very narrow truncations; the ends u = 0 and u = 1 give the support's ends. (Rounding can put
    # scipy's far-tail values an ulp outside the bounds; the prior keeps them inside.)
    from scipy import stats

    from impact.case.priors import TruncatedNormal

    u = np.r_[np.random.default_rng(5).random(2000), 1e-300, 0.5, 1 - 1e-16]
    for mean, sd, low, high in [(0, 1, -1, 1), (5, 2, 0, 100), (5, 2, -100, 4), (0, 1, 5, 8), (0, 1, -8, -5),
                                (0, 1, -40, -30), (10, 1, 9.99, 10.01), (2, 0.5, 0.1, 2.5)]:
        prior = TruncatedNormal(mean, sd, low, high)
        a, b = (low - mean) / sd, (high - mean) / sd
        ref = stats.truncnorm.ppf(u, a, b, loc=mean, scale=sd)
        np.testing.assert_allclose(prior.ppf(u), np.clip(ref, low, high), rtol=1e-12, atol=0)
        assert np.all((prior.ppf(u) >= low) & (prior.ppf(u) <= high))
        assert prior.ppf(0.0) == stats.truncnorm.ppf(0.0, a, b, loc=mean, scale=sd)
        assert prior.ppf(1.0) == stats.truncnorm.ppf(1.0, a, b, loc=mean, scale=sd)
        assert np.ndim(prior.ppf(0.3)) == 0
