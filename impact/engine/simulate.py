"""Simulate the ensemble: spin-up, plausibility filter and paired option runs.

Time is cut into segments at every output time, every time-unit boundary (where the
environmental multipliers are redrawn), every edge of a breeding season or of an intervention
scheduled by season, and every intervention start, end or event, so the right-hand side is
smooth inside each segment and jumps happen only between segments: the step control of each
segment never straddles a switch.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from impact.case import ARRIVAL_KINDS, Case, Option
from impact.engine.individuals import Counting, compiled_counted_members, counted_segment
from impact.engine.web import (DEFAULT_ENGINE, Jumps, coefficient_columns, pack_coefficients, pack_structure, web_run,
    web_segment)
from impact.model import Controls, FoodWeb, WebParams, controlled_coefficients, segment_coefficients

REASON_IMPLAUSIBLE = {"extinct": "a species present today fell below its quasi-extinction level during spin-up",
                      "range": "outside an observed range today"}


@dataclass(frozen=True)
class Run:
    """Result of one option on the ensemble.

    Attributes
    ----------
    times : ndarray (T,)
        Output times (see :func:`output_times`), from 0 to the horizon.
    states : ndarray (M, T, n_state)
        State at each recorded time (NaN after a member fails).
    cummin, cummax : ndarray (M, T, n_state)
        Running minimum / maximum over [0, t], including between recorded times.
    failed : ndarray (M,) bool
    reason : ndarray (M,) int8
    nfev : int
    """

    times: np.ndarray
    states: np.ndarray
    cummin: np.ndarray
    cummax: np.ndarray
    failed: np.ndarray
    reason: np.ndarray
    nfev: int


def output_times(case: Case) -> np.ndarray:
    """Recorded times, shared by every option so runs pair point by point: (T,)."""
    H = case.horizon
    ts = set(np.round(np.arange(0.0, H + 1e-12, case.output_step), 12).tolist())
    ts.update(case.risk.times)
    ts.update((0.0, H))
    return np.array(sorted(t for t in ts if 0.0 <= t <= H))


def segment_times(case: Case, option: Option | None, with_noise: bool) -> np.ndarray:
    """All segment boundaries over [0, horizon]."""
    H = case.horizon
    ts = set(output_times(case).tolist())
    if with_noise:
        ts.update(float(k) for k in range(int(np.floor(H)) + 1))
    ts.update(breeding_edges(case, 0.0, H))
    if option is not None:
        for name in option.interventions:
            ts.update(case.intervention(name).boundaries())
    return np.array(sorted(t for t in ts if 0.0 <= t <= H))


def breeding_edges(case: Case, t0: float, t1: float) -> set[float]:
    """Times in [t0, t1] where some species' breeding season opens or closes."""
    edges: set[float] = set()
    if case.seasons is None:
        return edges
    for s in case.species:
        if s.breeding_season is not None:
            for a, b in case.seasons.windows(*s.breeding_season, t0, t1):
                edges.update((a, b))
    return edges


def breeding_multiplier(case: Case, t: float) -> np.ndarray | None:
    """Births multiplier of every species at time ``t`` from its breeding season: (S,), or None
    when no species declares one. 1 inside the season's breeding parts, ``outside`` elsewhere."""
    if case.seasons is None or all(s.breeding_season is None for s in case.species):
        return None
    sea = case.seasons
    part = int(np.floor((t / sea.length) % 1.0 * sea.parts)) + 1
    out = np.ones(len(case.species))
    for i, s in enumerate(case.species):
        if s.breeding_season is None:
            continue
        first, last = s.breeding_season
        inside = first <= part <= last if first <= last else (part >= first or part <= last)
        out[i] = 1.0 if inside else s.breeding_outside
    return out


def season_share(case: Case, parts: tuple[int, int] | None) -> float:
    """Share of a season covered by parts ``parts`` = (first, last), wrapping; 1 for None."""
    if parts is None or case.seasons is None:
        return 1.0
    first, last = parts
    n = last - first + 1 if first <= last else case.seasons.parts - first + 1 + last
    return n / case.seasons.parts


def season_mean_phi(case: Case, M: int) -> np.ndarray:
    """Season-mean breeding multiplier of every species, (M, S): share + outside·(1 − share)."""
    row = [season_share(case, s.breeding_season) * (1.0 - s.breeding_outside) + s.breeding_outside
           if s.breeding_season is not None else 1.0 for s in case.species]
    return np.tile(np.array(row, float), (M, 1))


