"""The compiled engine against the numpy reference, scipy and the batch-independence rule.

The numpy ensemble stepper (``impact.engine.integrate``) is the reference; the compiled kernel
(generated per structure from the same declared terms) must give the same numbers: the contract
checked here is relative 1e-10, and equal step counts (they agree to the bit on this machine).
Closed forms and scipy anchor both: Verhulst's logistic curve and ``solve_ivp`` below.
"""

from __future__ import annotations

import os
import subprocess
from dataclasses import replace
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from casefiles import web_case, write_case
from impact.case import load_case
from impact.engine import generate
from impact.engine.control import Failure
from impact.engine.web import ENGINES, pack_structure, web_segment
from impact.model import Controls, FoodWeb, Link, WebParams, WebRHS, build_web, web_params
from impact.ensemble.sample import event_uniforms, noise_multipliers, parameter_values
from impact.engine.simulate import run_option, run_option_by_segment, spin_up

ROOT = Path(__file__).resolve().parents[2]
CASES = [str(p) for p in sorted((ROOT / "casework").glob("*.toml"))] + ["web_case"]
COMPILED = [e for e in ENGINES if e != "numpy"]
REF_RTOL = 1e-10  # the engine contract of DEVELOPERS.md (no published source)


def load(name: str, tmp_path) -> object:
    return load_case(write_case(tmp_path, web_case()) if name == "web_case" else name)


def ensemble(case, members: int, seed: int = 5):
    rng = np.random.default_rng(np.random.SeedSequence(seed))
    vals = parameter_values(case, rng.uniform(size=(members, len(case.uncertain))))
    return vals, web_params(case, vals, members)


def assert_same(a, b):
    np.testing.assert_allclose(a, b, rtol=REF_RTOL, atol=0.0, equal_nan=True)


@pytest.mark.parametrize("name", CASES, ids=lambda s: Path(s).stem)
def test_spin_up_and_option_runs_match_the_numpy_reference(name, tmp_path):
    case = load(name, tmp_path)
    web = build_web(case)
    M = 12
    vals, p = ensemble(case, M)
    ups = {e: spin_up(case, web, p, engine=e) for e in ENGINES}
    for e in COMPILED:
        for got, ref in zip(ups[e], ups["numpy"]):
            assert_same(got, ref)
    today = ups["numpy"][0]
    draws = np.arange(M)
    noise = noise_multipliers(1, draws, p.noise_sd, int(np.ceil(case.horizon)) + 1) \
        if (p.noise_sd > 0).any() else None
    event_u = {iv.name: event_uniforms(1, draws, iv.name) for iv in case.interventions}
    for opt in [None, *case.options]:
        runs = {e: run_option(case, web, p, vals, today, opt, noise, event_u, engine=e) for e in ENGINES}
        ref = runs["numpy"]
        for e in COMPILED:
            assert np.array_equal(runs[e].reason, ref.reason)
            for field in ("states", "cummin", "cummax"):
                assert_same(getattr(runs[e], field), getattr(ref, field))


def _paired_inputs(case, p, M: int):
    draws = np.arange(M)
    noise = noise_multipliers(1, draws, p.noise_sd, int(np.ceil(case.horizon)) + 1) \
        if (p.noise_sd > 0).any() else None
    return noise, {iv.name: event_uniforms(1, draws, iv.name) for iv in case.interventions}


@pytest.mark.parametrize("name", CASES, ids=lambda s: Path(s).stem)
def test_a_whole_run_in_one_kernel_call_equals_the_run_segment_by_segment(name, tmp_path):
    # The whole-run kernel repeats the per-segment calls' arithmetic (each member continuing from
    # its step size, jumps and running extremes between segments): equal to the bit, same work (the
    # engine contract of DEVELOPERS.md; no published source).
    case = load(name, tmp_path)
    web = build_web(case)
    vals, p = ensemble(case, 10)
    today = spin_up(case, web, p)[0]
    noise, event_u = _paired_inputs(case, p, 10)
    for opt in [None, *case.options]:
        whole = run_option(case, web, p, vals, today, opt, noise, event_u, engine="compiled")
        parts = run_option_by_segment(case, web, p, vals, today, opt, noise, event_u, engine="compiled")
        for field in ("states", "cummin", "cummax", "failed", "reason"):
            assert np.array_equal(getattr(whole, field), getattr(parts, field), equal_nan=True), field
        assert whole.nfev == parts.nfev


