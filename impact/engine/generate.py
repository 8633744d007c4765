"""Kernels specialised to one web structure: generated source, compiled by numba, cached on disk.

The interpreted kernel (:mod:`impact.engine.kernel`) reads the structure table at every
evaluation; here the right-hand side is written out as straight-line code for one structure (the
same operations in the same order, so results are identical to the bit), and the step loop is the
interpreted kernel's own source, recompiled around it (:func:`specialised`, files ``web_*.py``).
The tangent flow of the diagnostics (:mod:`impact.engine.flow`) is specialised the same way: its
J·v (:func:`impact.engine.tangent.member_jvp`) written out (:func:`jvp_lines`), once as
``web_jvp`` and once inside the stage loop of ``flow_trial`` (:func:`specialised_flow`, files
``flow_*.py``). Each module is written to the kernel cache (``IMPACT_KERNEL_CACHE``, default
``~/.cache/impact/kernels``) under a name keyed by its source (which holds the structure) and the
numba version, and numba caches its machine code beside it, so a structure pays compilation once
per machine.
"""

from __future__ import annotations

import hashlib
import importlib.util
import inspect
import os
import subprocess
import sys
import tempfile
import threading
from pathlib import Path

import numba
import numpy as np

from . import flow, kernel
from .tangent import PER_SPECIES_COEFFICIENTS

# Functions of the interpreted kernel that call the right-hand side, copied into every module.
STEPPER_FUNCTIONS = ("combine_stages", "initial_step", "trial_step", "accept_step", "segment", "member",
                     "run_members")
_loaded: dict[tuple[str, str, bytes], object] = {}  # (cache folder, kind, structure table bytes) -> module
_loading = threading.Lock()
# Seconds a run waits for a compile helper before ending it and compiling itself (a compilation
# takes 5-15 s on a 2-core machine; the margin covers a loaded one).
HELPER_WAIT = 300.0
# (cache folder, kind, structure bytes) -> a process compiling that kernel (see compile_flow_aside)
_compiling: dict[tuple[str, str, bytes], subprocess.Popen] = {}


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


