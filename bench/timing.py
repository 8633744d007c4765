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


# The child runs its module or script under this wrapper, which reports the child's own peak
# resident memory (VmHWM, kept per address space) on exit: the peak wait4 reports would also carry
# the benchmark process's own, folded in when the child's copy of it was replaced by exec.
PEAK_TAG = "impact-bench-peak-kib"
WRAPPER = f"""
import atexit, runpy, sys

def _peak():
    try:
        with open('/proc/self/status') as f:
            kib = next(int(x.split()[1]) for x in f if x.startswith('VmHWM:'))
    except (OSError, StopIteration):
        return
    sys.stderr.write('{PEAK_TAG} %d\\n' % kib)
    sys.stderr.flush()

atexit.register(_peak)
if sys.argv[1] == '-m':
    sys.argv = [sys.argv[2], *sys.argv[3:]]
    runpy.run_module(sys.argv[0], run_name='__main__', alter_sys=True)
elif sys.argv[1] == '-c':
    code, sys.argv = sys.argv[2], ['-c', *sys.argv[3:]]
    exec(compile(code, '<string>', 'exec'), {{'__name__': '__main__'}})
else:
    sys.argv = sys.argv[1:]
    runpy.run_path(sys.argv[0], run_name='__main__')
"""


def run_python(args: list[str], env: dict | None = None) -> tuple[float, float, float]:
    """Run ``python ARGS`` as a child process from the project folder: (wall seconds, CPU seconds and
    peak resident memory in MiB of that process, its own: see :data:`WRAPPER`). A failing child ends
    the benchmark with its stderr."""
    t0 = time.perf_counter()
    proc = subprocess.Popen([sys.executable, "-c", WRAPPER, *args], stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE, cwd=ROOT, env=env)
    err = proc.stderr.read().decode()  # (read before waiting: a full pipe would stall the child)
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    proc.stderr.close()
    if os.waitstatus_to_exitcode(status) != 0:
        raise SystemExit(f"python {' '.join(args)} failed:\n{err}")
    peaks = [int(line.split()[1]) for line in err.splitlines() if line.startswith(PEAK_TAG)]
    peak = peaks[-1] / 1024.0 if peaks else usage.ru_maxrss / 1024.0
    return wall, usage.ru_utime + usage.ru_stime, peak
