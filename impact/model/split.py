"""Each species' rate of change split into gains (births, food turned into young, maturation in)
and losses (deaths, crowding, being eaten, harvest, maturation out), generated from the term
declarations of :mod:`impact.model.terms`.

Counting a species in individuals (:mod:`impact.engine.individuals`) needs its births and deaths
as two rates, not their difference. Nothing here restates the web's equations: the statements of
:func:`impact.model.terms.program` are rewritten, one by one, into statements on a pair
``g{i}``, ``l{i}`` (both ≥ 0) with ``g{i} − l{i}`` equal to ``o{i}``:

* ``o = E`` with no rate in E: g = max(E, 0), l = max(−E, 0);
* ``o = o + E`` / ``o = o − E``: E's positive part joins the gains (losses), its negative part
  the other side, member by member (a linear rate min(r, 0) − m − q is a loss);
* ``o = o + o'`` (a juvenile stage takes its adult's births): the pairs add;
* ``o = o · F`` (a births multiplier): both sides scale, a negative product changing sides;
* ``o = E(o)`` linear in ``o`` (births × N/(N + s) under a sterile release): E is applied to
  each side.

Tests check ``g − l = o`` against the right-hand side for every term (tests/engine/test_individuals.py).
"""

from __future__ import annotations

import numpy as np

from impact.model.expr import Expr, Let, Op, Printer, Prod, Var, used_columns, variables
from impact.model.terms import Structure, program

_RATE = "o"


def _is_rate(name: str, n: int) -> bool:
    return name.startswith(_RATE) and name[1:].isdigit() and int(name[1:]) < n


def substitute(e: Expr, old: str, new: str) -> Expr:
    """``e`` with variable ``old`` read as ``new`` (a new tree; ``e`` is unchanged)."""
    if isinstance(e, Var):
        return Var(new) if e.name == old else e
    if isinstance(e, Prod):
        return Prod(*(substitute(f, old, new) for f in e.factors))
    kwargs = {}
    for name in e.__dataclass_fields__:
        child = getattr(e, name)
        kwargs[name] = substitute(child, old, new) if isinstance(child, Expr) else child
    return type(e)(**kwargs)


def split_lines(s: Structure, pr: Printer, timed_guard: bool = True) -> list[str]:
    """Statements computing the program and, beside it, ``g{i}`` and ``l{i}`` for every state
    (whole numpy columns, or plain numbers when ``pr`` prints for numbers). With ``timed_guard``
    the seasonal statements run only when ``t is not None`` (None: the season mean); without it
    they always run (compiled code, which is always given a time)."""
    out = []
    pos = (lambda x: f"np.maximum({x}, 0.0)") if pr.numpy else (lambda x: f"max({x}, 0.0)")  # noqa: E731
    for stmt in program(s):
        line = [f"{stmt.target} = {pr(stmt.expr)}"]
        if _is_rate(stmt.target, s.n):
            line += _split(stmt, s.n, pr, pos)
        out += ["if t is not None:"] + [f"    {x}" for x in line] if stmt.timed and timed_guard else line
    return out


def _split(stmt: Let, n: int, pr: Printer, pos) -> list[str]:
    """The statements on g, l that mirror one statement on a rate (see the module's rules)."""
    i = stmt.target[1:]
    g, l = f"g{i}", f"l{i}"
    e = stmt.expr
    rates = {v for v in variables(e) if _is_rate(v, n)}
    if isinstance(e, Op) and e.op in "+-" and isinstance(e.a, Var) and e.a.name == stmt.target:
        other = e.b
        if isinstance(other, Var) and _is_rate(other.name, n):
            j = other.name[1:]
            pg, pl = (f"g{j}", f"l{j}") if e.op == "+" else (f"l{j}", f"g{j}")
            return [f"{g} = {g} + {pg}", f"{l} = {l} + {pl}"]
        if variables(other) & rates:
            raise ValueError(f"cannot split {stmt.target}: a rate inside a sum")
        x = pr(other)
        up, down = (pos(x), pos(f"-{x}")) if e.op == "+" else (pos(f"-{x}"), pos(x))
        return [f"{g} = {g} + {up}", f"{l} = {l} + {down}"]
    if isinstance(e, Prod) and isinstance(e.factors[0], Var) and e.factors[0].name == stmt.target \
            and len(e.factors) == 2 and not (variables(e.factors[1]) & rates):
        f = pr(e.factors[1])
        return [f"_f = {f}", f"_g = {g} * _f", f"_l = {l} * _f",
                f"{g} = {pos('_g')} + {pos('-_l')}", f"{l} = {pos('_l')} + {pos('-_g')}"]
    if not rates:
        x = pr(e)
        return [f"{g} = {pos(x)}", f"{l} = {pos(f'-{x}')}"]
    if rates != {stmt.target}:
        raise ValueError(f"cannot split {stmt.target}: it reads another rate")
    # linear in the rate itself: apply to each side
    return [f"{g} = {pr(substitute(e, stmt.target, g))}", f"{l} = {pr(substitute(e, stmt.target, l))}"]


