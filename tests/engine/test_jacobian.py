"""Analytic Jacobian of the food-web right-hand side against central finite differences.

Reference: the derivative definition itself, approximated by central differences with error
O(ε²) (e.g. Press et al. 2007, Numerical Recipes 3rd ed., Sec. 5.7); agreement to ~1e-6
relative is what a correct analytic Jacobian gives at ε ~ 1e-5 relative.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from casefiles import web_case, write_case
from impact.case import load_case
from impact.engine.jacobian import WebTangent, jacobian, tangent
from impact.model import Controls, build_web, rhs, web_params
from impact.ensemble.sample import parameter_values


def _web_with(tmp_path, response):
    data = web_case()
    data["interactions"][0]["response"] = response  # hare on grass: every response type
    data["species"].append({"name": "rabbit", "growth": "logistic", "growth_rate": 0.7, "carrying_capacity": 300.0,
                            "initial": 50.0, "quasi_extinction": 1.0})
    data["interactions"] += [
        {"type": "competition", "species": "grass", "competitor": "rabbit", "coefficient": 0.3},
        {"type": "competition", "species": "rabbit", "competitor": "grass", "coefficient": 0.1},
        {"type": "predation", "predator": "fox", "prey": "rabbit", "response": "holling3", "attack_rate": 0.01,
         "handling_time": 0.3, "efficiency": 0.1},
        {"type": "mutualism", "beneficiary": "rabbit", "partner": "grass", "max_benefit": 0.5, "half_saturation": 100.0},
    ]
    case = load_case(write_case(tmp_path, data))
    return case, build_web(case)


def _web_with_new_terms(tmp_path, response):
    """The web of :func:`_web_with` plus an obligate pair (flower on moth), crowding mortality, a
    Beddington–DeAngelis fox with an alternative food, sterile releases on the hare and a juvenile
    stage (leverets) of the hare; the moth breeds in a sinusoidal season and needs mates (a
    mate-finding Allee effect), the flower has a strong Allee effect and the leverets are diluted
    prey of a generalist predator outside the web (a predator-dilution Allee effect on a juvenile
    stage)."""
    data = web_case()
    data["interactions"][0]["response"] = response
    data["interactions"][1]["response"] = "beddington-deangelis"  # fox on hare
    data["interactions"][1]["interference"] = 0.2
    data["species"][2]["crowding_mortality"] = 0.01
    data["seasons"] = {"length": 1.0, "parts": 12, "part_name": "month"}
    data["species"] += [
        {"name": "moth", "growth": "logistic", "growth_rate": 1.5, "carrying_capacity": 80.0, "initial": 30.0,
         "quasi_extinction": 1.0, "crowding_mortality": 0.002, "breeding_season": {"amplitude": 0.7, "peak": 7},
         "allee": "mate-finding", "allee_threshold": 10.0},
        {"name": "flower", "growth": "logistic", "growth_rate": 0.8, "carrying_capacity": 300.0, "mortality": 0.1,
         "initial": 100.0, "quasi_extinction": 1.0, "allee": "strong", "allee_threshold": 40.0}]
    data["interactions"] += [
        {"kind": "mutualism", "dependence": "obligate", "beneficiary": "flower", "partner": "moth", "half_saturation": 20.0},
        {"kind": "mutualism", "dependence": "obligate", "beneficiary": "flower", "partner": "beetle", "half_saturation": 3.0},
        {"kind": "mutualism", "beneficiary": "moth", "partner": "flower", "max_benefit": 0.5, "half_saturation": 50.0},
        {"kind": "predation", "predator": "hare", "prey": "flower", "response": response, "attack_rate": 0.001,
         "handling_time": 0.1, "efficiency": 0.2},
        {"kind": "alternative-food", "consumer": "fox", "density": 50.0, "response": "beddington-deangelis",
         "interference": 0.2, "attack_rate": 0.01, "handling_time": 0.2, "efficiency": 0.05}]
    data["interventions"].append({"name": "sterile hares", "kind": "sterile-release", "species": "hare",
                                  "sterile_density": 30.0})
    data["species"].append({"name": "leveret", "growth": "none", "mortality": 0.3, "initial": 20.0, "quasi_extinction": 1.0,
                            "matures_into": "hare", "maturation_rate": 0.8, "allee": "predator-dilution",
                            "allee_threshold": 15.0, "dilution_rate": 4.0})
    data["interactions"].append({"kind": "predation", "predator": "fox", "prey": "leveret", "response": "beddington-deangelis",
                                 "interference": 0.2, "attack_rate": 0.05, "handling_time": 0.1, "efficiency": 0.1})
    case = load_case(write_case(tmp_path, data))
    return case, build_web(case)


def _fd_jacobian(f, y, eps):
    m, n = y.shape
    J = np.empty((m, n, n))
    for j in range(n):
        step = eps * np.maximum(np.abs(y[:, j]), 1.0)
        yp, ym = y.copy(), y.copy()
        yp[:, j] += step
        ym[:, j] -= step
        J[:, :, j] = (f(yp) - f(ym)) / (2 * step[:, None])
    return J


def _random_point(tmp_path, response, controlled, seed, M=5, new_terms=False):
    """A web with one response type, M members' parameters, controls (neutral or random) and states."""
    case, web = (_web_with_new_terms if new_terms else _web_with)(tmp_path, response)
    rng = np.random.default_rng(seed)
    values = parameter_values(case, rng.random((M, len(case.uncertain))))
    p = web_params(case, values, M)
    S = web.n_species
    c = Controls.neutral(M, S)
    if controlled:
        c = Controls(phi=rng.uniform(0.7, 1.3, (M, S)), fertility=rng.uniform(0, 0.5, (M, S)),
                     habitat=rng.uniform(0.5, 1.5, (M, S)), harvest=rng.uniform(0, 0.3, (M, S)),
                     carcass=(rng.random((M, S)) < 0.5).astype(float),
                     sterile=rng.uniform(0, 40, (M, S)) * (rng.random((M, S)) < 0.7))
    y = rng.uniform(0.5, 2.0, (M, web.n_state)) * np.concatenate([p.initial[:, :S], np.full((M, 1), 20.0)], axis=1)
    return web, p, c, y, rng


