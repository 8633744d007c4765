"""A small expression tree for the food web's declared terms (:mod:`impact.model.terms`): nodes,
forward differentiation along a tangent vector, and printing as Python source.

Nodes print as they were built, parenthesised, so the printed code does the declared
floating-point operations in the declared order (``a * b * c`` is ``(a * b) * c``); nothing is
simplified or reordered. Derivative rules (:func:`derivative`):

* ``d(a ± b) = da ± db``; ``d(k₁⋯k_p · x₁⋯x_q) = k₁⋯k_p · d(x₁⋯x_q)`` with the constant factors
  (coefficients, numbers) pulled out first and ``d(x y) = dx·y + x·dy``;
* ``d(a / b) = (da − (a/b)·db) / b``, with ``a/b`` read from the statement's own result when given;
* ``d(x·x) = 2 x dx`` (:class:`Square`); a term may give its derivative outright (:class:`Declared`);
* derivatives known to vanish are dropped (no ``0 · x`` is ever formed).
"""

from __future__ import annotations

from dataclasses import dataclass


class Expr:
    """A node of the expression tree; operators build new nodes (nothing is simplified)."""

    def __add__(self, other):
        return Op("+", self, wrap(other))

    def __radd__(self, other):
        return Op("+", wrap(other), self)

    def __sub__(self, other):
        return Op("-", self, wrap(other))

    def __mul__(self, other):
        return Prod(self, wrap(other))

    def __rmul__(self, other):
        return Prod(wrap(other), self)

    def __truediv__(self, other):
        return Op("/", self, wrap(other))


def wrap(x) -> Expr:
    return x if isinstance(x, Expr) else Num(float(x))


@dataclass(frozen=True, eq=False)
class Num(Expr):
    value: float


@dataclass(frozen=True, eq=False)
class Coef(Expr):
    """Entry ``k`` of coefficient block ``block`` of the member's row."""
    block: str
    k: int = 0


@dataclass(frozen=True, eq=False)
class State(Expr):
    i: int


@dataclass(frozen=True, eq=False)
class Tangent(Expr):
    """Entry ``i`` of the tangent vector v (appears in derivatives only)."""
    i: int


@dataclass(frozen=True, eq=False)
class Var(Expr):
    name: str


@dataclass(frozen=True, eq=False)
class Time(Expr):
    pass


@dataclass(frozen=True, eq=False)
class Op(Expr):
    op: str  # "+", "-", "/"
    a: Expr
    b: Expr


@dataclass(frozen=True, eq=False, init=False)
class Prod(Expr):
    """Left-to-right product ``((f₁ · f₂) · f₃) ⋯``."""
    factors: tuple

    def __init__(self, *factors):
        flat = []
        for f in factors:
            # a leading product is the same left-to-right product, any later one a parenthesised factor
            flat += list(f.factors) if isinstance(f, Prod) and len(flat) == 0 else [f]
        object.__setattr__(self, "factors", tuple(flat))


@dataclass(frozen=True, eq=False)
class Neg(Expr):
    a: Expr


@dataclass(frozen=True, eq=False)
class Square(Expr):
    """``x · x``, with derivative ``2 x dx``."""
    a: Expr


@dataclass(frozen=True, eq=False)
class Cos(Expr):
    a: Expr


@dataclass(frozen=True, eq=False)
class Positive(Expr):
    """``a if k > 0 else b`` for a coefficient k (branches on parameters, never on the state)."""
    k: Coef
    a: Expr
    b: Expr


@dataclass(frozen=True, eq=False)
class Declared(Expr):
    """``value`` with its derivative along v given by the term (``deriv``) instead of the rules."""
    value: Expr
    deriv: Expr


@dataclass(frozen=True)
class Let:
    """Statement ``target = expr``; ``timed`` marks statements a season-mean evaluation (no time) skips."""
    target: str
    expr: Expr
    timed: bool = False


ZERO = None  # a derivative known to vanish