def test_a_run_continued_from_its_step_sizes_equals_the_run_in_one_call(tmp_path):
    # Calibration spin-ups run in two calls, the second continuing from the first's end state and
    # step sizes: the same numbers as one call over every boundary (DEVELOPERS.md, no source).
    from impact.engine.web import no_jumps, pack_coefficients, web_run
    from impact.model import segment_coefficients

    case = load("web_case", tmp_path)
    web = build_web(case)
    _, p = ensemble(case, 8)
    coef = pack_coefficients(segment_coefficients(web, p, Controls.neutral(8, web.n_species)), np.arange(8))[None]
    times = np.array([-30.0, -15.0, -5.0, -1.0, 0.0])
    kw = dict(rtol=1e-6, atol=1e-9)
    whole = web_run(web, coef, times, p.initial, no_jumps(4, 8), np.array([-1, -1, 0, 1, 2]), 3, **kw)
    first = web_run(web, coef, times[:2], p.initial, no_jumps(1, 8), np.array([-1, 0]), 1, **kw)
    second = web_run(web, coef, times[1:], first.states[:, 0], no_jumps(3, 8), np.array([-1, 0, 1, 2]), 3,
                     h0=first.h, **kw)
    assert np.array_equal(whole.states, second.states, equal_nan=True)
    assert np.array_equal(whole.h, second.h)
    assert whole.nfev == first.nfev + second.nfev


# --- random webs --------------------------------------------------------------------------------

RESPONSES = ("holling1", "holling2", "holling3")


def random_web(seed: int, members: int, new_terms: bool = False, allee: bool = False):
    """An invented web: 3-5 species, random feeding links (every response), carrion, competition
    and mutualism, with random parameters and controls; returns ``(web, params, controls)``.
    ``new_terms`` adds an obligate partner, predator interference, crowding mortality, sterile
    releases, an alternative food, a juvenile stage and a sinusoidal breeding season; ``allee`` a
    strong Allee effect on species 0, predator dilution on species 1 and mate finding on the last
    species."""
    rng = np.random.default_rng(np.random.SeedSequence(seed))
    S = int(rng.integers(3, 6))
    logistic = np.arange(S) < 2  # two basal species keep the web bounded
    links = {}
    for consumer in range(2, S):
        for resource in rng.choice(consumer, size=int(rng.integers(1, 3)), replace=False):
            links[(consumer, int(resource))] = RESPONSES[int(rng.integers(3))]
    links[(S - 1, S)] = RESPONSES[int(rng.integers(1, 3))]  # a scavenger on the carrion pool
    if new_terms:
        links[(S - 1, -1)] = RESPONSES[int(rng.integers(3))]  # ... with a constant alternative food
    web = FoodWeb(species=tuple(f"s{i}" for i in range(S)), has_carrion=True, logistic=logistic,
                  links=tuple(Link(c, r, resp, "predation") for (c, r), resp in links.items()),
                  competition=((0, 1), (1, 0)), mutualism=((0, S - 1),),
                  carrion_yield=rng.uniform(0, 1, S), unit=("n",) * S,
                  # the scavenger S−1 has a saturating link (on carrion), so it can carry interference
                  # species 1 breeds only with species S−1 or 2 (two obligate partners)
                  obligate=((1, S - 1), (1, 2)) if new_terms else (), interference=(S - 1,) if new_terms else (),
                  crowding=new_terms, sterile=(0, 2) if new_terms else (),
                  stages=((2, 1),) if new_terms else (),  # species 2 is the juvenile stage of species 1
                  wave=(0,) if new_terms else (),  # species 0 breeds in a sinusoidal season
                  allee=((0, "strong"), (1, "predator-dilution"), (S - 1, "mate-finding")) if allee else ())
    L, M = len(web.links), members

    def u(lo, hi, *shape):
        return rng.uniform(lo, hi, size=(M, *shape))

    r = np.where(logistic, u(0.5, 2.0, S), u(-0.2, 0.1, S))
    p = WebParams(r=r, K=np.where(logistic, u(50, 200, S), np.inf), m=np.where(logistic, 0.0, u(0.05, 0.4, S)),
                  a=u(0.001, 0.05, L), h=u(0.05, 0.5, L), e=u(0.1, 0.6, L), alpha=u(0.1, 0.6, 2),
                  beta=u(0.0, 0.4, 1), H=u(1.0, 10.0, 1), decay=u(0.5, 3.0),
                  initial=np.concatenate([u(10, 100, S), u(0, 5, 1)], axis=1), noise_sd=np.zeros((M, S)))
    c = Controls(phi=u(0.8, 1.2, S), fertility=u(0.0, 0.3, S), habitat=u(0.7, 1.3, S),
                 harvest=u(0.0, 0.1, S), carcass=(u(0, 1, S) > 0.5).astype(float))
    if new_terms:
        food = np.array([link.resource < 0 for link in web.links]) * u(1.0, 20.0, L)
        p = replace(p, quad=u(0.0, 0.01, S), obH=u(1.0, 10.0, 2), gamma=u(0.0, 0.5, S), food=food,
                    mat=u(0.2, 2.0, S), amp=u(0.0, 1.0, S), omega=u(3.0, 7.0, S), phase=u(0.0, 6.0, S))
        c = replace(c, sterile=u(0.0, 50.0, S) * (u(0, 1, S) > 0.3))  # some members without releases
    if allee:  # thresholds below most starting densities, so most members persist
        strong, mates, half = u(2.0, 10.0, 1), u(1.0, 10.0, 1), u(5.0, 30.0, 1)
        p = replace(p, allee=np.concatenate([strong, half, np.zeros((M, S - 3)), mates], axis=1),
                    dilution=np.concatenate([np.zeros((M, 1)), u(0.5, 5.0, 1), np.zeros((M, S - 2))], axis=1))
    return web, p, c


