"""Arrays handed to compiled code: every entry point refuses a wrong shape, dtype or layout with an error
naming the argument, before the compiled code could read or write past an array's end.

Contract of impact/engine/boundary.py (no published source: memory safety of unchecked indexing).
"""

from __future__ import annotations

import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

from impact.engine.boundary import CONTRACTS, KernelArgumentError, check_kernel_arrays, structure_sizes
from impact.engine.web import pack_coefficients, pack_structure
from impact.model import segment_coefficients

sys.path.insert(0, str(Path(__file__).resolve().parent))
from test_engine import random_web  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]


def valid_arguments(m: int = 3):
    """Every entry point's array arguments, valid for one invented web of 4-6 state columns."""
    web, p, c = random_web(6, m, new_terms=True)
    st = pack_structure(web)
    coef = pack_coefficients(segment_coefficients(web, p, c))
    n = web.n_state
    y = np.ascontiguousarray(p.initial, dtype=float)

    def f(*shape):
        return np.zeros(shape)

    i1, i8 = (lambda k: np.zeros(k, np.int8)), (lambda k: np.zeros(k, np.int64))
    K, T, E = 3, 2, 2
    args = {
        "segment": dict(coef=coef, y0=y, h0=f(m), rtol=f(n), atol=f(n), y_out=f(m, n), ymin=f(m, n), ymax=f(m, n),
                        h_out=f(m), reason=i1(m), nsteps=i8(m)),
        "run_members": dict(times=np.arange(K + 1.0), coef=np.ascontiguousarray(coef[None]), y0=y, h0=f(m),
                            jump_start=np.array([0, 0, 1, 2, 2], np.int64), jump_kind=np.array([0, 2], np.int64),
                            jump_species=np.array([0, 1], np.int64), jump_yield=np.array([0.5, -1.0]),
                            jump_value=f(m, E), jump_aux=f(m, E), rtol=f(n), atol=f(n),
                            slot_of=np.array([-1, 0, -1, 1], np.int64), states=f(m, T, n), cummin=f(m, T, n),
                            cummax=f(m, T, n), reason=i1(m), h_out=f(m)),
        "flow_batch": dict(coef=coef, y0=y, section=np.full(m, n - 1, np.int64), rtol=f(n), atol=f(n), y_out=f(m, n),
                           lg=f(m), low=f(m, n), high=f(m, n), acc=f(m, n), sec_vals=f(m, 8), sec_count=i8(m),
                           reason=i1(m), nsteps=i8(m)),
        "batch_jvp": dict(coef=coef, y=y, v=f(m, n), out=f(m, n), jv=f(m, n)),
        "counted_run": dict(coef=coef, y=y, cols=np.array([0, 1], np.int64), per_unit=np.full(2, 10.0),
                            x0=np.full((m, 2), 3, np.int64), rtol=f(n), atol=f(n), out=f(m, n), lo=f(m, n),
                            hi=f(m, n)),
    }
    return web, st, args


def test_the_structure_gives_the_coefficient_width_pack_coefficients_writes():
    # P is read from the structure table alone (the tangent flow's dispatch has no web): it must be
    # the width pack_coefficients gives, on webs with and without every newer term
    for seed in range(4):
        for new_terms in (False, True):
            web, p, c = random_web(seed, 2, new_terms)
            sizes = structure_sizes(pack_structure(web))
            assert sizes["P"] == pack_coefficients(segment_coefficients(web, p, c)).shape[1]
            assert sizes["n"] == web.n_state


# arguments that set a free size (segments K, jumps E, output slots T, section capacity C, counted species k)
BINDS = {"times", "jump_kind", "states", "sec_vals", "cols"}