def jvp_lines(st: np.ndarray, y, v, f, g) -> tuple[list[str], list[int]]:
    """Straight-line statements computing ``f(y)`` and ``J(y) v`` for structure ``st``: the operations
    of :func:`impact.engine.tangent.member_jvp` in the same order (so the results are identical to
    the bit), for the webs :func:`impact.engine.tangent.supports` accepts.

    ``y``, ``v``, ``f``, ``g`` map a state column to the name of its input or output; coefficient
    ``k`` of the member's row is read from ``c{k}``. Returns the statements and the coefficient
    columns they read.
    """
    S, n, carrion, L, Cc, U, logistic, crowding, O = (int(x) for x in st[: kernel.HEADER])
    H = kernel.HEADER
    cons, res = st[H:H + L], st[H + L:H + 2 * L]
    power, type1 = st[H + 2 * L:H + 3 * L], st[H + 3 * L:H + 4 * L]
    comp = st[H + 4 * L:H + 4 * L + 2 * Cc].reshape(-1, 2)
    mut = st[H + 4 * L + 2 * Cc:H + 4 * L + 2 * Cc + 2 * U].reshape(-1, 2)
    flags = st[H + 4 * L + 2 * Cc + 2 * U + 2 * O:]
    if O or crowding or (res < 0).any() or flags[:2 * S].any() or (flags[2 * S:3 * S] >= 0).any() or flags[3 * S:].any():
        raise ValueError("structure has terms the compiled J·v does not know (see impact.engine.tangent.supports)")
    o_a = PER_SPECIES_COEFFICIENTS * S
    o_al = o_a + 4 * L
    o_be = o_al + Cc
    o_H = o_be + U
    o_dec = o_H + U + O
    used = set()

    def c(k):
        used.add(int(k))
        return f"c{int(k)}"

    body = []
    if U:
        body += [f"q{i} = 1.0" for i in range(S)] + [f"dq{i} = 0.0" for i in range(S)]
        for u, (b, p) in enumerate(mut):
            Hu, P = c(o_H + u), y(p)
            body += [f"q{b} += {c(o_be + u)} * {P} / ({Hu} + {P})",
                     f"dq{b} += {c(o_be + u)} * {Hu} / (({Hu} + {P}) * ({Hu} + {P})) * {v(p)}"]
        body += [f"b{i} = {c(S + i)} * {y(i)} * q{i}" for i in range(S)]
        body += [f"db{i} = {c(S + i)} * ({v(i)} * q{i} + {y(i)} * dq{i})" for i in range(S)]
    else:
        body += [f"b{i} = {c(S + i)} * {y(i)}" for i in range(S)] + [f"db{i} = {c(S + i)} * {v(i)}" for i in range(S)]

    eaten_cols = sorted({int(r) for r in res})
    if L:
        body += _feeding_lines(cons, res, power, type1, eaten_cols, o_a, c, y, v)
    body += [f"o{i} = {c(i)} * b{i}" for i in range(S)] + [f"w{i} = {c(i)} * db{i}" for i in range(S)]
    if logistic:
        body += [f"cr{i} = {y(i)}" for i in range(S)] + [f"dcr{i} = {v(i)}" for i in range(S)]
        for k, (i, j) in enumerate(comp):
            body += [f"cr{i} += {c(o_al + k)} * {y(j)}", f"dcr{i} += {c(o_al + k)} * {v(j)}"]
        body += [f"o{i} -= {c(3 * S + i)} * {y(i)} * cr{i}" for i in range(S)]
        body += [f"w{i} -= {c(3 * S + i)} * ({v(i)} * cr{i} + {y(i)} * dcr{i})" for i in range(S)]
    body += [f"o{i} += {c(2 * S + i)} * {y(i)}" for i in range(S)] + [f"w{i} += {c(2 * S + i)} * {v(i)}" for i in range(S)]
    # a species nobody eats loses 0.0, and x − 0.0 is x to the bit: its subtraction is left out
    body += [f"o{i} -= loss{i}" for i in eaten_cols if i < S] + [f"w{i} -= dloss{i}" for i in eaten_cols if i < S]
    if carrion:
        body += [f"gain = {c(4 * S)} * {y(0)}", f"dgain = {c(4 * S)} * {v(0)}"]
        body += [f"gain = gain + {c(4 * S + i)} * {y(i)}" for i in range(1, S)]
        body += [f"dgain = dgain + {c(4 * S + i)} * {v(i)}" for i in range(1, S)]
        body += [f"o{S} = gain - {c(o_dec)} * {y(S)}", f"w{S} = dgain - {c(o_dec)} * {v(S)}"]
        if S in eaten_cols:
            body += [f"o{S} -= loss{S}", f"w{S} -= dloss{S}"]
    body += [f"{f(i)} = o{i}" for i in range(n)] + [f"{g(i)} = w{i}" for i in range(n)]
    return body, sorted(used)


def _feeding_lines(cons, res, power, type1, eaten_cols, o_a, c, y, v) -> list[str]:
    """The feeding terms of :func:`jvp_lines`: handling denominators and their derivatives along v,
    then per link the intake, e·I·N added to the consumer's births and I·N to the resource's loss."""
    L = len(cons)
    o_ah, o_e = o_a + L, o_a + 2 * L

    def powered(l):
        r = int(res[l])
        return (f"({y(r)} * {y(r)})", f"(2.0 * {y(r)} * {v(r)})") if power[l] == 2 else (y(r), v(r))

    body = [f"loss{r} = 0.0" for r in eaten_cols] + [f"dloss{r} = 0.0" for r in eaten_cols]
    seen = set()
    for l in range(L):
        if type1[l]:
            continue
        Rq, dRq = powered(l)
        j = int(cons[l])
        if j in seen:
            body += [f"den{j} = {c(o_ah + l)} * {Rq} + den{j}", f"dden{j} = {c(o_ah + l)} * {dRq} + dden{j}"]
        else:
            body += [f"den{j} = {c(o_ah + l)} * {Rq} + 1.0", f"dden{j} = {c(o_ah + l)} * {dRq}"]
            seen.add(j)
    for l in range(L):
        Rq, dRq = powered(l)
        j, r = int(cons[l]), int(res[l])
        if type1[l]:
            body += [f"I = {c(o_a + l)} * {Rq}", f"dI = {c(o_a + l)} * {dRq}"]
        else:
            body += [f"I = {c(o_a + l)} * {Rq} / den{j}", f"dI = ({c(o_a + l)} * {dRq} - I * dden{j}) / den{j}"]
        body += [f"eaten = I * {y(j)}", f"deaten = dI * {y(j)} + I * {v(j)}",
                 f"b{j} += {c(o_e + l)} * eaten", f"db{j} += {c(o_e + l)} * deaten",
                 f"loss{r} += eaten", f"dloss{r} += deaten"]
    return body


