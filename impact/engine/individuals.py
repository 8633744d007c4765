"""Individuals at low numbers: births and deaths as random events below a switching abundance.

A species declared in ``[individuals.SPECIES]`` (:mod:`impact.case.individuals`) is counted in
whole individuals whenever, at a segment boundary, it has fewer than ``switch_below`` of them (and
more than none). Over that segment its births and deaths (its gains and losses, split from the
declared terms by :mod:`impact.model.split`) are random events:

* **tau-leaping** with the step chosen by Cao, Gillespie & Petzold (2006), "Efficient step size
  selection for the tau-leaping simulation method", J. Chem. Phys. 124:044109, eq. (33): the
  expected change and the standard deviation of each counted species over a leap are held below
  max(ε x / g, 1), with ε = :data:`TAU_EPSILON` and g = :data:`HIGHEST_ORDER` (2: crowding and
  logistic deaths are quadratic in the species' own numbers). A leap that would make a count
  negative is halved and redrawn;
* **exact stochastic simulation** (Gillespie 1977, J. Phys. Chem. 81:2340–2361, the direct
  method) whenever the chosen leap would hold fewer than :data:`SSA_BELOW` events, as Cao et al.
  advise: at a handful of individuals every birth and death is simulated one by one.

The rest of the web goes on continuously: between two events (or over a leap) the whole web is
integrated by the continuous engine from the state before them, and the counted species is then
set to its new count. Rates are held over each step, so the coupling is first order in the step;
the error control above bounds the counted species' change per step. A count that reaches zero
stays zero (every rate of a species is proportional to it, except arrivals); above the switch the
continuous engine takes the species back. Random numbers come from each member's own stream
(built by :mod:`impact.ensemble.sample`), the same stream for every option (common random
numbers), so a member's numbers never depend on its batch, worker count or executor.

The compiled engines run this loop compiled (:func:`counted_run`, in a kernel generated for each
web structure beside the state kernel: :func:`count_module_source`), with the rates of the split
generated from the declared terms and numba's draws from the member's own numpy Generator, which
are numpy's to the bit. :func:`count_events` and :func:`reference_counted_segment` are the
reference in Python (and the numpy engine's counting); tests hold the two to the bit.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

import numpy as np

from impact.engine.control import template

# Cao, Gillespie & Petzold (2006): the error-control parameter ε; they use 0.03 in their examples
TAU_EPSILON = 0.03
# the highest order of any reaction a counted species takes part in (g_i of Cao et al., eq. 27)
HIGHEST_ORDER = 2.0
# Cao et al. (2006, section IV): when a leap would hold fewer than about 10 events, exact
# simulation is cheaper and exact
SSA_BELOW = 10.0
# a member whose continuous run fell to none by a jump (an eradication) from below this many times
# its switch at the output time before is run again with counting: between two output times its
# numbers may have passed under the switch before the jump hid them
NEAR_SWITCH = 4.0
# the rest of the web is integrated over steps of at least this long (time units) while a
# species is counted: a first-order coupling, as the rates are held over each step
COUPLING_STEP = 1.0 / 16.0
# a step loop that never ends is a bug or an explosion: fail the member instead of hanging
MAX_EVENTS = 200_000

Rates = Callable[[np.ndarray, float], tuple[np.ndarray, np.ndarray]]
Flow = Callable[[float, float, np.ndarray], None]


# The four helpers below run as they are in the reference loop (:func:`count_events`) and are
# compiled, from this same source, into the counting kernel (:func:`count_module_source`).
@template("kernel_inline")
def leap_size(x, up, down, eps=TAU_EPSILON):
    """The largest leap whose expected change and standard deviation of every count stay below
    max(ε x / g, 1) (Cao, Gillespie & Petzold 2006, eq. 33). inf when nothing happens.

    Parameters
    ----------
    x : int ndarray (k,)
        Counts.
    up, down : ndarray (k,)
        Birth and death propensities (events per time unit).
    """
    tau = math.inf
    for j in range(x.shape[0]):
        bound = max(eps * x[j] / HIGHEST_ORDER, 1.0)
        mu = abs(up[j] - down[j])
        var = up[j] + down[j]
        if mu > 0:
            tau = min(tau, bound / mu)
        if var > 0:
            tau = min(tau, bound * bound / var)
    return float(tau)


@template("kernel_inline")
def total_rate(up, down):
    """a0, the sum of every propensity: the births' sum plus the deaths' sum, each summed in order."""
    su = 0.0
    for j in range(up.shape[0]):
        su += up[j]
    sd = 0.0
    for j in range(down.shape[0]):
        sd += down[j]
    return float(su + sd)


@template("kernel_inline")
def chosen_event(up, down, r):
    """The direct method's choice (Gillespie 1977): the first event, births then deaths, whose
    running sum of propensities exceeds ``r`` (the last one if rounding leaves ``r`` at the very
    end). Births of species j are event j, deaths event k + j."""
    k = up.shape[0]
    total = 0.0
    for j in range(k):
        total += up[j]
        if total > r:
            return j
    for j in range(k):
        total += down[j]
        if total > r:
            return k + j
    return 2 * k - 1


@template("kernel_inline")
def leap(x, up, down, tau, rng, new):
    """A leap of ``tau`` from counts ``x`` (k,): Poisson births, then Poisson deaths, drawn species
    by species, into ``new`` (k,); halved and drawn again while a count would go below none.
    Returns the leap taken."""
    k = x.shape[0]
    while True:
        for j in range(k):
            new[j] = x[j] + rng.poisson(up[j] * tau)
        negative = False
        for j in range(k):
            new[j] -= rng.poisson(down[j] * tau)
            negative = negative or new[j] < 0
        if not negative:
            return tau
        tau *= 0.5


def count_events(x: np.ndarray, t: float, t_end: float, rates: Rates, rng: np.random.Generator,
                 flow: Flow | None = None, eps: float = TAU_EPSILON) -> tuple[np.ndarray, np.ndarray, bool]:
    """Births and deaths of counted species from ``t`` to ``t_end``, exact or by leaps (the
    reference loop; the compiled engines run :func:`counted_run`, the same steps compiled).

    Parameters
    ----------
    x : int ndarray (k,)
        Counts at ``t``.
    rates : callable (x, t) -> (up (k,), down (k,))
        Birth and death propensities at counts ``x`` (the rest of the web as it now is).
    flow : callable (t, dt, x), optional
        Advances the rest of the web over [t, t + dt] with the counts at ``x`` (called before each
        change of counts).

    Returns
    -------
    (x, low, ok) : counts at ``t_end``, the lowest count of each species on the way, and False
        when the event budget ran out.
    """
    x = np.array(x, np.int64)
    low = x.copy()
    for _ in range(MAX_EVENTS):
        if t >= t_end:
            return x, low, True
        up, down = rates(x, t)
        a0 = total_rate(up, down)
        if a0 <= 0.0:
            if flow is not None:
                flow(t, t_end - t, x)
            return x, low, True
        tau = min(leap_size(x, up, down, eps), t_end - t)
        x_before = x.copy()
        if tau * a0 < SSA_BELOW:
            dt = rng.exponential(1.0 / a0)
            if t + dt >= t_end:
                if flow is not None:
                    flow(t, t_end - t, x)
                return x, low, True
            r = rng.random() * a0
            j = chosen_event(up, down, r)
            k = up.size
            x[j % k] += 1 if j < k else -1
            step = dt
        else:
            new = np.empty_like(x)
            step = leap(x, up, down, tau, rng, new)
            x = new
        if flow is not None:
            flow(t, step, x_before)
        t += step
        np.minimum(low, x, out=low)
    return x, low, False


@dataclass(frozen=True)
class Counting:
    """Which species are counted, and each member's random stream.

    Attributes
    ----------
    columns : int ndarray (k,)
        State columns of the counted species.
    per_unit : ndarray (k,)
        Individuals in one unit of abundance.
    switch : ndarray (k,)
        Below this many individuals the species is counted.
    stream : callable (row) -> numpy.random.Generator
        A fresh generator of the member in row ``row`` (the same numbers on every call).
    """

    columns: np.ndarray
    per_unit: np.ndarray
    switch: np.ndarray
    stream: Callable[[int], np.random.Generator]

    def below(self, y: np.ndarray) -> np.ndarray:
        """Rows of ``y`` (M, n) with some counted species between none and the switch: (M,) bool."""
        c = y[:, self.columns] * self.per_unit
        with np.errstate(invalid="ignore"):
            return ((c > 0) & (c < self.switch)).any(axis=1)

    def subset(self, rows: np.ndarray) -> "Counting":
        """The same counting for members ``rows`` (row r of the subset is row rows[r] here)."""
        rows = np.asarray(rows)
        return Counting(self.columns, self.per_unit, self.switch, lambda r: self.stream(int(rows[r])))

    def may_go_below(self, states: np.ndarray, cummin: np.ndarray) -> np.ndarray:
        """Members of a continuous run (states and running minima (M, T, n)) that may have had some
        counted species between none and its switch at some time: (M,) bool. The others' runs
        with counting are their continuous runs, to the bit."""
        c = cummin[:, :, self.columns] * self.per_unit
        s = states[:, :, self.columns] * self.per_unit
        with np.errstate(invalid="ignore"):
            near = ((c > 0) & (c < self.switch)).any(axis=(1, 2)) | ((s > 0) & (s < self.switch)).any(axis=(1, 2))
            gone = c == 0
            before = np.concatenate([np.full_like(c[:, :1], np.inf), c[:, :-1]], axis=1)
            near |= (gone & (before > 0) & (before < NEAR_SWITCH * self.switch)).any(axis=(1, 2))
        return near

    def whole(self, y: np.ndarray, rng: np.random.Generator) -> np.ndarray:
        """Counts of a state row ``y`` (n,), a fraction of an individual kept with its chance
        (unbiased rounding; no random number is used for a whole count): int (k,)."""
        c = y[self.columns] * self.per_unit
        base = np.floor(c)
        frac = c - base
        out = base.astype(np.int64)
        for j in np.flatnonzero(frac > 1e-9):
            out[j] += int(rng.random() < frac[j])
        return out


# The counting kernel's own functions, compiled (in this order) after the state kernel's step loop.
COUNT_FUNCTIONS = ("leap_size", "total_rate", "chosen_event", "leap", "couple", "counted_rates", "next_events",
                   "counted_run")


@template("kernel_jit")
def couple(st, coef, t_from, t_end, cur, lo, hi, rtol, atol, max_steps, blowup, y0, y_out, ymin, ymax, h, h_out,
           reason, nsteps):
    """The rest of the web of one member from ``t_from`` to ``t_end`` > ``t_from`` with its state
    in ``cur`` (n,), through the step loop's ``segment`` with a first step chosen afresh (as
    :class:`impact.engine.web.MemberSegments`); ``cur``, ``lo`` and ``hi`` are updated unless it
    fails. ``y0`` to ``nsteps`` are ``segment``'s one-member arrays. Returns (failure code, evaluations)."""
    n = cur.shape[0]
    for j in range(n):
        if cur[j] < 0:
            raise ValueError("y0 has negative entries")
        y0[0, j] = cur[j]
        ymin[0, j] = cur[j]
        ymax[0, j] = cur[j]
        y_out[0, j] = math.nan
    h[0] = math.nan
    h_out[0] = math.nan
    reason[0] = 0
    nsteps[0] = 0
    nfev = segment(st, coef, y0, h, t_from, t_end, rtol, atol, max_steps, blowup, y_out, ymin, ymax, h_out, reason,
                   nsteps)
    code = int(reason[0])
    if code == 0:
        for j in range(n):
            lo[j] = nmin(lo[j], ymin[0, j])
            hi[j] = nmax(hi[j], ymax[0, j])
            cur[j] = y_out[0, j]
    return code, nfev


