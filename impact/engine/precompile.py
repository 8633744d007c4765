"""The helper process of :func:`impact.engine.generate.compile_flow_aside`.

``python -m impact.engine.precompile ST P`` compiles the tangent flow of structure table ``ST``
(comma-separated integers) for coefficient rows of ``P`` columns by running it once on one
member with zero coefficients: the arguments have the types of a real run's (the numbers do not
matter), so numba's disk cache then holds the machine code a run loads.
"""

from __future__ import annotations

import os
import sys

import numpy as np


def compile_flow(st: np.ndarray, n_coef: int):
    """Compile (or load) the generated tangent flow of ``st`` by one call on a dummy member."""
    from impact.engine.tangent import tangent_flow

    n = int(st[1])
    tangent_flow(st, np.zeros((1, n_coef)), np.ones((1, n)), t0=0.0, transient=0.5,
                 window=0.5, hmax=0.25, section=np.zeros(1, np.int64), rtol=np.full(n, 1e-6),
                 atol=np.full(n, 1e-9), max_steps=100)


def main(argv: list[str]) -> int:
    try:
        os.nice(10)  # the run this serves comes first
    except OSError:  # pragma: no cover - not permitted here
        pass
    st = np.array([int(x) for x in argv[0].split(",")], dtype=np.int64)
    compile_flow(st, int(argv[1]))
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
