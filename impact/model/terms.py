"""The food web's right-hand side, declared once, term by term (equations in :mod:`impact.model`).

Each growth and interaction term is one function of the web's structure that returns its
contribution to the right-hand side as statements of a small expression tree (:mod:`impact.model.expr`).
:data:`TERMS` lists them in the order they act; :func:`program` strings them together. From
that one program come

* the numpy reference right-hand side (:func:`numpy_rhs`, the column-by-column code run by
  :class:`impact.model.WebRHS`),
* the compiled kernel's straight-line right-hand side (:func:`impact.engine.generate.rhs_source`),
* the directional derivative J·v, by forward differentiation of the same statements
  (:func:`tangent_program`), printed for numpy (:func:`numpy_jvp`) and for numba
  (:func:`impact.engine.generate.jvp_lines`), and the Jacobian as J·v of the unit vectors.

Why a small tree and not sympy: the right-hand side must keep the floating-point operations of
the declaration in the declared order, so that the numpy and compiled engines (and every saved
table) agree to the bit; sympy canonicalises sums and products (reorders, merges, simplifies), so
its printed code would not. The tree prints what was declared, parenthesised as built
(``a * b * c`` is ``(a * b) * c``), and its derivative rules are few and fixed
(:func:`impact.model.expr.derivative`); a term may give its derivative outright
(:class:`impact.model.expr.Declared`, e.g. :func:`saturating`). The derivative forms reproduce the
J·v the engines computed before the terms were declared, so every saved table is unchanged.

Tests check every term's J·v against complex-step derivatives of the generated right-hand side
(tests/test_jacobian.py). A new term is one function appended to :data:`TERMS` (and its
coefficients to :data:`SPECIES_COEFFICIENTS` and :class:`impact.model.SegmentCoefficients`).

The structure table (int64, :func:`pack_structure`) and the coefficient rows are decoded once,
here (:class:`Structure`): header entries by the named positions ``HEAD_*``, then per feeding link
consumer, resource (−1: a constant alternative food), power and type-I flag (L each), competition
pairs (2·Cc), facultative mutualism pairs (2·U), obligate mutualism pairs (2·O), and per species
an interference flag, a sterile-release flag, the adult a juvenile matures into (−1: none), a
sinusoidal-breeding flag and an Allee-effect kind (:data:`ALLEE_KINDS`; S each, appended last so the
entries before it keep their places). Coefficient rows: the per-species blocks of
:data:`SPECIES_COEFFICIENTS` (S each), the per-link blocks of :data:`LINK_COEFFICIENTS` (L each),
then alpha (Cc), beta, H (U each), obH (O), decay (1), then the appended per-species blocks of
:data:`APPENDED_COEFFICIENTS` (S each: the Allee threshold, then the predator-dilution rate).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from impact.model.expr import (ZERO, Coef, Cos, Declared, Expr, Let, Neg, Op, Positive, Printer, Prod, Square,
    State, Tangent, Time, Var, derivative, used_columns, variables, wrap)

# positions in the structure table's header
HEAD_S, HEAD_N, HEAD_CARRION, HEAD_L, HEAD_CC, HEAD_U, HEAD_LOGISTIC, HEAD_CROWDING, HEAD_O = range(9)
HEADER = 9
# coefficient blocks, in the order of a member's coefficient row
SPECIES_COEFFICIENTS = ("scale", "rpos", "lin", "dens", "inflow", "quad", "gamma", "sterile", "mat", "amp",
                        "omega", "phase")
LINK_COEFFICIENTS = ("a", "ah", "e", "food")
RESPONSE_POWER = {"holling1": 1, "holling2": 1, "holling3": 2, "beddington-deangelis": 1}
# per-species blocks appended after decay (the columns before them keep their places)
APPENDED_COEFFICIENTS = ("allee", "dilution")
# the Allee-effect kind of a species in the structure table: its code is the position here
ALLEE_KINDS = ("none", "mate-finding", "strong", "predator-dilution")


# --------------------------------------------------------------------------------------------
# the structure table


def pack_structure(web) -> np.ndarray:
    """The structure of a :class:`impact.model.FoodWeb` as the int64 table the kernels read."""
    links = web.links
    S = web.n_species
    head = [S, web.n_state, int(web.has_carrion), len(links), len(web.competition),
            len(web.mutualism), int(web.logistic.any()), int(web.crowding), len(web.obligate)]
    cols = ([l.consumer for l in links] + [l.resource for l in links]
            + [RESPONSE_POWER[l.response] for l in links]
            + [int(l.response == "holling1") for l in links])
    pairs = ([x for pair in web.competition for x in pair] + [x for pair in web.mutualism for x in pair]
             + [x for pair in web.obligate for x in pair])
    per_species = [int(i in web.interference) for i in range(S)] + [int(i in web.sterile) for i in range(S)]
    adult = dict(web.stages)
    per_species += [adult.get(i, -1) for i in range(S)] + [int(i in web.wave) for i in range(S)]
    allee = dict(web.allee)
    per_species += [ALLEE_KINDS.index(allee.get(i, "none")) for i in range(S)]
    return np.array(head + cols + pairs + per_species, dtype=np.int64)


@dataclass(frozen=True)
class Structure:
    """A structure table decoded: counts, index lists and where each coefficient sits in a row.

    Attributes
    ----------
    S, n, L, Cc, U, O : int
        Species, state variables, feeding links, competition pairs, facultative and obligate
        mutualisms.
    carrion, logistic, crowding : bool
    consumer, resource, power, type1 : tuple of int (L each)
    competition, mutualism, obligate : tuple of (int, int)
    interfere, sterile, wave : tuple of bool (S each)
    adult : tuple of int (S,)
        The adult stage a juvenile matures into, −1 for none.
    allee : tuple of int (S,)
        Allee-effect kind of each species, an index into :data:`ALLEE_KINDS` (0: none).
    offset : dict of str -> int
        First column of each coefficient block in a member's row.
    """

    S: int
    n: int
    carrion: bool
    L: int
    Cc: int
    U: int
    logistic: bool
    crowding: bool
    O: int
    consumer: tuple
    resource: tuple
    power: tuple
    type1: tuple
    competition: tuple
    mutualism: tuple
    obligate: tuple
    interfere: tuple
    sterile: tuple
    adult: tuple
    wave: tuple
    allee: tuple
    offset: dict = field(compare=False)

    @staticmethod
    def decode(st: np.ndarray) -> "Structure":
        st = [int(x) for x in st]
        S, n, carrion, L, Cc, U, logistic, crowding, O = st[:HEADER]
        at = HEADER

        def take(k):
            nonlocal at
            out = tuple(st[at:at + k])
            at += k
            return out

        def pairs(k):
            flat = take(2 * k)
            return tuple(zip(flat[::2], flat[1::2]))

        consumer, resource, power, type1 = take(L), take(L), take(L), take(L)
        competition, mutualism, obligate = pairs(Cc), pairs(U), pairs(O)
        interfere, sterile, adult, wave, allee = take(S), take(S), take(S), take(S), take(S)
        offset, col = {}, 0
        for name, width in ([(b, S) for b in SPECIES_COEFFICIENTS] + [(b, L) for b in LINK_COEFFICIENTS]
                            + [("alpha", Cc), ("beta", U), ("H", U), ("obH", O), ("decay", 1)]
                            + [(b, S) for b in APPENDED_COEFFICIENTS]):
            offset[name] = col
            col += width
        offset["width"] = col
        return Structure(S, n, bool(carrion), L, Cc, U, bool(logistic), bool(crowding), O, consumer, resource,
                         power, type1, competition, mutualism, obligate, tuple(map(bool, interfere)),
                         tuple(map(bool, sterile)), adult, tuple(map(bool, wave)), allee, offset)

    def col(self, block: str, k: int = 0) -> int:
        """Column of entry ``k`` of coefficient block ``block`` in a member's row."""
        return self.offset[block] + k