# each seed is a web structure of its own, compiled once per machine (about 3 s each); seed 9 adds Allee terms
@pytest.mark.parametrize("seed, new_terms, allee", [(seed, seed >= 6, seed == 9) for seed in range(10)])
def test_random_webs_match_the_numpy_reference(seed, new_terms, allee):
    web, p, c = random_web(seed, 16, new_terms, allee)
    kw = dict(rtol=1e-8, atol=1e-10)
    ref = web_segment(web, p, c, 0.0, 15.0, p.initial, engine="numpy", **kw)
    assert (~ref.failed).sum() >= 8  # most members run through, so the comparison means something
    for e in COMPILED:
        got = web_segment(web, p, c, 0.0, 15.0, p.initial, engine=e, **kw)
        assert np.array_equal(got.reason, ref.reason)
        assert np.array_equal(got.nsteps, ref.nsteps)
        for field in ("y", "ymin", "ymax", "h"):
            assert_same(getattr(got, field), getattr(ref, field))


@pytest.mark.parametrize("seed", [0, 1])
def test_compiled_engine_matches_solve_ivp(seed):
    web, p, c = random_web(seed, 4)
    res = web_segment(web, p, c, 0.0, 10.0, p.initial, rtol=1e-10, atol=1e-12, engine="compiled")
    rhs = WebRHS(web, p, c)
    for k in np.flatnonzero(~res.failed):
        member = np.array([k])
        # Reference: scipy.integrate.solve_ivp (Virtanen et al. 2020), DOP853 at tighter tolerance.
        ref = solve_ivp(lambda t, y: rhs(None, y[None, :], member)[0], (0.0, 10.0), p.initial[k],
                        method="DOP853", rtol=1e-12, atol=1e-14).y[:, -1]
        # Global error of a few hundred local tolerances (1e-10) is common practice, no source;
        # below 1e-3 abundances are judged absolutely.
        assert np.max(np.abs(res.y[k] - ref) / np.maximum(np.abs(ref), 1e-3)) < 1e-7


# --- batch independence -----------------------------------------------------------------------


@pytest.mark.parametrize("engine", COMPILED)
def test_member_alone_equals_member_in_a_batch_with_a_failing_member(engine, tmp_path):
    # DEVELOPERS.md (no published source): a member's numbers never depend on its batch, also when
    # another member of the batch fails. Member 3's foxes grow at 40/year without a limit: their
    # prey's loss becomes stiff and the member runs out of steps (or blows up).
    case = load("web_case", tmp_path)
    web = build_web(case)
    _, p = ensemble(case, 6)
    p.r[3, 2] = 40.0
    c = Controls.neutral(6, web.n_species)
    kw = dict(rtol=1e-6, atol=1e-9, max_steps=3000, engine=engine)
    batch = web_segment(web, p, c, 0.0, 5.0, p.initial, **kw)
    assert batch.failed.tolist() == [False, False, False, True, False, False]
    assert int(batch.reason[3]) in (Failure.BLOWUP, Failure.TOO_MANY_STEPS)
    for k in range(6):
        alone = web_segment(web, p, c, 0.0, 5.0, p.initial[k:k + 1], members=np.array([k]), **kw)
        for field in ("y", "ymin", "ymax", "h", "reason", "nsteps"):
            assert np.array_equal(getattr(alone, field)[0], getattr(batch, field)[k], equal_nan=True)


