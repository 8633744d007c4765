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
from .sample import event_uniforms, member_uniforms, noise_multipliers, parameter_values
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


def _take(p: WebParams, sel: np.ndarray) -> WebParams:
    return WebParams(*(getattr(p, f)[sel] for f in WebParams.__dataclass_fields__))


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


def draw_ensemble(case: Case, members: int, seed: int, max_draws: int | None = None,
                  progress: Progress | None = None) -> Ensemble:
    """Draw candidates in index order until ``members`` plausible ones are kept."""
    web = build_web(case)
    D = len(case.uncertain)
    max_draws = max_draws or max(case.max_draws, members)
    kept_draws, kept_unit, kept_today = [], [], []
    kept_values: list[dict] = []
    kept_params: list[WebParams] = []
    tried = failed = extinct = out_range = n_kept = 0
    rate = 1.0
    while n_kept < members and tried < max_draws:
        need = members - n_kept
        batch = int(min(max_draws - tried, max(64, np.ceil(1.2 * need / max(rate, 0.02)))))
        draws = np.arange(tried, tried + batch)
        unit = member_uniforms(seed, draws, D)
        values, p, today, v = screen_draws(case, web, unit)
        tried += batch
        failed += int(v["failed"].sum())
        extinct += int(v["extinct"].sum())
        out_range += int(v["range"].sum())
        keep = np.flatnonzero(v["kept"])[:need]
        n_kept += keep.size
        rate = max(n_kept / tried, 1e-3)
        kept_draws.append(draws[keep])
        kept_unit.append(unit[keep])
        kept_today.append(today[keep])
        kept_values.append({k: a[keep] for k, a in values.items()})
        kept_params.append(_take(p, keep))
        if progress:
            progress(f"drawing today's ecosystem: {tried} tried, {n_kept}/{members} plausible")
    if n_kept == 0:
        raise CaseError(case.path, "observed",
                        f"none of {tried} draws gave a plausible web today ({failed} numerical failures, "
                        f"{extinct} with a species below its quasi-extinction level, {out_range} outside an "
                        "observed range); widen the priors or the observed ranges, or raise case.max_draws")
    cat = lambda xs: np.concatenate(xs, axis=0)  # noqa: E731
    values = {k: cat([v[k] for v in kept_values]) for k in kept_values[0]}
    params = WebParams(*(cat([getattr(p, f) for p in kept_params]) for f in WebParams.__dataclass_fields__))
    counts = dict(wanted=members, tried=tried, kept=n_kept, failed=failed, extinct=extinct, out_of_range=out_range)
    return Ensemble(cat(kept_draws), cat(kept_unit), values, params, cat(kept_today), counts)


def run_options(case: Case, ens: Ensemble, seed: int, progress: Progress | None = None) -> dict[str, Run]:
    """Baseline and every option on the same draws, noise and chance events (paired)."""
    web = build_web(case)
    with_noise = bool((ens.params.noise_sd > 0).any())
    n_units = int(np.ceil(case.horizon)) + 1
    noise = noise_multipliers(seed, ens.draws, ens.params.noise_sd, n_units) if with_noise else None
    event_u = {iv.name: event_uniforms(seed, ens.draws, iv.name) for iv in case.interventions}
    runs = {}
    options: list[Option | None] = [None, *case.options]
    for opt in options:
        name = "baseline" if opt is None else opt.name
        if progress:
            progress(f"simulating {name} on {len(ens.draws)} members")
        runs[name] = run_option(case, web, ens.params, ens.values, ens.today, opt, noise, event_u)
    return runs


def _row(option, species, metric, horizon, value, low, high, unit, n):
    return dict(option=option, species=species, metric=metric, horizon=horizon,
                value=value, low=low, high=high, unit=unit, n=n)