def controls_at(case: Case, option: Option | None, values, t_mid: float, phi: np.ndarray, M: int, S: int,
                season_averaged: bool = False) -> Controls:
    """Controls of ``option`` at time ``t_mid`` (inside a segment), with growth multipliers ``phi`` (M, S).

    ``season_averaged`` gives the season-averaged controls the regime diagnostics follow: an
    intervention scheduled by season acts whenever it is on (between ``start`` and ``end``), at
    its rate (fraction, sterile density) times the share of the season it covers, or with its
    carrying-capacity factor raised to that share.
    """
    from impact.model import resolve  # local: keeps the public surface of this module small

    c = Controls.neutral(M, S)
    c = replace(c, phi=phi)
    if season_averaged:  # a sinusoidal breeding season averages to births × 1
        c = replace(c, wave=np.zeros((M, S)))
    if option is None:
        return c
    col = {n: i for i, n in enumerate(case.species_names)}
    for name in option.interventions:
        iv = case.intervention(name)
        w = season_share(case, iv.season_parts) if season_averaged else 1.0
        if not (iv.start <= t_mid < iv.end if season_averaged else iv.active(t_mid)):
            continue
        j = col[iv.species]
        if iv.kind == "press-harvest":
            c.harvest[:, j] += w * resolve(iv.rate, values, M)
            if iv.carcasses_to_carrion:
                c.carcass[:, j] = 1.0
        elif iv.kind == "fertility-control":
            # several suppressions combine multiplicatively on the surviving births
            c.fertility[:, j] = 1.0 - (1.0 - c.fertility[:, j]) * (1.0 - w * resolve(iv.fraction, values, M))
        elif iv.kind == "carrying-capacity-change":
            c.habitat[:, j] *= resolve(iv.factor, values, M) ** w
        elif iv.kind == "sterile-release":
            c.sterile[:, j] += w * resolve(iv.sterile_density, values, M) * resolve(iv.competitiveness, values, M)
    return c


def segment_controls(case: Case, option: Option | None, values, times: np.ndarray, noise: np.ndarray | None,
                     M: int, S: int):
    """Controls of each segment between ``times`` (a generator of :class:`Controls`)."""
    ones = np.ones((M, S))
    for t0, t1 in zip(times[:-1], times[1:]):
        mid = 0.5 * (t0 + t1)
        phi = noise[:, int(np.floor(mid))] if noise is not None else ones
        season = breeding_multiplier(case, mid)
        if season is not None:
            phi = phi * season
        yield controls_at(case, option, values, mid, phi, M, S)


def boundary_jumps(case: Case, web: FoodWeb, option: Option | None, values, event_u, times: np.ndarray,
                   M: int) -> Jumps:
    """The option's culls, eradications and arrivals at boundaries 0 … K of ``times``.

    Entries ``start[b]`` to ``start[b + 1] − 1`` act at boundary ``b``; the whole-run kernel applies
    those of boundaries 1 … K, :func:`apply_jumps` any (the numpy reference, and boundary 0).
    ``event_u`` (M,) per chance event decides which eradications fail.
    """
    from impact.engine.kernel import JUMP_ADD, JUMP_CULL, JUMP_ERADICATE
    from impact.model import resolve

    col = {n: i for i, n in enumerate(case.species_names)}
    start, kind, species, cy, value, fails = [0], [], [], [], [], []
    for t in times:
        for name in (option.interventions if option is not None else ()):
            iv = case.intervention(name)
            if t not in iv.event_times():
                continue
            j = col[iv.species]
            if iv.kind == "pulse-cull":
                kind.append(JUMP_CULL)
                value.append(resolve(iv.fraction, values, M))
                fails.append(np.zeros(M))
                cy.append(web.carrion_yield[j] if iv.carcasses_to_carrion and web.has_carrion else -1.0)
            elif iv.kind == "eradication":
                kind.append(JUMP_ERADICATE)
                value.append(resolve(iv.residual_fraction, values, M))
                fails.append((event_u[name] < resolve(iv.failure_probability, values, M)).astype(float))
                cy.append(-1.0)
            elif iv.kind in ARRIVAL_KINDS:
                kind.append(JUMP_ADD)
                value.append(resolve(iv.amount, values, M))
                fails.append(np.zeros(M))
                cy.append(-1.0)
            else:
                continue
            species.append(j)
        start.append(len(kind))
    E = len(kind)
    cols = (lambda rows: np.ascontiguousarray(np.stack(rows, axis=1), dtype=float) if E else np.zeros((M, 0)))
    return Jumps(np.array(start, np.int64), np.array(kind, np.int64), np.array(species, np.int64),
                 np.array(cy, float), cols(value), cols(fails))


