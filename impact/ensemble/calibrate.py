"""Calibration: the ensemble as a sample from the posterior given monitoring data and constraints.

Target. With ``z`` the uncertain parameters on the probit scale (``u = Φ(z)`` is the unit-hypercube
row each prior maps through its inverse CDF, so the prior of ``z`` is standard normal whatever
the declared priors are), the posterior is ::

    π(z) ∝ N(z; 0, I) · L(z) · 1[d(z) = 0]

with ``L`` the likelihood of the monitoring series (:func:`impact.ensemble.observe.log_likelihood`) and ``d``
the distance from the hard constraints (persistence, observed ranges today, limits on change;
:func:`impact.ensemble.observe.distance`).

Sampler. Sequential Monte Carlo over a sequence of targets ``N(z) · L(z)^β · 1[d(z) ≤ ε]``:
first the tolerance ε falls from ∞ to 0 (ABC-SMC with an adaptive tolerance, each step keeping
half the particles: Del Moral, Doucet & Jasra 2012; the constraint scheme of Vollert, Drovandi
& Adams 2024), then the temperature β rises from 0 to 1 (likelihood tempering, each step chosen
so that the effective sample size falls to half: Jasra et al. 2011). After each reweighting the
particles are resampled (systematic) and moved by random-walk Metropolis steps whose proposal
covariance is 2.38²/D times the particles' covariance (Roberts & Rosenthal 2001) and whose
number is set from the first step's acceptance so that a particle stays put with probability
below 1 % (Drovandi & Pettitt 2011: R = ⌈log c / log(1 − p_acc)⌉ with c = ``STAY``). The first move
step of a generation simulates the particles to move as one batch (its acceptance sets R and the
proposal scale); then each chunk of particles runs the other R − 1 steps as one task, with no wait
for the other chunks between steps (:func:`move_chunk`). Generation 0 is the first ``members``
draws of the rejection sampler's path.

Stopping. The sequence ends at its exact target, ε = 0 and β = 1, and nowhere before: an earlier
stop would present an approximation of the posterior as the posterior. The sampler gives up
(an error, no ensemble) when the tolerance falls by less than 1 % over ``STALL`` generations,
after ``MAX_GENERATIONS``, or when the simulation budget runs out.

The population-level random numbers come from :func:`impact.ensemble.sample.calibration_generator` (seed,
generation), so the result depends on the seed alone, never on the executor or chunking.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np
from scipy import special

from impact.ensemble.draws import Ensemble, LowAcceptance, draw_ensemble, first_kept
from impact.case import DEFAULT_MIN_ACCEPTANCE, Case
from impact.errors import CaseError
from impact.model import WebParams, build_web, web_params
from impact.ensemble.observe import (distance, has_data, log_likelihood, record_times,
    unmet_constraints)
from impact.ensemble.sample import calibration_generator, draw_uniforms, parameter_values
from impact.engine.web import no_jumps, pack_coefficients, web_run
from impact.model import Controls, segment_coefficients

# SMC settings (the values of the papers cited in the module docstring; common practice)
KEEP = 0.5            # share of particles kept per tolerance step, and ESS target per temperature step
STAY = 0.01           # wanted chance that a particle never moves in a generation's steps
MAX_STEPS = 30        # move steps per generation at most
MAX_GENERATIONS = 80
MIN_DISTINCT = 0.5    # refuse a posterior with fewer distinct members than this share (common practice)
STALL = 3             # generations without a 1 % fall of the tolerance before the sampler gives up
SIMULATIONS_PER_MEMBER = 200  # default budget: spin-ups per member wanted
TARGET_ACCEPTANCE = 0.25
EVAL_CHUNK = 2048      # rows per chunk of a batch at most (a chunk cannot be stopped halfway)
EVAL_CHUNKS_PER_WORKER = 4
MOVE_CHUNK_SIMULATIONS = 2 * EVAL_CHUNK  # spin-ups per task of move steps at most (an interrupt waits for one)
U_CLIP = 1e-12        # keep Φ(z) inside (0, 1): priors with unbounded support map 0 and 1 to ±inf


class CalibrationError(CaseError):
    """The sampler could not produce a posterior it can stand behind (not converged, no plausible draw)."""


@dataclass(frozen=True)
class Calibration:
    """How the ensemble was built, and the diagnostics the report and manifest show.

    Attributes
    ----------
    sampler : str
        ``rejection`` or ``smc``.
    simulations : int
        Spin-ups spent (pilot draws included).
    acceptance : float
        Rejection: share of draws kept. SMC: share of move proposals accepted over all generations.
    prior_acceptance : float
        Share of prior draws meeting every constraint (generation 0, or the rejection draws).
    generations : list of dict
        Per generation: generation, tolerance, temperature, ess, acceptance, steps, simulations.
    distinct : float
        Share of distinct members in the final ensemble.
    converged : bool
    seconds : float
    recorded : ndarray (M, R, n_state) or None
        Spin-up states of the final members at ``times`` (for the posterior predictive).
    times : ndarray (R,) or None
    """

    sampler: str
    simulations: int
    acceptance: float
    prior_acceptance: float
    generations: list = field(default_factory=list)
    distinct: float = 1.0
    converged: bool = True
    seconds: float = 0.0
    recorded: np.ndarray | None = None
    times: np.ndarray | None = None

    def record(self) -> dict:
        """The manifest entry (plain JSON types)."""
        return {"sampler": self.sampler, "simulations": int(self.simulations),
                "acceptance": round(float(self.acceptance), 6),
                "prior_acceptance": round(float(self.prior_acceptance), 6),
                "generations": len(self.generations), "distinct": round(float(self.distinct), 4),
                "converged": bool(self.converged), "seconds": round(self.seconds, 2),
                "simulations_per_second": round(self.simulations / max(self.seconds, 1e-9), 1)}


def spin_up_recorded(case: Case, p: WebParams, times: np.ndarray):
    """Deterministic spin-up from the declared initial state, recording the state at ``times``.

    Segments end at ``-spinup/2`` (where persistence starts being judged, as in
    :func:`impact.engine.simulate.spin_up`) and at every record time, each continuing from the previous
    one's last step size; with no record time before today this is the same integration.

    Returns
    -------
    recorded : ndarray (M, R, n_state)
    late_min : ndarray (M, n_state)
        Minimum over [-spinup/2, 0].
    failed : ndarray (M,) bool
    step : ndarray (M,)
        The step size each member would go on with (NaN where it failed): small where its web is
        stiff, a forecast of the work a nearby member's spin-up takes.
    """
    web = build_web(case)
    y = p.initial.copy()
    M, n = y.shape
    R = len(times)
    recorded = np.full((M, R, n), np.nan)
    if case.spinup <= 0:
        recorded[:] = y[:, None, :]
        return recorded, y.copy(), ~np.isfinite(y).all(axis=1), np.full(M, np.nan)
    half = -0.5 * case.spinup
    bounds = np.array(sorted({-case.spinup, half, *times.tolist()}))
    coef = pack_coefficients(segment_coefficients(web, p, Controls.neutral(M, web.n_species)))
    slot = {float(t): i for i, t in enumerate(times)}
    cut = int(np.searchsorted(bounds, half))
    # Two whole runs in the compiled kernel, the second continuing from the first's end state and
    # step sizes: up to -spinup/2, then on to the last record time. Each run's last boundary goes
    # to an extra slot R (its end state; for the second, its running minimum is the late minimum).
    runs, h = [], None
    for part in (bounds[:cut + 1], bounds[cut:]):
        K = len(part) - 1
        slot_of = np.array([slot.get(float(t), -1) for t in part[:-1]] + [R], np.int64)
        run = web_run(web, coef[None], part, y, no_jumps(K, M), slot_of, R + 1,
                      rtol=case.rtol, atol=case.atol, h0=h)
        if float(part[-1]) in slot:
            run.states[:, slot[float(part[-1])]] = run.states[:, R]
        runs.append(run)
        y, h = run.states[:, R], run.h
    first, second = runs
    recorded = np.where(np.isnan(second.states[:, :R]), first.states[:, :R], second.states[:, :R])
    failed = (first.reason != 0) | (second.reason != 0)
    return recorded, second.cummin[:, R], failed, np.where(failed, np.nan, second.h)


@dataclass(frozen=True)
class EvalTask:
    """Unit-hypercube rows to spin up and weigh against the data (one chunk of a batch).

    ``forecast`` (n,), optional: each row's expected step size (the ``step`` of a nearby row's last
    evaluation). Rows are then spun up in its order, so that the block engine's blocks hold rows of
    like stiffness (a block runs as long as its slowest row); the results are the same in any order.
    """

    case: Case
    unit: np.ndarray
    forecast: np.ndarray | None = None


def evaluate_chunk(task: EvalTask) -> dict[str, np.ndarray]:
    """Spin up rows and return their log-likelihood, constraint distance, recorded states and last
    step sizes, in row order (a worker's function)."""
    case, unit = task.case, task.unit
    order = None if task.forecast is None else np.argsort(task.forecast, kind="stable")
    if order is not None:
        unit = unit[order]
    values = parameter_values(case, unit)
    p = web_params(case, values, unit.shape[0])
    times = record_times(case)
    recorded, late_min, failed, step = spin_up_recorded(case, p, times)
    d = distance(case, recorded, times, late_min, failed)
    ll = log_likelihood(case, values, recorded, times) if case.monitoring else np.zeros(unit.shape[0])
    ev = {"loglik": np.where(d["failed"], -np.inf, ll), "recorded": recorded, "step": step, **d}
    if order is None:
        return ev
    back = np.empty_like(order)
    back[order] = np.arange(order.size)
    return {k: v[back] for k, v in ev.items()}


def evaluate(case: Case, unit: np.ndarray, executor=None, forecast: np.ndarray | None = None) -> dict[str, np.ndarray]:
    """Evaluate a batch of rows, split among the executor's workers; results in row order.
    ``forecast`` (M,), optional: as :class:`EvalTask`'s, for the whole batch."""
    from impact.run.execute import InProcess

    executor = executor or InProcess()
    M = unit.shape[0]
    # a few chunks per worker, so members that take longer do not leave a worker idle, of 64 rows at
    # least (each chunk has a fixed cost) and EVAL_CHUNK at most (a long chunk would hold up an interrupt)
    size = min(EVAL_CHUNK, max(64, int(np.ceil(M / (EVAL_CHUNKS_PER_WORKER * max(executor.workers, 1))))))
    starts = list(range(0, M, size))
    tasks = [EvalTask(case, unit[a:a + size], None if forecast is None else forecast[a:a + size]) for a in starts]
    parts: dict[int, dict] = {}
    for i, res in executor.map(evaluate_chunk, tasks):
        parts[i] = res
    return {k: np.concatenate([parts[i][k] for i in range(len(starts))]) for k in parts[0]}


def _probit(u: np.ndarray) -> np.ndarray:
    return special.ndtri(np.clip(u, U_CLIP, 1 - U_CLIP))


def _unit(z: np.ndarray) -> np.ndarray:
    return np.clip(special.ndtr(z), U_CLIP, 1 - U_CLIP)


def _ess(w: np.ndarray) -> float:
    s = w.sum()
    return float(s * s / (w * w).sum()) if s > 0 else 0.0


def _systematic(w: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    N = w.size
    c = np.cumsum(w / w.sum())
    c[-1] = 1.0
    return np.searchsorted(c, (rng.random() + np.arange(N)) / N)


def _next_temperature(loglik: np.ndarray, beta: float, target: float) -> float:
    """The temperature at which the incremental weights' ESS falls to ``target`` (1 if it never does)."""
    finite = np.isfinite(loglik)

    def ess(b):
        lw = np.where(finite, (b - beta) * np.where(finite, loglik, 0.0), -np.inf)
        return _ess(np.exp(lw - lw[finite].max()))

    if ess(1.0) >= target:
        return 1.0
    lo, hi = beta, 1.0
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if ess(mid) >= target else (lo, mid)
    return max(lo, beta + 1e-12)


class _Population:
    """Particles and what the sampler knows of each (rows follow the particles)."""

    def __init__(self, z, ev):
        self.z = z
        self.ev = ev

    def take(self, idx):
        return _Population(self.z[idx], {k: v[idx] for k, v in self.ev.items()})

    def replace(self, mask, z, ev):
        self.z = np.where(mask[:, None], z, self.z)
        self.ev = {k: np.where(mask.reshape((-1,) + (1,) * (v.ndim - 1)), ev[k], v) for k, v in self.ev.items()}


def _accept(z, ev_old, prop, ev, eps: float, beta: float, log_u: np.ndarray) -> np.ndarray:
    """Metropolis acceptance of ``prop`` against ``z`` under ``N(z) · L(z)^β · 1[d(z) ≤ ε]``: (n,) bool.

    Row by row, so a particle's decision never depends on which other rows share its call.
    """
    with np.errstate(invalid="ignore"):
        log_a = (-0.5 * (prop ** 2).sum(1) + 0.5 * (z ** 2).sum(1)
                 + (beta * (ev["loglik"] - ev_old["loglik"]) if beta > 0 else 0.0))
    return (ev["distance"] <= eps) & np.isfinite(ev["loglik"]) & (log_u < np.nan_to_num(log_a, nan=-np.inf))


@dataclass(frozen=True)
class MoveTask:
    """Rows of particles to carry through a generation's remaining Metropolis steps (one chunk).

    ``increments`` (S, n, D) and ``log_u`` (S, n) are the proposal steps and log-uniforms of the
    chunk's rows, drawn for the whole population beforehand, so the chunk's result is the same
    however the population is cut.
    """

    case: Case
    z: np.ndarray
    ev: dict
    increments: np.ndarray
    log_u: np.ndarray
    eps: float
    beta: float


def move_chunk(task: MoveTask) -> tuple[np.ndarray, dict, int]:
    """Run a chunk's Metropolis steps one after another with no wait for the other chunks (a worker's function).

    Returns the moved rows ``z`` (n, D), their evaluation and the number of proposals accepted.
    """
    sub = _Population(task.z.copy(), {k: v.copy() for k, v in task.ev.items()})
    accepted = 0
    for inc, log_u in zip(task.increments, task.log_u):
        prop = sub.z + inc
        ev = evaluate_chunk(EvalTask(task.case, _unit(prop), sub.ev["step"]))  # a proposal's work is its particle's
        ok = _accept(sub.z, sub.ev, prop, ev, task.eps, task.beta, log_u)
        sub.replace(ok, prop, ev)
        accepted += int(ok.sum())
    return sub.z, sub.ev, accepted


def _move_rest(case, sub: _Population, increments, log_u, eps: float, beta: float, executor) -> int:
    """Steps 2.. of a generation: each chunk of rows runs all of them as one task (no barrier per step).

    A chunk holds a few per worker, so a slow one does not leave a worker idle, and at most
    ``MOVE_CHUNK_SIMULATIONS`` spin-ups, so an interrupt waits for it briefly. Moves ``sub`` in
    place; returns the proposals accepted.
    """
    from impact.run.execute import InProcess

    executor = executor or InProcess()
    S, n = log_u.shape
    size = int(np.ceil(n / (EVAL_CHUNKS_PER_WORKER * max(executor.workers, 1))))
    size = max(1, min(max(64, size), MOVE_CHUNK_SIMULATIONS // max(S, 1)))
    starts = list(range(0, n, size))
    tasks = [MoveTask(case, sub.z[a:a + size], {k: v[a:a + size] for k, v in sub.ev.items()},
                      increments[:, a:a + size], log_u[:, a:a + size], eps, beta) for a in starts]
    accepted = 0
    for i, (z, ev, acc) in executor.map(move_chunk, tasks):
        rows = slice(starts[i], starts[i] + size)
        sub.z[rows] = z
        for k, v in ev.items():
            sub.ev[k][rows] = v
        accepted += acc
    return accepted


def _move(case, pop: _Population, eps: float, beta: float, rng, executor, budget_left: int, scale: float = 1.0,
          rows: np.ndarray | None = None):
    """Random-walk Metropolis steps on the particles ``rows`` (default all).

    The proposal covariance is ``scale × 2.38²/D`` times the whole population's covariance. The
    first step runs as one batch: its acceptance sets the proposal scale and the number of steps
    (Drovandi & Pettitt 2011). The other steps run chunk by chunk, each chunk through all of them
    (:func:`move_chunk`), their random numbers drawn for the whole population in step order first.
    Returns the population (moved in place), the acceptance rate, the steps taken and wanted, and
    the simulations spent (fewer steps than wanted when the budget ran out).
    """
    N, D = pop.z.shape
    rows = np.arange(N) if rows is None else rows
    cov = np.atleast_2d(np.cov(pop.z, rowvar=False)) * (scale * 2.38 ** 2 / D) + 1e-10 * np.eye(D)
    chol = np.linalg.cholesky(cov)
    sub = pop.take(rows)
    n = len(rows)
    if not n or n > budget_left:
        return pop, 0.0, 0, 1 if n else 0, 0
    prop = sub.z + rng.standard_normal((n, D)) @ chol.T
    ev = evaluate(case, _unit(prop), executor, forecast=sub.ev["step"])
    ok = _accept(sub.z, sub.ev, prop, ev, eps, beta, np.log(rng.random(n)))
    sub.replace(ok, prop, ev)
    accepted, a = int(ok.sum()), ok.mean()
    if a < 0.5 * TARGET_ACCEPTANCE:
        # the first step shows the steps are too long: shorten them for the rest (and count on the
        # acceptance the shorter steps should reach when setting how many to take)
        chol = chol * np.sqrt(_rescale(1.0, a))
        a = max(a, 0.5 * TARGET_ACCEPTANCE)
    wanted = MAX_STEPS if a == 0 else 1 if a == 1 else int(min(MAX_STEPS, np.ceil(np.log(STAY) / np.log1p(-a))))
    steps = 1 + min(wanted - 1, (budget_left - n) // n)
    if steps > 1:
        increments, log_u = np.empty((steps - 1, n, D)), np.empty((steps - 1, n))
        for k in range(steps - 1):  # the order of the draws is the order of the steps
            increments[k] = rng.standard_normal((n, D)) @ chol.T
            log_u[k] = np.log(rng.random(n))
        accepted += _move_rest(case, sub, increments, log_u, eps, beta, executor)
    pop.z[rows] = sub.z
    for k, v in sub.ev.items():
        pop.ev[k][rows] = v
    return pop, accepted / (steps * n), steps, wanted, steps * n


def _rescale(scale: float, acceptance: float) -> float:
    """The proposal scale (a variance factor) for the next steps, from the last steps' acceptance.

    As the tolerance falls the particles fill a thinner, often curved region, where steps sized by
    the particles' covariance mostly leave it. For a random walk across a thin region the acceptance
    falls in proportion to the step length, so the variance factor is multiplied by the square of
    acceptance / 0.25 (within 0.1–2 per adjustment), holding the acceptance near 0.25 (adaptive tuning
    in the spirit of Fearnhead & Taylor 2013; the rule and its bounds are common practice, no source).
    """
    factor = float(np.clip((max(acceptance, 1e-3) / TARGET_ACCEPTANCE) ** 2, 0.1, 2.0))
    return float(np.clip(scale * factor, 1e-4, 1.0))


def _refuse(case: Case, why: str, history, ev: dict | None = None) -> CalibrationError:
    last = history[-1] if history else {}
    where = ("monitoring" if case.monitoring else "change_limits" if case.change_limits else "observed")
    unmet = unmet_constraints(case, ev["breaches"], ev["failed"]) if ev is not None and "breaches" in ev else ""
    if unmet:  # name what cannot be met first: the field to look at before the sampler's state
        why += f". Furthest from being met: {unmet}"
    return CalibrationError(case.path, where, f"the calibration did not converge: {why} (after "
                            f"{last.get('simulations', 0)} simulations in {len(history)} generations; tolerance "
                            f"{last.get('tolerance', float('nan')):.3g}, temperature {last.get('temperature', 0):.3g}). "
                            "No posterior ensemble is presented. Check that the data, ranges and limits on change can "
                            "hold together under the priors, widen the priors, or raise calibration.max_simulations")


def smc(case: Case, members: int, seed: int, executor=None, progress=None, budget: int | None = None,
        spent: int = 0) -> tuple[np.ndarray, dict, Calibration]:
    """Sequential Monte Carlo from the prior to the posterior (see the module docstring).

    Parameters
    ----------
    members : int
        Particles, and members of the ensemble returned.
    budget : int, optional
        Simulations the sampler may spend (default ``SIMULATIONS_PER_MEMBER × members``).
    spent : int
        Simulations already spent by a pilot (counted in the cost reported).

    Returns
    -------
    unit : ndarray (members, D)
    evaluation : dict of ndarray
        The final particles' evaluation (``recorded``, ``distance``, ``loglik``, ...).
    Calibration

    Raises
    ------
    CalibrationError
        When the tolerance cannot reach 0, the temperature 1, or the final ensemble is degenerate.
    """
    t_start = time.monotonic()
    N = members
    budget = budget or SIMULATIONS_PER_MEMBER * members
    z = _probit(draw_uniforms(case, seed, np.arange(N)))
    pop = _Population(z, evaluate(case, _unit(z), executor))
    sims = spent + N
    prior_ok = float((pop.ev["distance"] == 0).mean())
    state = dict(eps=np.inf, beta=0.0 if case.monitoring else 1.0, stalled=0, scale=1.0, accepted=0, proposed=0)
    history = [dict(generation=0, tolerance=np.inf, temperature=state["beta"], ess=float(N), acceptance=np.nan,
                    steps=0, simulations=sims)]
    for g in range(1, MAX_GENERATIONS + 1):
        target = _next_target(case, pop, state, history)
        if target is None:
            break
        new_eps, new_beta, w = target
        ess = _ess(w)
        tempering = new_beta != state["beta"]
        state.update(eps=new_eps, beta=new_beta)
        acc, steps, wanted = np.nan, 0, 0
        # equal weights: the particles already follow the new target, no resampling or move needed
        if w.min() < w.max():
            rng = calibration_generator(seed, g)
            pop, rows = _resample(pop, w, tempering, rng)
            pop, acc, steps, wanted, spent_g = _move(case, pop, new_eps, new_beta, rng, executor, budget - sims,
                                                     state["scale"], rows)
            state["scale"] = _rescale(state["scale"], acc)
            sims += spent_g
            state["accepted"] += int(round(acc * steps * rows.size))
            state["proposed"] += steps * rows.size
        history.append(dict(generation=g, tolerance=new_eps, temperature=new_beta, ess=ess, acceptance=acc,
                            steps=steps, simulations=sims))
        if steps < wanted:
            raise _refuse(case, f"the budget of {budget} simulations ran out", history, pop.ev)
        if progress:
            moved = f"move acceptance {acc:.0%} over {steps} steps" if steps else "no move needed"
            progress(f"calibrating (SMC) generation {g}: tolerance {new_eps:.3g}, temperature {new_beta:.3g}, "
                     f"ESS {ess:.0f} of {N}, {moved}, {sims} simulations")
    else:
        raise _refuse(case, f"{MAX_GENERATIONS} generations were not enough", history, pop.ev)
    distinct = len(np.unique(pop.z, axis=0)) / N
    cal = Calibration("smc", sims, state["accepted"] / max(state["proposed"], 1), prior_ok, history, distinct,
                      distinct >= MIN_DISTINCT, time.monotonic() - t_start, pop.ev["recorded"], record_times(case))
    if not cal.converged:
        raise _refuse(case, f"only {distinct:.0%} of the final members are distinct (at least "
                            f"{MIN_DISTINCT:.0%} needed): the move steps could not mix", history)
    return _unit(pop.z), pop.ev, cal


def _next_target(case: Case, pop: _Population, state: dict, history: list):
    """The next tolerance (while constraints are unmet) or temperature, and the particles' weights.

    Returns ``(eps, beta, weights (N,))``, or None when the posterior is reached.
    """
    d, ll = pop.ev["distance"], pop.ev["loglik"]
    eps, beta = state["eps"], state["beta"]
    N = d.size
    if eps > 0:
        new_eps = 0.0 if (d == 0).mean() >= KEEP else float(np.quantile(d, KEEP, method="inverted_cdf"))
        if not np.isfinite(new_eps):
            raise _refuse(case, "more than half of the prior draws failed numerically", history)
        state["stalled"] = state["stalled"] + 1 if new_eps > 0.99 * eps else 0
        if state["stalled"] >= STALL:
            raise _refuse(case, "the distance from the constraints stopped falling", history, pop.ev)
        return new_eps, beta, (d <= new_eps).astype(float)
    if beta < 1.0:
        finite = np.isfinite(ll)
        if not finite.any():
            raise _refuse(case, "the monitoring data are impossible under every member", history)
        new_beta = _next_temperature(ll, beta, KEEP * N)
        lw = np.where(finite, (new_beta - beta) * np.where(finite, ll, 0.0), -np.inf)
        return eps, new_beta, np.exp(lw - lw.max())
    return None


def _resample(pop: _Population, w: np.ndarray, tempering: bool, rng) -> tuple[_Population, np.ndarray]:
    """Resample by the weights; returns the population and the rows to move.

    A tolerance step (0/1 weights) keeps the survivors where they are and replaces the dropped
    particles by copies of survivors, and only those copies are moved (replenishment; Drovandi &
    Pettitt 2011); a temperature step resamples everyone (systematic) and moves everyone.
    """
    N = w.size
    if tempering:
        return pop.take(_systematic(w, rng)), np.arange(N)
    dead = np.flatnonzero(w == 0)
    pop = pop.take(np.arange(N))
    copies = pop.take(rng.choice(np.flatnonzero(w > 0), dead.size))
    pop.z[dead] = copies.z
    for k, v in copies.ev.items():
        pop.ev[k][dead] = v
    return pop, dead


def rejection(case: Case, members: int, seed: int, executor=None, progress=None,
              first: dict | None = None) -> tuple[np.ndarray, np.ndarray, dict, Calibration]:
    """The first ``members`` prior draws meeting every constraint, in draw order (no likelihood).

    ``first`` is the evaluation of draws ``0 .. len - 1`` if already done (the SMC's generation 0).

    Returns
    -------
    draws : ndarray (K,) int
    unit : ndarray (K, D)
    evaluation : dict of ndarray (K rows)
    Calibration
    """
    t_start = time.monotonic()

    def judge(start: int, stop: int):
        ev = evaluate(case, draw_uniforms(case, seed, np.arange(start, stop)), executor)
        return ev["distance"] == 0, ev

    got = first_kept(judge, members, max(case.max_draws, members), progress=progress,
                     done=None if first is None else (first["distance"] == 0, first),
                     label="drawing today's ecosystem (rejection)")
    ev = {k: np.concatenate([part[k] for part in got.parts]) for k in got.parts[0]}
    ok = np.flatnonzero(got.kept)[:members]  # the kept draws' indices
    tried = got.tried
    if not len(ok):
        raise CalibrationError(case.path, "change_limits" if case.change_limits else "observed",
                               f"none of {tried} draws met every constraint (persistence, observed ranges, limits "
                               "on change); widen the priors or the limits, or raise case.max_draws")
    cal = Calibration("rejection", tried, len(ok) / tried, len(ok) / tried, [], 1.0, True,
                      time.monotonic() - t_start, ev["recorded"][ok], record_times(case))
    sel = {k: v[:tried] for k, v in ev.items()}
    return ok, draw_uniforms(case, seed, ok), sel, cal


def _counts(members: int, tried: int, kept: int, ev: dict) -> dict:
    d = ev
    return dict(wanted=members, tried=int(tried), kept=int(kept), failed=int(d["failed"].sum()),
                extinct=int((d["extinct"] > 0).sum()), out_of_range=int(((d["range"] > 0) & (d["extinct"] == 0)).sum()))


def _make(case: Case, draws, unit, today, counts) -> Ensemble:
    values = parameter_values(case, unit)
    return Ensemble(draws, unit, values, web_params(case, values, len(draws)), today, counts)


def build_ensemble(case: Case, members: int, seed: int, progress=None, executor=None, store=None,
                   block: int | None = None) -> tuple[Ensemble, Calibration]:
    """The ensemble the assessment believes, and how it was built.

    A case with neither monitoring data nor limits on change is drawn by rejection
    (:func:`impact.ensemble.draws.draw_ensemble`) unless the first round of draws keeps fewer than
    ``calibration.min_acceptance`` of them; then, and whenever there are data, by SMC. A case
    with limits on change but no data is drawn by rejection while its prior draws meet the
    constraints often enough. ``calibration.sampler`` forces either sampler.
    """
    table = case.calibration
    sampler = table.sampler if table else "auto"
    min_acc = table.min_acceptance if table else DEFAULT_MIN_ACCEPTANCE
    budget = table.max_simulations if table and table.max_simulations else SIMULATIONS_PER_MEMBER * members
    if sampler == "rejection" and case.monitoring:
        raise CaseError(case.path, "calibration.sampler", "rejection cannot weigh monitoring data (a likelihood); "
                                                          "choose auto or smc")
    if not case.uncertain and sampler != "smc":
        sampler = "rejection"
    spent = 0
    if not has_data(case) and sampler != "smc":
        t0 = time.monotonic()
        try:
            ens = draw_ensemble(case, members, seed, progress=progress, executor=executor, store=store, block=block,
                                min_rate=None if sampler == "rejection" else min_acc)
            c = ens.counts
            return ens, Calibration("rejection", c["tried"], c["kept"] / max(c["tried"], 1),
                                    c["kept"] / max(c["tried"], 1), seconds=time.monotonic() - t0)
        except LowAcceptance as low:
            spent = low.tried
            if progress:
                progress(f"only {low.kept} of {low.tried} draws plausible (below {min_acc:.0%}): "
                         "switching to sequential Monte Carlo")
    if not case.uncertain:
        raise CaseError(case.path, "calibration.sampler", "there is no uncertain parameter to calibrate")
    if spent == 0 and not case.monitoring and sampler != "smc":
        first = evaluate(case, draw_uniforms(case, seed, np.arange(members)), executor)
        if sampler == "rejection" or (first["distance"] == 0).mean() >= min_acc:
            draws, unit, ev, cal = rejection(case, members, seed, executor, progress, first)
            return _make(case, draws, unit, cal.recorded[:, -1], _counts(members, cal.simulations, len(draws), ev)), cal
        spent = members
    unit, ev, cal = smc(case, members, seed, executor, progress, budget, spent)
    return _make(case, np.arange(members), unit, ev["recorded"][:, -1],
                 _counts(members, cal.simulations, members, ev)), cal


def ensemble_from_arrays(case: Case, draws: np.ndarray, unit: np.ndarray, today: np.ndarray, counts: dict) -> Ensemble:
    """An :class:`impact.ensemble.draws.Ensemble` rebuilt from saved arrays (a posterior ensemble reused)."""
    return _make(case, np.asarray(draws), np.asarray(unit, float), np.asarray(today, float), counts)


def calibration_from_record(record: dict, generations: list | None = None) -> Calibration:
    """A :class:`Calibration` from its manifest entry (no recorded states: the predictive table is not redrawn)."""
    return Calibration(record["sampler"], int(record["simulations"]), float(record["acceptance"]),
                       float(record["prior_acceptance"]), list(generations or []), float(record.get("distinct", 1.0)),
                       bool(record.get("converged", True)), float(record.get("seconds", 0.0)))