@pytest.mark.parametrize("response", ["holling1", "holling2", "holling3"])
@pytest.mark.parametrize("controlled", [False, True])
@pytest.mark.parametrize("new_terms", [False, True])
def test_jacobian_matches_central_differences(tmp_path, response, controlled, new_terms):
    web, p, c, y, rng = _random_point(tmp_path, response, controlled, 1, new_terms=new_terms)
    M = y.shape[0]
    idx = np.arange(M)
    t = rng.uniform(0.0, 3.0, M)  # times matter for a sinusoidal breeding season
    J = jacobian(web, p, c, y, idx, t)
    Jfd = _fd_jacobian(lambda yy: rhs(web, p, c, yy, idx, t), y, 1e-6)
    scale = np.abs(Jfd).max(axis=2, keepdims=True) + 1e-12
    assert np.all(np.abs(J - Jfd) / scale < 1e-6)


def test_jacobian_rows_follow_member_indices(tmp_path):
    """Row k uses member idx[k]'s parameters (the ensemble-integrator contract)."""
    case, web = _web_with(tmp_path, "holling2")
    M = 4
    values = parameter_values(case, np.random.default_rng(2).random((M, len(case.uncertain))))
    p = web_params(case, values, M)
    c = Controls.neutral(M, web.n_species)
    y = np.abs(p.initial) + 1.0
    idx = np.array([3, 1])
    J_sub = jacobian(web, p, c, y[idx], idx)
    J_all = jacobian(web, p, c, y, np.arange(M))
    np.testing.assert_array_equal(J_sub, J_all[idx])


def test_tangent_is_the_matrix_vector_product():
    """J v per member equals numpy's matmul on each member separately (definition of the product)."""
    rng = np.random.default_rng(3)
    J, v = rng.normal(size=(6, 4, 4)), rng.normal(size=(6, 4))
    ref = np.stack([J[k] @ v[k] for k in range(6)])
    np.testing.assert_allclose(tangent(J, v), ref, rtol=1e-13, atol=1e-13)


