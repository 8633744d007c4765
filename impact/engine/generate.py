"""Kernels specialised to one web structure: generated source, compiled by numba, cached on disk.

The interpreted kernel (:mod:`impact.engine.kernel`) reads the structure table at every
evaluation; here the right-hand side is written out as straight-line code for one structure (the
same operations in the same order, so results are identical to the bit), and the step loop is the
interpreted kernel's own source, recompiled around it. The module is written to the kernel cache
(``IMPACT_KERNEL_CACHE``, default ``~/.cache/impact/kernels``) under a name keyed by the structure,
the kernel's source and the numba version, and numba caches its machine code beside it, so a
structure pays compilation once per machine.
"""

from __future__ import annotations

import hashlib
import importlib.util
import inspect
import os
import sys
import tempfile
from pathlib import Path

import numba
import numpy as np

from . import kernel

# Functions of the interpreted kernel that call the right-hand side, copied into every module.
STEPPER_FUNCTIONS = ("combine_stages", "initial_step", "trial_step", "accept_step", "segment", "member",
                     "run_members")
_loaded: dict[tuple[str, bytes], object] = {}  # (cache folder, structure table bytes) -> loaded module


def cache_dir() -> Path:
    """Where generated kernels and their compiled code live."""
    env = os.environ.get("IMPACT_KERNEL_CACHE")
    if env:
        return Path(env)
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "impact" / "kernels"


def rhs_source(st: np.ndarray) -> str:
    """Straight-line ``web_rhs(st, cf, t, y, out, work)`` for the structure table ``st``."""
    S, n, carrion, L, Cc, U, logistic, crowding, O = (int(x) for x in st[: kernel.HEADER])
    H = kernel.HEADER
    cons, res = st[H:H + L], st[H + L:H + 2 * L]
    power, type1 = st[H + 2 * L:H + 3 * L], st[H + 3 * L:H + 4 * L]
    comp = st[H + 4 * L:H + 4 * L + 2 * Cc].reshape(-1, 2)
    op = H + 4 * L + 2 * Cc + 2 * U
    mut = st[H + 4 * L + 2 * Cc:op].reshape(-1, 2)
    obl = st[op:op + 2 * O].reshape(-1, 2)
    fp = op + 2 * O  # per-species flags
    interfere, sterile = st[fp:fp + S], st[fp + S:fp + 2 * S]
    adult, wave = st[fp + 2 * S:fp + 3 * S], st[fp + 3 * S:fp + 4 * S]
    o_quad, o_gam, o_ster, o_mat = 5 * S, 6 * S, 7 * S, 8 * S
    o_amp, o_om, o_ph = 9 * S, 10 * S, 11 * S
    o_a = 12 * S
    o_ah, o_e, o_food, o_al = o_a + L, o_a + 2 * L, o_a + 3 * L, o_a + 4 * L
    o_be = o_al + Cc
    o_H = o_be + U
    o_obH = o_H + U
    o_dec = o_obH + O
    body = [f"y{i} = y[{i}]" for i in range(n)]
    body += [f"b{i} = cf[{S + i}] * y{i}" for i in range(S)]
    if U:
        bens = sorted({int(b) for b, _ in mut})
        body += [f"q{b} = 1.0" for b in bens]
        body += [f"q{b} += cf[{o_be + u}] * y{p} / (cf[{o_H + u}] + y{p})" for u, (b, p) in enumerate(mut)]
        body += [f"b{b} *= q{b}" for b in bens]
    if O:  # pollinated share Σ_o P_o/(H_o + P_o) Π_{k<o} H_k/(H_k + P_k), as the table kernel
        bens = sorted({int(b) for b, _ in obl})
        body += [f"g{b} = 0.0" for b in bens] + [f"m{b} = 1.0" for b in bens]
        for u, (b, p) in enumerate(obl):
            body += [f"g{b} = g{b} + m{b} * (y{p} / (cf[{o_obH + u}] + y{p}))",
                     f"m{b} = m{b} * (cf[{o_obH + u}] / (cf[{o_obH + u}] + y{p}))"]
        body += [f"b{b} *= g{b}" for b in bens]
    # a link's resource: its state variable, or (resource −1) the constant alternative food
    dens = [f"y{res[l]}" if res[l] >= 0 else f"cf[{o_food + l}]" for l in range(L)]
    if L:
        body += [f"loss{r} = 0.0" for r in sorted({int(r) for r in res if r >= 0})]
        seen = set()
        for l in range(L):
            if type1[l]:
                continue
            Rq = f"{dens[l]} * {dens[l]}" if power[l] == 2 else dens[l]
            j = int(cons[l])
            body.append(f"d{j} = cf[{o_ah + l}] * ({Rq}) + " + ("1.0" if j not in seen else f"d{j}"))
            seen.add(j)
        body += [f"d{j} = d{j} + cf[{o_gam + j}] * y{j}" for j in range(S) if interfere[j]]
        for l in range(L):
            Rq = f"({dens[l]} * {dens[l]})" if power[l] == 2 else dens[l]
            j = int(cons[l])
            intake = f"cf[{o_a + l}] * {Rq}" + ("" if type1[l] else f" / d{j}")
            body += [f"eaten = ({intake}) * y{j}", f"b{j} += cf[{o_e + l}] * eaten"]
            if res[l] >= 0:
                body.append(f"loss{res[l]} += eaten")
    body += [f"o{i} = cf[{i}] * b{i}" for i in range(S)]
    body += [f"o{i} *= 1.0 + cf[{o_amp + i}] * math.cos(cf[{o_om + i}] * t - cf[{o_ph + i}])"
             for i in range(S) if wave[i]]
    for i in range(S):
        if sterile[i]:
            body += [f"if cf[{o_ster + i}] > 0:", f"    o{i} *= y{i} / (y{i} + cf[{o_ster + i}])"]
    for i in range(S):
        if adult[i] >= 0:
            a = int(adult[i])
            body += [f"o{i} += o{a}", f"o{a} = 0.0", f"flow = cf[{o_mat + i}] * y{i}", f"o{i} -= flow", f"o{a} += flow"]
    if logistic:
        body += [f"c{i} = y{i}" for i in range(S)]
        body += [f"c{i} += cf[{o_al + k}] * y{j}" for k, (i, j) in enumerate(comp)]
        body += [f"o{i} -= cf[{3 * S + i}] * y{i} * c{i}" for i in range(S)]
    if crowding:
        body += [f"o{i} -= cf[{o_quad + i}] * y{i} * y{i}" for i in range(S)]
    body += [f"o{i} += cf[{2 * S + i}] * y{i}" for i in range(S)]
    eaten_species = sorted({int(r) for r in res if 0 <= r < S})
    body += [f"o{i} -= loss{i}" for i in eaten_species]
    if carrion:
        body.append(f"g = cf[{4 * S}] * y0")
        body += [f"g = g + cf[{4 * S + i}] * y{i}" for i in range(1, S)]
        body.append(f"o{S} = g - cf[{o_dec}] * y{S}")
        if S in {int(r) for r in res}:
            body.append(f"o{S} -= loss{S}")
    body += [f"out[{i}] = o{i}" for i in range(n)]
    return "@kernel_jit\ndef web_rhs(st, cf, t, y, out, work):\n" + "".join(f"    {b}\n" for b in body)