def y(i):
    return State(int(i))


def c(block, k=0):
    return Coef(block, int(k))


def let(target, expr, timed=False):
    return Let(target, wrap(expr), timed)


def update(target, op, expr, timed=False):
    """``target = target op expr`` (``op`` '+', '-' or '*')."""
    expr = wrap(expr)
    return Let(target, Prod(Var(target), expr) if op == "*" else Op(op, Var(target), expr), timed)


def saturating(k: Expr, P: Expr, H: Expr, dP: Expr) -> Declared:
    """``k P / (H + P)``, with derivative ``k H / ((H + P)(H + P)) dP``."""
    return Declared(k * P / (H + P), k * H / ((H + P) * (H + P)) * dP)


# --------------------------------------------------------------------------------------------
# the terms, in the order they act


def births(s: Structure) -> list[Let]:
    """Births r⁺ N, times the facultative boost 1 + Σ β P/(H + P) (Holland & DeAngelis 2010) and the
    obligate share Σ_o P_o/(H_o + P_o) Π_{k<o} H_k/(H_k + P_k) = 1 − Π_o H_o/(H_o + P_o)."""
    body, factor = [], {i: [] for i in range(s.S)}
    boosted = sorted({b for b, _ in s.mutualism})
    body += [let(f"q{b}", 1.0) for b in boosted]
    body += [update(f"q{b}", "+", saturating(c("beta", u), y(p), c("H", u), Tangent(p)))
             for u, (b, p) in enumerate(s.mutualism)]
    for b in boosted:
        factor[b].append(Var(f"q{b}"))
    pollinated = sorted({b for b, _ in s.obligate})
    body += [let(f"pol{b}", 0.0) for b in pollinated] + [let(f"miss{b}", 1.0) for b in pollinated]
    for u, (b, p) in enumerate(s.obligate):
        H = c("obH", u)
        slope = H / ((H + y(p)) * (H + y(p))) * Tangent(p)  # d/dP of P/(H + P), and minus that of H/(H + P)
        body += [update(f"pol{b}", "+", Var(f"miss{b}") * Declared(y(p) / (H + y(p)), slope)),
                 update(f"miss{b}", "*", Declared(H / (H + y(p)), Neg(slope)))]
    for b in pollinated:
        factor[b].append(Var(f"pol{b}"))
    body += [let(f"b{i}", Prod(c("rpos", i), y(i), *factor[i])) for i in range(s.S)]
    return body


