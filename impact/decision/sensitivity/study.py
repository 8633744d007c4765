"""The prior-box screen as an assessment stage: settings, Morris pre-screen, Sobol indices of every
per-point output per option, ranking, convergence and the given-data rows, as tidy tables."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
import pandas as pd

from impact.case import Case
from impact.errors import CaseError, SettingError
from impact.decision.sensitivity.designs import (DEFAULT_FAILURE_LIMIT, DEFAULT_TOLERANCE, SCREEN_ABOVE,
    SCREEN_KEEP, morris_design)
from impact.decision.sensitivity.estimators import given_data_first_order, morris_effects, sobol_study
from impact.decision.sensitivity.outputs import METRIC_TEXT, FoodWebModel, output_labels

@dataclass(frozen=True)
class Settings:
    """Declared settings of the sensitivity stage."""

    base_samples: int = 1024
    second_order: bool = False
    seed: int = 0
    confidence: float = 0.95
    resamples: int = 100
    tolerance: float = DEFAULT_TOLERANCE
    failure_limit: float = DEFAULT_FAILURE_LIMIT
    screen: bool | None = None  # None: screen when more than SCREEN_ABOVE uncertain parameters
    screen_trajectories: int = 20
    screen_keep: float = SCREEN_KEEP
    given_data: bool = True  # also first-order indices on the plausible subset (headline metrics only)


def check_settings(s: Settings):
    """Raise :class:`SettingError` for settings no study can run with."""
    N = s.base_samples
    if N < 16 or N & (N - 1):
        raise SettingError("base_samples", f"must be a power of two of at least 16 (e.g. 256, 1024), got {N}")
    if s.seed < 0:
        raise SettingError("seed", "must be a non-negative whole number")
    if not 0 < s.tolerance < 1:
        raise SettingError("tolerance", f"must lie between 0 and 1, got {s.tolerance}")
    if not 0 <= s.failure_limit < 1:
        raise SettingError("failure_limit", f"must lie in [0, 1), got {s.failure_limit}")
    if s.screen_trajectories < 2:
        raise SettingError("screen_trajectories", "must be at least 2")


POLICY = (
    "Sobol design over the full prior box (SALib's Saltelli design; non-uniform priors mapped through "
    "their inverse CDF). A Saltelli design cannot drop rows, so the plausibility filter is NOT applied: "
    "indices of every risk metric are conditional on the whole prior, including parameter points whose "
    "baseline would be judged implausible today. The indicator 'baseline/plausible/all' shows which "
    "priors make today's ecosystem implausible. Each point is the deterministic skeleton (environmental "
    "noise off); each point draws its own chance events from a stream named by its coordinates, so an "
    "event probability shows its influence like any other parameter. Base samples holding a numerically failed "
    "point are dropped whole; an output with more failed points than the declared limit is refused. "
    "Rows marked 'plausible subset' are first-order indices from the given-data RBD-FAST estimator (as SALib's rbd_fast) "
    "on the plausible A and B points only (no total order there), for the quasi-extinction indicator and "
    "the paired change only."
)


def conditional_text(screened_out: Sequence[str]) -> str:
    s = "full prior, plausibility not applied; noise off, chance events per design point"
    if screened_out:
        s += f"; screened-out parameters held at prior median ({', '.join(screened_out)})"
    return s


GIVEN_DATA_METRICS = ("quasi_extinct", "mean_change")
CONDITIONAL_PLAUSIBLE = "plausible subset (given-data RBD-FAST, first order only); noise off, chance events per design point"


@dataclass(frozen=True)
class StageResult:
    """Tables and settings of the sensitivity stage (written by the CLI)."""

    indices: pd.DataFrame
    second_order: pd.DataFrame
    ranking: pd.DataFrame
    convergence: pd.DataFrame
    info: dict
    refused: list


INDEX_COLUMNS = ["option", "metric", "species", "parameter", "S1", "S1_conf", "ST", "ST_conf", "conditional_on", "N"]
S2_COLUMNS = ["option", "metric", "species", "parameter_i", "parameter_j", "S2", "S2_conf"]
RANK_COLUMNS = ["option", "metric", "species", "rank", "parameter", "ST", "ST_conf", "S1", "interaction"]
CONV_COLUMNS = ["option", "metric", "species", "max_shift", "max_ci_width", "tolerance", "converged"]


def morris_screen(case: Case, settings: Settings, progress=None, executor=None, store=None) -> dict:
    """Morris screening of every uncertain parameter over every output; which to keep."""
    names = [p.name for p in case.uncertain]
    D = len(names)
    design = morris_design(names, settings.screen_trajectories, settings.seed)
    model = FoodWebModel(case, settings.seed, np.arange(D), np.full(D, 0.5), progress=progress,
                          executor=executor, store=store)
    Y = model(design.unit)
    score = np.zeros(D)
    for k in range(Y.shape[1]):
        mu = morris_effects(design, Y[:, k], seed=settings.seed)["mu_star"]
        if mu.max() > 0:
            score = np.maximum(score, mu / mu.max())
    keep = score >= settings.screen_keep
    if keep.sum() < 2:  # Sobol needs at least two factors; keep the two strongest
        keep[np.argsort(score)[-2:]] = True
    return {"method": "Morris elementary effects (SALib)", "trajectories": settings.screen_trajectories,
            "levels": design.levels, "runs": design.runs, "keep_share": settings.screen_keep,
            "score": dict(zip(names, score.round(4).tolist())),
            "kept": [n for n, k in zip(names, keep) if k], "dropped": [n for n, k in zip(names, keep) if not k],
            "failures": model.failures, "seconds": round(model.seconds, 3)}


def _index_rows(labels, study, names: Sequence[str], cond: str, N: int):
    """Index, second-order, ranking and convergence rows of every output; the refused and constant ones."""
    idx_rows, s2_rows, rank_rows, conv_rows, refused, constant = [], [], [], [], [], []
    for (opt, metric, sp), ind, cv in zip(labels, study.indices, study.convergence):
        conv_rows.append(dict(option=opt, metric=metric, species=sp, **cv))
        if ind.status == "refused":
            refused.append(dict(option=opt, metric=metric, species=sp, message=ind.message))
            continue
        if ind.status == "constant":
            constant.append(f"{opt}/{metric}/{sp}")
            continue
        for j, p in enumerate(names):
            idx_rows.append(dict(option=opt, metric=metric, species=sp, parameter=p, S1=ind.S1[j],
                                 S1_conf=ind.S1_conf[j], ST=ind.ST[j], ST_conf=ind.ST_conf[j],
                                 conditional_on=cond, N=N))
        order = np.argsort(-ind.ST, kind="stable")
        for r, j in enumerate(order, start=1):
            rank_rows.append(dict(option=opt, metric=metric, species=sp, rank=r, parameter=names[j], ST=ind.ST[j],
                                  ST_conf=ind.ST_conf[j], S1=ind.S1[j], interaction=ind.ST[j] - ind.S1[j]))
        if ind.S2 is not None:
            for i in range(len(names)):
                for j in range(i + 1, len(names)):
                    s2_rows.append(dict(option=opt, metric=metric, species=sp, parameter_i=names[i],
                                        parameter_j=names[j], S2=ind.S2[i, j], S2_conf=ind.S2_conf[i, j]))
    return idx_rows, s2_rows, rank_rows, conv_rows, refused, constant


def _given_data_rows(labels, study, names: Sequence[str], seed: int) -> list[dict]:
    """First-order rows from the plausible A and B points alone (i.i.d. draws from the prior)."""
    rows = study.design.base_rows()
    kept = study.outputs[rows, 0] == 1.0
    Xk = study.design.unit[rows][kept]
    out = []
    for k, (opt, metric, sp) in enumerate(labels):
        # only the headline risks get these rows, which keeps the table short (the estimator costs
        # ~0.05 CPU s per output at N=1024, all 100 resamples in one FFT)
        if metric not in GIVEN_DATA_METRICS or study.indices[k].status != "ok":
            continue
        s1, c1 = given_data_first_order(Xk, study.outputs[rows, k][kept], names, seed)
        if not np.isfinite(s1).any():
            continue
        for j, p in enumerate(names):
            out.append(dict(option=opt, metric=metric, species=sp, parameter=p, S1=s1[j], S1_conf=c1[j],
                            ST=np.nan, ST_conf=np.nan, conditional_on=CONDITIONAL_PLAUSIBLE, N=int(kept.sum())))
    return out


def sensitivity_stage(case: Case, settings: Settings, progress=None, executor=None, store=None) -> StageResult:
    """Sobol indices of every per-point risk metric, per option, with ranking and convergence."""
    import time

    check_settings(settings)
    all_names = [p.name for p in case.uncertain]
    if len(all_names) < 2:
        raise CaseError(case.path, "parameters", "sensitivity analysis needs at least two uncertain parameters")
    do_screen = settings.screen if settings.screen is not None else len(all_names) > SCREEN_ABOVE
    screening = {"method": "none", "reason": f"{len(all_names)} uncertain parameters (screening above {SCREEN_ABOVE})"}
    names = all_names
    if do_screen:
        screening = morris_screen(case, settings, progress, executor, store)
        names = screening["kept"]
    varied = np.array([all_names.index(n) for n in names])
    model = FoodWebModel(case, settings.seed, varied, np.full(len(all_names), 0.5), progress=progress,
                         executor=executor, store=store)
    t0 = time.perf_counter()
    study = sobol_study(model, names, settings.base_samples, second_order=settings.second_order,
                        seed=settings.seed, confidence=settings.confidence, resamples=settings.resamples,
                        tolerance=settings.tolerance, failure_limit=settings.failure_limit)
    total = time.perf_counter() - t0
    analysis_seconds = total - model.seconds
    labels = output_labels(case)
    cond = conditional_text(screening.get("dropped", []))
    N = settings.base_samples
    idx_rows, s2_rows, rank_rows, conv_rows, refused, constant = _index_rows(labels, study, names, cond, N)
    t1 = time.perf_counter()
    rows = study.design.base_rows()
    kept = study.outputs[rows, 0] == 1.0
    if settings.given_data:
        idx_rows += _given_data_rows(labels, study, names, settings.seed)
    analysis_seconds += time.perf_counter() - t1
    runs = study.design.runs
    info = {
        "N": N, "D": len(names), "second_order": settings.second_order, "runs": runs,
        "failures": {"points_failed_by_option": model.failures, "design_points": runs,
                     "refused_outputs": len(refused)},
        "failure_limit": settings.failure_limit,
        "policy": POLICY,
        "method": "Sobol indices: SALib sobol.sample (scrambled Sobol', Saltelli cross-sampling) and the estimators "
                  "of SALib's sobol.analyze (Saltelli et al. 2010 first/total order, Saltelli 2002 second order), "
                  "bootstrap CIs "
                  f"({settings.resamples} resamples, {settings.confidence:.0%}); convergence: indices at N vs the "
                  "first N/2 base samples of the same design",
        "screening": screening,
        "parameters": names,
        "tolerance": settings.tolerance,
        "confidence": settings.confidence,
        "seed": settings.seed,
        "conditional_on": cond,
        "plausible_share": float(np.nanmean(study.outputs[rows, 0])),
        "plausible_points": int(kept.sum()),
        "constant_outputs": constant,
        "refused": refused,
        "not_converged": int(sum(not c["converged"] for c in study.convergence)),
        "metrics": METRIC_TEXT,
        "horizon": case.horizon,
        "seconds": {"simulation": round(model.seconds, 3), "analysis": round(analysis_seconds, 3)},
    }
    return StageResult(pd.DataFrame(idx_rows, columns=INDEX_COLUMNS), pd.DataFrame(s2_rows, columns=S2_COLUMNS),
                       pd.DataFrame(rank_rows, columns=RANK_COLUMNS), pd.DataFrame(conv_rows, columns=CONV_COLUMNS),
                       info, refused)


def summary_lines(res: StageResult, top: int = 3) -> list[str]:
    """Short text summary of the stage (the CLI prints it)."""
    info = res.info
    L = [f"sensitivity: {info['runs']} design points (N={info['N']}, D={info['D']}), "
         f"{info['plausible_share']:.0%} of them plausible today; indices conditional on: {info['conditional_on']}"]
    fails = info["failures"]["points_failed_by_option"]
    if any(fails.values()):
        L.append("  numerically failed design points: " + ", ".join(f"{k} {v}" for k, v in fails.items()))
    for r in res.refused:
        L.append(f"  REFUSED {r['option']}/{r['metric']}/{r['species']}: {r['message']}")
    nc = info["not_converged"]
    L.append(f"  {nc} of {len(res.convergence)} outputs NOT converged (CI width or N/2 shift > {info['tolerance']:g})"
             if nc else "  all outputs converged within the tolerance")
    rk = res.ranking
    for opt, metric, sp in [("baseline", "plausible", "all")]:
        sel = rk[(rk.option == opt) & (rk.metric == metric) & (rk.species == sp)].head(top)
        cv = res.convergence
        ok = cv[(cv.option == opt) & (cv.metric == metric) & (cv.species == sp)].converged.all()
        if len(sel):
            L.append("  what makes today's web implausible: "
                     + ", ".join(f"{p} (ST {st:.2f})" for p, st in zip(sel.parameter, sel.ST))
                     + ("" if ok else " [NOT converged: indicative only]"))
    return L