@template("kernel_inline")
def counted_rates(st, cf, t, cur, x, cols, per_unit, yy, gain, loss, up, down):
    """Birth and death propensities ``up``, ``down`` (k,) of the counted species at counts ``x``
    with the rest of the web at ``cur`` (n,): the generated split (``web_split``) in individuals."""
    for j in range(cur.shape[0]):
        yy[j] = cur[j]
    for j in range(cols.shape[0]):
        yy[cols[j]] = x[j] / per_unit[j]
    web_split(st, cf, t, yy, gain, loss)
    for j in range(cols.shape[0]):
        up[j] = gain[cols[j]] * per_unit[j]
        down[j] = loss[cols[j]] * per_unit[j]


@template("kernel_inline")
def next_events(x, up, down, t, t1, eps, rng, new):
    """The events of one step of :func:`count_events` from counts ``x`` (k,) at ``t``, applied to
    ``x``: one by exact simulation or a leap. Returns the step and whether it reaches ``t1`` with
    no event (the last)."""
    k = x.shape[0]
    a0 = total_rate(up, down)
    if a0 <= 0.0:
        return t1 - t, True
    tau = min(leap_size(x, up, down, eps), t1 - t)
    if tau * a0 < SSA_BELOW:
        dt = rng.exponential(1.0 / a0)
        if t + dt >= t1:
            return t1 - t, True
        e = chosen_event(up, down, rng.random() * a0)
        if e < k:
            x[e] += 1
        else:
            x[e - k] -= 1
        return dt, False
    step = leap(x, up, down, tau, rng, new)
    for j in range(k):
        x[j] = new[j]
    return step, False


