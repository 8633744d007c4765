"""The plausible ensemble: draws of the prior kept where the web of today persists and fits what is observed.

No file I/O here; :mod:`impact.store.results` writes what this returns.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from impact.case import Case
from impact.errors import CaseError
from impact.model import FoodWeb, WebParams, build_web, web_params
from impact.ensemble.sample import draw_uniforms, parameter_values
from impact.engine.simulate import plausibility, spin_up

Progress = Callable[[str], None]


@dataclass(frozen=True)
class Ensemble:
    """The kept (plausible) draws of today's ecosystem.

    Attributes
    ----------
    draws : ndarray (M,) int
        Draw index of each kept member (its identity in the random path).
    unit : ndarray (M, D)
        Unit-hypercube coordinates of the uncertain parameters.
    values : dict of str -> ndarray (M,)
    params : WebParams
    today : ndarray (M, n_state)
    counts : dict
        tried, kept, failed, extinct, out_of_range, wanted.
    """

    draws: np.ndarray
    unit: np.ndarray
    values: dict
    params: WebParams
    today: np.ndarray
    counts: dict


def plausibility_of_draws(case: Case, web: FoodWeb, unit: np.ndarray):
    """Spin up candidate draws and judge their plausibility (pure; no random numbers).

    Returns
    -------
    values, params, today, verdict
    """
    values = parameter_values(case, unit)
    p = web_params(case, values, unit.shape[0])
    today, late_min, failed, _ = spin_up(case, web, p)
    verdict = plausibility(case, web, today, late_min, failed)
    return values, p, today, verdict


# Draws are screened in blocks of consecutive draw indices; like the run chunks, blocks are as
# large as an even share of the workers allows (every step has a fixed cost), within bounds.
MIN_BLOCK = 256
MAX_BLOCK = 4096


def draw_block_size(members: int, workers: int) -> int:
    """Draw indices per screening block: the expected need (10 % spare) cut into a multiple of the
    workers' number of blocks, each at most ``MAX_BLOCK`` (so every worker gets the same share)."""
    need, w = 1.1 * members, max(workers, 1)
    rounds = int(np.ceil(need / (w * MAX_BLOCK)))
    return int(np.clip(np.ceil(need / (rounds * w)), MIN_BLOCK, MAX_BLOCK))
# Members per chunk of the option runs: a chunk is one worker's unit of work (every option on its
# members, so noise and chance events are drawn once) and one checkpoint. The compiled engine's cost
# is proportional to the members, so several chunks per worker balance the load; a chunk holds the
# trajectories of all its runs until summarised, which bounds it (common practice, no source).
MIN_CHUNK = 100
MAX_CHUNK = 2000  # member runs held at once: members × runs
CHUNKS_PER_WORKER = 4