def apply_jumps(jumps: Jumps, b: int, y: np.ndarray, carrion: int):
    """Apply the jumps of boundary ``b`` to ``y`` (M, n_state) in place, as the whole-run kernel does;
    ``carrion`` is the carrion pool's column."""
    from impact.engine.kernel import JUMP_CULL, JUMP_ERADICATE

    for e in range(jumps.start[b], jumps.start[b + 1]):
        j = jumps.species[e]
        if jumps.kind[e] == JUMP_CULL:
            removed = y[:, j] * jumps.value[:, e]
            y[:, j] -= removed
            if jumps.carrion_yield[e] >= 0:
                y[:, carrion] += jumps.carrion_yield[e] * removed
        elif jumps.kind[e] == JUMP_ERADICATE:
            y[:, j] = np.where(jumps.fails[:, e] != 0, y[:, j] * jumps.value[:, e], 0.0)
        else:
            y[:, j] += jumps.value[:, e]


def run_option(case: Case, web: FoodWeb, p: WebParams, values: dict, y0: np.ndarray,
               option: Option | None, noise: np.ndarray | None, event_u: dict[str, np.ndarray],
               engine: str = DEFAULT_ENGINE, counting: Counting | None = None) -> Run:
    """Integrate the ensemble over [0, horizon] under one option (``None`` is the baseline).

    With a compiled engine each member's whole run (every segment, its controls and noise, the
    jumps between) is one compiled loop; the numpy engine steps segment by segment
    (:func:`run_option_by_segment`, the reference: both give the same numbers to the bit).
    Arguments as :func:`run_option_by_segment`. With species counted in individuals
    (``counting``), the members whose continuous run comes near a switch
    (:meth:`impact.engine.individuals.Counting.may_go_below`) are run again segment by segment
    with their counted species as random events.
    """
    if engine == "numpy":
        return run_option_by_segment(case, web, p, values, y0, option, noise, event_u, engine, counting)
    run = run_option_whole(case, web, p, values, y0, option, noise, event_u, engine)
    if counting is None:
        return run
    rows = np.flatnonzero(counting.may_go_below(run.states, run.cummin))
    if not rows.size:
        return run
    # a member that never came near its switch is the same run as the continuous one, to the bit
    # (the segment-by-segment engine is the whole-run one step for step): only the others are redone
    sub = run_option_by_segment(case, web, take_rows(p, rows), {k: np.asarray(v)[rows] if np.ndim(v) else v
                                                                for k, v in values.items()},
                                y0[rows], option, None if noise is None else noise[rows],
                                {k: v[rows] for k, v in event_u.items()}, engine, counting.subset(rows))
    states, cummin, cummax = run.states.copy(), run.cummin.copy(), run.cummax.copy()
    failed, reason = run.failed.copy(), run.reason.copy()
    states[rows], cummin[rows], cummax[rows], failed[rows], reason[rows] = (sub.states, sub.cummin, sub.cummax,
                                                                            sub.failed, sub.reason)
    return Run(run.times, states, cummin, cummax, failed, reason, run.nfev + sub.nfev)


def take_rows(p: WebParams, rows: np.ndarray) -> WebParams:
    """The parameters of members ``rows`` (every per-member array sliced on its first axis)."""
    return WebParams(*(getattr(p, f)[rows] if isinstance(getattr(p, f), np.ndarray) and np.ndim(getattr(p, f))
                       else getattr(p, f) for f in WebParams.__dataclass_fields__))


def run_option_whole(case: Case, web: FoodWeb, p: WebParams, values: dict, y0: np.ndarray,
                     option: Option | None, noise: np.ndarray | None, event_u: dict[str, np.ndarray],
                     engine: str = DEFAULT_ENGINE) -> Run:
    """Every member's whole run as one compiled loop (:func:`run_option` without counting)."""
    M, n = y0.shape
    times = segment_times(case, option, noise is not None)
    out_t = output_times(case)
    slot = {float(t): i for i, t in enumerate(out_t)}
    slot_of = np.array([slot.get(float(t), -1) for t in times], np.int64)
    controls = segment_controls(case, option, values, times, noise, M, web.n_species)
    first = segment_coefficients(web, p, next(controls))
    columns = coefficient_columns(first)
    coef = np.empty((len(times) - 1, M, sum(s.stop - s.start for s in columns.values())))
    pack_coefficients(first, out=coef[0])
    coef[1:] = coef[0]  # the columns the controls leave alone, in one copy
    for k, c in enumerate(controls, start=1):
        for name, value in controlled_coefficients(web, p, c).items():
            coef[k, :, columns[name]] = value
    y = y0.copy()
    jumps = boundary_jumps(case, web, option, values, event_u, times, M)
    apply_jumps(jumps, 0, y, web.n_species)
    res = web_run(web, coef, times, y, jumps, slot_of, len(out_t), rtol=case.rtol, atol=case.atol, engine=engine)
    return Run(out_t, res.states, res.cummin, res.cummax, res.reason != 0, res.reason, res.nfev)


