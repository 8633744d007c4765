"""Timing helpers shared by the benchmark scripts."""

from __future__ import annotations

import time

import numpy as np


def cpu_min(fn, repeats: int) -> tuple[float, object]:
    """The least CPU time of ``repeats`` calls of ``fn`` (this process), and the last call's result."""
    best, out = np.inf, None
    for _ in range(repeats):
        t = time.process_time()
        out = fn()
        best = min(best, time.process_time() - t)
    return best, out