def feeding(s: Structure) -> list[Let]:
    """Intake I of each link by Holling type I (a R), II (a R/D), III (a R²/D) or
    Beddington–DeAngelis (a R/D, D with γ N of the consumer), with D = 1 + Σ a h R^q over the
    consumer's saturating links: e I N_consumer joins the consumer's births, I N_consumer the
    resource's losses (a constant alternative food is not depleted)."""
    if not s.L:
        return []
    dens = [y(r) if r >= 0 else c("food", l) for l, r in enumerate(s.resource)]
    powered = [Square(d) if q == 2 else d for d, q in zip(dens, s.power)]
    body = [let(f"loss{r}", 0.0) for r in sorted({r for r in s.resource if r >= 0})]
    seen = set()
    for l in range(s.L):
        if s.type1[l]:
            continue
        j = s.consumer[l]
        body.append(let(f"d{j}", c("ah", l) * powered[l] + (Var(f"d{j}") if j in seen else 1.0)))
        seen.add(j)
    body += [update(f"d{j}", "+", c("gamma", j) * y(j)) for j in range(s.S) if s.interfere[j]]
    for l in range(s.L):
        j, r = s.consumer[l], s.resource[l]
        intake = c("a", l) * powered[l]
        body += [let("I", intake if s.type1[l] else intake / Var(f"d{j}")), let("eaten", Var("I") * y(j)),
                 update(f"b{j}", "+", c("e", l) * Var("eaten"))]
        if r >= 0:
            body.append(update(f"loss{r}", "+", Var("eaten")))
    return body


def controls(s: Structure) -> list[Let]:
    """Births scaled by φ (1 − f), the environmental and breeding-season multiplier and the share
    not suppressed by fertility control."""
    return [let(f"o{i}", c("scale", i) * Var(f"b{i}")) for i in range(s.S)]


def sinusoidal_breeding(s: Structure) -> list[Let]:
    """Births × (1 + A cos(ω t − ω t_peak)) for a sinusoidal breeding season (left out for the
    season-averaged web)."""
    return [update(f"o{i}", "*", 1.0 + c("amp", i) * Cos(c("omega", i) * Time() - c("phase", i)), timed=True)
            for i in range(s.S) if s.wave[i]]


def sterile_release(s: Structure) -> list[Let]:
    """Births × N/(N + s) with s sterile individuals present (Knipling 1955); unchanged when s = 0."""
    return [let(f"o{i}", Positive(c("sterile", i), Var(f"o{i}") * (y(i) / (y(i) + c("sterile", i))), Var(f"o{i}")))
            for i in range(s.S) if s.sterile[i]]


def mate_finding(s: Structure) -> list[Let]:
    """Births × N/(N + θ): the chance of finding a mate at density N, θ the density at which half the
    females are mated (Dennis 1989; the mate-finding Allee effect of Boukal & Berec 2002 and
    Courchamp, Berec & Gascoigne 2008). A weak Allee effect alone; with mortality, a strong one."""
    return [update(f"o{i}", "*", y(i) / (y(i) + c("allee", i))) for i in range(s.S) if s.allee[i] == 1]


