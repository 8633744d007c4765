"""Speed of the engines on the demo web, the scalar-limit estimate and the compilation cost.

Usage::

    python bench/bench_engine.py [--members N] [--case CASE]

Prints, measured in this same run (CPU seconds of this process, best of three, so the figures
are per core):

1. member-steps per second of the compiled kernel generated for the web, the numpy reference
   stepper and the block kernel ("lanes", eight members stepped together), on one 20-year segment
   of the demo ensemble under neutral controls (the step sequence is the same for all; they agree
   to the bit), and of the block kernel with the members sorted by their step count (the stiffest
   together: an upper bound of what grouping by expected stiffness gains);
2. the scalar-limit estimate: floating-point operations per member-step counted from the web's
   structure (the generated right-hand side and the Dormand-Prince tableau), over the measured
   rate of independent scalar multiply-adds on this core; and the fraction of it reached;
3. first-run compilation of a never-seen structure (fresh caches, a new process) and the cost
   of loading it from the on-disk cache (a second process).
"""

from __future__ import annotations

import argparse
import os
import re
import subprocess
import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from impact.case import load_case  # noqa: E402
from impact.engine import generate  # noqa: E402
from impact.engine.control import DormandPrince54  # noqa: E402
from impact.engine.web import pack_structure, web_segment  # noqa: E402
from impact.model import Controls, WebParams, build_web, web_params  # noqa: E402
from impact.ensemble.sample import parameter_values  # noqa: E402

DEMO = ROOT / "casework" / "island_mesopredator.toml"
ENGINES = ("compiled", "numpy", "lanes")


def demo_ensemble(case, members: int, seed: int = 1):
    rng = np.random.default_rng(np.random.SeedSequence(seed))
    vals = parameter_values(case, rng.uniform(size=(members, len(case.uncertain))))
    return web_params(case, vals, members)


def member_step_rates(case, members: int) -> dict[str, float]:
    """Best-of-three member-steps per CPU second of each engine on the same segment."""
    web = build_web(case)
    p = demo_ensemble(case, members)
    c = Controls.neutral(members, web.n_species)
    kw = dict(rtol=case.rtol, atol=case.atol)
    for e in ENGINES:  # load (or compile) every kernel before timing
        web_segment(web, p, c, 0.0, 1.0, p.initial[:2], members=np.arange(2), engine=e, **kw)
    best: dict[str, float] = {}
    for _ in range(3):
        for e in ENGINES:
            t = time.process_time()
            res = web_segment(web, p, c, 0.0, 20.0, p.initial, engine=e, **kw)
            rate = res.nsteps.sum() / (time.process_time() - t)
            best[e] = max(best.get(e, 0.0), rate)
            if e == "compiled":
                steps = res.nsteps
    order = np.argsort(steps, kind="stable")  # blocks of members with similar step counts
    sorted_p = replace(p, **{f: getattr(p, f)[order] for f in WebParams.__dataclass_fields__})
    for _ in range(3):
        t = time.process_time()
        res = web_segment(web, sorted_p, c, 0.0, 20.0, sorted_p.initial, engine="lanes", **kw)
        best["lanes, sorted"] = max(best.get("lanes, sorted", 0.0), res.nsteps.sum() / (time.process_time() - t))
    return best


def flops_per_member_step(st: np.ndarray) -> int:
    """Arithmetic operations of one accepted Dormand-Prince step of one member.

    Right-hand side: the operators of the generated straight-line code, times 6 evaluations
    (FSAL). Stages: per state variable, a multiply and an add per non-zero tableau weight, then
    ×h and +y, for the 5 inner stages and the solution; the error estimate likewise over E plus
    scale (abs, max, ×rtol, +atol), ÷ and the squared sum. Control-flow and the controller's
    few scalar operations are left out (so this is a lower bound of the work).
    """
    n = int(st[1])
    body = generate.rhs_source(st).split("\n", 2)[2]
    rhs = len(re.findall(r"(?<![eE])[-+*/](?!=)|[-+*/]=", body))
    A, B, E = DormandPrince54.A, DormandPrince54.B, DormandPrince54.E
    stages = sum(2 * np.count_nonzero(A[s]) + 2 for s in range(1, 6)) + 2 * np.count_nonzero(B) + 2
    error = 2 * np.count_nonzero(E) + 1 + 5 + 2
    return int(DormandPrince54.n_stages * rhs + n * (stages + error))