@pytest.mark.parametrize("response", ["holling1", "holling2", "holling3"])
@pytest.mark.parametrize("controlled", [False, True])
@pytest.mark.parametrize("new_terms", [False, True])
def test_directional_derivative_matches_central_differences(tmp_path, response, controlled, new_terms):
    """J·v without forming J equals (f(y + εv) − f(y − εv))/(2ε) to O(ε²) (Press et al. 2007, Sec. 5.7)."""
    web, p, c, y, rng = _random_point(tmp_path, response, controlled, 4, new_terms=new_terms)
    M = y.shape[0]
    v = rng.normal(size=y.shape) * y  # perturbations on the scale of each state
    idx = np.arange(M)
    t = rng.uniform(0.0, 3.0, M)
    f, jv = WebTangent(web, p, c)(t, y, v, idx)
    np.testing.assert_allclose(f, rhs(web, p, c, y, idx, t), rtol=1e-13, atol=1e-12)
    eps = 1e-6
    fd = (rhs(web, p, c, y + eps * v, idx, t) - rhs(web, p, c, y - eps * v, idx, t)) / (2 * eps)
    scale = np.abs(fd).max(axis=1, keepdims=True) + 1e-12
    assert np.all(np.abs(jv - fd) / scale < 1e-6)


@pytest.mark.parametrize("response", ["holling1", "holling2", "holling3"])
@pytest.mark.parametrize("controlled", [False, True])
def test_compiled_tangent_equals_the_numpy_reference(tmp_path, response, controlled):
    """The compiled (f, J·v) does the numpy reference's arithmetic in the same order: equal to
    rounding (a few ulps), member by member, whatever the batch."""
    web, p, c, y, rng = _random_point(tmp_path, response, controlled, 4)
    M = y.shape[0]
    v = rng.normal(size=y.shape) * y
    idx = np.arange(M)
    ref_f, ref_jv = WebTangent(web, p, c, engine="numpy")(None, y, v, idx)
    f, jv = WebTangent(web, p, c, engine="compiled")(None, y, v, idx)
    np.testing.assert_allclose(f, ref_f, rtol=1e-14, atol=1e-300)
    np.testing.assert_allclose(jv, ref_jv, rtol=1e-13, atol=1e-12 * np.abs(ref_jv).max())
    # a member's numbers never depend on its batch
    sub = idx[::2]
    f2, jv2 = WebTangent(web, p, c, engine="compiled")(None, y[sub], v[sub], sub)
    np.testing.assert_array_equal(f2, f[sub])
    np.testing.assert_array_equal(jv2, jv[sub])


CASEWORK = Path(__file__).resolve().parents[2] / "casework"


@pytest.mark.parametrize("name", ["island_mesopredator", "moth_pollinator", "orchard_biocontrol", "predator_prey"])
def test_compiled_tangent_of_every_casework_web_equals_the_numpy_reference(name):
    """Every term has a compiled J·v (the pollinator web's obligate mutualism, interference, crowding,
    sterile releases, life stages, alternative food included): it equals the numpy J·v to rtol 1e-10
    (both run the same generated statements, so in fact to the bit)."""
    case = load_case(CASEWORK / f"{name}.toml")
    web = build_web(case)
    M = 6
    rng = np.random.default_rng(3)
    values = parameter_values(case, rng.random((M, len(case.uncertain))))
    p = web_params(case, values, M)
    S = web.n_species
    c = Controls.neutral(M, S)
    if web.sterile:
        c = Controls(c.phi, c.fertility, c.habitat, c.harvest, c.carcass,
                     sterile=rng.uniform(0, 40, (M, S)) * (rng.random((M, S)) < 0.7))
    jvp = WebTangent(web, p, c)
    assert jvp.engine == "compiled" and jvp.structure is not None
    y = (np.abs(p.initial) + 1.0) * rng.uniform(0.3, 3.0, p.initial.shape)
    v = rng.normal(size=y.shape)
    t = rng.uniform(0.0, 2.0, M)
    idx = np.arange(M)
    f, jv = jvp(t, y, v, idx)
    ref_f, ref_jv = WebTangent(web, p, c, engine="numpy")(t, y, v, idx)
    np.testing.assert_allclose(f, ref_f, rtol=1e-10, atol=0)
    np.testing.assert_allclose(jv, ref_jv, rtol=1e-10, atol=1e-10 * np.abs(ref_jv).max())
    np.testing.assert_array_equal(jv, ref_jv)
    np.testing.assert_array_equal(f, rhs(web, p, c, y, idx, t))