@pytest.mark.parametrize("entry", sorted(CONTRACTS))
def test_valid_arrays_pass_and_every_damaged_argument_is_named(entry):
    _, st, all_args = valid_arguments()
    args = all_args[entry]
    assert set(args) == set(CONTRACTS[entry])
    check_kernel_arrays(entry, st, **args)  # the valid call passes
    for name, a in args.items():
        other = np.float32 if a.dtype.kind == "f" else np.int32
        strided = np.repeat(a, 2, axis=-1)[..., ::2]  # same values, not contiguous
        short = a[..., :-1].copy() if a.shape[-1] > 1 else np.zeros(a.shape[:-1] + (5,), a.dtype)
        frozen = a.copy()
        frozen.flags.writeable = False
        cases = [("dtype", a.astype(other)), ("contiguous", strided),
                 ("shape", a.reshape(-1) if a.ndim > 1 else a[None]), ("numpy array", a.tolist())]
        if name not in BINDS:  # (an argument that binds a free size is as long as it likes; the next one must match)
            cases.append(("shape", short))
        for why, bad in cases:
            with pytest.raises(KernelArgumentError, match=why) as err:
                check_kernel_arrays(entry, st, **{**args, name: bad})
            assert (err.value.entry, err.value.argument) == (entry, name)
        if name in ("y_out", "reason", "states", "sec_vals", "out"):
            with pytest.raises(KernelArgumentError, match="writeable"):
                check_kernel_arrays(entry, st, **{**args, name: frozen})
    with pytest.raises(KernelArgumentError, match="missing"):
        check_kernel_arrays(entry, st, **{k: v for k, v in args.items() if k != "coef"})


@pytest.mark.parametrize("entry, name, value, message", [
    ("flow_batch", "section", lambda n: np.full(3, n, np.int64), r"\[0, "),
    ("flow_batch", "section", lambda n: np.full(3, -1, np.int64), r"\[0, "),
    ("run_members", "jump_species", lambda n: np.array([0, n], np.int64), r"\[0, "),
    ("run_members", "jump_kind", lambda n: np.array([0, 3], np.int64), r"\[0, 2\]"),
    ("run_members", "jump_start", lambda n: np.array([0, 2, 1, 2, 2], np.int64), "not decrease"),
    ("run_members", "jump_start", lambda n: np.array([0, 0, 1, 2, 3], np.int64), r"\[0, 2\]"),
    ("run_members", "slot_of", lambda n: np.array([-1, 0, -1, 2], np.int64), r"\[-1, 1\]"),
    ("run_members", "coef", lambda n: None, "1 or 3 segments"),
    ("counted_run", "cols", lambda n: np.array([0, n], np.int64), r"\[0, "),
    ("counted_run", "x0", lambda n: np.array([[3, -1]] * 3, np.int64), r"\[0, "),
    ("counted_run", "y", lambda n: -np.ones((3, n)), "non-negative"),
    ("counted_run", "per_unit", lambda n: np.array([10.0, 0.0]), "positive"),
])
def test_index_arrays_out_of_range_are_refused(entry, name, value, message):
    web, st, all_args = valid_arguments()
    args = dict(all_args[entry])
    if name == "coef":
        args["coef"] = np.concatenate([args["coef"]] * 2)
    else:
        args[name] = value(web.n_state)
    with pytest.raises(KernelArgumentError, match=message) as err:
        check_kernel_arrays(entry, st, **args)
    assert err.value.argument == name


def test_a_damaged_structure_table_is_refused():
    _, st, all_args = valid_arguments()
    args = all_args["segment"]
    damaged = {"length": st[:-1].copy(), "dtype": st.astype(np.int32), "state columns": st.copy(),
               "consumer": st.copy(), "header": st[:4].copy()}
    damaged["state columns"][1] += 1
    damaged["consumer"][9] = 99  # the first link's consumer, past the last species
    for why, bad in damaged.items():
        with pytest.raises(KernelArgumentError) as err:
            check_kernel_arrays("segment", bad, **args)
        assert err.value.argument == "st", why