def _function(head: str, body: list[str]) -> str:
    return f"@kernel_jit\ndef {head}:\n" + "".join(f"    {b}\n" for b in body)


def jvp_source(st: np.ndarray) -> str:
    """Straight-line ``web_jvp(st, cf, y, v, out, jv, work)``, as :func:`impact.engine.tangent.member_jvp`."""
    n = int(st[1])
    lines, used = jvp_lines(st, lambda i: f"y{i}", lambda i: f"v{i}", lambda i: f"out[{i}]", lambda i: f"jv[{i}]")
    body = [f"c{k} = cf[{k}]" for k in used] + [f"y{i} = y[{i}]" for i in range(n)] + [f"v{i} = v[{i}]" for i in range(n)]
    return _function("web_jvp(st, cf, y, v, out, jv, work)", body + lines)


def trial_source(st: np.ndarray) -> str:
    """``flow_trial`` of :mod:`impact.engine.flow` for structure ``st``, with the straight-line J·v
    written into its stage loop (one copy: numba's compile time grows faster than a function's
    length) and the member's coefficients read once. Same operations in the same order."""
    n = int(st[1])
    lines, used = jvp_lines(st, lambda i: f"xp{i}", lambda i: f"vp{i}", lambda i: f"K[s, {i}]", lambda i: f"g{i}")
    body = [f"c{k} = cf[{k}]" for k in used]
    body += ["for s in range(1, STAGES + 1):",
             "    for j in range(n):",
             "        a = K[0, j] * WEIGHT_ROWS[s, 0]",
             "        b = L[0, j] * WEIGHT_ROWS[s, 0]",
             "        for i in range(1, s):",
             "            w = WEIGHT_ROWS[s, i]",
             "            if w != 0:",
             "                a += K[i, j] * w",
             "                b += L[i, j] * w",
             "        x = a * hs + y[j]",
             "        d = b * hs + v[j]",
             "        Z[Y_NEW, j] = x",
             "        Z[V_NEW, j] = d",
             "        Z[XC, j] = x if (x >= 0.0 or x != x) else 0.0",  # max(x, 0) as nmax, NaN kept
             "        Z[VC, j] = d if Z[XC, j] > 0 else 0.0"]
    body += [f"    xp{i} = Z[XC, {i}]" for i in range(n)] + [f"    vp{i} = Z[VC, {i}]" for i in range(n)]
    body += [f"    {line}" for line in lines]
    body += [f"    L[s, {i}] = g{i} if xp{i} > 0 else 0.0" for i in range(n)]
    body += ["for j in range(n):",
             "    scale = nmax(abs(y[j]), abs(Z[Y_NEW, j])) * rtol[j] + atol[j]",
             "    e = K[0, j] * WEIGHT_ROWS[STAGES + 1, 0]",
             "    for i in range(1, STAGES + 1):",
             "        w = WEIGHT_ROWS[STAGES + 1, i]",
             "        if w != 0:",
             "            e += K[i, j] * w",
             "    Z[TMP, j] = e * hs / scale",
             "acc = Z[TMP, 0] * Z[TMP, 0]",
             "for j in range(1, n):",
             "    acc += Z[TMP, j] * Z[TMP, j]",
             "return math.sqrt(acc / n)"]
    return _function("flow_trial(st, cf, y, v, K, L, Z, work, hs, rtol, atol)",
                     [f"n = {n}"] + body)


def flow_module_source(st: np.ndarray) -> str:
    """Source of a module holding the straight-line J·v and the tangent flow's step loop around it."""
    helpers = ", ".join(n for n in flow.__all__ if n not in flow.FLOW_FUNCTIONS)
    parts = ['"""Generated by impact.engine.generate for one web structure; do not edit."""',
             "import math", "import numpy as np", f"from impact.engine.flow import {helpers}", "",
             jvp_source(st)]
    n = int(st[1])
    for name in flow.FLOW_FUNCTIONS:
        if name == "flow_trial":
            parts.append(trial_source(st))
        else:
            parts.append(_fix_state_size(inspect.getsource(getattr(flow, name).py_func), n))
    return "\n".join(parts) + "\n"


