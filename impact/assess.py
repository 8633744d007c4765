"""The assessment stage runner: draw the plausible ensemble, run every option paired, tabulate risk.

No file I/O here; :mod:`impact.results` writes what this returns.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
import pandas as pd

from . import metrics as mx
from .case import Case, Option
from .errors import CaseError
from .integrate import FAILURE_REASONS
from .model import FoodWeb, WebParams, build_web, web_params
from .sample import draw_uniforms, event_uniforms, noise_multipliers, parameter_values
from .simulate import Run, plausibility, run_option, spin_up

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


def screen_draws(case: Case, web: FoodWeb, unit: np.ndarray):
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
class ScreenTask:
    """Draw indices ``start`` .. ``stop - 1`` of the random path, to spin up and judge."""

    case: Case
    seed: int
    start: int
    stop: int


def screen_block(task: ScreenTask) -> dict[str, np.ndarray]:
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
    _, _, today, v = screen_draws(case, build_web(case), unit)
    k = v["kept"]
    return {"draws": draws, **{f: v[f] for f in ("kept", "failed", "extinct", "range")},
            "unit": unit[k], "today": today[k]}


def _ensemble(case: Case, draws, unit, today, counts) -> Ensemble:
    values = parameter_values(case, unit)
    return Ensemble(draws, unit, values, web_params(case, values, len(draws)), today, counts)


class LowAcceptance(Exception):
    """The first round of draws kept fewer than the share asked for (``min_rate`` of :func:`draw_ensemble`)."""

    def __init__(self, tried: int, kept: int):
        self.tried, self.kept = tried, kept
        super().__init__(f"{kept} of {tried} draws plausible")


def draw_ensemble(case: Case, members: int, seed: int, max_draws: int | None = None,
                  progress: Progress | None = None, executor=None, store=None, block: int | None = None,
                  min_rate: float | None = None) -> Ensemble:
    """The first ``members`` plausible draws in index order (at most ``max_draws`` tried).

    ``tried`` and the rejection counts cover the draws up to the last one kept, so they do not
    depend on how the draws were blocked or where they were computed.

    Parameters
    ----------
    executor : object with ``map(fn, tasks)``, optional
        Where blocks are computed (default: in this process).
    store : impact.results.Checkpoints, optional
        Finished blocks are saved there and reused on a resumed run.
    block : int, optional
        Draw indices per block (default :func:`draw_block_size`); results do not depend on it.
    min_rate : float, optional
        Raise :class:`LowAcceptance` when the first round of blocks keeps fewer than this share
        of its draws and not enough members (the caller then turns to another sampler).
    """
    from .execute import InProcess, count

    executor = executor or InProcess()
    B = block or draw_block_size(members, executor.workers)
    max_draws = max_draws or max(case.max_draws, members)
    blocks: dict[int, dict] = {}
    n_kept = 0
    next_start = 0
    rate = 1.0
    while n_kept < members and next_start < max_draws:
        # enough blocks for the expected acceptance rate, at least one per worker
        need = members - n_kept
        n_blocks = max(executor.workers, int(np.ceil(1.1 * need / max(rate, 0.02) / B)))
        starts = [s for s in range(next_start, max_draws, B)][:n_blocks]
        next_start = starts[-1] + B
        tasks, todo = [], []
        for s in starts:
            saved = store.get(f"draws-{s}") if store else None
            if saved is not None:
                blocks[s] = saved
            else:
                tasks.append(ScreenTask(case, seed, s, min(s + B, max_draws)))
                todo.append(s)
        for i, res in executor.map(screen_block, tasks):
            blocks[todo[i]] = res
            if store:
                store.put(f"draws-{todo[i]}", res)
        n_kept = sum(int(b["kept"].sum()) for b in blocks.values())
        tried = sum(b["draws"].size for b in blocks.values())
        if min_rate is not None and n_kept < members and n_kept < min_rate * tried:
            raise LowAcceptance(tried, n_kept)
        min_rate = None  # judged on the first round only
        rate = max(n_kept / tried, 1e-3)
        count(progress, "drawing today's ecosystem", min(n_kept, members), members, f"plausible, {tried} tried")
    order = sorted(blocks)
    kept_all = np.concatenate([blocks[s]["kept"] for s in order])
    draws_all = np.concatenate([blocks[s]["draws"] for s in order])
    if kept_all.sum() >= members:
        tried = int(np.flatnonzero(kept_all)[members - 1]) + 1
    else:
        tried = int(draws_all.size)
    flags = {f: np.concatenate([blocks[s][f] for s in order])[:tried] for f in ("failed", "extinct", "range")}
    n_kept = min(int(kept_all[:tried].sum()), members)
    if n_kept == 0:
        raise CaseError(case.path, "observed",
                        f"none of {tried} draws gave a plausible web today ({int(flags['failed'].sum())} numerical "
                        f"failures, {int(flags['extinct'].sum())} with a species below its quasi-extinction level, "
                        f"{int(flags['range'].sum())} outside an observed range); widen the priors or the observed "
                        "ranges, or raise case.max_draws")
    unit = np.concatenate([blocks[s]["unit"] for s in order])[:n_kept]
    today = np.concatenate([blocks[s]["today"] for s in order])[:n_kept]
    draws = draws_all[kept_all][:n_kept]
    counts = dict(wanted=members, tried=tried, kept=n_kept, failed=int(flags["failed"].sum()),
                  extinct=int(flags["extinct"].sum()), out_of_range=int(flags["range"].sum()))
    return _ensemble(case, draws, unit, today, counts)


def run_options(case: Case, ens: Ensemble, seed: int, progress: Progress | None = None,
                only: tuple[str, ...] | None = None) -> dict[str, Run]:
    """Baseline and every option (or those named in ``only``) on the same draws, noise and chance events (paired)."""
    web = build_web(case)
    with_noise = bool((ens.params.noise_sd > 0).any())
    n_units = int(np.ceil(case.horizon)) + 1
    noise = noise_multipliers(seed, ens.draws, ens.params.noise_sd, n_units) if with_noise else None
    event_u = {iv.name: event_uniforms(seed, ens.draws, iv.name) for iv in case.interventions}
    runs = {}
    options: list[Option | None] = [None, *case.options]
    for opt in options:
        name = "baseline" if opt is None else opt.name
        if only is not None and name not in only:
            continue
        if progress:
            progress(f"simulating {name} on {len(ens.draws)} members")
        runs[name] = run_option(case, web, ens.params, ens.values, ens.today, opt, noise, event_u)
    return runs


@dataclass(frozen=True)
class Summary:
    """What the assessment keeps of one option's run, per member (full trajectories are not kept).

    Attributes
    ----------
    times : ndarray (T,)
        Output times.
    at : ndarray (H,)
        Summary horizons: the case's risk horizons and the assessment horizon, ascending.
    trajectory : ndarray (M, T, n_state) float32
        States at the output times, in single precision (7 significant digits; the tables
        carry 6), for the quantile bands.
    minimum, maximum : ndarray (M, H, n_state)
        Running minimum / maximum over [0, h] for each summary horizon, including between
        output times.
    mean : ndarray (M, H, S)
        Time-mean abundance over [0, h] (trapezoid rule on the output times).
    state : ndarray (M, H, n_state)
        State at each summary horizon (every horizon is an output time).
    recovery : ndarray (M, S)
        Recovery time against the paired baseline (NaN for the baseline itself).
    final : ndarray (M, n_state)
    failed : ndarray (M,) bool
    reason : ndarray (M,) int8
    nfev : int
    """

    times: np.ndarray
    at: np.ndarray
    trajectory: np.ndarray
    minimum: np.ndarray
    maximum: np.ndarray
    mean: np.ndarray
    state: np.ndarray
    recovery: np.ndarray
    final: np.ndarray
    failed: np.ndarray
    reason: np.ndarray
    nfev: int

    @property
    def members(self) -> int:
        return int(self.failed.shape[0])

    def slot(self, h: float) -> int:
        """Index of summary horizon ``h`` in :attr:`at`."""
        return int(np.searchsorted(self.at, h - 1e-12))


PER_MEMBER = ("trajectory", "minimum", "maximum", "mean", "state", "recovery", "final", "failed", "reason")


def summary_horizons(case: Case) -> np.ndarray:
    return np.array(sorted(set(case.risk.horizons) | {case.horizon}), float)


def summarise(case: Case, runs: dict[str, Run]) -> dict[str, Summary]:
    """Reduce full runs to the per-member summaries the tables are built from (pure)."""
    base = runs["baseline"]
    at = summary_horizons(case)
    S = len(case.species)
    out = {}
    for name, run in runs.items():
        ti = np.searchsorted(run.times, at - 1e-12)
        mean = np.stack([np.stack([mx.time_mean(run.times, run.states[:, :, j], h) for j in range(S)], axis=1)
                         for h in at], axis=1)
        rec = np.full((run.states.shape[0], S), np.nan)
        if name != "baseline":
            for j, sp in enumerate(case.species):
                if sp.present:
                    rec[:, j] = mx.recovery_times(run.times, run.states[:, :, j], base.states[:, :, j],
                                                  case.risk.recovery_fraction)
        out[name] = Summary(run.times, at, run.states.astype(np.float32), run.cummin[:, ti], run.cummax[:, ti],
                            mean, run.states[:, ti].copy(), rec, run.states[:, -1].copy(), run.failed, run.reason,
                            run.nfev)
    return out


def concat_summaries(parts: list[dict[str, Summary]]) -> dict[str, Summary]:
    """Join chunk summaries in member order."""
    first = parts[0]
    return {name: Summary(s.times, s.at,
                          *(np.concatenate([getattr(p[name], f) for p in parts], axis=0) for f in PER_MEMBER),
                          sum(p[name].nfev for p in parts))
            for name, s in first.items()}


@dataclass(frozen=True)
class RunTask:
    """A chunk of kept members to run under the baseline and every option."""

    case: Case
    seed: int
    draws: np.ndarray
    unit: np.ndarray
    today: np.ndarray


def run_chunk(task: RunTask) -> dict[str, Summary]:
    """Run one chunk of members under the baseline and every option, summarised (a worker's function).

    Noise and chance events come from each member's own streams (drawn once for all options),
    so the runs pair member by member wherever each chunk was computed. Summarising here keeps
    the full trajectories in the worker.
    """
    ens = _ensemble(task.case, task.draws, task.unit, task.today, {})
    return summarise(task.case, run_options(task.case, ens, task.seed))


def assess_members(case: Case, ens: Ensemble, seed: int, progress: Progress | None = None, executor=None,
                   store=None, chunk: int | None = None) -> dict[str, Summary]:
    """Baseline and every option on the kept members, chunk by chunk, as summaries.

    Each chunk is one task running every option. Chunks are cut from the member order alone,
    and a member's results do not depend on the chunk it falls in (the integrator steps each
    member on its own), so any chunking, executor or resumed run gives the same numbers. A chunk
    is summarised, and saved, once its options are in; its full trajectories are then dropped.
    """
    from .execute import InProcess, count

    executor = executor or InProcess()
    names = ["baseline", *[o.name for o in case.options]]
    M = len(ens.draws)
    chunk = chunk or run_chunk_size(M, executor.workers, len(names))
    starts = list(range(0, M, chunk))
    parts: dict[int, dict[str, Summary]] = {}
    tasks, todo = [], []
    for k, a in enumerate(starts):
        saved = store.get_summaries(f"runs-{a}") if store else None
        if saved is not None:
            parts[k] = saved
            continue
        b = min(a + chunk, M)
        tasks.append(RunTask(case, seed, ens.draws[a:b], ens.unit[a:b], ens.today[a:b]))
        todo.append(k)
    label = f"simulating baseline + {len(case.options)} options"
    total = M * len(names)
    done = sum(p["baseline"].members for p in parts.values()) * len(names)
    count(progress, label, done, total, "member runs")
    for i, got in executor.map(run_chunk, tasks):
        k = todo[i]
        parts[k] = {n: got[n] for n in names}
        if store:
            store.put_summaries(f"runs-{starts[k]}", parts[k])
        done += got["baseline"].members * len(names)
        count(progress, label, done, total, "member runs")
    return concat_summaries([parts[k] for k in range(len(starts))])


def _summaries(case: Case, runs: dict) -> dict[str, Summary]:
    first = next(iter(runs.values()))
    return runs if isinstance(first, Summary) else summarise(case, runs)


RISK_COLUMNS = ("option", "species", "metric", "horizon", "value", "low", "high", "interval", "level", "unit", "n")
# the interval each metric of risk.csv carries (see impact.metrics.INTERVAL_KINDS)
RISK_INTERVALS = {"quasi_extinction": "clopper_pearson", "outbreak": "clopper_pearson",
                  "not_recovered": "clopper_pearson", "expected_minimum": "mean_normal",
                  "mean_abundance": "member_quantiles", "mean_change": "member_quantiles",
                  "recovery_time": "member_quantiles"}


def _row(option, species, metric, horizon, value, low, high, unit, n, confidence):
    kind = RISK_INTERVALS[metric]
    level = mx.QUANTILE_LEVEL if kind == "member_quantiles" else confidence
    return dict(option=option, species=species, metric=metric, horizon=horizon,
                value=value, low=low, high=high, interval=kind, level=level, unit=unit, n=n)


QUANTILES = (mx.QUANTILE_BAND[0], 0.5, mx.QUANTILE_BAND[1])


def risk_table(case: Case, runs: dict) -> pd.DataFrame:
    """Tidy risk table: one row per option, species, metric and horizon.

    ``runs`` maps option names to :class:`Summary` (or to full runs, summarised first).
    """
    runs = _summaries(case, runs)
    conf = case.risk.confidence
    base = runs["baseline"]
    rows = []
    for opt, run in runs.items():
        for j, sp in enumerate(case.species):
            for h in case.risk.horizons:
                k_h = run.slot(h)
                rmin = run.minimum[:, k_h, j]
                if sp.present:
                    k, n = mx.quasi_extinction_probability(rmin, sp.quasi_extinction)
                    lo, hi = mx.clopper_pearson(k, n, conf)
                    rows.append(_row(opt, sp.name, "quasi_extinction", h, k / n if n else np.nan, float(lo), float(hi), "probability", n, conf))
                    m, lo, hi = mx.expected_minimum_abundance(rmin, conf)
                    rows.append(_row(opt, sp.name, "expected_minimum", h, m, lo, hi, sp.unit, int(np.isfinite(rmin).sum()), conf))
                if sp.outbreak is not None:
                    rmax = run.maximum[:, k_h, j]
                    ok = np.isfinite(rmax)
                    k, n = int((rmax[ok] > sp.outbreak).sum()), int(ok.sum())
                    lo, hi = mx.clopper_pearson(k, n, conf)
                    rows.append(_row(opt, sp.name, "outbreak", h, k / n if n else np.nan, float(lo), float(hi), "probability", n, conf))
                mean_o = run.mean[:, k_h, j]
                ok = np.isfinite(mean_o)
                q = np.quantile(mean_o[ok], QUANTILES) if ok.any() else [np.nan] * 3
                rows.append(_row(opt, sp.name, "mean_abundance", h, q[1], q[0], q[2], sp.unit, int(ok.sum()), conf))
                if opt == "baseline":
                    continue
                d = mx.paired_relative_change(mean_o, base.mean[:, k_h, j])
                ok = np.isfinite(d)
                q = np.quantile(d[ok], QUANTILES) if ok.any() else [np.nan] * 3
                rows.append(_row(opt, sp.name, "mean_change", h, q[1], q[0], q[2], "fraction of baseline", int(ok.sum()), conf))
            if opt == "baseline" or not sp.present:
                continue
            rt = run.recovery[:, j]
            ok = ~np.isnan(rt)
            n = int(ok.sum())
            never = int(np.isinf(rt[ok]).sum())
            H = case.horizon
            if n:
                q = np.quantile(rt[ok], QUANTILES, method="inverted_cdf")  # no interpolation: inf stays inf
                rows.append(_row(opt, sp.name, "recovery_time", H, q[1], q[0], q[2], case.time_unit, n, conf))
                lo, hi = mx.clopper_pearson(never, n, conf)
                rows.append(_row(opt, sp.name, "not_recovered", H, never / n, float(lo), float(hi), "probability", n, conf))
    return pd.DataFrame(rows, columns=list(RISK_COLUMNS))


def bands_table(case: Case, runs: dict) -> pd.DataFrame:
    """Quantile bands of every trajectory over time (tidy)."""
    runs = _summaries(case, runs)
    frames = []
    names = case.species_names + (("carrion",) if case.carrion is not None else ())
    for opt, run in runs.items():
        for j, sp in enumerate(names):
            q = mx.trajectory_bands(run.trajectory[:, :, j].astype(np.float64))
            frames.append(pd.DataFrame({"option": opt, "species": sp, "time": run.times,
                                        **{f"q{int(round(p * 100)):02d}": q[i] for i, p in enumerate(mx.BAND_QUANTILES)}}))
    return pd.concat(frames, ignore_index=True)


def members_table(case: Case, ens: Ensemble, runs: dict) -> pd.DataFrame:
    """Per-member summaries (minimum, final, time-mean) for every option and species."""
    runs = _summaries(case, runs)
    frames = []
    for opt, run in runs.items():
        k_H = run.slot(case.horizon)
        failure = np.array([FAILURE_REASONS.get(int(r), str(r)) for r in run.reason], dtype=object)
        for j, sp in enumerate(case.species_names):
            frames.append(pd.DataFrame({
                "member": ens.draws, "option": opt, "species": sp,
                "minimum": run.minimum[:, k_H, j], "final": run.final[:, j],
                "mean": run.mean[:, k_H, j],
                "failed": run.failed,
                "failure": failure,
            }))
    return pd.concat(frames, ignore_index=True)


def failure_counts(runs: dict) -> dict[str, dict[str, int]]:
    """Numerical failures per option, by reason."""
    out = {}
    for opt, run in runs.items():
        reasons = {FAILURE_REASONS.get(int(r), str(r)): int((run.reason[run.failed] == r).sum())
                   for r in np.unique(run.reason[run.failed])}
        out[opt] = {"failed": int(run.failed.sum()), **reasons}
    return out


@dataclass(frozen=True)
class DesignRuns:
    """Every option run on arbitrary parameter points, with no plausibility filtering.

    Attributes
    ----------
    values : dict of str -> ndarray (N,)
    verdict : dict of str -> ndarray (N,) bool
        ``kept`` marks points whose baseline is a plausible picture of today.
    runs : dict of str -> Run
    """

    values: dict
    verdict: dict
    runs: dict


def evaluate_points(case: Case, unit: np.ndarray, seed: int, draws: np.ndarray | None = None,
                    noise: bool = True, progress: Progress | None = None) -> DesignRuns:
    """Spin up and run baseline plus every option on given unit-hypercube points.

    Parameters
    ----------
    unit : ndarray (N, D)
        Columns follow ``case.uncertain``.
    draws : int ndarray (N,), optional
        Random-stream identities for noise and chance events; by default every point shares
        stream 0, so differences between points come from the parameters alone.
    noise : bool
        Whether declared environmental noise is applied.
    """
    web = build_web(case)
    N = unit.shape[0]
    draws = np.zeros(N, dtype=np.int64) if draws is None else np.asarray(draws)
    values, p, today, verdict = screen_draws(case, web, unit)
    # implausible and failed points still run, from whatever state spin-up reached
    start = np.where(np.isfinite(today), today, p.initial)
    if not noise:
        p = WebParams(*(getattr(p, f) if f != "noise_sd" else np.zeros_like(p.noise_sd) for f in WebParams.__dataclass_fields__))
    ens = Ensemble(draws, unit, values, p, start, {})
    runs = run_options(case, ens, seed, progress=progress)
    return DesignRuns(values, verdict, runs)