def run_option_by_segment(case: Case, web: FoodWeb, p: WebParams, values: dict, y0: np.ndarray,
                          option: Option | None, noise: np.ndarray | None, event_u: dict[str, np.ndarray],
                          engine: str = DEFAULT_ENGINE, counting: Counting | None = None) -> Run:
    """Integrate the ensemble over [0, horizon] under one option (``None`` is the baseline), one
    segment at a time for the whole ensemble.

    Parameters
    ----------
    y0 : ndarray (M, n_state)
        State today (after spin-up).
    noise : ndarray (M, n_units, S) or None
        Environmental multipliers per time unit, shared by all options (paired).
    event_u : dict of str -> ndarray (M,)
        Uniforms deciding chance events (eradication failure), shared by all options.
    engine : {"compiled", "numpy"}
        See :mod:`impact.engine.web`; both give the same numbers.
    counting : Counting, optional
        Species counted in individuals at low numbers: a member with one of them below its switch
        at the start of a segment goes through that segment by random births and deaths
        (:func:`impact.engine.individuals.counted_segment`).
    """
    M, n = y0.shape
    S = web.n_species
    times = segment_times(case, option, noise is not None)
    out_t = output_times(case)
    slot = {float(t): i for i, t in enumerate(out_t)}
    T = len(out_t)
    states = np.full((M, T, n), np.nan)
    cummin = np.full((M, T, n), np.nan)
    cummax = np.full((M, T, n), np.nan)
    y = y0.copy()
    failed = ~np.isfinite(y).all(axis=1)
    reason = np.where(failed, 1, 0).astype(np.int8)
    h = np.full(M, np.nan)
    nfev = 0
    jumps = boundary_jumps(case, web, option, values, event_u, times, M)
    apply_jumps(jumps, 0, y, S)
    lo, hi = y.copy(), y.copy()
    states[:, 0], cummin[:, 0], cummax[:, 0] = y, lo, hi
    controls = segment_controls(case, option, values, times, noise, M, S)
    streams: dict[int, np.random.Generator] = {}
    for k, c in enumerate(controls):
        t0, t1 = times[k], times[k + 1]
        active = np.flatnonzero(~failed)
        if counting is not None and active.size:
            low = active[counting.below(y[active])]
            active = np.setdiff1d(active, low)
            nfev += counted_members(web, p, c, t0, t1, y, lo, hi, h, failed, reason, low, counting, streams,
                                    case, engine)
        if active.size:
            h0 = h[active]
            if counting is None or engine == "numpy":
                h0 = None if np.isnan(h0).any() else h0
            # (with counting, members leaving a counted segment start afresh: the compiled engines
            # choose the first step of each NaN entry alone, so no member's step depends on another's)
            seg = web_segment(web, p, c, t0, t1, y[active], rtol=case.rtol, atol=case.atol,
                              h0=h0, members=active, engine=engine)
            nfev += seg.nfev
            y[active] = seg.y
            h[active] = seg.h
            lo[active] = np.minimum(lo[active], seg.ymin)
            hi[active] = np.maximum(hi[active], seg.ymax)
            newly = seg.failed
            failed[active[newly]] = True
            reason[active[newly]] = seg.reason[newly]
        apply_jumps(jumps, k + 1, y, S)
        lo = np.minimum(lo, y)
        hi = np.maximum(hi, y)
        y[failed] = np.nan
        lo[failed] = np.nan
        hi[failed] = np.nan
        if float(t1) in slot:
            i = slot[float(t1)]
            states[:, i], cummin[:, i], cummax[:, i] = y, lo, hi
    return Run(out_t, states, cummin, cummax, failed, reason, nfev)


