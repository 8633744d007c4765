"""Cost of the Lyapunov stage relative to a plain ensemble run, the demo's regime screen, and scan throughput.

Run: .venv/bin/python bench/bench_dynamics.py [--screen-only | --casework]   (ratios are measured in the same run)

``--casework`` times the full assessment (every stage, the PDF) of the pollinator case against the
demo's, each as its own process after one untimed run that fills the kernel cache: the pollinator's
regime screen runs in the compiled tangent flow generated from the declared terms (target: at most
1.5 times the demo's wall time; wall times on a shared machine, so the CPU seconds are shown too).

The demo's regime screen (``impact assess casework/island_mesopredator.toml``: every option's
screened members diagnosed from their state at the horizon) is timed in CPU seconds
(``time.process_time``, minimum of 3 repeats, the machine may be shared) with the tangent flow in
the compiled kernel and in the numpy step loop, after one untimed run that loads (or compiles)
the kernels. The first-run compilation of the demo web's tangent flow is timed in a fresh
process with an empty kernel cache.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np

from impact.case import load_case  # noqa: E402
from impact.dynamics.lyapunov import DynamicsSettings, lyapunov_flow, web_functions  # noqa: E402
from impact.dynamics.scan import nominal_values, scan_web  # noqa: E402
from impact.engine.integrate import integrate_segment  # noqa: E402
from impact.engine.jacobian import WebTangent  # noqa: E402
from impact.model import Controls, build_web, web_params  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))
from test_dynamics import hp_case  # noqa: E402


ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "casework" / "island_mesopredator.toml"


def demo_screen_tasks():
    """The demo's regime-screen tasks (one per option) as ``impact assess`` builds them."""
    from impact.api import load_case as read_case
    from impact.risk.runs import assess_members
    from impact.ensemble.calibrate import build_ensemble
    from impact.dynamics.lyapunov import declared_settings
    from impact.dynamics.regime_screen import SCREEN, screen_tasks

    case = read_case(DEMO)
    ens, _ = build_ensemble(case, case.members, case.seed)
    runs = assess_members(case, ens, case.seed)
    settings, _ = declared_settings(case, SCREEN)
    return screen_tasks(case, ens.params, ens.values, runs, settings, seed=case.seed)[1]


def cpu_seconds(fn, repeats: int = 3) -> float:
    """Minimum CPU time of ``repeats`` calls of ``fn``."""
    best = np.inf
    for _ in range(repeats):
        t = time.process_time()
        fn()
        best = min(best, time.process_time() - t)
    return best


def first_compile_seconds() -> float:
    """CPU seconds of a fresh process that compiles the demo web's tangent flow into an empty cache
    (a one-member flow: the kernels are compiled for their argument types on first call)."""
    import os
    import subprocess
    import tempfile

    script = ("import time, numpy as np\n"
              "from impact.api import load_case\n"
              "from impact.model import build_web, web_params, Controls\n"
              "from impact.engine.jacobian import WebTangent\n"
              "from impact.dynamics.lyapunov import lyapunov_flow\n"
              "from impact.dynamics.scan import nominal_values\n"
              f"case = load_case({str(DEMO)!r})\n"
              "web = build_web(case)\n"
              "p = web_params(case, {k: np.array([v]) for k, v in nominal_values(case).items()}, 1)\n"
              "jvp = WebTangent(web, p, Controls.neutral(1, web.n_species))\n"
              "t = time.process_time()\n"
              "lyapunov_flow(None, None, np.abs(p.initial), transient=1.0, window=1.0, sample_dt=0.5, jvp=jvp)\n"
              "print(time.process_time() - t)\n")
    with tempfile.TemporaryDirectory() as cache:
        out = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, check=True,
                             env={**os.environ, "IMPACT_KERNEL_CACHE": cache}, cwd=ROOT)
    return float(out.stdout.split()[-1])


def demo_screen() -> None:
    """The demo's regime screen, compiled tangent flow against the numpy step loop (same run)."""
    from impact.dynamics.regime_screen import diagnose_task

    tasks = demo_screen_tasks()
    members = sum(t.y0.shape[0] for t in tasks)
    for engine in ("compiled", "numpy"):
        diagnose_task(tasks[0], engine)  # load or compile the kernels; import costs
    times = {e: cpu_seconds(lambda: [diagnose_task(t, e) for t in tasks]) for e in ("compiled", "numpy")}
    print(f"demo regime screen ({len(tasks)} options x {members // len(tasks)} members), CPU s, min of 3: "
          f"numpy step loop {times['numpy']:.2f}, compiled tangent flow {times['compiled']:.2f} "
          f"(ratio {times['numpy'] / times['compiled']:.1f}; target <= 2 s)")
    print(f"first-run compilation of the demo web's tangent flow (fresh process, empty cache): "
          f"{first_compile_seconds():.1f} CPU s")


