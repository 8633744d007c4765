"""The "lanes" engine (blocks of eight members stepped together) against the scalar compiled kernel.

Contract (DEVELOPERS.md and issue 26, no published source): the block kernel gives the scalar
kernel's numbers to relative 1e-12 with the same step counts and failure codes, and a member's
numbers never depend on which members share its block (checked exactly: lanes never mix).
"""

from __future__ import annotations

import sys
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from impact.engine.lanedriver import LANES
from impact.engine.simulate import run_option
from impact.engine.web import web_segment
from impact.model import Controls, WebParams, build_web

sys.path.insert(0, str(Path(__file__).resolve().parent))
from test_engine import _paired_inputs, ensemble, load, random_web  # noqa: E402

M = 2 * LANES + 3  # two full blocks and a padded one
FIELDS = ("y", "ymin", "ymax", "h", "reason", "nsteps")


def stiff_ensemble(tmp_path):
    """The invented test web with one member whose foxes grow at 40/year without a limit (it runs out
    of steps or blows up) and one whose initial state is not finite."""
    case = load("web_case", tmp_path)
    web = build_web(case)
    vals, p = ensemble(case, M)
    p.r[3, 2] = 40.0
    p.initial[11, 0] = np.nan
    return case, web, vals, p


def rows(p: WebParams, order) -> WebParams:
    return replace(p, **{f: getattr(p, f)[order] for f in WebParams.__dataclass_fields__})


def test_segments_equal_the_scalar_kernel_and_do_not_depend_on_the_block(tmp_path):
    case, web, _, p = stiff_ensemble(tmp_path)
    c = Controls.neutral(M, web.n_species)
    h0 = np.where(np.arange(M) % 3 == 0, np.nan, 0.01)  # some members choose their first step
    kw = dict(rtol=1e-6, atol=1e-9, max_steps=3000)
    ref = web_segment(web, p, c, 0.0, 5.0, p.initial, h0=h0, engine="compiled", **kw)
    got = web_segment(web, p, c, 0.0, 5.0, p.initial, h0=h0, engine="lanes", **kw)
    assert ref.failed[3] and ref.failed[11] and (~ref.failed).sum() == M - 2
    for f in ("reason", "nsteps"):
        assert np.array_equal(getattr(got, f), getattr(ref, f)), f
    for f in ("y", "ymin", "ymax", "h"):
        np.testing.assert_allclose(getattr(got, f), getattr(ref, f), rtol=1e-12, atol=0.0, equal_nan=True)
    assert got.nfev == ref.nfev
    # the same members permuted, shifted by three lanes and one alone: the same numbers to the bit
    rng = np.random.default_rng(0)
    for order in (rng.permutation(M), np.r_[np.arange(M - 3, M), np.arange(M - 3)], np.array([5])):
        sub = web_segment(web, rows(p, order), Controls.neutral(len(order), web.n_species), 0.0, 5.0,
                          p.initial[order], h0=h0[order], engine="lanes", **kw)
        for f in FIELDS:
            assert np.array_equal(getattr(sub, f), getattr(got, f)[order], equal_nan=True), f


def test_whole_runs_equal_the_scalar_kernel_and_do_not_depend_on_the_block(tmp_path):
    # culls, eradication with chance failure and noise, as the scalar kernel's batch test
    case, web, vals, p = stiff_ensemble(tmp_path)
    today = p.initial.copy()
    noise, event_u = _paired_inputs(case, p, M)
    opt = case.options[-1]
    ref = run_option(case, web, p, vals, today, opt, noise, event_u, engine="compiled")
    got = run_option(case, web, p, vals, today, opt, noise, event_u, engine="lanes")
    assert ref.failed[3] and ref.failed[11] and (~ref.failed).sum() == M - 2
    assert np.array_equal(got.reason, ref.reason) and got.nfev == ref.nfev
    for f in ("states", "cummin", "cummax"):
        np.testing.assert_allclose(getattr(got, f), getattr(ref, f), rtol=1e-12, atol=0.0, equal_nan=True)
    order = np.random.default_rng(1).permutation(M)[: M - 5]  # fewer members, other blocks
    sub = run_option(case, web, rows(p, order), {n: np.asarray(v)[order] for n, v in vals.items()}, today[order],
                     opt, None if noise is None else noise[order], {n: u[order] for n, u in event_u.items()},
                     engine="lanes")
    for f in ("states", "cummin", "cummax", "reason"):
        assert np.array_equal(getattr(sub, f), getattr(got, f)[order], equal_nan=True), f


