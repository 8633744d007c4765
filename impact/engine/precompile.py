"""The helper process of :func:`impact.engine.generate.compile_aside`.

``python -m impact.engine.precompile KIND ST P`` compiles the generated module of kind ``KIND``
(``flow``: the tangent flow; ``lanes``: the block engine's ``run_members`` and ``segment``) of
structure table ``ST`` (comma-separated integers) for coefficient rows of ``P`` columns, by running
it once on one member with zero coefficients: the arguments have the types of a real run's (the
numbers do not matter), so numba's disk cache then holds the machine code a run loads.
"""

from __future__ import annotations

import os
import sys
import threading

import numpy as np


def compile_flow(st: np.ndarray, n_coef: int):
    """Compile (or load) the generated tangent flow of ``st`` by one call on a dummy member."""
    from impact.engine.tangent import tangent_flow

    n = int(st[1])
    tangent_flow(st, np.zeros((1, n_coef)), np.ones((1, n)), t0=0.0, transient=0.5,
                 window=0.5, hmax=0.25, section=np.zeros(1, np.int64), rtol=np.full(n, 1e-6),
                 atol=np.full(n, 1e-9), max_steps=100)


def compile_lanes(st: np.ndarray, n_coef: int):
    """Compile (or load) the block engine of ``st``: one whole run and one segment of a dummy
    member, with the argument types :func:`impact.engine.web.web_run` and
    :func:`impact.engine.web.web_segment` pass."""
    from impact.engine.lanes import specialised_lanes

    n = int(st[1])
    module = specialised_lanes(st)
    tol = (np.full(n, 1e-6), np.full(n, 1e-9))
    y0, f1, i1, i8 = np.ones((1, n)), (lambda *s: np.zeros(s)), np.zeros(1, np.int8), np.zeros(1, np.int64)
    module.run_members(st, f1(1, 1, n_coef), np.array([0.0, 0.5]), y0, np.full(1, np.nan), np.zeros(3, np.int64),
                       np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0), f1(1, 0), f1(1, 0), *tol, 100, 1e12,
                       np.array([0, 1], np.int64), f1(1, 2, n), f1(1, 2, n), f1(1, 2, n), i1.copy(), f1(1))
    module.segment(st, f1(1, n_coef), y0, np.full(1, np.nan), 0.0, 0.5, *tol, 100, 1e12, f1(1, n), f1(1, n),
                   f1(1, n), f1(1), i1.copy(), i8)


# what a run writes to its helper's standard input when the helper may outlive it
KEEP_GOING = b"finish\n"


def watch_parent():
    """End this helper when the run that started it ends without saying it may go on.

    The run holds the other end of this process's standard input: it writes :data:`KEEP_GOING`
    before it lets go of a helper whose work serves later runs
    (:func:`impact.engine.generate.release`); a run killed or ended by a signal closes the pipe
    without it, and the helper goes too (before it has imported the compiler).
    """
    if sys.stdin.buffer.read() != KEEP_GOING:
        os._exit(3)


def main(argv: list[str]) -> int:
    try:
        os.nice(10)  # the run this serves comes first
    except OSError:  # pragma: no cover - not permitted here
        pass
    threading.Thread(target=watch_parent, name="parent-watch", daemon=True).start()
    kind = argv[0]
    st = np.array([int(x) for x in argv[1].split(",")], dtype=np.int64)
    {"flow": compile_flow, "lanes": compile_lanes}[kind](st, int(argv[2]))
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