def risk_table(case: Case, runs: dict[str, Run]) -> pd.DataFrame:
    """Tidy risk table: one row per option, species, metric and horizon."""
    conf = case.risk.confidence
    base = runs["baseline"]
    times = base.times
    rows = []
    for opt, run in runs.items():
        for j, sp in enumerate(case.species):
            for h in case.risk.horizons:
                ti = int(np.searchsorted(times, h - 1e-12))
                rmin = run.cummin[:, ti, j]
                if sp.present:
                    k, n = mx.quasi_extinction_probability(rmin, sp.quasi_extinction)
                    lo, hi = mx.clopper_pearson(k, n, conf)
                    rows.append(_row(opt, sp.name, "quasi_extinction", h, k / n if n else np.nan, float(lo), float(hi), "probability", n))
                    m, lo, hi = mx.expected_minimum_abundance(rmin, conf)
                    rows.append(_row(opt, sp.name, "expected_minimum", h, m, lo, hi, sp.unit, int(np.isfinite(rmin).sum())))
                if sp.outbreak is not None:
                    rmax = run.cummax[:, ti, j]
                    ok = np.isfinite(rmax)
                    k, n = int((rmax[ok] > sp.outbreak).sum()), int(ok.sum())
                    lo, hi = mx.clopper_pearson(k, n, conf)
                    rows.append(_row(opt, sp.name, "outbreak", h, k / n if n else np.nan, float(lo), float(hi), "probability", n))
                mean_o = mx.time_mean(times, run.states[:, :, j], h)
                ok = np.isfinite(mean_o)
                q = np.quantile(mean_o[ok], [0.05, 0.5, 0.95]) if ok.any() else [np.nan] * 3
                rows.append(_row(opt, sp.name, "mean_abundance", h, q[1], q[0], q[2], sp.unit, int(ok.sum())))
                if opt == "baseline":
                    continue
                mean_b = mx.time_mean(times, base.states[:, :, j], h)
                d = mx.paired_relative_change(mean_o, mean_b)
                ok = np.isfinite(d)
                q = np.quantile(d[ok], [0.05, 0.5, 0.95]) if ok.any() else [np.nan] * 3
                rows.append(_row(opt, sp.name, "mean_change", h, q[1], q[0], q[2], "fraction of baseline", int(ok.sum())))
            if opt == "baseline" or not sp.present:
                continue
            rt = mx.recovery_times(times, run.states[:, :, j], base.states[:, :, j], case.risk.recovery_fraction)
            ok = ~np.isnan(rt)
            n = int(ok.sum())
            never = int(np.isinf(rt[ok]).sum())
            H = case.horizon
            if n:
                q = np.quantile(rt[ok], [0.05, 0.5, 0.95], method="inverted_cdf")  # no interpolation: inf stays inf
                rows.append(_row(opt, sp.name, "recovery_time", H, q[1], q[0], q[2], case.time_unit, n))
                lo, hi = mx.clopper_pearson(never, n, conf)
                rows.append(_row(opt, sp.name, "not_recovered", H, never / n, float(lo), float(hi), "probability", n))
    return pd.DataFrame(rows)


def bands_table(case: Case, runs: dict[str, Run]) -> pd.DataFrame:
    """Quantile bands of every trajectory over time (tidy)."""
    frames = []
    names = case.species_names + (("carrion",) if case.carrion is not None else ())
    for opt, run in runs.items():
        for j, sp in enumerate(names):
            q = mx.trajectory_bands(run.states[:, :, j])
            frames.append(pd.DataFrame({"option": opt, "species": sp, "time": run.times,
                                        **{f"q{int(round(p * 100)):02d}": q[i] for i, p in enumerate(mx.BAND_QUANTILES)}}))
    return pd.concat(frames, ignore_index=True)


def members_table(case: Case, ens: Ensemble, runs: dict[str, Run]) -> pd.DataFrame:
    """Per-member summaries (minimum, final, time-mean) for every option and species."""
    frames = []
    for opt, run in runs.items():
        for j, sp in enumerate(case.species_names):
            frames.append(pd.DataFrame({
                "member": ens.draws, "option": opt, "species": sp,
                "minimum": run.cummin[:, -1, j], "final": run.states[:, -1, j],
                "mean": mx.time_mean(run.times, run.states[:, :, j], case.horizon),
                "failed": run.failed,
                "failure": [FAILURE_REASONS.get(int(r), str(r)) for r in run.reason],
            }))
    return pd.concat(frames, ignore_index=True)


def failure_counts(runs: dict[str, Run]) -> dict[str, dict[str, int]]:
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
