"""Timing helpers shared by the benchmark scripts."""

from __future__ import annotations

import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent


def cpu_min(fn, repeats: int) -> tuple[float, object]:
    """The least CPU time of ``repeats`` calls of ``fn`` (this process), and the last call's result."""
    best, out = np.inf, None
    for _ in range(repeats):
        t = time.process_time()
        out = fn()
        best = min(best, time.process_time() - t)
    return best, out


def run_python(args: list[str], env: dict | None = None) -> tuple[float, float, float]:
    """Run ``python ARGS`` as a child process from the project folder: (wall seconds, CPU seconds and
    peak resident memory in MiB of that process). A failing child ends the benchmark with its stderr."""
    t0 = time.perf_counter()
    proc = subprocess.Popen([sys.executable, *args], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, cwd=ROOT,
                            env=env)
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    err = proc.stderr.read().decode()
    proc.stderr.close()
    if os.waitstatus_to_exitcode(status) != 0:
        raise SystemExit(f"python {' '.join(args)} failed:\n{err}")
    return wall, usage.ru_utime + usage.ru_stime, usage.ru_maxrss / 1024.0