def main(members: int = 200, span: float = 2000.0, dt: float = 2.0):
    tmp = Path("/tmp") / "bench_dynamics"
    tmp.mkdir(exist_ok=True)
    case = load_case(hp_case(tmp))
    web = build_web(case)
    b1 = np.linspace(2.2, 3.2, members)
    vals = {k: np.full(members, v) for k, v in nominal_values(case).items()}
    vals["h1"] = b1 / 5.0
    p = web_params(case, vals, members)
    fun, jac = web_functions(web, p, Controls.neutral(members, 3))
    t = time.perf_counter()
    plain = integrate_segment(fun, 0.0, span, p.initial, rtol=1e-7, atol=1e-9)
    t_plain = time.perf_counter() - t
    t = time.perf_counter()
    dm = lyapunov_flow(fun, jac, p.initial, transient=0.0, window=span, sample_dt=dt, section=2, rtol=1e-7, atol=1e-9)
    t_matrix = time.perf_counter() - t
    # the stage as diagnose_web runs it: J·v from the interaction terms, no (m, n, n) Jacobian
    t = time.perf_counter()
    d = lyapunov_flow(fun, None, p.initial, transient=0.0, window=span, sample_dt=dt, section=2, rtol=1e-7, atol=1e-9,
                      jvp=WebTangent(web, p, Controls.neutral(members, 3), engine="numpy"))
    t_numpy = time.perf_counter() - t
    WebTangent(web, p, Controls.neutral(members, 3))(None, p.initial, p.initial, np.arange(members))  # compile or load
    t = time.perf_counter()
    d = lyapunov_flow(fun, None, p.initial, transient=0.0, window=span, sample_dt=dt, section=2, rtol=1e-7, atol=1e-9,
                      jvp=WebTangent(web, p, Controls.neutral(members, 3)))
    t_lyap = time.perf_counter() - t
    print(f"Lyapunov stage, numpy step loop with J·v by numpy columns: {t_numpy:.2f} s; compiled tangent flow "
          f"(generated for the web): {t_lyap:.2f} s (ratio {t_numpy / t_lyap:.2f})")
    print(f"plain ensemble run: {members} members x {span:g} time units: {t_plain:.2f} s ({plain.nfev} rhs calls)")
    print(f"Lyapunov, Jacobian matrix times v (max step {dt:g}): {t_matrix:.2f} s ({dm.nfev} calls), "
          f"ratio {t_matrix / t_plain:.2f}")
    print(f"Lyapunov stage as diagnose_web runs it (compiled tangent flow): {t_lyap:.2f} s ({d.nfev} member evaluations)")
    print(f"ratio Lyapunov / plain: {t_lyap / t_plain:.2f} (target <= 3)")
    from impact.run.execute import LocalPool

    s = DynamicsSettings(transient=1000.0, window=1000.0, sample_dt=dt)
    pool = LocalPool(2)
    try:
        for label, cont, ex in (("parallel, in-process", False, None), ("parallel, 2-worker pool", False, pool),
                                ("continuation", True, None)):
            grid = np.linspace(2.2, 3.2, 40 if not cont else 6) / 5.0
            t = time.perf_counter()
            scan_web(case, "h1", grid, s, continuation=cont, executor=ex)
            el = time.perf_counter() - t
            print(f"scan ({label}), {grid.size} values x 2000 time units: {el:.2f} s, {grid.size / el:.2f} members per second")
    finally:
        pool.close()


def casework(repeats: int = 2) -> None:
    """Wall and CPU seconds of ``impact assess`` on the demo and the pollinator case (best of ``repeats``)."""
    import tempfile

    from timing import run_python

    best = {}
    with tempfile.TemporaryDirectory() as tmp:
        for name in ("island_mesopredator", "moth_pollinator"):
            case = ROOT / "casework" / f"{name}.toml"
            args = ["-m", "impact.cli", "assess", str(case), "--quiet", "--replace-results", "--out"]
            run_python(args + [f"{tmp}/{name}-warm"])  # compiles or loads this case's kernels
            runs = [run_python(args + [f"{tmp}/{name}-{k}"])[:2] for k in range(repeats)]
            best[name] = min(runs)
            print(f"{name}: {best[name][0]:.1f} s wall, {best[name][1]:.1f} s CPU (best of {repeats})")
    demo, moth = best["island_mesopredator"], best["moth_pollinator"]
    print(f"pollinator / demo: {moth[0] / demo[0]:.2f}x wall, {moth[1] / demo[1]:.2f}x CPU (target: at most 1.5x)")


if __name__ == "__main__":
    if "--casework" in sys.argv:
        sys.path.insert(0, str(Path(__file__).resolve().parent))
        casework()
    else:
        demo_screen()
        if "--screen-only" not in sys.argv:
            main()