def test_every_newer_term_gives_the_scalar_kernels_numbers():
    # an invented web with a sinusoidal breeding season (its cosine computed in a loop of its own),
    # sterile releases, life stages, obligate mutualism and alternative food
    web, p, c = random_web(6, M, new_terms=True)
    kw = dict(rtol=1e-8, atol=1e-10)
    ref = web_segment(web, p, c, 0.0, 15.0, p.initial, engine="compiled", **kw)
    got = web_segment(web, p, c, 0.0, 15.0, p.initial, engine="lanes", **kw)
    assert web.wave and (~ref.failed).sum() >= M // 2
    for f in ("reason", "nsteps"):
        assert np.array_equal(getattr(got, f), getattr(ref, f)), f
    for f in ("y", "ymin", "ymax", "h"):
        np.testing.assert_allclose(getattr(got, f), getattr(ref, f), rtol=1e-12, atol=0.0, equal_nan=True)


def test_the_auto_engine_takes_the_block_engine_once_a_helper_has_compiled_it(tmp_path, monkeypatch):
    # "auto" never compiles the block engine itself: it runs the scalar kernel until a helper
    # process (impact.engine.generate.compile_aside) has put the block engine's machine code in the
    # kernel cache, then loads it from there (a cache hit, no compilation in this process)
    from impact.engine import lanes
    from impact.engine.generate import compile_aside
    from impact.engine.web import pack_coefficients, pack_structure, ready_engine
    from impact.model import segment_coefficients

    monkeypatch.setenv("IMPACT_KERNEL_CACHE", str(tmp_path / "kernels"))
    monkeypatch.setattr(lanes, "LOOK_EVERY", 0.0)
    web, p, c = random_web(3, 4)
    st = pack_structure(web)
    assert ready_engine(st, "auto") == "compiled" and ready_engine(st, "lanes") == "lanes"
    assert compile_aside(st, "lanes", pack_coefficients(segment_coefficients(web, p, c)).shape[1])
    deadline = time.monotonic() + 600.0
    while not lanes.lanes_ready(st) and time.monotonic() < deadline:
        time.sleep(0.5)
    assert ready_engine(st, "auto") == "lanes"
    got = web_segment(web, p, c, 0.0, 2.0, p.initial, rtol=1e-6, atol=1e-9, engine="auto")
    ref = web_segment(web, p, c, 0.0, 2.0, p.initial, rtol=1e-6, atol=1e-9, engine="numpy")
    np.testing.assert_allclose(got.y, ref.y, rtol=1e-9, atol=1e-12)
    stats = lanes.specialised_lanes(st).segment.stats
    assert sum(stats.cache_hits.values()) == 1 and not sum(stats.cache_misses.values())


def test_a_large_run_asks_for_the_block_engine_helper_unless_switched_off(tmp_path, monkeypatch):
    import impact.api as api
    from impact.engine import generate, lanes

    asked = []
    monkeypatch.setattr(generate, "compile_aside", lambda st, prefix, n_coef: asked.append(prefix) or True)
    monkeypatch.setattr(lanes, "lanes_ready", lambda st: False)
    case = load("web_case", tmp_path)
    monkeypatch.setenv(api.LANES_ASIDE_SWITCH, "1")
    api._compile_aside(case, flow=False, lanes=True)
    assert asked == ["lanes"]
    monkeypatch.setenv(api.LANES_ASIDE_SWITCH, "0")
    api._compile_aside(case, flow=False, lanes=True)
    assert asked == ["lanes"]


KILLED_RUN = """
import sys, time
sys.path[:0] = [{tests!r}, {engine!r}]
from test_engine import random_web
from impact.engine.boundary import structure_sizes
from impact.engine.generate import compile_aside
from impact.engine.web import pack_structure
web, _, _ = random_web(3, 4)
st = pack_structure(web)
assert compile_aside(st, "lanes", structure_sizes(st)["P"])
print("started", flush=True)
time.sleep(120)
"""


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="needs /proc to find the helper process")
def test_a_compile_helper_ends_with_a_run_killed_before_it_let_go(tmp_path, monkeypatch):
    # a helper outlives its run only when the run says so on ending well (generate.release); a run
    # killed outright closes the helper's standard input without it, and the helper goes too
    import os
    import signal
    import subprocess

    from impact.engine.web import pack_structure
    from test_reliability import _children, _running, _wait_for

    here = Path(__file__).resolve().parent
    env = {**os.environ, "IMPACT_KERNEL_CACHE": str(tmp_path / "kernels")}
    run = subprocess.Popen([sys.executable, "-c", KILLED_RUN.format(tests=str(here.parent), engine=str(here))],
                           stdout=subprocess.PIPE, text=True, env=env)
    try:
        assert run.stdout.readline().strip() == "started"
        helpers = _children(run.pid)
        assert helpers
        run.send_signal(signal.SIGKILL)
        run.wait(timeout=30)
    finally:
        if run.poll() is None:
            run.kill()
    assert _wait_for(lambda: not any(_running(h) for h in helpers), 30), helpers
    # it went before its work was done (a helper that had ignored its run would have finished it)
    from impact.engine import lanes

    monkeypatch.setenv("IMPACT_KERNEL_CACHE", str(tmp_path / "kernels"))
    assert not lanes.lanes_ready(pack_structure(random_web(3, 4)[0]))