def life_stages(s: Structure) -> list[Let]:
    """An adult's births are born as juveniles, which mature into the adult at rate μ
    (de Roos & Persson 2013)."""
    body = []
    for i in range(s.S):
        a = s.adult[i]
        if a >= 0:
            body += [update(f"o{i}", "+", Var(f"o{a}")), let(f"o{a}", 0.0), let("flow", c("mat", i) * y(i)),
                     update(f"o{i}", "-", Var("flow")), update(f"o{a}", "+", Var("flow"))]
    return body


def logistic(s: Structure) -> list[Let]:
    """Logistic crowding r N (N + Σ α N_j)/(κ K), competition included (dens = 0 for other species)."""
    if not s.logistic:
        return []
    body = [let(f"cr{i}", y(i)) for i in range(s.S)]
    body += [update(f"cr{i}", "+", c("alpha", k) * y(j)) for k, (i, j) in enumerate(s.competition)]
    return body + [update(f"o{i}", "-", Prod(c("dens", i), y(i), Var(f"cr{i}"))) for i in range(s.S)]


def strong_allee(s: Structure) -> list[Let]:
    """Logistic growth × (N/A − 1): r N (1 − N/K)(N/A − 1) alone, a strong Allee effect with
    threshold A (equilibria 0 and K stable, A unstable; Lewis & Kareiva 1993, Courchamp, Berec &
    Gascoigne 2008)."""
    return [update(f"o{i}", "*", y(i) / c("allee", i) - 1.0) for i in range(s.S) if s.allee[i] == 2]


def predator_dilution(s: Structure) -> list[Let]:
    """Losses D N/(N + h) to a generalist predator that is not a species of the web, whose type II
    response saturates: D the most it removes per time unit, h the half-saturation density. The
    per-capita risk D/(N + h) falls as N grows, so predation alone makes an Allee effect
    (predation-driven, or predator-dilution, Allee effect: Gascoigne & Lipcius 2004, Mar Ecol Prog
    Ser 269:49–59; Courchamp, Berec & Gascoigne 2008, ch. 2); with logistic growth r N (1 − N/K)
    it is strong when r (1 − N/K)(N + h) = D has two positive roots, the lower one the threshold.
    A loss, not a multiplier of births: it acts on any growth form and on a juvenile stage."""
    return [update(f"o{i}", "-", saturating(c("dilution", i), y(i), c("allee", i), Tangent(i)))
            for i in range(s.S) if s.allee[i] == 3]


def crowding(s: Structure) -> list[Let]:
    """Crowding (density-dependent) mortality μ N²."""
    if not s.crowding:
        return []
    return [update(f"o{i}", "-", Prod(c("quad", i), y(i), y(i))) for i in range(s.S)]


def linear(s: Structure) -> list[Let]:
    """min(r, 0) − m − q: exponential decline, mortality and harvest."""
    return [update(f"o{i}", "+", c("lin", i) * y(i)) for i in range(s.S)]


def eaten(s: Structure) -> list[Let]:
    """What consumers eat of each species (subtracting a zero loss would change nothing: left out)."""
    return [update(f"o{i}", "-", Var(f"loss{i}")) for i in sorted({r for r in s.resource if 0 <= r < s.S})]


def carrion(s: Structure) -> list[Let]:
    """dC/dt = Σ_i y_i (m_i + c_i q_i) N_i − δ C − what scavengers eat, summed species by species."""
    if not s.carrion:
        return []
    S = s.S
    body = [let("gain", c("inflow", 0) * y(0))] + [update("gain", "+", c("inflow", i) * y(i)) for i in range(1, S)]
    body.append(let(f"o{S}", Var("gain") - c("decay") * y(S)))
    if S in s.resource:
        body.append(update(f"o{S}", "-", Var(f"loss{S}")))
    return body


TERMS = (births, feeding, controls, sinusoidal_breeding, sterile_release, mate_finding, life_stages, logistic,
         strong_allee, predator_dilution, crowding, linear, eaten, carrion)


def terms_used(s: Structure) -> tuple[str, ...]:
    """Names of the declared terms that act in structure ``s`` (those with statements)."""
    return tuple(term.__name__ for term in TERMS if term(s))


def program(s: Structure) -> list[Let]:
    """The right-hand side of structure ``s`` as statements; ``o{i}`` holds dy_i/dt at the end."""
    return [stmt for term in TERMS for stmt in term(s)]


