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
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

import numpy as np

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


def leap_size(x: np.ndarray, up: np.ndarray, down: np.ndarray, eps: float = TAU_EPSILON) -> float:
    """The largest leap whose expected change and standard deviation of every count stay below
    max(ε x / g, 1) (Cao, Gillespie & Petzold 2006, eq. 33). inf when nothing happens.

    Parameters
    ----------
    x : ndarray (k,)
        Counts.
    up, down : ndarray (k,)
        Birth and death propensities (events per time unit).
    """
    # plain floats: k is a handful, and this runs once per event (the same operations as elementwise numpy)
    tau = math.inf
    for xi, u, d in zip(x.tolist(), up.tolist(), down.tolist()):
        bound = max(eps * xi / HIGHEST_ORDER, 1.0)
        mu, var = abs(u - d), u + d
        if mu > 0:
            tau = min(tau, bound / mu)
        if var > 0:
            tau = min(tau, bound * bound / var)
    return tau


def chosen_event(propensities: list[float], r: float) -> int:
    """The direct method's choice (Gillespie 1977): the first event whose running sum of
    propensities exceeds ``r`` (the last one if rounding leaves ``r`` at the very end)."""
    total = 0.0
    for j, a in enumerate(propensities):
        total += a
        if total > r:
            return j
    return len(propensities) - 1


def count_events(x: np.ndarray, t: float, t_end: float, rates: Rates, rng: np.random.Generator,
                 flow: Flow | None = None, eps: float = TAU_EPSILON) -> tuple[np.ndarray, np.ndarray, bool]:
    """Births and deaths of counted species from ``t`` to ``t_end``, exact or by leaps.

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
        a0 = float(up.sum() + down.sum())
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
            j = chosen_event(up.tolist() + down.tolist(), r)
            k = up.size
            x[j % k] += 1 if j < k else -1
            step = dt
        else:
            while True:
                new = x + rng.poisson(up * tau) - rng.poisson(down * tau)
                if (new >= 0).all():
                    break
                tau *= 0.5
            x, step = new, tau
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
        if t + dt - state["from"] >= COUPLING_STEP or t + dt >= t1:
            flow(t + dt)
        state["y"][cols] = x / u  # the counted species change by events only

    x, low, ok = count_events(x0, t0, t1, rates, rng, flow_then_count)
    out = state["y"]
    out[cols] = x / u
    lo, hi = state["lo"], state["hi"]
    lo[cols] = np.minimum(y[cols], low / u)
    hi[cols] = np.maximum(y[cols], out[cols])  # (the highest count between is not kept)
    reason = state["reason"] or (0 if ok else int(Failure.TOO_MANY_STEPS))
    return out, lo, hi, reason, state["nfev"]
