"""Bifurcation scans: one quantity varied, every value diagnosed, regime transitions listed."""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from impact.case.structures import switch_values
from impact.case import Case
from impact.dynamics.diagnose import diagnose_web
from impact.dynamics.lyapunov import DynamicsSettings, section_species
from impact.errors import SettingError
from impact.engine.integrate import FAILURE_REASONS
from impact.model import Controls, build_web, web_params

# intervention fields that `--parameter INTERVENTION.FIELD` may vary
INTENSITIES = ("rate", "fraction", "factor", "sterile_density")


def transitions(parameter: str, values: np.ndarray, regime, period) -> pd.DataFrame:
    """Changes of (regime, period) between scan values, with a kind for each change.

    ``undetermined`` values are stepped over: a change is reported between the two nearest
    determined values around it, and ``undetermined_between`` counts the values skipped (the
    change lies somewhere in that bracket).

    Returns
    -------
    DataFrame with columns parameter, from_value, to_value, from_regime, to_regime, kind,
    undetermined_between (``from_regime``/``to_regime`` carry the period for cycles, e.g. ``cycle(2)``).
    """
    def label(r, k):
        return f"cycle({k})" if r == "cycle" else r

    cols = ["parameter", "from_value", "to_value", "from_regime", "to_regime", "kind", "undetermined_between"]
    rows = []
    keep = [i for i in range(len(values)) if regime[i] != "undetermined"]
    for i, j in zip(keep[:-1], keep[1:]):
        a, b = (regime[i], int(period[i])), (regime[j], int(period[j]))
        if a == b:
            continue
        rows.append(dict(parameter=parameter, from_value=float(values[i]), to_value=float(values[j]),
                         from_regime=label(*a), to_regime=label(*b), kind=transition_kind(a, b),
                         undetermined_between=j - i - 1))
    return pd.DataFrame(rows, columns=cols)


def transition_kind(a: tuple[str, int], b: tuple[str, int]) -> str:
    """Name of a change of regime (period doublings are told apart by the period ratio)."""
    (ra, ka), (rb, kb) = a, b
    if ra == "cycle" and rb == "cycle":
        return "period-doubling" if kb == 2 * ka else "period-halving" if ka == 2 * kb else "period-change"
    if ra == "equilibrium" and rb == "cycle":
        return "onset-of-cycles"
    if ra == "cycle" and rb == "equilibrium":
        return "cycles-cease"
    if rb == "chaotic":
        return "onset-of-chaos"
    if ra == "chaotic" and rb == "cycle":
        return "periodic-window"
    if ra == "chaotic" and rb == "equilibrium":
        return "chaos-ceases"
    if rb == "extinction":
        return "extinction"
    if ra == "extinction":
        return "persistence"
    return f"{ra}-to-{rb}"


def nominal_values(case: Case) -> dict[str, float]:
    """Every parameter at its prior median (fixed ones at their value)."""
    out = {}
    for p in case.parameters:
        out[p.name] = float(p.prior.value) if not p.uncertain else float(p.prior.ppf(np.array([0.5]))[0])
    if case.structures is not None:  # structural doubts: the web of highest prior weight
        mode = np.array([case.structures.mode()])
        out.update({k: float(v[0]) for k, v in
                    switch_values(case.structures, mode, {k: np.array([v]) for k, v in out.items()}).items()})
    return out


def scan_target(case: Case, name: str, option_name: str | None):
    """Resolve a scanned quantity: a declared parameter, or ``INTERVENTION.FIELD`` of the option.

    Returns a function ``value -> (case', values)`` giving the case and parameter values with
    the scanned quantity set.
    """
    base = nominal_values(case)
    if name in base:
        return lambda v: (case, {**base, name: float(v)})
    if "." in name:
        iv_name, fld = name.rsplit(".", 1)
        ivs = {iv.name: iv for iv in case.interventions}
        if iv_name in ivs:
            iv = ivs[iv_name]
            allowed = [f for f in INTENSITIES if getattr(iv, f) is not None]
            if fld not in allowed:
                raise SettingError("parameter", f"intervention {iv_name!r} ({iv.kind}) has no intensity {fld!r}; use one of: {', '.join(allowed) or 'none'}")
            opt = next((o for o in case.options if o.name == option_name), None)
            if opt is None or iv_name not in opt.interventions:
                raise SettingError("option", f"scanning {name!r} needs `option` naming an option that uses intervention {iv_name!r}")
            def at(v):
                new_iv = replace(iv, **{fld: float(v)})
                return replace(case, interventions=tuple(new_iv if x.name == iv_name else x for x in case.interventions)), base
            return at
    choices = sorted(base) + [f"{iv.name}.{f}" for iv in case.interventions for f in INTENSITIES
                              if getattr(iv, f) is not None]
    raise SettingError("parameter", f"unknown quantity {name!r}; choose a parameter or an intervention intensity: {', '.join(choices)}")


def steady_controls(case: Case, option_name: str | None, values: dict, M: int) -> Controls:
    """Controls with every press intervention of the option in force (events are ignored).

    ``values`` maps parameter names to ndarray (M,) or scalars.
    """
    from impact.engine.simulate import controls_at, season_mean_phi

    S = len(case.species)
    if option_name is None:
        return replace(Controls.neutral(M, S), phi=season_mean_phi(case, M), wave=np.zeros((M, S)))
    opt = next(o for o in case.options if o.name == option_name)
    always = tuple(replace(iv, start=-np.inf, end=np.inf) if iv.name in opt.interventions else iv
                   for iv in case.interventions)
    vals = {k: np.broadcast_to(np.asarray(v, float), (M,)).copy() for k, v in values.items()}
    return controls_at(replace(case, interventions=always), opt, vals, 0.0, season_mean_phi(case, M), M, S,
                       season_averaged=True)