def derivative(e: Expr, dvar: dict, self_name: str | None = None):
    """Derivative of ``e`` along v, or ZERO. ``dvar`` maps a variable to its derivative's variable
    (absent: its derivative vanishes); ``self_name`` is the variable a quotient's value is kept in."""
    D = lambda x: derivative(x, dvar)  # noqa: E731
    if isinstance(e, (Num, Coef, Time)):
        return ZERO
    if isinstance(e, State):
        return Tangent(e.i)
    if isinstance(e, Var):
        return Var(dvar[e.name]) if e.name in dvar else ZERO
    if isinstance(e, Declared):
        return e.deriv
    if isinstance(e, Square):
        da = D(e.a)
        return ZERO if da is ZERO else Prod(Num(2.0), e.a, da)
    if isinstance(e, Neg):
        da = D(e.a)
        return ZERO if da is ZERO else Neg(da)
    if isinstance(e, Cos):
        if D(e.a) is not ZERO:
            raise ValueError("the cosine of a state-dependent argument has no derivative rule")
        return ZERO
    if isinstance(e, Positive):
        da, db = D(e.a), D(e.b)
        if da is ZERO and db is ZERO:
            return ZERO
        return Positive(e.k, Num(0.0) if da is ZERO else da, Num(0.0) if db is ZERO else db)
    if isinstance(e, Op):
        da, db = D(e.a), D(e.b)
        if e.op in "+-":
            if db is ZERO:
                return da
            if da is ZERO:
                return db if e.op == "+" else Neg(db)
            return Op(e.op, da, db)
        # quotient: (da − (a/b) db)/b, a/b read from the statement's result when it is one
        if db is ZERO:
            return ZERO if da is ZERO else Op("/", da, e.b)
        q = Var(self_name) if self_name is not None else e
        part = Prod(q, db)
        return Op("/", Neg(part) if da is ZERO else Op("-", da, part), e.b)
    if isinstance(e, Prod):
        const = [f for f in e.factors if D(f) is ZERO]
        varying = [f for f in e.factors if D(f) is not ZERO]
        if not varying:
            return ZERO
        acc, dacc = varying[0], D(varying[0])
        for f in varying[1:]:
            acc, dacc = Prod(acc, f), Op("+", Prod(dacc, f), Prod(acc, D(f)))
        if not const:
            return dacc
        return Prod(*const, dacc) if len(const) > 1 else Prod(const[0], dacc)
    raise TypeError(f"no derivative rule for {type(e).__name__}")


def variables(e: Expr) -> set:
    """Names of the variables an expression reads."""
    if isinstance(e, Var):
        return {e.name}
    out = set()
    for name in ("a", "b", "k", "value", "deriv"):
        child = getattr(e, name, None)
        if isinstance(child, Expr):
            out |= variables(child)
    for f in getattr(e, "factors", ()):
        out |= variables(f)
    return out


class Printer:
    """Python source of expressions: ``col(block, k)`` gives a coefficient's column, ``coef(col)``,
    ``state(i)``, ``tangent(i)`` the names of a coefficient column, a state entry and a tangent entry;
    ``numpy`` prints branches and cosines for whole columns."""

    def __init__(self, col, coef, state, tangent, numpy: bool, time: str = "t"):
        self.col, self.coef, self.state, self.tangent, self.numpy, self.time = col, coef, state, tangent, numpy, time

    def __call__(self, e: Expr) -> str:
        p = self
        if isinstance(e, Num):
            return repr(e.value)
        if isinstance(e, Coef):
            return self.coef(self.col(e.block, e.k))
        if isinstance(e, State):
            return self.state(e.i)
        if isinstance(e, Tangent):
            return self.tangent(e.i)
        if isinstance(e, Var):
            return e.name
        if isinstance(e, Time):
            return self.time
        if isinstance(e, Op):
            return f"({p(e.a)} {e.op} {p(e.b)})"
        if isinstance(e, Prod):
            text = p(e.factors[0])
            for f in e.factors[1:]:
                text = f"({text} * {p(f)})"
            return text
        if isinstance(e, Neg):
            return f"(-{p(e.a)})"
        if isinstance(e, Square):
            x = p(e.a)
            return f"({x} * {x})"
        if isinstance(e, Cos):
            arg = p(e.a)
            return f"cos_array(np.ascontiguousarray({arg}))" if self.numpy else f"math.cos({arg})"
        if isinstance(e, Positive):
            if self.numpy:
                return f"np.where({p(e.k)} > 0, {p(e.a)}, {p(e.b)})"
            return f"({p(e.a)} if {p(e.k)} > 0 else {p(e.b)})"
        if isinstance(e, Declared):
            return p(e.value)
        raise TypeError(f"cannot print {type(e).__name__}")


def used_columns(stmts: list[Let], col) -> list[int]:
    """Coefficient columns the statements read (``col(block, k)`` gives a coefficient's column)."""
    cols = set()

    def walk(e):
        if isinstance(e, Coef):
            cols.add(col(e.block, e.k))
        for name in ("a", "b", "k", "value", "deriv"):
            child = getattr(e, name, None)
            if isinstance(child, Expr):
                walk(child)
        for f in getattr(e, "factors", ()):
            walk(f)

    for stmt in stmts:
        walk(stmt.expr)
    return sorted(cols)