@template("kernel_jit")
def counted_run(st, coef, t0, t1, y, cols, per_unit, x0, rng, eps, rtol, atol, max_steps, blowup, out, lo, hi):
    """:func:`counted_segment`'s loop compiled: :func:`count_events` with the rates of the
    generated split (``web_split``) and the rest of the web moved by :func:`couple` in steps of at
    least :data:`COUPLING_STEP`, every operation and random draw in the reference's order.

    ``coef`` (1, P) the member's row, ``y`` (n,) its state at ``t0``, ``cols`` (k,) the counted
    columns, ``per_unit`` (k,) individuals per unit, ``x0`` (k,) int64 counts at ``t0``, ``rng`` the
    member's numpy Generator (advanced in place). Fills ``out``, ``lo``, ``hi`` (n,) as
    :func:`counted_segment` returns them; returns (failure code, evaluations).
    """
    n = y.shape[0]
    k = cols.shape[0]
    cf = coef[0]
    y0 = np.empty((1, n))
    y_out = np.empty((1, n))
    ymin = np.empty((1, n))
    ymax = np.empty((1, n))
    h = np.empty(1)
    h_out = np.empty(1)
    reason = np.zeros(1, np.int8)
    nsteps = np.zeros(1, np.int64)
    gain, loss, yy = np.empty(n), np.empty(n), np.empty(n)
    up, down = np.empty(k), np.empty(k)
    x, before, new, low = x0.copy(), x0.copy(), x0.copy(), x0.copy()
    for j in range(n):
        out[j] = y[j]
        lo[j] = y[j]
        hi[j] = y[j]
    for j in range(k):
        out[cols[j]] = x[j] / per_unit[j]
    t = t0
    t_from = t0
    code = 0
    nfev = 0
    ok = False
    for _ in range(MAX_EVENTS):
        if t >= t1:
            ok = True
            break
        counted_rates(st, cf, t, out, x, cols, per_unit, yy, gain, loss, up, down)
        for j in range(k):
            before[j] = x[j]
        step, last = next_events(x, up, down, t, t1, eps, rng, new)
        # the rest of the web moves on in steps of at least COUPLING_STEP, seeing the counts held
        # over [t, t + step] (as reference_counted_segment's flow)
        for j in range(k):
            out[cols[j]] = before[j] / per_unit[j]
        t_end = t + step
        if (t_end - t_from >= COUPLING_STEP or t_end >= t1) and code == 0 and t_end > t_from:
            code, e = couple(st, coef, t_from, t_end, out, lo, hi, rtol, atol, max_steps, blowup, y0, y_out, ymin,
                             ymax, h, h_out, reason, nsteps)
            nfev += e
            t_from = t_end
        if last:
            ok = True
            break
        t = t_end
        for j in range(k):
            low[j] = min(low[j], x[j])
    for j in range(k):
        c = cols[j]
        out[c] = x[j] / per_unit[j]
        lo[c] = nmin(y[c], low[j] / per_unit[j])
        hi[c] = nmax(y[c], out[c])
    if code == 0 and not ok:
        code = TOO_MANY
    return code, nfev


