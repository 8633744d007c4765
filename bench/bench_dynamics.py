"""Cost of the Lyapunov stage relative to a plain ensemble run, and scan throughput.

Run: /tmp/venv/bin/python bench/bench_dynamics.py   (ratios are measured in the same run)
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np

from impact.case import load_case  # noqa: E402
from impact.dynamics import DynamicsSettings, lyapunov_flow, web_functions  # noqa: E402
from impact.scan import nominal_values, scan_web  # noqa: E402
from impact.integrate import integrate_segment  # noqa: E402
from impact.jacobian import WebTangent  # noqa: E402
from impact.model import Controls, build_web, web_params  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))
from test_dynamics import hp_case  # noqa: E402


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
    print(f"Lyapunov stage, J·v by numpy columns: {t_numpy:.2f} s; by the compiled kernel: {t_lyap:.2f} s "
          f"(ratio {t_numpy / t_lyap:.2f})")
    print(f"plain ensemble run: {members} members x {span:g} time units: {t_plain:.2f} s ({plain.nfev} rhs calls)")
    print(f"Lyapunov, Jacobian matrix times v (max step {dt:g}): {t_matrix:.2f} s ({dm.nfev} calls), "
          f"ratio {t_matrix / t_plain:.2f}")
    print(f"Lyapunov stage, J·v without J (as in diagnose_web): {t_lyap:.2f} s ({d.nfev} calls)")
    print(f"ratio Lyapunov / plain: {t_lyap / t_plain:.2f} (target <= 3)")
    from impact.execute import LocalPool

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


if __name__ == "__main__":
    main()