@pytest.mark.parametrize("engine", COMPILED)
def test_a_whole_run_of_a_member_alone_equals_its_run_in_a_batch_with_a_failing_member(engine, tmp_path):
    # As above for whole option runs (culls, eradication with chance failure, noise): member 3's
    # foxes grow at 40/year without a limit and blow up; the others must not notice.
    case = load("web_case", tmp_path)
    web = build_web(case)
    vals, p = ensemble(case, 6)
    p.r[3, 2] = 40.0
    today = p.initial.copy()
    noise, event_u = _paired_inputs(case, p, 6)
    opt = case.options[-1]
    batch = run_option(case, web, p, vals, today, opt, noise, event_u, engine=engine)
    assert batch.failed.tolist() == [False, False, False, True, False, False]
    for k in range(6):
        one = replace(p, **{f: getattr(p, f)[k:k + 1] for f in WebParams.__dataclass_fields__})
        alone = run_option(case, web, one, {n: np.asarray(v)[k:k + 1] for n, v in vals.items()}, today[k:k + 1], opt,
                           None if noise is None else noise[k:k + 1], {n: u[k:k + 1] for n, u in event_u.items()},
                           engine=engine)
        for field in ("states", "cummin", "cummax", "reason"):
            assert np.array_equal(getattr(alone, field)[0], getattr(batch, field)[k], equal_nan=True), field


# --- the on-disk kernel cache -------------------------------------------------------------------


def one_species_web():
    return FoodWeb(species=("a",), has_carrion=False, logistic=np.array([True]), links=(), competition=(),
                   mutualism=(), carrion_yield=np.zeros(1), unit=("n",))


def test_generated_kernel_is_written_once_per_structure_and_loaded_from_disk(tmp_path, monkeypatch):
    monkeypatch.setenv("IMPACT_KERNEL_CACHE", str(tmp_path))
    monkeypatch.setattr(generate, "_loaded", {})  # another test of this process may have loaded the structure
    st = pack_structure(one_species_web())
    module = generate.specialised(st)
    assert generate.specialised(st) is module
    sources = list(tmp_path.glob("web_*.py"))
    assert len(sources) == 1
    # Logistic growth, Verhulst (1838): N(t) = K / (1 + (K/N0 - 1) e^{-rt}) with r=1, K=10, N0=1.
    p = WebParams(r=np.ones((1, 1)), K=np.full((1, 1), 10.0), m=np.zeros((1, 1)), a=np.zeros((1, 0)),
                  h=np.zeros((1, 0)), e=np.zeros((1, 0)), alpha=np.zeros((1, 0)), beta=np.zeros((1, 0)),
                  H=np.zeros((1, 0)), decay=np.zeros(1), initial=np.ones((1, 1)), noise_sd=np.zeros((1, 1)))
    res = web_segment(one_species_web(), p, Controls.neutral(1, 1), 0.0, 3.0, p.initial, rtol=1e-10,
                      atol=1e-12, engine="compiled")
    assert res.y[0, 0] == pytest.approx(10.0 / (1.0 + 9.0 * np.exp(-3.0)), rel=1e-8)
    # A new process finds the machine code numba cached beside the generated source.
    script = ("import numpy as np; from impact.engine.generate import specialised; "
              f"m = specialised(np.array({st.tolist()}, dtype=np.int64)); "
              "from tests_probe import run; run(m)")
    probe = tmp_path / "tests_probe.py"
    probe.write_text(
        "import numpy as np\n"
        "def run(m):\n"
        "    st = np.array(%s, dtype=np.int64)\n"
        "    y0 = np.ones((1, 1)); out = np.full((1, 1), np.nan); lo = y0.copy(); hi = y0.copy()\n"
        "    h = np.full(1, np.nan); reason = np.zeros(1, np.int8); n = np.zeros(1, np.int64)\n"
        # scale, rpos, lin, dens, inflow, quad, gamma, sterile, mat, amp, omega, phase, decay, allee,
        # dilution (the kernel's column order, model.SegmentCoefficients)
        "    coef = np.array([[1.0, 1.0, 0.0, 0.1] + [0.0] * 11])\n"
        "    m.segment(st, coef, y0, np.full(1, np.nan), 0.0, 1.0, np.full(1, 1e-6), np.full(1, 1e-9),\n"
        "              1000, 1e12, out, lo, hi, h, reason, n)\n"
        "    print(sum(m.segment.stats.cache_hits.values()), sum(m.segment.stats.cache_misses.values()))\n"
        % st.tolist())
    env = dict(os.environ, IMPACT_KERNEL_CACHE=str(tmp_path), PYTHONPATH=str(tmp_path))
    out = subprocess.run([sys.executable, "-c", script], env=env, capture_output=True, text=True, check=True)
    hits, misses = (int(x) for x in out.stdout.split())
    assert hits == 1 and misses == 0
    other = pack_structure(FoodWeb(species=("a", "b"), has_carrion=False, logistic=np.array([True, True]),
                                   links=(), competition=((0, 1),), mutualism=(), carrion_yield=np.zeros(2),
                                   unit=("n", "n")))
    assert generate.module_source(other) != generate.module_source(st)
