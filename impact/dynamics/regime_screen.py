"""The assessment's dynamics stage: a regime screen of the ensemble, with intervals on the shares.

Two views, each labelled in the tables:

* the long-run attractor (noise off): every kept member, or a random subset of
  ``screen_members`` drawn from the seed, is continued from each option's state at the
  assessment horizon under the press controls in force just before it, deterministically, and
  diagnosed by :func:`impact.dynamics.diagnose.diagnose_web` (windows from each member's own time
  scales, never from the case horizon);
* the assessment horizon (noise as in the risk): the oscillation amplitude (max − min over
  [0, horizon]) of every species in every kept member's own risk run.

Shares of each regime carry a Wilson score interval (:func:`impact.dynamics.regimes.share_interval`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from impact.dynamics import regimes as rg
from impact.case import Case
from impact.dynamics.diagnose import diagnose_web
from impact.dynamics.lyapunov import (PURPOSE_DYNAMICS, DynamicsSettings, declared_settings, section_species,
    settings_record)
from impact.model import Controls, WebParams, build_web
from impact.ensemble.sample import first_uniforms

SHARE_CONFIDENCE = 0.95
# The screen's defaults bound its cost with short sub-windows (one relaxation time), periods up
# to 4 and windows of at most 100 slowest per-capita time scales (a member that needs more is not
# called aperiodic on it); every member keeps its own window (see README, measured figures).
SCREEN = dict(screen_members=300, sub_relaxations=1.0, max_period=4, rtol=1e-6, max_window_rates=100.0)
ATTRACTOR = "long-run attractor, noise off"
HORIZON = "assessment horizon, noise as in the risk"


def screened_members(seed: int, M: int, n: int) -> np.ndarray:
    """The ``n`` members (of ``M``) with the smallest per-member uniform key, ascending; all if n ≥ M.

    Each member's key comes from ``SeedSequence(seed, spawn_key=(member, PURPOSE_DYNAMICS))``
    alone, so whether a member is screened never depends on batches or workers.
    """
    if n >= M:
        return np.arange(M)
    keys = first_uniforms(seed, np.arange(M), PURPOSE_DYNAMICS)
    return np.sort(np.argsort(keys, kind="stable")[:n])


@dataclass(frozen=True)
class DiagnoseTask:
    """One option's diagnosis in an assessment: members' parameters, controls and start states."""

    case: Case
    params: WebParams
    controls: Controls
    y0: np.ndarray
    settings: DynamicsSettings
    level: np.ndarray
    section: int
    lost: np.ndarray


def diagnose_task(task: DiagnoseTask, engine: str = "compiled") -> dict:
    """:func:`diagnose_web` on one task (a worker's function); drops what the tables do not need."""
    out = diagnose_web(build_web(task.case), task.params, task.controls, task.y0, task.settings, task.level,
                       section=task.section, engine=engine, lost=task.lost)
    for key in ("sections", "final"):
        out.pop(key)
    return out


def share_table(frame: pd.DataFrame, basis: str) -> list[dict]:
    """Rows of regime_shares for one option's regimes table, one per verdict (Wilson intervals on each share)."""
    rows = []
    n = len(frame)
    for verdict, g in frame.groupby("verdict", sort=False):
        lo, hi = rg.share_interval(len(g), n, SHARE_CONFIDENCE)
        rows.append(dict(option=frame.option.iloc[0], regime=g.regime.iloc[0], verdict=verdict,
                         extinct_species=g.extinct_species.iloc[0], share=len(g) / n, share_low=float(lo),
                         share_high=float(hi), count=len(g), diagnosed=n,
                         lyapunov_median=float(g.lyapunov.median()), horizon_median=float(g.horizon_time.median()),
                         shortfall_max=float(g.shortfall.max()), basis=basis))
    return rows


def horizon_amplitudes(case: Case, name: str, run) -> pd.DataFrame:
    """Amplitude (max − min over [0, horizon], noise as in the risk) per kept member and species."""
    H = run.slot(case.horizon)
    amp = run.maximum[:, H, :len(case.species)] - run.minimum[:, H, :len(case.species)]
    frame = pd.DataFrame(amp, columns=[f"amplitude_{sp.name}" for sp in case.species])
    frame.insert(0, "member", np.arange(run.members))
    frame.insert(0, "option", name)
    frame["basis"] = HORIZON
    return frame


def screen_tasks(case: Case, params: WebParams, values: dict, runs: dict, s: DynamicsSettings,
                 section: str | None = None, seed: int = 0) -> tuple[np.ndarray, list[DiagnoseTask]]:
    """The screened members (of the kept ones) and one :class:`DiagnoseTask` per option, baseline first."""
    from impact.engine.simulate import controls_at, season_mean_phi

    sec_col = section_species(case, section)[0]
    S = len(case.species)
    sel = screened_members(seed, runs["baseline"].members, s.screen_members)
    sub = WebParams(*(getattr(params, f)[sel] for f in WebParams.__dataclass_fields__))
    level = np.array([sp.quasi_extinction for sp in case.species], float)
    H = case.horizon
    t_last = H - 1e-9 * max(H, 1.0)
    opts = {None: "baseline", **{o: o.name for o in case.options}}
    vals = {k: np.asarray(v)[sel] for k, v in values.items()}
    # seasons are averaged: the diagnostics look for the autonomous web's own regime
    tasks = [DiagnoseTask(case, sub, controls_at(case, opt, vals, t_last, season_mean_phi(case, sel.size), sel.size, S,
                                                 season_averaged=True),
                          runs[name].final[sel], s, level, sec_col, lost_at_horizon(case, runs[name].final[sel]))
             for opt, name in opts.items()]
    return sel, tasks


def lost_at_horizon(case: Case, final: np.ndarray) -> np.ndarray:
    """(M, S) bool: species present in the case that are below their quasi-extinction level at the horizon.

    Quasi-extinction is absorbing in the risk (a species that fell below its level counts as
    lost), so the regime screen counts these species as extinct and diagnoses the remaining web.
    A failed run (NaN state) loses nothing here; it is reported as failed.
    """
    S = len(case.species)
    level = np.array([sp.quasi_extinction for sp in case.species], float)
    present = np.array([sp.present for sp in case.species], bool)
    with np.errstate(invalid="ignore"):
        return present & (level > 0) & (np.asarray(final, float)[:, :S] < level)


def assess_stage(case: Case, params: WebParams, values: dict, runs: dict, settings: DynamicsSettings | None = None,
                 progress=None, section: str | None = None, executor=None, seed: int = 0):
    """The regime screen of every option (the assessment's dynamics stage).

    ``runs`` maps option names to :class:`impact.risk.runs.Summary` (per-member summaries).

    Returns
    -------
    tables : dict of str -> DataFrame
        ``regimes``, ``regime_shares``, ``risk_by_regime``, ``horizon_amplitude`` (columns as in
        DEVELOPERS.md).
    record : dict
        Settings for dynamics.json.
    """
    from impact.run.execute import InProcess, count

    s, declared = (settings, {}) if settings is not None else declared_settings(case, SCREEN)
    sec_name = section_species(case, section)[1]
    M = runs["baseline"].members
    H = case.horizon
    sel, tasks = screen_tasks(case, params, values, runs, s, section, seed)
    opts = {None: "baseline", **{o: o.name for o in case.options}}
    results = {}
    count(progress, "dynamics: diagnosing options", 0, len(tasks), "options")
    for i, out in (executor or InProcess()).map(diagnose_task, tasks):
        results[i] = out
        count(progress, "dynamics: diagnosing options", len(results), len(tasks), "options")
    reg_rows, share_rows, risk_rows, amp_rows, counts = [], [], [], [], {}
    for k, (opt, name) in enumerate(opts.items()):
        run, out = runs[name], results[k]
        frame = regime_frame(case, name, sel, run.failed[sel], out, H)
        counts[name] = {"diagnosed": int(sel.size), "failed": int((frame.regime == "failed").sum()),
                        "undetermined": int((frame.regime == "undetermined").sum())}
        reg_rows.append(frame)
        share_rows += share_table(frame, ATTRACTOR)
        risk_rows += risk_by_regime(case, name, run, sel, frame)
        amp_rows.append(horizon_amplitudes(case, name, run))
    tables = {"regimes": pd.concat(reg_rows, ignore_index=True),
              "regime_shares": pd.DataFrame(share_rows),
              "risk_by_regime": pd.DataFrame(risk_rows, columns=["option", "regime", "species", "metric", "value"]),
              "horizon_amplitude": pd.concat(amp_rows, ignore_index=True)}
    record = settings_record(
        s, members_diagnosed=int(sel.size), members_kept=int(M),
        member_selection=("every kept member" if sel.size == M else
                          f"a random subset of {sel.size} of {M} kept members (seed {seed}, the same members for every option)"),
        basis=ATTRACTOR, start="each option's state at the horizon", controls="press controls in force just before the horizon",
        seasons=("averaged: births at their season-mean multiplier, interventions scheduled by season at their rate "
                 "times the share of the season they cover" if case.seasons is not None else "none declared"),
        noise="off (deterministic)", events="none after the horizon", section=f"maxima of {sec_name}",
        share_interval=f"Wilson score interval, {SHARE_CONFIDENCE:.0%}", assessment_horizon=H,
        horizon_amplitude=HORIZON, counts=counts, declared=declared,
        shortfall="assessment horizon minus the predictability horizon where shorter (0: predictable over the whole assessment)",
        extinct="extinct is true when a species present in the case is below its quasi-extinction level at the assessment "
                "horizon, or stays below it over a whole diagnosed window; extinct_species names them. Such species are set "
                "to zero and the regime is that of the remaining web (verdict, e.g. \"equilibrium of the remaining web; "
                "moth extinct\"); extinction only when no species remains",
        lyapunov_se="batch means over the sub-windows with the AR(1) correction for correlation between them "
                    "(see regime_rules)",
        stability="equilibrium requires Re μ₁ < 0 of the Jacobian at the equilibrium found from the window, or "
                  "λ's interval below zero where none was found")
    return tables, record


def regime_frame(case: Case, name: str, sel: np.ndarray, failed_run: np.ndarray, out: dict, H: float) -> pd.DataFrame:
    """regimes.csv rows of one option."""
    regime = np.where(failed_run, "failed", out["regime"])
    frame = pd.DataFrame({"option": name, "member": sel, "regime": regime, "period": out["period"],
                          "lyapunov": out["lyapunov"], "lyapunov_se": out["lyapunov_se"], "horizon_time": out["predictability_time"],
                          "extinct": out["extinct"], "extinct_species": out["extinct_species"],
                          "verdict": [verdict_text(r, e) for r, e in zip(regime, out["extinct_species"])],
                          "reason": out["reason"],
                          "envelope_rate": out["envelope_rate"], "window": out["window"],
                          "shortfall": rg.predictability_shortfall(out["predictability_time"], H)})
    for j, sp in enumerate(case.species):
        frame[f"amplitude_{sp.name}"] = out["amplitude"][:, j]
    return frame


def verdict_text(regime: str, extinct_species: str) -> str:
    """The regime as the tables read it: e.g. "equilibrium of the remaining web; moth and primrose extinct"."""
    names = [x for x in str(extinct_species or "").split(";") if x]
    if not names:
        return regime
    lost = names[0] if len(names) == 1 else ", ".join(names[:-1]) + " and " + names[-1]
    if regime == "extinction":
        return f"no species remains; {lost} extinct"
    if regime == "undetermined":
        return f"remaining web undetermined; {lost} extinct"
    return f"{regime} of the remaining web; {lost} extinct"


def risk_by_regime(case: Case, name: str, run, sel: np.ndarray, frame: pd.DataFrame) -> list[dict]:
    """Risk metrics over the members of each regime (one option)."""
    rows = []
    H = case.horizon
    for regime in dict.fromkeys(frame.regime):
        members = sel[(frame.regime == regime).to_numpy()]
        for j, sp in enumerate(case.species):
            mins = run.minimum[members, run.slot(H), j]
            ok = np.isfinite(mins)
            if sp.present:
                rows.append(dict(option=name, regime=regime, species=sp.name, metric="quasi_extinction",
                                 value=float((mins[ok] < sp.quasi_extinction).mean()) if ok.any() else np.nan))
                rows.append(dict(option=name, regime=regime, species=sp.name, metric="expected_minimum",
                                 value=float(mins[ok].mean()) if ok.any() else np.nan))
            fin = run.final[members, j]
            rows.append(dict(option=name, regime=regime, species=sp.name, metric="final_median",
                             value=float(np.nanmedian(fin)) if np.isfinite(fin).any() else np.nan))
    return rows