def specialised(st: np.ndarray):
    """The generated state kernel for structure table ``st`` (written and compiled on first use)."""
    return _load(st, "web", module_source)


def specialised_flow(st: np.ndarray):
    """The generated tangent-flow kernel for structure ``st`` (a web :func:`impact.engine.tangent.supports`)."""
    return _load(st, "flow", flow_module_source)


def _load(st: np.ndarray, prefix: str, make_source):
    folder = cache_dir()
    memo = (str(folder), prefix, st.tobytes())  # a kernel cache named for this run is this run's
    if memo in _loaded:  # reading the kernel's source again would cost milliseconds per segment
        return _loaded[memo]
    with _loading:  # worker threads asking for the same new kernel write and compile it once
        if memo not in _loaded:
            helper = _compiling.pop(memo, None)
            if helper is not None:  # its machine code is on its way to the disk cache: load it from there
                try:
                    helper.wait(timeout=HELPER_WAIT)
                except BaseException as exc:  # interrupted, or stuck: the helper goes
                    helper.kill()
                    helper.wait()
                    if not isinstance(exc, subprocess.TimeoutExpired):
                        raise
            _loaded[memo] = _write_and_import(st, prefix, make_source, folder)
    return _loaded[memo]


def flow_cached(st: np.ndarray) -> bool:
    """Whether the tangent flow of structure ``st`` has machine code in the kernel cache."""
    source = flow_module_source(st)
    stem = "flow_" + hashlib.sha256((source + numba.__version__).encode()).hexdigest()[:20]
    return any((cache_dir() / "__pycache__").glob(f"{stem}.flow_batch-*.nbi"))


def compile_flow_aside(st: np.ndarray, n_coef: int) -> bool:
    """Compile the tangent flow of a never-seen structure in a separate, low-priority process.

    numba compiles in Python under the interpreter's lock, so compiling in a thread beside a run's
    workers costs the run as much time as it saves (measured); a process does not share the lock,
    and at low priority it takes the processor time the run leaves idle. The helper writes numba's
    disk cache; :func:`specialised_flow` waits for it and loads from there. Returns whether a
    helper was started (not when the code is cached already).

    Parameters
    ----------
    st : int64 ndarray
        Structure table (:func:`impact.engine.web.pack_structure`) of a web the flow supports.
    n_coef : int
        Coefficient columns of the web (the width of its packed coefficient rows).
    """
    memo = (str(cache_dir()), "flow", st.tobytes())
    if memo in _loaded or memo in _compiling or flow_cached(st):
        return False
    cmd = [sys.executable, "-m", "impact.engine.precompile", ",".join(str(int(x)) for x in st), str(int(n_coef))]
    try:
        _compiling[memo] = subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                                            stderr=subprocess.DEVNULL)
    except OSError:  # no interpreter to start (an embedded Python): the run compiles it when needed
        return False
    return True


def stop_compiling():
    """End the helpers :func:`compile_flow_aside` started that nobody waited for (a run that ends early)."""
    with _loading:
        while _compiling:
            _, helper = _compiling.popitem()
            if helper.poll() is None:
                helper.kill()
            helper.wait()


def _write_and_import(st: np.ndarray, prefix: str, make_source, folder: Path):
    source = make_source(st)
    key = hashlib.sha256((source + numba.__version__).encode()).hexdigest()[:20]
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError:  # e.g. no writable home directory: fall back to the temporary directory
        folder = Path(tempfile.gettempdir()) / f"impact-kernels-{os.getuid()}"
        folder.mkdir(parents=True, exist_ok=True)
    path = folder / f"{prefix}_{key}.py"
    if not path.exists() or path.read_text() != source:
        tmp = path.with_suffix(f".{os.getpid()}.tmp")
        tmp.write_text(source)
        os.replace(tmp, path)  # atomic: concurrent workers never import half a file
    name = f"impact_kernel_{key}"
    spec = importlib.util.spec_from_file_location(name, path)
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    spec.loader.exec_module(module)
    return module