def _scan_rows(parameter, v, out, i, keep_sections, species):
    reg, per, lam = out["regime"][i], int(out["period"][i]), float(out["lyapunov"][i])
    sec = out["sections"][i][-keep_sections:]
    rows = [dict(parameter=parameter, value=float(v), section_value=float(x), regime=reg, period=per, lyapunov=lam)
            for x in sec] or [dict(parameter=parameter, value=float(v), section_value=np.nan, regime=reg, period=per, lyapunov=lam)]
    pt = dict(parameter=parameter, value=float(v), regime=reg, period=per, lyapunov=lam,
              lyapunov_se=float(out["lyapunov_se"][i]), envelope_rate=float(out["envelope_rate"][i]),
              reason=out["reason"][i], horizon=float(out["predictability_time"][i]), window=float(out["window"][i]),
              n_section=int(out["sections"][i].size), failed=bool(out["failed"][i]),
              failure=FAILURE_REASONS.get(int(out["failure"][i]), ""),
              **{f"amplitude_{sp}": float(out["amplitude"][i, j]) for j, sp in enumerate(species)})
    return rows, pt


@dataclass(frozen=True)
class ScanTask:
    """Scan values to run side by side from the case's initial state (a part of a parallel scan)."""

    case: Case
    parameter: str
    grid: np.ndarray
    settings: DynamicsSettings
    option: str | None
    section: int


def scan_values(task: ScanTask) -> tuple[list, list]:
    """Diagnose every value of a parallel scan part as one ensemble (a worker's function).

    Returns the section rows and the per-value points, as :func:`scan_web` tabulates them.
    """
    case, grid, s, option = task.case, task.grid, task.settings, task.option
    at = scan_target(case, task.parameter, option)
    web = build_web(case)
    level = np.array([sp.quasi_extinction for sp in case.species], float)
    K = grid.size
    per_value = [at(v) for v in grid]
    vals = {k: np.array([b[k] for _, b in per_value]) for k in per_value[0][1]}
    cases = [cs for cs, _ in per_value]
    p = web_params(cases[0], vals, K)
    if cases[0] is not case:  # an intervention intensity: controls differ per value
        cs_list = [steady_controls(cs, option, {k: x[i] for k, x in vals.items()}, 1) for i, cs in enumerate(cases)]
        c = Controls(*(np.concatenate([getattr(ci, f) for ci in cs_list]) for f in Controls.__dataclass_fields__))
    else:
        c = steady_controls(case, option, vals, K)
    out = diagnose_web(web, p, c, p.initial, s, level, section=task.section)
    rows, pts = [], []
    for i, v in enumerate(grid):
        r, pt = _scan_rows(task.parameter, v, out, i, 4 * s.max_period, web.species)
        rows += r
        pts.append(pt)
    return rows, pts


def scan_web(case: Case, parameter: str, grid: np.ndarray, s: DynamicsSettings, option: str | None = None,
             section: str | None = None, continuation: bool = True, progress=None, executor=None):
    """Bifurcation scan of one quantity with every other parameter at its prior median.

    ``section`` names the species whose maxima form the Poincaré section (default: the last
    declared species); an unknown name raises :class:`SettingError` for ``section``.

    With ``continuation`` each value starts where the previous one ended (so a branch is
    followed and hysteresis shows); without it all values run side by side as one ensemble
    from the case's initial state (much faster; each value finds its own attractor), split
    among ``executor``'s workers when one is given.

    Returns
    -------
    scan : DataFrame (parameter, value, section_value, regime, period, lyapunov), one row per
        kept section point (one row with NaN section_value when there are none)
    points : DataFrame (parameter, value, regime, period, lyapunov, lyapunov_se, envelope_rate, reason,
        horizon, window, n_section, failed, failure, amplitude_SPECIES for every species)
    transitions : DataFrame, see :func:`transitions`
    """
    if option is not None and option not in [o.name for o in case.options]:
        raise SettingError("option", f"unknown option {option!r}; declared: {', '.join(o.name for o in case.options) or 'none'}")
    grid = np.asarray(grid, float)
    section, _ = section_species(case, section)
    at = scan_target(case, parameter, option)
    web = build_web(case)
    level = np.array([sp.quasi_extinction for sp in case.species], float)
    keep = 4 * s.max_period
    rows, pts = [], []
    if continuation:
        y = None
        for i, v in enumerate(grid):
            cs, base = at(v)
            p = web_params(cs, {k: np.array([x]) for k, x in base.items()}, 1)
            c = steady_controls(cs, option, base, 1)
            y0 = p.initial if y is None or not np.isfinite(y).all() else y
            out = diagnose_web(web, p, c, y0, s, level, section=section)
            y = out["final"]
            r, pt = _scan_rows(parameter, v, out, 0, keep, web.species)
            rows += r
            pts.append(pt)
            if progress:
                progress(f"scan {parameter}: {i + 1}/{len(grid)} ({pt['regime']}, λ={pt['lyapunov']:.3g})")
    else:
        from impact.run.execute import InProcess

        executor = executor or InProcess()
        # values are independent here: split them among the workers, put the parts back in order
        parts = [g for g in np.array_split(grid, min(executor.workers, grid.size)) if g.size]
        tasks = [ScanTask(case, parameter, g, s, option, section) for g in parts]
        done = dict(executor.map(scan_values, tasks))
        for i in range(len(parts)):
            rows += done[i][0]
            pts += done[i][1]
    points = pd.DataFrame(pts)
    return (pd.DataFrame(rows), points,
            transitions(parameter, points.value.to_numpy(), points.regime.to_numpy(), points.period.to_numpy()))
