"""The risk stage runner: every option run paired on the ensemble, summarised per member, tabulated.

No file I/O here; :mod:`impact.store.results` writes what this returns.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
import pandas as pd

from impact.risk import metrics as mx
from impact.case import Case, Option
from impact.engine.integrate import FAILURE_REASONS
from impact.model import WebParams, build_web
from impact.ensemble.sample import counting_for, event_uniforms, noise_multipliers
from impact.engine.simulate import Run, run_option
from impact.ensemble.draws import Ensemble, make_ensemble, run_chunk_size, plausibility_of_draws

Progress = Callable[[str], None]


def run_options(case: Case, ens: Ensemble, seed: int, progress: Progress | None = None,
                only: tuple[str, ...] | None = None, individuals: bool = True) -> dict[str, Run]:
    """Baseline and every option (or those named in ``only``) on the same draws, noise and chance events (paired).

    ``individuals=False`` runs every species continuously, even one the case counts in individuals
    at low numbers (a screen of the parameters alone)."""
    web = build_web(case)
    with_noise = bool((ens.params.noise_sd > 0).any())
    n_units = int(np.ceil(case.horizon)) + 1
    noise = noise_multipliers(seed, ens.draws, ens.params.noise_sd, n_units) if with_noise else None
    event_u = {iv.name: event_uniforms(seed, ens.draws, iv.name) for iv in case.interventions}
    counting = counting_for(case, seed, ens.draws) if individuals else None
    runs = {}
    options: list[Option | None] = [None, *case.options]
    for opt in options:
        name = "baseline" if opt is None else opt.name
        if only is not None and name not in only:
            continue
        if progress:
            progress(f"simulating {name} on {len(ens.draws)} members")
        runs[name] = run_option(case, web, ens.params, ens.values, ens.today, opt, noise, event_u,
                                counting=counting)
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


def summary_times(case: Case) -> np.ndarray:
    return np.array(sorted(set(case.risk.times) | {case.horizon}), float)


def summarise(case: Case, runs: dict[str, Run]) -> dict[str, Summary]:
    """Reduce full runs to the per-member summaries the tables are built from (pure)."""
    base = runs["baseline"]
    at = summary_times(case)
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
    ens = make_ensemble(task.case, task.draws, task.unit, task.today, {})
    return summarise(task.case, run_options(task.case, ens, task.seed))


def assess_members(case: Case, ens: Ensemble, seed: int, progress: Progress | None = None, executor=None,
                   store=None, chunk: int | None = None) -> dict[str, Summary]:
    """Baseline and every option on the kept members, chunk by chunk, as summaries.

    Each chunk is one task running every option. Chunks are cut from the member order alone,
    and a member's results do not depend on the chunk it falls in (the integrator steps each
    member on its own), so any chunking, executor or resumed run gives the same numbers. A chunk
    is summarised, and saved, once its options are in; its full trajectories are then dropped.
    """
    from impact.run.execute import InProcess, count

    executor = executor or InProcess()
    names = ["baseline", *[o.name for o in case.options]]
    M = len(ens.draws)
    chunk = chunk or run_chunk_size(M, executor.workers, len(names))
    starts = list(range(0, M, chunk))
    parts: dict[int, dict[str, Summary]] = {}
    tasks, todo = [], []
    for k, a in enumerate(starts):
        flat = store.get(f"runs-{a}") if store else None
        saved = None if flat is None else summaries_from_arrays(flat)
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
            store.put(f"runs-{starts[k]}", summaries_to_arrays(parts[k]))
        done += got["baseline"].members * len(names)
        count(progress, label, done, total, "member runs")
    return concat_summaries([parts[k] for k in range(len(starts))])


def _summaries(case: Case, runs: dict) -> dict[str, Summary]:
    first = next(iter(runs.values()))
    return runs if isinstance(first, Summary) else summarise(case, runs)


RISK_COLUMNS = ("option", "species", "metric", "horizon", "value", "low", "high", "interval", "level", "unit", "n")
# the interval each metric of risk.csv carries (see impact.risk.metrics.INTERVAL_KINDS)
RISK_INTERVALS = {"quasi_extinction": "clopper_pearson", "extinct": "clopper_pearson", "outbreak": "clopper_pearson",
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
    counted = {x.species: x.per_unit for x in case.individuals}
    rows = []
    for opt, run in runs.items():
        for j, sp in enumerate(case.species):
            for h in case.risk.times:
                k_h = run.slot(h)
                rmin = run.minimum[:, k_h, j]
                if sp.present:
                    k, n = mx.quasi_extinction_probability(rmin, sp.quasi_extinction)
                    lo, hi = mx.clopper_pearson(k, n, conf)
                    rows.append(_row(opt, sp.name, "quasi_extinction", h, k / n if n else np.nan, float(lo), float(hi), "probability", n, conf))
                    if sp.name in counted:
                        k, n = mx.extinction_probability(rmin, counted[sp.name])
                        lo, hi = mx.clopper_pearson(k, n, conf)
                        rows.append(_row(opt, sp.name, "extinct", h, k / n if n else np.nan, float(lo), float(hi), "probability", n, conf))
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
                    noise: bool = True, progress: Progress | None = None, individuals: bool = True) -> DesignRuns:
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
    individuals : bool
        Whether species declared in ``[individuals.SPECIES]`` are counted at low numbers (births and
        deaths as chance events); False runs them continuously.
    """
    web = build_web(case)
    N = unit.shape[0]
    draws = np.zeros(N, dtype=np.int64) if draws is None else np.asarray(draws)
    values, p, today, verdict = plausibility_of_draws(case, web, unit)
    # implausible and failed points still run, from whatever state spin-up reached
    start = np.where(np.isfinite(today), today, p.initial)
    if not noise:
        p = WebParams(*(getattr(p, f) if f != "noise_sd" else np.zeros_like(p.noise_sd) for f in WebParams.__dataclass_fields__))
    ens = Ensemble(draws, unit, values, p, start, {})
    runs = run_options(case, ens, seed, progress=progress, individuals=individuals)
    return DesignRuns(values, verdict, runs)


def summaries_to_arrays(summaries: dict[str, Summary]) -> dict[str, np.ndarray]:
    """A chunk's summaries as plain arrays for a checkpoint (no pickles): ``options`` and ``"{i}|{field}"``."""
    flat = {"options": np.array(list(summaries), dtype=str)}
    for i, s in enumerate(summaries.values()):
        for f in ("times", "at", *PER_MEMBER, "nfev"):
            flat[f"{i}|{f}"] = np.asarray(getattr(s, f))
    return flat


def summaries_from_arrays(flat: dict[str, np.ndarray]) -> dict[str, Summary]:
    """The summaries :func:`summaries_to_arrays` wrote, by option."""
    names = [str(n) for n in flat["options"]]
    return {n: Summary(flat[f"{i}|times"], flat[f"{i}|at"], *(flat[f"{i}|{f}"] for f in PER_MEMBER),
                       int(flat[f"{i}|nfev"])) for i, n in enumerate(names)}