def module_source(st: np.ndarray) -> str:
    """Source of a module holding the specialised right-hand side and the step loop around it."""
    helpers = ", ".join(n for n in kernel.__all__ if n not in STEPPER_FUNCTIONS and n != "web_rhs")
    parts = ['"""Generated by impact.engine.generate for one web structure; do not edit."""',
             "import math", "import numpy as np",
             f"from impact.engine.kernel import {helpers}",
             "from impact.engine.control import ERROR_EXPONENT, MAX_FACTOR, MIN_FACTOR, "
             "MIN_STEP_ULPS, SAFETY", "", rhs_source(st)]
    n = int(st[1])
    for name in STEPPER_FUNCTIONS:
        parts.append(_fix_state_size(inspect.getsource(getattr(kernel, name).py_func), n))
    return "\n".join(parts) + "\n"


def _fix_state_size(source: str, n: int) -> str:
    """Make the number of state variables a constant, so loops over it unroll into registers."""
    lines = []
    for line in source.splitlines():
        stripped = line.strip()
        if stripped.startswith("n = ") and stripped.endswith(".shape[0]"):
            line = line[: line.index("n = ")] + f"n = {n}"
        elif stripped == "M, n = y0.shape":
            line = line[: line.index("M, n")] + f"M, n = y0.shape[0], {n}"
        lines.append(line)
    return "\n".join(lines) + "\n"


def specialised(st: np.ndarray):
    """The generated module for structure table ``st`` (written and compiled on first use)."""
    folder = cache_dir()
    memo = (str(folder), st.tobytes())  # a kernel cache named for this run is this run's
    if memo in _loaded:  # reading the kernel's source again would cost milliseconds per segment
        return _loaded[memo]
    source = module_source(st)
    key = hashlib.sha256((source + numba.__version__).encode()).hexdigest()[:20]
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError:  # e.g. no writable home directory: fall back to the temporary directory
        folder = Path(tempfile.gettempdir()) / f"impact-kernels-{os.getuid()}"
        folder.mkdir(parents=True, exist_ok=True)
    path = folder / f"web_{key}.py"
    if not path.exists() or path.read_text() != source:
        tmp = path.with_suffix(f".{os.getpid()}.tmp")
        tmp.write_text(source)
        os.replace(tmp, path)  # atomic: concurrent workers never import half a file
    name = f"impact_kernel_{key}"
    spec = importlib.util.spec_from_file_location(name, path)
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    spec.loader.exec_module(module)
    _loaded[memo] = module
    return module