def count_module_source(st: np.ndarray) -> str:
    """Source of the counting kernel for structure ``st``: the state kernel's module
    (:func:`impact.engine.generate.module_source`), the split of :mod:`impact.model.split` as
    ``web_split(st, cf, t, y, gain_out, loss_out)``, and the functions of :data:`COUNT_FUNCTIONS`."""
    from impact.engine.generate import module_source, template_source
    from impact.model.split import scalar_split_body

    n = int(st[1])
    body = scalar_split_body(st, timed_guard=False)
    body += [f"gain_out[{i}] = g{i}" for i in range(n)] + [f"loss_out[{i}] = l{i}" for i in range(n)]
    split = "@kernel_jit\ndef web_split(st, cf, t, y, gain_out, loss_out):\n" + "".join(f"    {b}\n" for b in body)
    parts = [module_source(st), "from impact.engine.individuals import COUPLING_STEP, HIGHEST_ORDER, MAX_EVENTS, "
             "SSA_BELOW, TAU_EPSILON", "", split]
    parts += [template_source(globals()[name], n) for name in COUNT_FUNCTIONS]
    return "\n".join(parts) + "\n"


def counting_kernel(st: np.ndarray):
    """The compiled counting kernel of structure ``st`` (written and compiled on first use)."""
    from impact.engine.generate import generated

    return generated(st, "count", count_module_source)