PEAK_SOURCE = '''
import numba
@numba.njit(cache=False)
def madd(k, x):
    a0 = a1 = a2 = a3 = a4 = a5 = a6 = a7 = 1.0
    for _ in range(k):
        a0 = a0 * x + 1e-9; a1 = a1 * x + 2e-9; a2 = a2 * x + 3e-9; a3 = a3 * x + 4e-9
        a4 = a4 * x + 5e-9; a5 = a5 * x + 6e-9; a6 = a6 * x + 7e-9; a7 = a7 * x + 8e-9
    return a0 + a1 + a2 + a3 + a4 + a5 + a6 + a7
'''


def scalar_peak() -> float:
    """Flops per second of eight independent scalar multiply-add chains (16 flops per pass)."""
    space: dict = {}
    exec(PEAK_SOURCE, space)
    madd = space["madd"]
    madd(10, 0.999999)
    k = 20_000_000
    best = 0.0
    for _ in range(3):
        t = time.process_time()
        madd(k, 0.999999)
        best = max(best, 16 * k / (time.process_time() - t))
    return best


FIRST_RUN = '''
import time, numpy as np
t0 = time.perf_counter()
from impact.engine.web import no_jumps, pack_coefficients, web_run, web_segment
from impact.model import Controls, FoodWeb, WebParams, Link, segment_coefficients
t1 = time.perf_counter()
S = {S}
web = FoodWeb(species=tuple("s%d" % i for i in range(S)), has_carrion=False,
              logistic=np.arange(S) == 0, links=tuple(Link(i, i - 1, "holling2", "predation") for i in range(1, S)),
              competition=(), mutualism=(), carrion_yield=np.zeros(S), unit=("n",) * S)
M, L = 4, S - 1
f = lambda v, k: np.full((M, k), v)
p = WebParams(r=np.where(np.arange(S) == 0, 1.0, 0.0) * np.ones((M, S)), K=f(10.0, S), m=f(0.1, S),
              a=f(1.0, L), h=f(0.5, L), e=f(0.5, L), alpha=f(0.0, 0), beta=f(0.0, 0), H=f(0.0, 0),
              decay=np.zeros(M), initial=f(1.0, S), noise_sd=f(0.0, S))
web_segment(web, p, Controls.neutral(M, S), 0.0, 1.0, p.initial, rtol=1e-6, atol=1e-9, engine="{engine}")
coef = pack_coefficients(segment_coefficients(web, p, Controls.neutral(M, S)))[None]  # the whole-run kernel too
web_run(web, coef, np.array([0.0, 1.0]), p.initial, no_jumps(1, M), np.array([-1, 0]), 1, rtol=1e-6, atol=1e-9,
        engine="{engine}")
print(t1 - t0, time.perf_counter() - t1)
'''


def compile_costs(S: int) -> list[tuple[str, float]]:
    """Wall seconds of the first call of the compiled engine on a never-seen web (fresh caches),
    then of the same call in a second process (loaded from the disk cache)."""
    out = []
    with tempfile.TemporaryDirectory(prefix="impact-kernels-") as tmp:
        env = dict(os.environ, IMPACT_KERNEL_CACHE=tmp, NUMBA_CACHE_DIR=tmp, PYTHONPATH=str(ROOT))
        for engine in ("compiled", "lanes"):
            for label in ("first run (compiles)", "second run (disk cache)"):
                proc = subprocess.run([sys.executable, "-c", FIRST_RUN.format(S=S, engine=engine)],
                                      env=env, capture_output=True, text=True, check=True)
                out.append((f"{engine:8s} {label}", float(proc.stdout.split()[1])))
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--members", type=int, default=2000)
    ap.add_argument("--case", default=str(DEMO))
    args = ap.parse_args(argv)
    measure(args.case, args.members)
    return 0


def measure(case_path: str, members: int) -> dict:
    """Print the engines' member-step rates, the scalar limit and the compilation costs; return the
    rates (member-steps per CPU second by engine)."""
    case = load_case(case_path)
    st = pack_structure(build_web(case))
    rates = member_step_rates(case, members)
    for e in (*ENGINES, "lanes, sorted"):
        print(f"{e:13s} engine {rates[e] / 1e6:6.2f} million member-steps per CPU second"
              f"  ({rates[e] / rates['numpy']:5.1f}x numpy, {rates[e] / rates['compiled']:4.2f}x compiled)")
    flops = flops_per_member_step(st)
    peak = scalar_peak()
    limit = peak / flops
    print(f"scalar limit: {flops} flops per member-step / {peak / 1e9:.2f} Gflop/s scalar peak "
          f"= {limit / 1e6:.2f} million member-steps/s; compiled engine reaches "
          f"{rates['compiled'] / limit:.0%} of it, lanes engine {rates['lanes'] / limit:.0%}")
    for label, seconds in compile_costs(int(st[0])):
        print(f"{label:34s} {seconds:6.2f} s (wall, after imports)")
    return rates


if __name__ == "__main__":
    sys.exit(main())
