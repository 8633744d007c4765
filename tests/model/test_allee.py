"""Allee effects (impact.model.terms.mate_finding, strong_allee, predator_dilution) against their closed forms,
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


def _refused(tmp_path, data: dict, edit: dict, field: str, words: str):
    """The case ``data`` with its first species' keys edited (None removes a key) is refused naming ``field``."""
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


@pytest.mark.parametrize("desc, edit, field, words", BAD, ids=[b[0] for b in BAD])
def test_bad_allee_keys_name_the_field(tmp_path, desc, edit, field, words):
    _refused(tmp_path, _strong(30.0), edit, field, words)


# --- predator dilution (impact.model.terms.predator_dilution) ----------------------------------------

# dN/dt = r N (1 − N/K) − D N/(N + h): logistic prey of a generalist predator outside the web whose
# type II response saturates (Gascoigne & Lipcius 2004, Mar Ecol Prog Ser 269:49–59; Courchamp, Berec
# & Gascoigne 2008, ch. 2: predation with a saturating response can make a strong Allee effect). Its
# positive equilibria solve r (1 − N/K)(N + h) = D, i.e. N² − (K − h) N + K (D/r − h) = 0 (rearranged
# by hand); with D/r > h both roots are positive and 0 is stable (f'(0) = r − D/h < 0).
PR, PK, PD, PH = 1.0, 100.0, 20.0, 10.0


def _roots(r=PR, K=PK, D=PD, h=PH):
    b, c = K - h, K * (D / r - h)
    disc = np.sqrt(b * b - 4.0 * c)
    return (b - disc) / 2.0, (b + disc) / 2.0


def _diluted(N0, horizon=80.0, **edit):
    sp = {"name": "snail", "growth": "logistic", "growth_rate": PR, "carrying_capacity": PK, "initial": float(N0),
          "quasi_extinction": 0.0, "allee": "predator-dilution", "allee_threshold": PH, "dilution_rate": PD}
    return one_species_case({**sp, **edit}, horizon=horizon)


def test_predator_dilution_equilibria_are_the_roots_of_the_closed_form(tmp_path):
    low, high = _roots()
    assert 0.0 < low < high < PK and PD / PR > PH  # three equilibria 0 < A < C, 0 stable
    f, J = _at(tmp_path, _diluted(1.0), [low, high, 0.0, 50.0])
    scale = PD * np.array([low / (low + PH), high / (high + PH)])  # the size of each balanced term
    assert np.all(np.abs(f[:2]) <= 1e-10 * scale)
    np.testing.assert_allclose(f[3], PR * 50.0 * (1 - 50.0 / PK) - PD * 50.0 / (50.0 + PH), rtol=1e-14)
    # f'(N) = r (1 − 2N/K) − D h/(N + h)², differentiated by hand: A unstable, C and 0 stable
    Nx = np.array([low, high, 0.0, 50.0])
    np.testing.assert_allclose(J, PR * (1 - 2 * Nx / PK) - PD * PH / (Nx + PH) ** 2, rtol=1e-12, atol=1e-14)
    assert J[0] > 0 > J[1] and J[2] < 0


@pytest.mark.parametrize("factor, persists", [(0.95, False), (1.05, True)])
def test_predator_dilution_started_near_the_lower_root_goes_the_way_the_closed_form_says(tmp_path, factor,
                                                                                          persists):
    # f < 0 on (0, A) and f > 0 on (A, C) (the sign of r (1 − N/K)(N + h) − D); 80 years is many
    # multiples of 1/|f'| at A, C and 0 (≈ 2.8, 1.8 and 1 year here)
    low, high = _roots()
    _, run = simulate(tmp_path, _diluted(factor * low))
    final = run.states[0, -1, 0]
    if persists:
        assert final == pytest.approx(high, rel=1e-4)
    else:
        assert final < 1e-3 * low


def test_predator_dilution_is_a_loss_in_the_births_and_deaths_split(tmp_path):
    # Counting individuals needs births and deaths apart (impact.model.split): the predator's
    # removals D N/(N + h) are deaths, beside the logistic crowding r N²/K; births stay r N.
    from impact.model import pack_coefficients, segment_coefficients
    from impact.model.split import numpy_split
    from impact.model.terms import pack_structure

    case = load_case(write_case(tmp_path, _diluted(1.0)))
    web = build_web(case)
    N = np.array([[5.0], [40.0]])
    cf = np.ascontiguousarray(pack_coefficients(segment_coefficients(web, web_params(case, {}, 2),
                                                                     Controls.neutral(2, 1))).T)
    g, l = np.empty_like(N), np.empty_like(N)
    numpy_split(pack_structure(web))(None, N, cf, g, l)
    np.testing.assert_allclose(g, PR * N, rtol=1e-14)
    np.testing.assert_allclose(l, PR * N * N / PK + PD * N / (N + PH), rtol=1e-14)