def counted_segment(web, p, c, coef_row: np.ndarray, t0: float, t1: float, y: np.ndarray, member: int,
                    counting: Counting, rng: np.random.Generator, *, rtol, atol, engine: str):
    """One member over one segment with its counted species as random events.

    Parameters
    ----------
    coef_row : ndarray (1, P)
        The member's coefficient row for the segment (:func:`impact.model.pack_coefficients`).
    y : ndarray (n,)
        State at ``t0``.
    member : int
        Row of ``p`` and ``c``.

    Returns
    -------
    (y, ymin, ymax, reason, nfev) : state at ``t1`` (n,), running extremes (n,), failure code
        (0: none) and right-hand-side evaluations.
    """
    from impact.engine.web import pack_structure

    if engine == "numpy":
        return reference_counted_segment(web, p, c, coef_row, t0, t1, y, member, counting, rng, rtol=rtol, atol=atol,
                                         engine=engine)
    out, lo, hi, reason, nfev = compiled_counted_members(pack_structure(web), coef_row, t0, t1, y[None, :], counting,
                                                         [rng], rtol=rtol, atol=atol)
    return out[0], lo[0], hi[0], int(reason[0]), nfev


def reference_counted_segment(web, p, c, coef_row: np.ndarray, t0: float, t1: float, y: np.ndarray, member: int,
                              counting: Counting, rng: np.random.Generator, *, rtol, atol, engine: str):
    """:func:`counted_segment` in Python: :func:`count_events` with the rates of
    :func:`impact.model.split.scalar_split` and the rest of the web moved by the engine ``engine``
    (the numpy engine's counting, and the reference the compiled counting is tested against).
    Arguments and returns as :func:`counted_segment`."""
    from impact.engine.control import Failure
    from impact.engine.web import MemberSegments, pack_structure, web_segment
    from impact.model.split import scalar_split

    split = scalar_split(pack_structure(web))
    cols, u = counting.columns, counting.per_unit
    cf = coef_row[0].tolist()
    state = {"y": y.copy(), "lo": y.copy(), "hi": y.copy(), "nfev": 0, "reason": 0, "from": t0}
    x0 = counting.whole(y, rng)
    state["y"][cols] = x0 / u

    def rates(x, t):
        yy = state["y"].tolist()
        for j, c in enumerate(cols):
            yy[c] = x[j] / u[j]
        g, l = split(t, yy, cf)
        return np.array([g[c] for c in cols]) * u, np.array([l[c] for c in cols]) * u

    if engine == "numpy":
        def segment(t, t_end, y_now):
            return web_segment(web, p, c, t, t_end, y_now[None, :], rtol=rtol, atol=atol, members=np.array([member]),
                               engine=engine)
    else:  # one member's many short segments: its arrays are checked once, not at every step
        segment = MemberSegments(web, coef_row, y.size, rtol=rtol, atol=atol, engine=engine)

    def flow(t_end):
        # the rest of the web moves on in steps of at least COUPLING_STEP (events between are
        # applied to the counted species at once; rates are held over each step anyway)
        t = state["from"]
        if state["reason"] or t_end <= t:
            return
        seg = segment(t, t_end, state["y"])
        state["nfev"] += seg.nfev
        state["from"] = t_end
        if seg.failed[0]:
            state["reason"] = int(seg.reason[0])
            return
        state["lo"] = np.minimum(state["lo"], seg.ymin[0])
        state["hi"] = np.maximum(state["hi"], seg.ymax[0])
        state["y"] = seg.y[0]

    def flow_then_count(t, dt, x):
        # the rest of the web sees the counts held over [t, t + dt] (between events the counted
        # species change by events only)
        state["y"][cols] = x / u
        if t + dt - state["from"] >= COUPLING_STEP or t + dt >= t1:
            flow(t + dt)

    x, low, ok = count_events(x0, t0, t1, rates, rng, flow_then_count)
    out = state["y"]
    out[cols] = x / u
    lo, hi = state["lo"], state["hi"]
    lo[cols] = np.minimum(y[cols], low / u)
    hi[cols] = np.maximum(y[cols], out[cols])  # (the highest count between is not kept)
    reason = state["reason"] or (0 if ok else int(Failure.TOO_MANY_STEPS))
    return out, lo, hi, reason, state["nfev"]