def run_chunk_size(members: int, workers: int, runs: int = 1) -> int:
    """Members per chunk for ``members`` on ``workers`` workers, each chunk running ``runs`` options."""
    chunks = CHUNKS_PER_WORKER * max(workers, 1)
    return int(np.clip(np.ceil(members / chunks), MIN_CHUNK, max(MIN_CHUNK, MAX_CHUNK // max(runs, 1))))


@dataclass(frozen=True)
class PlausibilityTask:
    """Draw indices ``start`` .. ``stop - 1`` of the random path, to spin up and judge."""

    case: Case
    seed: int
    start: int
    stop: int


def plausibility_block(task: PlausibilityTask) -> dict[str, np.ndarray]:
    """Spin up one block of candidate draws (a worker's function).

    Returns
    -------
    dict of ndarrays
        ``draws`` (B,), the verdict flags ``kept``, ``failed``, ``extinct``, ``range`` (B,),
        and for kept draws only ``unit`` (K, D) and ``today`` (K, n_state).
    """
    case = task.case
    draws = np.arange(task.start, task.stop)
    unit = draw_uniforms(case, task.seed, draws)
    _, _, today, v = plausibility_of_draws(case, build_web(case), unit)
    k = v["kept"]
    return {"draws": draws, **{f: v[f] for f in ("kept", "failed", "extinct", "range")},
            "unit": unit[k], "today": today[k]}


def make_ensemble(case: Case, draws, unit, today, counts) -> Ensemble:
    values = parameter_values(case, unit)
    return Ensemble(draws, unit, values, web_params(case, values, len(draws)), today, counts)


class LowAcceptance(Exception):
    """The first round of draws kept fewer than the share asked for (``min_rate`` of :func:`first_kept`)."""

    def __init__(self, tried: int, kept: int):
        self.tried, self.kept = tried, kept
        super().__init__(f"{kept} of {tried} draws plausible")


@dataclass(frozen=True)
class Kept:
    """The draws :func:`first_kept` judged, in draw order.

    Attributes
    ----------
    kept : bool ndarray (N,)
        Whether each of the draws 0 .. N − 1 judged is kept.
    parts : list
        What the judge returned with its flags, one entry per range it judged, in draw order.
    tried : int
        The draws up to the ``members``-th kept one (all N judged when fewer were kept): a number
        that depends on neither the rounds nor where they were judged.
    n_kept : int
        Kept draws among the first ``tried`` (at most ``members``).
    """

    kept: np.ndarray
    parts: list
    tried: int
    n_kept: int


Judge = Callable[[int, int], "tuple[np.ndarray, object]"]


def first_kept(judge: Judge, members: int, max_draws: int, *, quantum: int = 1, least: int = 1, done=None,
               min_rate: float | None = None, progress: Progress | None = None,
               label: str = "drawing today's ecosystem") -> Kept:
    """Rejection sampling of the prior: the draws judged in index order, round by round, until
    ``members`` are kept or ``max_draws`` were tried.

    Each round judges the next contiguous range of draw indices, as many as the acceptance rate so
    far says are needed (10 % spare; common practice, no source), in whole ``quantum`` s and at
    least ``least`` of them (e.g. one block per worker). Which draws are kept depends only on the
    judge, never on the rounds.

    Parameters
    ----------
    judge : callable ``judge(start, stop) -> (kept, part)``
        Judges draws ``start .. stop − 1``: ``kept`` bool ndarray (stop − start,), ``part`` whatever
        the caller wants back with them (:attr:`Kept.parts`).
    members, max_draws : int
        Draws wanted, and the most tried.
    quantum, least : int
        Each round judges a multiple of ``quantum`` draws (cut at ``max_draws``), at least
        ``least`` quanta.
    done : (kept, part), optional
        Draws 0 .. len(kept) − 1 judged already (they start the sample).
    min_rate : float, optional
        Raise :class:`LowAcceptance` when the first round keeps fewer than this share of the draws
        tried and not enough members (the caller then turns to another sampler).
    progress : callable, optional
        Told the kept and tried counts after each round (:func:`impact.run.execute.count`).

    Returns
    -------
    Kept
    """
    from impact.run.execute import count

    flags, parts, tried, n_kept = [], [], 0, 0
    if done is not None:
        flags.append(np.asarray(done[0], bool))
        parts.append(done[1])
        tried, n_kept = flags[0].size, int(flags[0].sum())
    rate = max(n_kept / tried, 1e-3) if tried else 1.0
    while n_kept < members and tried < max_draws:
        quanta = max(least, int(np.ceil(1.1 * (members - n_kept) / max(rate, 0.02) / quantum)))
        stop = min(max_draws, tried + quanta * quantum)
        kept, part = judge(tried, stop)
        flags.append(np.asarray(kept, bool))
        parts.append(part)
        tried, n_kept = stop, n_kept + int(flags[-1].sum())
        if min_rate is not None and n_kept < members and n_kept < min_rate * tried:
            raise LowAcceptance(tried, n_kept)
        min_rate = None  # judged on the first round only
        rate = max(n_kept / tried, 1e-3)
        count(progress, label, min(n_kept, members), members, f"plausible, {tried} tried")
    kept = np.concatenate(flags) if flags else np.zeros(0, bool)
    if n_kept >= members > 0:
        tried = int(np.flatnonzero(kept)[members - 1]) + 1
    return Kept(kept, parts, tried, min(int(kept[:tried].sum()), members))


def draw_ensemble(case: Case, members: int, seed: int, max_draws: int | None = None,
                  progress: Progress | None = None, executor=None, store=None, block: int | None = None,
                  min_rate: float | None = None) -> Ensemble:
    """The first ``members`` plausible draws in index order (at most ``max_draws`` tried), by
    :func:`first_kept` on blocks of draws.

    ``tried`` and the rejection counts cover the draws up to the last one kept, so they do not
    depend on how the draws were blocked or where they were computed.

    Parameters
    ----------
    executor : object with ``map(fn, tasks)``, optional
        Where blocks are computed (default: in this process).
    store : impact.store.results.Checkpoints, optional
        Finished blocks are saved there and reused on a resumed run.
    block : int, optional
        Draw indices per block (default :func:`draw_block_size`); results do not depend on it.
    min_rate : float, optional
        As in :func:`first_kept`: :class:`LowAcceptance` when the first round keeps too few.
    """
    from impact.run.execute import InProcess

    executor = executor or InProcess()
    B = block or draw_block_size(members, executor.workers)
    max_draws = max_draws or max(case.max_draws, members)

    def judge(start: int, stop: int):
        # blocks of B draws from a multiple of B (the checkpoints' keys), each computed once
        blocks, todo = {}, []
        for s in range(start, stop, B):
            saved = store.get(f"draws-{s}") if store else None
            if saved is not None:
                blocks[s] = saved
            else:
                todo.append(s)
        tasks = [PlausibilityTask(case, seed, s, min(s + B, stop)) for s in todo]
        for i, res in executor.map(plausibility_block, tasks):
            blocks[todo[i]] = res
            if store:
                store.put(f"draws-{todo[i]}", res)
        done = [blocks[s] for s in sorted(blocks)]
        return np.concatenate([b["kept"] for b in done]), done

    got = first_kept(judge, members, max_draws, quantum=B, least=executor.workers, min_rate=min_rate,
                     progress=progress)
    blocks = [b for part in got.parts for b in part]
    tried, n_kept = got.tried, got.n_kept
    flags = {f: np.concatenate([b[f] for b in blocks])[:tried] for f in ("failed", "extinct", "range")}
    if n_kept == 0:
        raise CaseError(case.path, "observed",
                        f"none of {tried} draws gave a plausible web today ({int(flags['failed'].sum())} numerical "
                        f"failures, {int(flags['extinct'].sum())} with a species below its quasi-extinction level, "
                        f"{int(flags['range'].sum())} outside an observed range); widen the priors or the observed "
                        "ranges, or raise case.max_draws")
    unit = np.concatenate([b["unit"] for b in blocks])[:n_kept]
    today = np.concatenate([b["today"] for b in blocks])[:n_kept]
    draws = np.concatenate([b["draws"] for b in blocks])[got.kept][:n_kept]
    counts = dict(wanted=members, tried=tried, kept=n_kept, failed=int(flags["failed"].sum()),
                  extinct=int(flags["extinct"].sum()), out_of_range=int(flags["range"].sum()))
    return make_ensemble(case, draws, unit, today, counts)