# --------------------------------------------------------------------------------------------
# the derivative along v


def tangent_program(s: Structure) -> list[Let]:
    """The right-hand side's statements with their derivatives along v (``d`` + name): ``o{i}`` holds
    f_i and ``do{i}`` (when present) (J v)_i; an absent ``do{i}`` is 0.

    A derivative is computed before its statement (it reads the old values of an update such as
    ``m = m · x``), except for a quotient whose value it reuses (``dI`` from ``I = a/D``)."""
    dvar, body = {}, []
    for stmt in program(s):
        reuse = isinstance(stmt.expr, Op) and stmt.expr.op == "/" and stmt.target not in variables(stmt.expr)
        d = derivative(stmt.expr, dvar, stmt.target if reuse else None)
        name = "d" + stmt.target
        if d is ZERO:
            body.append(stmt)
            dvar.pop(stmt.target, None)
            continue
        # an unchanged derivative (d = d) needs no statement
        dstmts = [] if isinstance(d, Var) and d.name == name else [Let(name, d, stmt.timed)]
        body += ([stmt] + dstmts) if reuse else (dstmts + [stmt])
        dvar[stmt.target] = name
    return body


# --------------------------------------------------------------------------------------------
# the numpy reference


def _numpy_lines(s: Structure, stmts: list[Let], tangent: bool) -> list[str]:
    """Column-by-column numpy statements: coefficient columns ``k{col}``, state ``y{i}``, tangent ``v{i}``."""
    pr = Printer(s.col, lambda k: f"k{k}", lambda i: f"y{i}", lambda i: f"v{i}", numpy=True)
    # whole columns are read from transposed copies: contiguous, so each operation runs at full speed
    body = [f"k{k} = cf[{k}]" for k in used_columns(stmts, s.col)] + ["yt = y.T.copy()"]
    body += [f"y{i} = yt[{i}]" for i in range(s.n)]
    if tangent:
        body += ["vt = v.T.copy()"] + [f"v{i} = vt[{i}]" for i in range(s.n)]
    for stmt in stmts:
        line = f"{stmt.target} = {pr(stmt.expr)}"
        body += ["if t is not None:", f"    {line}"] if stmt.timed else [line]
    if any(isinstance(stmt.expr, Positive) for stmt in stmts):
        # both branches of np.where are evaluated: N/(N + s) is 0/0 where no sterile release acts
        body = ["with np.errstate(divide='ignore', invalid='ignore'):"] + [f"    {line}" for line in body]
    return body


def _compile(name: str, head: str, body: list[str]):
    from impact.model.libm import cos_array  # numba is loaded on first use only

    source = f"def {head}:\n" + "".join(f"    {line}\n" for line in body)
    scope = {"np": np, "cos_array": cos_array}
    exec(compile(source, f"<impact.model.terms {name}>", "exec"), scope)  # noqa: S102 - our own generated source
    fn = scope[name]
    fn.source = source
    return fn


_numpy_cache: dict = {}


def numpy_rhs(st: np.ndarray):
    """``rhs(t, y, cf, out)``: the right-hand side for whole columns (y (m, n), cf (P, m) the members'
    coefficient rows transposed, t (m,) or None for the season mean), the same operations in the same
    order as the compiled kernel."""
    key = ("rhs", st.tobytes())
    if key not in _numpy_cache:
        s = Structure.decode(st)
        body = _numpy_lines(s, program(s), False) + [f"out[:, {i}] = o{i}" for i in range(s.n)]
        _numpy_cache[key] = _compile("rhs", "rhs(t, y, cf, out)", body)
    return _numpy_cache[key]


def numpy_jvp(st: np.ndarray):
    """``jvp(t, y, v, cf, out, jv)``: f and J·v for whole columns (cf (P, m)), as :func:`numpy_rhs`."""
    key = ("jvp", st.tobytes())
    if key not in _numpy_cache:
        s = Structure.decode(st)
        stmts = tangent_program(s)
        done = {stmt.target for stmt in stmts}
        body = _numpy_lines(s, stmts, True)
        body += [f"out[:, {i}] = o{i}" for i in range(s.n)]
        body += [f"jv[:, {i}] = do{i}" if f"do{i}" in done else f"jv[:, {i}] = 0.0" for i in range(s.n)]
        _numpy_cache[key] = _compile("jvp", "jvp(t, y, v, cf, out, jv)", body)
    return _numpy_cache[key]