def test_predator_dilution_acts_on_any_growth_form_and_its_keys_may_be_uncertain(tmp_path):
    """A juvenile-free species without growth (only losses): dN/dt = −m N − D N/(N + h), with D and
    h drawn per member."""
    data = _diluted(30.0, growth="none", mortality=0.1, dilution_rate="removals", allee_threshold="half")
    for k in ("growth_rate", "carrying_capacity"):
        data["species"][0].pop(k)
    data["parameters"] = {
        "removals": {"distribution": "uniform", "low": 5.0, "high": 40.0, "unit": "snails per year", "source": "invented"},
        "half": {"distribution": "uniform", "low": 2.0, "high": 20.0, "unit": "individuals", "source": "invented"}}
    case = load_case(write_case(tmp_path, data))
    p = web_params(case, {"removals": np.array([5.0, 40.0]), "half": np.array([2.0, 20.0])}, 2)
    np.testing.assert_array_equal(p.dilution[:, 0], [5.0, 40.0])
    np.testing.assert_array_equal(p.allee[:, 0], [2.0, 20.0])
    f = rhs(build_web(case), p, Controls.neutral(2, 1), np.full((2, 1), 30.0), np.arange(2))[:, 0]
    np.testing.assert_allclose(f, -0.1 * 30.0 - np.array([5.0, 40.0]) * 30.0 / (30.0 + np.array([2.0, 20.0])),
                               rtol=1e-14)


BAD_DILUTION = [
    ("no removal rate", {"dilution_rate": None}, "species.snail.dilution_rate", "required"),
    ("no half-saturation", {"allee_threshold": None}, "species.snail.allee_threshold", "required"),
    ("negative removal rate", {"dilution_rate": -1.0}, "species.snail.dilution_rate", ">= 0"),
    ("half-saturation not positive", {"allee_threshold": 0.0}, "species.snail.allee_threshold", "> 0"),
    ("removal rate without the form", {"allee": None, "allee_threshold": None}, "species.snail.dilution_rate",
     "predator-dilution"),
    ("removal rate with another form", {"allee": "mate-finding"}, "species.snail.dilution_rate", "predator-dilution"),
]


@pytest.mark.parametrize("desc, edit, field, words", BAD_DILUTION, ids=[b[0] for b in BAD_DILUTION])
def test_bad_predator_dilution_keys_name_the_field(tmp_path, desc, edit, field, words):
    _refused(tmp_path, _diluted(30.0), edit, field, words)


def test_predator_dilution_on_a_juvenile_stage_is_allowed_the_breeding_forms_are_not(tmp_path):
    """A loss to predation acts on juveniles too; mate finding (a change in breeding) is refused there."""
    adult = {"name": "crab", "growth": "logistic", "growth_rate": 1.0, "carrying_capacity": 50.0, "initial": 10.0,
             "quasi_extinction": 0.0}
    young = {"name": "juvenile crab", "growth": "none", "mortality": 0.2, "initial": 5.0, "quasi_extinction": 0.0,
             "matures_into": "crab", "maturation_rate": 0.5, "allee": "predator-dilution", "allee_threshold": 4.0,
             "dilution_rate": 3.0}
    case = load_case(write_case(tmp_path, one_species_case([adult, young])))
    assert dict(build_web(case).allee) == {1: "predator-dilution"}
    young = {**young, "allee": "mate-finding"}
    young.pop("dilution_rate")
    with pytest.raises(CaseError) as err:
        load_case(write_case(tmp_path, one_species_case([adult, young])))
    assert err.value.field == "species.juvenile crab.allee"


def test_predator_dilution_in_the_equations_and_the_command_line(tmp_path, capsys):
    """The manifest's equations and ``impact check`` name the form; a refused key exits with 2 and
    the field's name, without a traceback (the project's rule for bad input)."""
    from impact.cli import main
    from impact.model import equations

    path = write_case(tmp_path, _diluted(30.0))
    assert any("predator dilution" in line and "Gascoigne & Lipcius 2004" in line
               for line in equations(load_case(path)))
    assert main(["check", str(path)]) == 0
    assert "predator-dilution Allee effect" in capsys.readouterr().out
    data = _diluted(30.0)
    data["species"][0]["dilution_rate"] = -2.0
    assert main(["check", str(write_case(tmp_path, data))]) == 2
    err = capsys.readouterr().err
    assert "species.snail.dilution_rate" in err and "Traceback" not in err