def compiled_counted_members(st: np.ndarray, coef: np.ndarray, t0: float, t1: float, y: np.ndarray,
                             counting: Counting, rngs: list, *, rtol, atol, max_steps: int = 100_000,
                             blowup: float = 1e12):
    """Members through one segment with their counted species as random events, through the
    compiled counting kernel (:func:`counted_run`): for each member the numbers of
    :func:`reference_counted_segment`, from the same random draws. The arrays are checked once for
    all of them at the boundary.

    Parameters
    ----------
    st : int64 ndarray
        Structure table (:func:`impact.engine.web.pack_structure`).
    coef : ndarray (m, P)
        The members' coefficient rows for the segment.
    y : ndarray (m, n)
        States at ``t0``.
    rngs : list of numpy.random.Generator (m,)
        Each member's own stream, advanced in place.

    Returns
    -------
    (y, ymin, ymax, reason, nfev) : states at ``t1`` (m, n), running extremes (m, n), failure
        codes (m,) int and right-hand-side evaluations.
    """
    from impact.engine.boundary import check_kernel_arrays
    from impact.engine.web import tolerance

    m, n = y.shape
    y = np.ascontiguousarray(y, dtype=float)
    coef = np.ascontiguousarray(coef, dtype=float)
    rtol, atol = tolerance(rtol, n, "rtol"), tolerance(atol, n, "atol")
    if len(rngs) != m:
        raise ValueError(f"{len(rngs)} random streams for {m} members")
    x0 = np.array([counting.whole(y[r], rngs[r]) for r in range(m)], dtype=np.int64).reshape(m, counting.columns.size)
    cols = np.ascontiguousarray(counting.columns, dtype=np.int64)
    per_unit = np.ascontiguousarray(counting.per_unit, dtype=float)
    out, lo, hi = np.empty((m, n)), np.empty((m, n)), np.empty((m, n))
    reason = np.zeros(m, dtype=np.int64)
    check_kernel_arrays("counted_run", st, coef=coef, y=y, cols=cols, per_unit=per_unit, x0=x0, rtol=rtol,
                        atol=atol, out=out, lo=lo, hi=hi)  # (boundary into compiled code: rows of these go in)
    kernel = counting_kernel(st)
    nfev = 0
    for r in range(m):
        code, e = kernel.counted_run(st, coef[r:r + 1], float(t0), float(t1), y[r], cols, per_unit, x0[r], rngs[r],
                                     float(TAU_EPSILON), rtol, atol, int(max_steps), float(blowup), out[r], lo[r],
                                     hi[r])
        reason[r] = code
        nfev += int(e)
    return out, lo, hi, reason, nfev