def counted_members(web: FoodWeb, p: WebParams, c: Controls, t0: float, t1: float, y, lo, hi, h, failed, reason,
                    rows: np.ndarray, counting: Counting, streams: dict, case: Case, engine: str) -> int:
    """Members ``rows`` through one segment with their counted species as random events; updates
    ``y``, ``lo``, ``hi``, ``h``, ``failed`` and ``reason`` in place. Returns the evaluations."""
    if not rows.size:
        return 0
    coef = pack_coefficients(segment_coefficients(web, p, c), rows)
    for m in rows:
        if int(m) not in streams:
            streams[int(m)] = counting.stream(int(m))
    rngs = [streams[int(m)] for m in rows]
    if engine == "numpy":
        parts = [counted_segment(web, p, c, coef[r:r + 1], t0, t1, y[m], int(m), counting, rngs[r],
                                 rtol=case.rtol, atol=case.atol, engine=engine) for r, m in enumerate(rows)]
        out, ymin, ymax = (np.array([part[i] for part in parts]) for i in range(3))
        why = np.array([part[3] for part in parts])
        nfev = sum(part[4] for part in parts)
    else:
        out, ymin, ymax, why, nfev = compiled_counted_members(pack_structure(web), coef, t0, t1, y[rows], counting,
                                                              rngs, rtol=case.rtol, atol=case.atol)
    y[rows], h[rows] = out, np.nan  # the next continuous segment chooses its first step afresh
    lo[rows] = np.minimum(lo[rows], ymin)
    hi[rows] = np.maximum(hi[rows], ymax)
    bad = why != 0
    failed[rows[bad]], reason[rows[bad]] = True, why[bad]
    return nfev


def spin_up(case: Case, web: FoodWeb, p: WebParams,
            engine: str = DEFAULT_ENGINE) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Run the deterministic baseline from the declared initial state for ``case.spinup``.

    Returns
    -------
    today : ndarray (M, n_state)
        State at the end of spin-up (time 0 of the assessment).
    late_min : ndarray (M, n_state)
        Minimum over the second half of spin-up (persistence is judged on it).
    failed : ndarray (M,) bool
    reason : ndarray (M,) int8
    """
    y = p.initial.copy()
    M, n = y.shape
    if case.spinup <= 0:
        return y, y.copy(), ~np.isfinite(y).all(axis=1), np.zeros(M, np.int8)
    S = web.n_species
    half = -0.5 * case.spinup
    # cut at the breeding seasons' edges too, so the step control never straddles one
    times = sorted({-case.spinup, half, 0.0} | breeding_edges(case, -case.spinup, 0.0))
    failed = np.zeros(M, bool)
    reason = np.zeros(M, np.int8)
    h = np.full(M, np.nan)
    late_min = np.full_like(y, np.inf)
    for t0, t1 in zip(times[:-1], times[1:]):
        ok = np.flatnonzero(~failed)
        if not ok.size:
            break
        season = breeding_multiplier(case, 0.5 * (t0 + t1))
        c = Controls.neutral(M, S) if season is None else replace(Controls.neutral(M, S), phi=np.tile(season, (M, 1)))
        h0 = None if t0 == -case.spinup else h[ok]
        seg = web_segment(web, p, c, t0, t1, y[ok], rtol=case.rtol, atol=case.atol, h0=h0, members=ok, engine=engine)
        y[ok] = seg.y
        h[ok] = seg.h
        if t0 >= half:
            late_min[ok] = np.minimum(late_min[ok], np.minimum(seg.ymin, seg.y))
        failed[ok[seg.failed]] = True
        reason[ok[seg.failed]] = seg.reason[seg.failed]
    today = np.where(failed[:, None], np.nan, y)
    late_min[failed] = np.nan
    return today, late_min, failed, reason


def plausibility(case: Case, web: FoodWeb, today: np.ndarray, late_min: np.ndarray, failed: np.ndarray) -> dict[str, np.ndarray]:
    """Which draws are a plausible picture of today's ecosystem.

    A draw is kept when every species present today persists through the second half of
    spin-up (never below its quasi-extinction level) and today's abundances sit inside every
    observed range declared in the case.

    Returns
    -------
    dict with boolean ndarrays (M,): ``kept``, ``failed``, ``extinct``, ``range``.
    """
    col = {n: i for i, n in enumerate(case.species_names)}
    present = np.array([s.present for s in case.species])
    qe = np.array([s.quasi_extinction for s in case.species])
    with np.errstate(invalid="ignore"):
        extinct = ((late_min[:, : web.n_species] < qe) & present).any(axis=1) & ~failed
        out_range = np.zeros(len(today), bool)
        for ob in case.observed:
            x = today[:, col[ob.species]]
            out_range |= ~((x >= ob.low) & (x <= ob.high))
    out_range &= ~failed & ~extinct
    kept = ~failed & ~extinct & ~out_range
    return {"kept": kept, "failed": failed, "extinct": extinct, "range": out_range}