_cache: dict = {}


def numpy_split(st: np.ndarray):
    """``split(t, y, cf, gain, loss)``: gains and losses of every state variable for whole columns
    (y (m, n), cf (P, m) the members' coefficient rows transposed, t (m,) or None for the season
    mean), gain and loss (m, n) filled, both ≥ 0 with gain − loss the right-hand side."""
    key = st.tobytes()
    if key not in _cache:
        from impact.model.libm import cos_array  # numba is loaded on first use only

        s = Structure.decode(st)
        pr = Printer(s.col, lambda k: f"k{k}", lambda i: f"y{i}", lambda i: f"v{i}", numpy=True)
        body = [f"k{k} = cf[{k}]" for k in used_columns(program(s), s.col)]
        body += ["yt = y.T.copy()"] + [f"y{i} = yt[{i}]" for i in range(s.n)] + split_lines(s, pr)
        # the outputs are named apart from the program's own variables (the carrion term has a "gain")
        body += [f"gain_out[:, {i}] = g{i}" for i in range(s.n)] + [f"loss_out[:, {i}] = l{i}" for i in range(s.n)]
        source = ("def split(t, y, cf, gain_out, loss_out):\n    with np.errstate(divide='ignore', invalid='ignore'):\n"
                  + "".join(f"        {x}\n" for x in body))
        scope = {"np": np, "cos_array": cos_array}
        exec(compile(source, "<impact.model.split>", "exec"), scope)  # noqa: S102 - our own generated source
        fn = scope["split"]
        fn.source = source
        _cache[key] = fn
    return _cache[key]


def scalar_split_body(st: np.ndarray, timed_guard: bool = True) -> list[str]:
    """Statements of one member's split in plain numbers: read ``cf`` (P,) and ``y`` (n,) at time
    ``t``, leave the gains and losses in ``g{i}``, ``l{i}``. The body of :func:`scalar_split`, and
    of the compiled split beside the kernels (:mod:`impact.engine.individuals`)."""
    s = Structure.decode(st)
    pr = Printer(s.col, lambda k: f"k{k}", lambda i: f"y{i}", lambda i: f"v{i}", numpy=False)
    body = [f"k{k} = cf[{k}]" for k in used_columns(program(s), s.col)]
    return body + [f"y{i} = y[{i}]" for i in range(s.n)] + split_lines(s, pr, timed_guard)


def scalar_split(st: np.ndarray):
    """``split(t, y, cf) -> (gains, losses)`` for one member in plain Python numbers (y (n,), cf (P,)
    its coefficient row, t a number): the statements of :func:`numpy_split`, at a fraction of the
    cost for a single member (the reference for counted members, which the compiled engines run
    with the same statements compiled)."""
    key = ("scalar", st.tobytes())
    if key not in _cache:
        import math

        n = int(st[1])
        body = scalar_split_body(st)
        body.append(f"return [{', '.join(f'g{i}' for i in range(n))}], [{', '.join(f'l{i}' for i in range(n))}]")
        source = "def split(t, y, cf):\n" + "".join(f"    {x}\n" for x in body)
        scope = {"math": math}
        exec(compile(source, "<impact.model.split scalar>", "exec"), scope)  # noqa: S102 - our own generated source
        fn = scope["split"]
        fn.source = source
        _cache[key] = fn
    return _cache[key]
