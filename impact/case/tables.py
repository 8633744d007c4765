"""Reading the optional tables of a case file: parameter groups, objectives, the [dynamics] settings,
monitoring series (inline or from a CSV beside the case), limits on change and [calibration]."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

from impact.case.reader import Reader, Table
from impact.case.types import (DEFAULT_MIN_ACCEPTANCE, MEASURES, REQUIREMENTS, SAMPLERS, SERIES_COLUMNS,
    SERIES_KINDS, CalibrationTable, ChangeLimit, DynamicsTable, MonitoringSeries, Objective, ParameterGroup,
    Species)
from impact.errors import CaseError, ReadError
from impact.case.seriesfile import SeriesFile, read_series_file

# steps of one limit on change: the spin-up records every member's state at each (common practice)
MAX_CHANGE_STEPS = 1_000


def read_group(r: Reader, i: int, raw: Any, uncertain: set[str]) -> ParameterGroup:
    """One ``[[parameter_groups]]`` entry: a name and two or more uncertain parameters."""
    t = Table(r, raw, f"parameter_groups[{i}]")
    name = t.get("name", kind="str")
    t.path = base = f"parameter_groups.{name}"
    members = t.get("parameters", kind="list")
    if len(members) < 2 or any(not isinstance(m, str) for m in members) or len(set(members)) != len(members):
        r.fail(f"{base}.parameters", "must list two or more different parameter names")
    for m in members:
        if m not in uncertain:
            r.fail(f"{base}.parameters", f"{m!r} is not an uncertain parameter; uncertain: {', '.join(sorted(uncertain)) or 'none'}")
    desc = t.get("description", "", "str")
    t.done()
    return ParameterGroup(name, tuple(members), desc)


def read_objective(r: Reader, i: int, raw: Any, species: tuple[Species, ...], horizon: float,
                    risk_times: tuple[float, ...]) -> Objective:
    """One ``[[objectives]]`` entry: species, measure, horizon, event level and requirement."""
    t = Table(r, raw, f"objectives[{i}]")
    name = t.get("name", kind="str")
    t.path = base = f"objectives.{name}"
    by_name = {s.name: s for s in species}
    sp = t.get("species", kind="str")
    if sp not in by_name:
        r.fail(f"{base}.species", f"unknown species {sp!r}; declared species: {', '.join(sorted(by_name))}")
    measure = r.choice(f"{base}.measure", t.get("measure", kind="str"), MEASURES)
    allowed_h = sorted(set(risk_times) | {horizon})
    h = t.number("horizon", horizon)
    match = [a for a in allowed_h if abs(h - a) <= 1e-9 * max(1.0, a)]
    if not match:
        r.fail(f"{base}.horizon", f"{h:g} is not a risk horizon; allowed: {', '.join(f'{a:g}' for a in allowed_h)} "
                                  "(add it to risk.horizons to use it)")
    h = match[0]
    level, below = None, True
    if measure == "abundance":
        given = [k for k in ("below", "above") if k in t.data]
        if len(given) != 1:
            r.fail(f"{base}.below", "an abundance objective needs exactly one of below = LEVEL or above = LEVEL "
                                    "(the abundance the option should keep the species under, or over)")
        below = given[0] == "below"
        level = t.number(given[0], low=0)
    elif measure == "outbreak" and by_name[sp].outbreak is None:
        r.fail(f"{base}.measure", f"species {sp!r} declares no outbreak level; add species.{sp}.outbreak")
    given = [k for k in REQUIREMENTS if k in t.data]
    if len(given) != 1:
        r.fail(f"{base}.{given[1] if len(given) > 1 else 'chance_at_least'}",
               f"exactly one requirement is needed; choose one of: {', '.join(REQUIREMENTS)}")
    bound = t.number(given[0], low=0, high=1)
    desc = t.get("description", "", "str")
    t.done()
    return Objective(name, sp, measure, float(h), given[0], float(bound), level, below, desc)


def read_dynamics(r: Reader, raw: Any, species: list[str]) -> DynamicsTable | None:
    """Read ``[dynamics]`` (absent: None)."""
    if raw is None:
        return None
    t = Table(r, raw, "dynamics")
    out = DynamicsTable(
        transient=t.number("transient", None, low=0),
        window=t.number("window", None, low=0, low_open=True),
        sample_dt=t.number("sample_dt", None, low=0, low_open=True),
        section=t.get("section", None, "str"),
        eq_tol=t.number("eq_tol", None, low=0, low_open=True, high=1),
        period_tol=t.number("period_tol", None, low=0, low_open=True, high=1),
        max_period=t.number("max_period", None, low=1, high=64, integer=True),
        env_tol=t.number("env_tol", None, low=0, low_open=True, high=1),
        confidence=t.number("confidence", None, low=0.5, high=0.9999),
        screen_members=t.number("screen_members", None, low=1, integer=True),
    )
    t.done()
    if out.section is not None:
        r.choice("dynamics.section", out.section, species)
    return out


def series_values(r: Reader, t: Table, base: str) -> tuple[list, list, SeriesFile | None]:
    """Times and values inline (``times``, ``values``) or from ``file``: exactly one of the two."""
    inline = [k for k in ("times", "values") if k in t.data]
    if "file" in t.data:
        if inline:
            r.fail(f"{base}.{inline[0]}", "give the series either inline (times, values) or in a file, not both")
        series = read_series_file(r.path, base, t.get("file", kind="str"))
        return list(series.times), list(series.values), series
    times, values = t.get("times", kind="list"), t.get("values", kind="list")
    for key, lst in (("times", times), ("values", values)):
        if any(isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x) for x in lst):
            r.fail(f"{base}.{key}", "must be a list of finite numbers")
    return [float(x) for x in times], [float(x) for x in values], None


def _check_series(r: Reader, base: str, kind: str, spinup: float, times: list, values: list,
                  series: SeriesFile | None):
    """A series' meaning: one value per time, at least two, times increasing within the spin-up,
    counts whole and >= 0, index values > 0. A series from a file is refused naming the line and column."""
    def fail(index, column, message):
        if series is not None and index is not None:
            series.fail(index, column, message)
        r.fail(f"{base}.{'file' if series else column + 's'}", message)

    if len(times) != len(values):
        fail(None, "value", f"{len(times)} times but {len(values)} values; give one value per time")
    if len(times) < 2:
        fail(None, "value", "needs at least two observations")
    for k in range(1, len(times)):
        if times[k] <= times[k - 1]:
            fail(k, "time", f"{times[k]:g} does not come after {times[k - 1]:g}; times must be strictly increasing "
                            "(no repeated or unordered times)")
    outside = [k for k, x in enumerate(times) if not -spinup <= x <= 0]
    if outside:
        fail(outside[0], "time", f"times are counted from today (0, the end of spin-up) and must lie in "
                                 f"[{-spinup:g}, 0] (case.spinup = {spinup:g}); got {times[0]:g} to {times[-1]:g}")
    bad = [k for k, v in enumerate(values) if (v < 0 or v != math.floor(v) if kind == "count" else v <= 0)]
    if bad:
        fail(bad[0], "value", "counts must be whole numbers >= 0" if kind == "count" else
             "index values must be > 0 (a lognormal error needs positive values)")


def read_monitoring(r: Reader, i: int, raw: Any, names: set[str], spinup: float) -> MonitoringSeries:
    """One ``[[monitoring]]`` entry: a species' count series or index, and its observation model."""
    t = Table(r, raw, f"monitoring[{i}]")
    sp = t.get("species", kind="str")
    if sp not in names:
        r.fail(f"monitoring[{i}].species", f"unknown species {sp!r}; declared species: {', '.join(sorted(names))}")
    t.path = base = f"monitoring.{sp}"
    kind = r.choice(f"{base}.kind", t.get("kind", "count", "str"), tuple(SERIES_KINDS))
    error = r.choice(f"{base}.error", t.get("error", SERIES_KINDS[kind][0], "str"), SERIES_KINDS[kind])
    times, values, series = series_values(r, t, base)
    _check_series(r, base, kind, spinup, times, values, series)
    file = series.name if series is not None else None
    detection = t.quantity("detection", 1.0, low=0, low_open=True, high=1) if kind == "count" else 1.0
    scale = t.quantity("scale", 1.0, low=0, low_open=True)
    dispersion = t.quantity("dispersion", low=0, low_open=True) if error == "negative-binomial" else None
    log_sd = t.quantity("log_sd", low=0, low_open=True) if error == "lognormal" else None
    source = t.get("source", "", "str")
    t.done()
    return MonitoringSeries(sp, kind, tuple(times), tuple(values), error, detection, scale, dispersion, log_sd,
                            source, file)