PROBE = textwrap.dedent("""
    import sys
    import numpy as np
    sys.path[:0] = [{tests!r}, {engine!r}]
    from test_engine import random_web
    from impact.engine.boundary import KernelArgumentError
    from impact.engine import tangent
    from impact.engine.web import no_jumps, pack_coefficients, pack_structure, web_run, web_segment
    from impact.engine.jacobian import WebTangent
    from impact.engine.individuals import Counting, compiled_counted_members
    from impact.model import segment_coefficients

    web, p, c = random_web(6, 3, new_terms=True)  # (the arrays are refused before a kernel is compiled)
    plain = random_web(0, 3)
    assert WebTangent(*plain).engine == "compiled"
    n = web.n_state
    narrow = np.ascontiguousarray(p.initial[:, :-1])   # one state column too few: read past the end
    coef = pack_coefficients(segment_coefficients(web, p, c))
    counting = Counting(np.array([0]), np.array([10.0]), np.array([50.0]), np.random.default_rng)
    probes = {{
        "web_segment": lambda: web_segment(web, p, c, 0.0, 1.0, narrow, rtol=1e-6, atol=1e-9),
        "web_segment coef": lambda: web_segment(web, p, c, 0.0, 1.0, p.initial, rtol=1e-6, atol=1e-9,
                                                coef=coef[:, :-1]),
        "web_run": lambda: web_run(web, coef[None], np.array([0.0, 1.0]), narrow, no_jumps(1, 3), np.array([-1, 0]),
                                   1, rtol=1e-6, atol=1e-9),
        "web_run coef": lambda: web_run(web, coef[None, :, ::2], np.array([0.0, 1.0]), p.initial, no_jumps(1, 3),
                                        np.array([-1, 0]), 1, rtol=1e-6, atol=1e-9),
        "tangent_flow": lambda: tangent.tangent_flow(pack_structure(web), coef, p.initial, t0=0.0, transient=0.0,
                                                  window=1.0, hmax=0.1, section=np.full(3, n + 5), rtol=np.full(n, 1e-6),
                                                  atol=np.full(n, 1e-9)),
        "tangent_flow y0": lambda: tangent.tangent_flow(pack_structure(web), coef, narrow, t0=0.0, transient=0.0,
                                                     window=1.0, hmax=0.1, section=np.zeros(3, np.int64),
                                                     rtol=np.full(n - 1, 1e-6), atol=np.full(n - 1, 1e-9)),
        "lanes": lambda: web_segment(*plain, 0.0, 1.0, plain[1].initial[:, :-1], rtol=1e-6, atol=1e-9, engine="lanes"),
        "batch_jvp": lambda: WebTangent(*plain)(None, plain[1].initial[:, :-1], plain[1].initial[:, :-1], np.arange(3)),
        "counted_run": lambda: compiled_counted_members(pack_structure(web), coef, 0.0, 1.0, narrow, counting,
                                                        [np.random.default_rng(r) for r in range(3)], rtol=1e-6,
                                                        atol=1e-9),
    }}
    for name, call in probes.items():
        try:
            call()
        except KernelArgumentError as exc:
            print(name, "refused:", exc)
        else:
            print(name, "NOT REFUSED")
""")


def test_wrong_shapes_at_every_dispatch_are_refused_not_a_crash(tmp_path):
    # in a child process: a segmentation fault ends the child (negative status) and fails this test
    # instead of killing pytest
    run = subprocess.run([sys.executable, "-c", PROBE.format(tests=str(ROOT / "tests"),
                                                            engine=str(ROOT / "tests" / "engine"))], capture_output=True,
                         text=True, timeout=300, cwd=tmp_path)
    assert run.returncode == 0, (run.returncode, run.stderr[-2000:])
    lines = run.stdout.splitlines()
    assert len(lines) == 9 and all("refused:" in line for line in lines), run.stdout
    assert "y0" in lines[0] and "coef" in lines[1] and "section" in lines[4] and "segment: y0" in lines[6]
    assert "batch_jvp: y" in lines[7] and "counted_run: y" in lines[8]
    # every compiled entry point is reached through its dispatch, and refuses there
    assert {line.split("refused: ")[1].split(":")[0] for line in lines} == set(CONTRACTS)
