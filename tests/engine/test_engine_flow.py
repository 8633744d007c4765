"""The compiled tangent flow against the numpy step loop, and the batch-independence rule.

The reference is :func:`impact.dynamics.lyapunov.lyapunov_flow` with ``engine="numpy"``: the numpy
ensemble stepper (:func:`impact.engine.integrate.integrate_segment`) with the tangent riding along and
the Benettin renormalisation in an observer. The compiled flow (generated per structure from the
declared terms) does the same arithmetic in the same order, so with the same J·v the contract
is equality to the bit (DEVELOPERS.md; common practice, no published source). The published
checks of the exponents themselves (Lorenz, Hastings–Powell, Rosenzweig–MacArthur) are in
test_dynamics.py and test_regimes.py and run through the compiled flow.
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from impact.case import load_case
from impact.dynamics.lyapunov import lyapunov_flow
from impact.engine import flow, generate
from impact.engine.control import Failure
from impact.engine.web import pack_coefficients, pack_structure
from impact.engine.jacobian import WebTangent
from impact.model import Controls, WebRHS, build_web, segment_coefficients, web_params
from impact.ensemble.sample import parameter_values
from test_engine import random_web

CASEWORK = Path(__file__).resolve().parents[2] / "casework"
DEMO = CASEWORK / "island_mesopredator.toml"
# the casework webs the compiled J·v covers (moth_pollinator has an obligate partner: numpy step loop)
COVERED = ["island_mesopredator", "orchard_biocontrol", "predator_prey"]
FIELDS = ("lyapunov", "low", "high", "mean", "final", "reason")


def members(path: Path):
    """Six members of a case: one with a species absent (its tangent lives on a face), the rest varied."""
    case = load_case(path)
    web = build_web(case)
    M = 6
    rng = np.random.default_rng(3)
    p = web_params(case, parameter_values(case, rng.random((M, len(case.uncertain)))), M)
    c = Controls.neutral(M, web.n_species)
    y0 = np.abs(p.initial) * rng.uniform(0.5, 1.5, p.initial.shape)
    y0[1, 0] = 0.0  # an absent species stays absent: the perturbation is confined to the others
    return web, p, c, y0


@pytest.fixture(scope="module")
def demo():
    return members(DEMO)


def same(a, b):
    for f in FIELDS:
        np.testing.assert_array_equal(getattr(a, f), getattr(b, f), err_msg=f)
    assert len(a.sections) == len(b.sections)
    for x, y in zip(a.sections, b.sections):
        np.testing.assert_array_equal(x, y)


@pytest.mark.parametrize("name", COVERED)
def test_compiled_flow_equals_the_numpy_step_loop_to_the_bit(name):
    web, p, c, y0 = members(CASEWORK / f"{name}.toml")
    jvp = WebTangent(web, p, c)
    assert jvp.structure is not None  # a web the compiled J·v covers
    kw = dict(transient=3.0, window=12.0, sample_dt=0.25, section=web.n_species - 1, rtol=1e-6, atol=1e-9, jvp=jvp)
    ref = lyapunov_flow(None, None, y0, engine="numpy", **kw)
    got = lyapunov_flow(None, None, y0, engine="compiled", **kw)
    assert (ref.reason == 0).all()  # the comparison means something
    if name == "island_mesopredator":
        assert sum(s.size for s in ref.sections) > 0  # ... including section maxima
    same(got, ref)
    # no transient: the window's first step is chosen from scratch
    same(lyapunov_flow(None, None, y0, engine="compiled", **{**kw, "transient": 0.0}),
         lyapunov_flow(None, None, y0, engine="numpy", **{**kw, "transient": 0.0}))


def test_member_alone_equals_member_in_a_batch_with_failing_members(demo):
    # A batch with a non-finite start state and a member whose coefficients are not finite (both
    # fail as non-finite); every other member's numbers are those it has alone, to the bit.
    web, p, c, y0 = demo
    r = p.r.copy()
    r[4, 0] = np.nan
    p = replace(p, r=r)
    y0 = y0.copy()
    y0[2, 1] = np.nan
    jvp = WebTangent(web, p, c)
    kw = dict(transient=2.0, window=6.0, sample_dt=0.25, section=3, rtol=1e-6, atol=1e-9, jvp=jvp)
    batch = lyapunov_flow(None, None, y0, **kw)
    assert list(batch.reason) == [0, 0, Failure.NONFINITE, 0, Failure.NONFINITE, 0]
    assert np.isnan(batch.lyapunov[[2, 4]]).all() and np.isfinite(batch.lyapunov[[0, 1, 3, 5]]).all()
    for k in range(len(y0)):
        alone = lyapunov_flow(None, None, y0[k:k + 1], members=np.array([k]), **kw)
        for f in FIELDS:
            np.testing.assert_array_equal(getattr(alone, f)[0], getattr(batch, f)[k], err_msg=f)
        np.testing.assert_array_equal(alone.sections[0], batch.sections[k])
    # and the numpy step loop agrees on the failing batch too
    same(batch, lyapunov_flow(None, None, y0, engine="numpy", **kw))


def test_every_section_value_is_kept_beyond_the_first_buffer(demo, monkeypatch):
    # A member with more maxima than the kernel's buffer is run again with room for all of them.
    web, p, c, y0 = demo
    kw = dict(transient=3.0, window=12.0, sample_dt=0.25, section=3, rtol=1e-6, atol=1e-9, jvp=WebTangent(web, p, c))
    full = lyapunov_flow(None, None, y0, **kw)
    counts = np.array([s.size for s in full.sections])
    assert counts.max() >= 2
    monkeypatch.setattr(flow, "SECTION_CAPACITY", 1)
    small = lyapunov_flow(None, None, y0, **kw)
    same(small, full)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_generated_jvp_of_one_member_equals_the_numpy_jvp_and_the_complex_step_derivative(seed):
    # The straight-line J·v compiled for one structure, called member by member, does the numpy
    # reference's operations (the same generated statements on whole columns) in its order: equal
    # to the bit. Both are checked against the complex-step derivative of the numpy right-hand side,
    # J·v = Im f(y + i h v)/h (Squire & Trapp 1998, SIAM Review 40:110-112; exact to rounding at
    # h = 1e-30), within 1e-12 of each row's largest entry: a fault in differentiating a term, which
    # both generated J·v would share, shows there.
    web, p, c = random_web(seed, 8)
    st = pack_structure(web)
    coef = pack_coefficients(segment_coefficients(web, p, c), np.arange(8))
    rng = np.random.default_rng(seed)
    y = np.abs(p.initial) * rng.uniform(0.2, 3.0, p.initial.shape)
    y[0, 1] = 0.0
    v = rng.normal(size=y.shape)
    idx = np.arange(len(y))
    module = generate.specialised_flow(st)
    work = np.empty((10, y.shape[1]))
    got = np.empty_like(y), np.empty_like(y)
    for k in range(len(y)):
        module.web_jvp(st, coef[k], 0.0, y[k], v[k], got[0][k], got[1][k], work)
    want = WebTangent(web, p, c, engine="numpy")(None, y, v, idx)
    np.testing.assert_array_equal(got[0], want[0])
    np.testing.assert_array_equal(got[1], want[1])
    h = 1e-30
    exact = WebRHS(web, p, c)(None, y + 1j * h * v, idx).imag / h
    assert np.all(np.abs(got[1] - exact) <= 1e-12 * (np.abs(exact).max(axis=1, keepdims=True) + 1e-300))


def test_random_web_flow_equals_the_numpy_step_loop_to_the_bit():
    web, p, c = random_web(4, 4)
    jvp = WebTangent(web, p, c)
    kw = dict(transient=2.0, window=8.0, sample_dt=0.5, section=web.n_species - 1, rtol=1e-7, atol=1e-10, jvp=jvp)
    ref = lyapunov_flow(None, None, p.initial, engine="numpy", **kw)
    assert (ref.reason == 0).sum() >= 2
    same(lyapunov_flow(None, None, p.initial, **kw), ref)


# --- compiling a never-seen structure's flow in a helper process --------------------------------


def _logistic_web_and_params():
    from impact.model import FoodWeb, WebParams

    web = FoodWeb(species=("a",), has_carrion=False, logistic=np.array([True]), links=(), competition=(),
                  mutualism=(), carrion_yield=np.zeros(1), unit=("n",))
    z = np.zeros((1, 0))
    p = WebParams(r=np.ones((1, 1)), K=np.full((1, 1), 10.0), m=np.zeros((1, 1)), a=z, h=z, e=z, alpha=z, beta=z,
                  H=z, decay=np.zeros(1), initial=np.ones((1, 1)), noise_sd=np.zeros((1, 1)))
    return web, p


@pytest.fixture
def empty_kernel_cache(tmp_path, monkeypatch):
    """An empty kernel cache, no kernel loaded or being compiled by this process."""
    monkeypatch.setenv("IMPACT_KERNEL_CACHE", str(tmp_path))
    monkeypatch.setattr(generate, "_loaded", {})
    monkeypatch.setattr(generate, "_compiling", {})
    return tmp_path


def test_a_never_seen_flow_is_compiled_aside_and_loaded_from_the_disk_cache(empty_kernel_cache):
    web, p = _logistic_web_and_params()
    st = pack_structure(web)
    n_coef = pack_coefficients(segment_coefficients(web, p, Controls.neutral(1, 1))).shape[1]
    assert not generate.flow_cached(st)
    assert generate.compile_flow_aside(st, n_coef)
    assert not generate.compile_flow_aside(st, n_coef)  # one helper per structure
    # the run's own call (its argument types, not the helper's dummy ones) waits for the helper
    # and finds the machine code in numba's disk cache: nothing compiles in this process
    jvp = WebTangent(web, p, Controls.neutral(1, 1))
    out = lyapunov_flow(None, None, np.full((1, 1), 10.0), transient=1.0, window=5.0, sample_dt=0.5, jvp=jvp)
    assert not generate._compiling and generate.flow_cached(st)
    module = generate.specialised_flow(st)
    assert sum(module.flow_batch.stats.cache_hits.values()) == 1
    assert sum(module.flow_batch.stats.cache_misses.values()) == 0
    # At its carrying capacity K the logistic web's one Lyapunov exponent is f'(K) = -r = -1
    # (linear stability of the equilibrium; Strogatz 2015, Nonlinear Dynamics and Chaos, §2.4).
    assert out.lyapunov[0] == pytest.approx(-1.0, rel=1e-4)


def test_a_helper_nobody_waited_for_is_ended_with_the_run(empty_kernel_cache):
    st = pack_structure(_logistic_web_and_params()[0])
    assert generate.compile_flow_aside(st, 13)
    (helper,) = generate._compiling.values()
    generate.stop_compiling()
    assert helper.poll() is not None and not generate._compiling