def read_change_limit(r: Reader, i: int, raw: Any, names: set[str], spinup: float) -> ChangeLimit:
    """One ``[[change_limits]]`` entry: the largest rise and fall per step before today."""
    t = Table(r, raw, f"change_limits[{i}]")
    sp = t.get("species", kind="str")
    if sp not in names:
        r.fail(f"change_limits[{i}].species", f"unknown species {sp!r}; declared species: {', '.join(sorted(names))}")
    t.path = base = f"change_limits.{sp}"
    up = t.number("up_at_most", None, low=1, low_open=True)
    down = t.number("down_at_most", None, low=1, low_open=True)
    if up is None and down is None:
        r.fail(f"{base}.up_at_most", "give up_at_most (e.g. 2: never more than doubling per step), "
                                     "down_at_most (e.g. 2: never below half per step), or both")
    step = t.number("step", 1.0, low=0, low_open=True)
    start = t.number("start", -0.5 * spinup, low=-spinup, high=0)
    end = t.number("end", 0.0, low=-spinup, high=0)
    if end - start < step - 1e-12:
        r.fail(f"{base}.end", f"the window [{start:g}, {end:g}] must hold at least one step of {step:g}")
    if (end - start) / step > MAX_CHANGE_STEPS:
        r.fail(f"{base}.step", f"{step:g} cuts the window [{start:g}, {end:g}] into {(end - start) / step:.3g} steps; "
                               f"at most {MAX_CHANGE_STEPS:,} are allowed (the abundance is recorded at each step "
                               "of every member's spin-up): use a longer step")
    source = t.get("source", "", "str")
    t.done()
    return ChangeLimit(sp, up, down, step, start, end, source)


def read_calibration(r: Reader, raw: Any) -> CalibrationTable | None:
    """Read ``[calibration]`` (absent: None, every setting at its default)."""
    if raw is None:
        return None
    t = Table(r, raw, "calibration")
    out = CalibrationTable(
        sampler=r.choice("calibration.sampler", t.get("sampler", "auto", "str"), SAMPLERS),
        min_acceptance=t.number("min_acceptance", DEFAULT_MIN_ACCEPTANCE, low=0, low_open=True, high=1),
        max_simulations=t.number("max_simulations", None, low=1, integer=True),
    )
    t.done()
    return out