def _complex_step(web, p, c, y, v, idx, t, h=1e-30):
    """J·v as Im f(y + i h v) / h (Squire & Trapp 1998, SIAM Review 40:110-112): no subtraction, so
    the only error is O(h²) truncation (nil at h = 1e-30) plus rounding of f itself."""
    from impact.model import WebRHS

    return WebRHS(web, p, c)(t, y + 1j * h * v, idx).imag / h


@pytest.mark.parametrize("response", ["holling1", "holling2", "holling3"])
@pytest.mark.parametrize("controlled", [False, True])
def test_every_terms_derivative_equals_the_complex_step_derivative(tmp_path, response, controlled):
    """The generated J·v and Jacobian of every declared term against complex-step derivatives of the
    generated right-hand side, on random states: relative error below 1e-12 of each row's largest
    entry (complex-step derivatives are exact to rounding; the analytic ones differ by rounding in a
    handful of operations)."""
    from impact.model.terms import TERMS, Structure, pack_structure

    web, p, c, y, rng = _random_point(tmp_path, response, controlled, 7, new_terms=True)
    s = Structure.decode(pack_structure(web))
    assert all(term(s) for term in TERMS), "the web exercises every declared term"
    M, n = y.shape
    idx = np.arange(M)
    t = rng.uniform(0.0, 3.0, M)
    J = jacobian(web, p, c, y, idx, t)
    for k in range(n + 2):
        v = np.eye(n)[k] * np.ones((M, 1)) if k < n else rng.normal(size=y.shape) * y
        want = _complex_step(web, p, c, y, v, idx, t)
        scale = np.abs(want).max(axis=1, keepdims=True) + 1e-300
        for engine in ("numpy", "compiled"):
            _, jv = WebTangent(web, p, c, engine=engine)(t, y, v, idx)
            assert np.all(np.abs(jv - want) <= 1e-12 * scale), engine
        assert np.all(np.abs(tangent(J, v) - want) <= 1e-12 * scale * n)


def test_coefficient_rows_follow_the_declared_layout():
    """The blocks of SegmentCoefficients are the blocks the declared terms read, in the same order."""
    from impact.model import SegmentCoefficients
    from impact.model.terms import APPENDED_COEFFICIENTS, LINK_COEFFICIENTS, SPECIES_COEFFICIENTS

    assert tuple(SegmentCoefficients.__dataclass_fields__) == (
        SPECIES_COEFFICIENTS + LINK_COEFFICIENTS + ("alpha", "beta", "H", "obH", "decay") + APPENDED_COEFFICIENTS)


def test_a_new_term_is_one_declaration(tmp_path, monkeypatch):
    """A term appended to the declarations reaches the numpy reference, the Jacobian, the generated
    kernel source and J·v at once.
    The invented term: constant immigration ι into the first species, dN₀/dt += ι (ι = 0.75): the
    right-hand side grows by exactly ι in that row and the Jacobian does not change."""
    from impact.model import terms
    from impact.engine import generate

    web, p, c, y, rng = _random_point(tmp_path, "holling2", False, 3)
    idx = np.arange(y.shape[0])
    f0, J0 = rhs(web, p, c, y, idx), jacobian(web, p, c, y, idx)

    def immigration(s):
        return [terms.update("o0", "+", 0.75)]

    monkeypatch.setattr(terms, "TERMS", terms.TERMS + (immigration,))
    monkeypatch.setattr(terms, "_numpy_cache", {})
    f1, J1 = rhs(web, p, c, y, idx), jacobian(web, p, c, y, idx)
    np.testing.assert_array_equal(f1[:, 1:], f0[:, 1:])
    np.testing.assert_array_equal(f1[:, 0], f0[:, 0] + 0.75)
    np.testing.assert_array_equal(J1, J0)
    st = terms.pack_structure(web)
    assert "o0 = (o0 + 0.75)" in generate.rhs_source(st)
    assert any("o0 = (o0 + 0.75)" in line for line in generate.jvp_lines(st, str, str, str, str)[0])
