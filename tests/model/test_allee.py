"""Allee effects in growth (impact.model.terms.mate_finding, strong_allee) against their closed forms,
and the case keys that declare them."""

from __future__ import annotations

import numpy as np
import pytest

from casefiles import write_case
from impact.case import load_case
from impact.engine.jacobian import jacobian
from impact.errors import CaseError
from impact.model import Controls, build_web, rhs, web_params
from test_model import one_species_case, simulate

R, K, A = 0.8, 100.0, 20.0


def _strong(N0, horizon=60.0, threshold=A):
    sp = {"name": "plant", "growth": "logistic", "growth_rate": R, "carrying_capacity": K, "initial": float(N0),
          "quasi_extinction": 0.0, "allee": "strong", "allee_threshold": threshold}
    return one_species_case(sp, horizon=horizon)


def _at(tmp_path, data, N):
    """Right-hand side and Jacobian of a one-species case at abundances N (one member each)."""
    case = load_case(write_case(tmp_path, data))
    web = build_web(case)
    M = len(N)
    p = web_params(case, {}, M)
    c = Controls.neutral(M, 1)
    y = np.asarray(N, float)[:, None]
    idx = np.arange(M)
    return rhs(web, p, c, y, idx)[:, 0], jacobian(web, p, c, y, idx)[:, 0, 0]


def test_strong_allee_equilibria_and_their_stability(tmp_path):
    # The strong Allee model dN/dt = r N (1 − N/K)(N/A − 1) (Lewis & Kareiva 1993; Courchamp, Berec &
    # Gascoigne 2008, ch. 2; the form from memory): equilibria 0, A, K; by differentiating the
    # closed form, f'(0) = −r, f'(A) = r (1 − A/K) > 0 (unstable), f'(K) = −r (K/A − 1) < 0.
    f, J = _at(tmp_path, _strong(1.0), [0.0, A, K, 50.0])
    np.testing.assert_allclose(f[:3], 0.0, atol=1e-12)
    np.testing.assert_allclose(f[3], R * 50.0 * (1 - 50.0 / K) * (50.0 / A - 1), rtol=1e-14)
    np.testing.assert_allclose(J[:3], [-R, R * (1 - A / K), -R * (K / A - 1)], rtol=1e-12)


@pytest.mark.parametrize("factor, persists", [(0.95, False), (1.05, True)])
def test_strong_allee_started_near_the_threshold_goes_the_way_the_closed_form_says(tmp_path, factor, persists):
    # Below A the closed form's growth is negative down to the stable 0, above it positive up to K
    # (the signs of f on (0, A) and (A, K)); 60 years is many multiples of 1/(r (1 − A/K)).
    case, run = simulate(tmp_path, _strong(factor * A))
    final = run.states[0, -1, 0]
    if persists:
        assert final == pytest.approx(K, rel=1e-4)
    else:
        assert final < 1e-3 * A


def test_mate_finding_threshold_and_its_limit(tmp_path):
    # Mate finding: births b N · N/(N + θ) against deaths d N (Dennis 1989; Boukal & Berec 2002, the
    # mate-finding function; from memory). Per capita growth b N/(N + θ) − d vanishes at
    # N* = d θ/(b − d), a strong Allee threshold (derived from that form); as θ → 0 the term
    # leaves the exponential model b N − d N.
    b, d, theta = 0.6, 0.2, 5.0
    sp = {"name": "fly", "growth": "exponential", "growth_rate": b, "mortality": d, "initial": 1.0,
          "quasi_extinction": 0.0, "allee": "mate-finding", "allee_threshold": theta}
    star = d * theta / (b - d)
    f, J = _at(tmp_path, one_species_case(sp), [star, 30.0])
    assert abs(f[0]) < 1e-14
    np.testing.assert_allclose(f[1], b * 30.0 * 30.0 / (30.0 + theta) - d * 30.0, rtol=1e-14)
    # d/dN [b N²/(N + θ) − d N] at N* = b N*(N* + 2θ)/(N* + θ)² − d > 0: unstable
    np.testing.assert_allclose(J[0], b * star * (star + 2 * theta) / (star + theta) ** 2 - d, rtol=1e-12)
    assert J[0] > 0
    for N0, grows in ((1.05 * star, True), (0.95 * star, False)):
        _, run = simulate(tmp_path, one_species_case({**sp, "initial": N0}, horizon=60.0))
        assert (run.states[0, -1, 0] > 10 * N0) if grows else (run.states[0, -1, 0] < 0.1 * N0)
    sp_small = {**sp, "allee_threshold": 1e-9}
    f_small, _ = _at(tmp_path, one_species_case(sp_small), [30.0])
    np.testing.assert_allclose(f_small[0], (b - d) * 30.0, rtol=1e-9)


def test_allee_threshold_may_be_uncertain(tmp_path):
    """A threshold named as a parameter takes each member's drawn value."""
    data = _strong(30.0)
    data["species"][0]["allee_threshold"] = "threshold"
    data["parameters"] = {"threshold": {"distribution": "uniform", "low": 10.0, "high": 40.0, "unit": "plants",
                                        "source": "invented"}}
    case = load_case(write_case(tmp_path, data))
    p = web_params(case, {"threshold": np.array([10.0, 40.0])}, 2)
    np.testing.assert_array_equal(p.allee[:, 0], [10.0, 40.0])
    f = rhs(build_web(case), p, Controls.neutral(2, 1), np.full((2, 1), 30.0), np.arange(2))[:, 0]
    assert f[0] > 0 > f[1]  # above one member's threshold, below the other's


BAD = [
    ("unknown form", {"allee": "weak"}, "species.plant.allee", "choose one of"),
    ("strong without logistic growth", {"growth": "exponential", "carrying_capacity": None},
     "species.plant.allee", "logistic"),
    ("threshold above K", {"allee_threshold": 150.0}, "species.plant.allee_threshold", "below the carrying capacity"),
    ("threshold not positive", {"allee_threshold": 0.0}, "species.plant.allee_threshold", "> 0"),
    ("threshold without a form", {"allee": None}, "species.plant.allee_threshold", "without an Allee effect"),
    ("form without a threshold", {"allee_threshold": None}, "species.plant.allee_threshold", "required"),
]


@pytest.mark.parametrize("desc, edit, field, words", BAD, ids=[b[0] for b in BAD])
def test_bad_allee_keys_name_the_field(tmp_path, desc, edit, field, words):
    data = _strong(30.0)
    sp = data["species"][0]
    for k, v in edit.items():
        if v is None:
            sp.pop(k)
        else:
            sp[k] = v
    with pytest.raises(CaseError) as err:
        load_case(write_case(tmp_path, data))
    assert err.value.field == field
    assert words in err.value.message
