"""The report's tables: risk, paired effects, objectives, comparisons and the indicative IUCN reading,
formatted from the saved numbers."""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..formatting import PROBABILITY_METRICS, fmt_bare_points, fmt_cell, fmt_change, fmt_num, fmt_points, fmt_prob
from ..iucn import CATEGORY_NAMES, criterion_e_in_units, years_per_unit
from ..metrics import describe_interval
from ..manifest import Manifest
from ..results import Results, risk_row
from ..verdict import with_term

RISK_METRICS = (
    ("quasi_extinction", "Quasi-extinction probability"),
    ("expected_minimum", "Expected minimum abundance"),
    ("mean_change", "Paired change in mean abundance"),
    ("outbreak", "Outbreak probability"),
    ("recovery_time", "Recovery time (median [5 %, 95 %])"),
    ("not_recovered", "Probability of no recovery within the horizon"),
)


def interval_caption(table: pd.DataFrame, labels: dict) -> str:
    """Which interval each measure of a table carries, read from its ``interval`` and ``level`` columns."""
    groups: dict[str, list[str]] = {}
    for key, g in table.groupby(["interval", "level"], sort=False):
        kind, level = key
        names = [labels.get(x, x) for x in dict.fromkeys(g[g.columns[_label_column(g)]])]
        groups.setdefault(describe_interval(kind, float(level)), []).extend(names)
    return "; ".join(f"{', '.join(dict.fromkeys(v))}: {k}" for k, v in groups.items()) + "."


def _label_column(g: pd.DataFrame) -> int:
    # risk.csv names its measure in `metric`; effects.csv in `statistic`
    return list(g.columns).index("statistic" if "statistic" in g.columns else "metric")


def _n_note(n, kept: int) -> str:
    return "" if pd.isna(n) or int(n) == kept else f"n {int(n)}"


def risk_table_context(res: Results, option: str) -> dict:
    m = res.manifest
    hs = list(m.horizons)
    kept = m.counts.kept
    rows = []
    for s in m.species:
        sp = s.name
        for metric, label in RISK_METRICS:
            cells, any_value = [], False
            for h in hs:
                o = risk_row(res.risk, option, sp, metric, h)
                b = risk_row(res.risk, "baseline", sp, metric, h)
                if o is None:
                    cells.append(None)
                    continue
                any_value = True
                cells.append(dict(option=fmt_cell(metric, o.value, o.low, o.high), n=_n_note(o.n, kept),
                                  baseline=None if b is None else fmt_cell(metric, b.value, b.low, b.high),
                                  unit="" if metric in PROBABILITY_METRICS or metric == "mean_change" else o.unit))
            if any_value:
                rows.append(dict(species=sp, metric=label, cells=cells))
    shown = res.risk[res.risk.option.isin([option, "baseline"])]
    return dict(horizons=[fmt_num(h) for h in hs], rows=rows,
                caption=interval_caption(shown, dict(RISK_METRICS)))


EFFECT_LABELS = {"median_change": "paired change in mean abundance (median)", "p_material": "material change",
                 "p_worse": "worse than doing nothing", "difference": "change in chance"}


def effects_table_context(res: Results, option: str) -> dict:
    """Per species and horizon: the paired change, its material and worse chances, and event chance changes."""
    e = res.effects[res.effects.option == option]
    kept = res.manifest.counts.kept
    hs = list(res.manifest.horizons)
    rows = []
    for s in res.manifest.species:
        sp = s.name
        es = e[e.species == sp]
        if es.empty:
            continue
        tag = s.role + ", " + ("direct" if bool(str(es.direct.iloc[0]).lower() == "true") else "indirect")
        for metric, stats, label in (("mean_abundance", ("median_change", "p_material", "p_worse"), "abundance"),
                                     ("quasi_extinction", ("difference", "p_worse"), "quasi-extinction"),
                                     ("outbreak", ("difference", "p_worse"), "outbreak")):
            for stat in stats:
                cells = []
                for h in hs:
                    r = _row_stat(es, metric, stat, h)
                    cells.append(None if r is None else dict(text=_effect_cell(r), n=_n_note(r.n, kept)))
                if any(cells):
                    rows.append(dict(species=sp, tag=tag, measure=f"{label}: {EFFECT_LABELS[stat]}", cells=cells))
    return dict(horizons=[fmt_num(h) for h in hs], rows=rows, caption=interval_caption(e, EFFECT_LABELS))


def _row_stat(e: pd.DataFrame, metric: str, stat: str, h: float):
    r = e[(e.metric == metric) & (e.statistic == stat) & np.isclose(e.horizon, h)]
    return None if r.empty else r.iloc[0]


def _effect_cell(r) -> str:
    if r.statistic == "median_change":
        return f"{fmt_change(r.value)} [{fmt_change(r.low)}, {fmt_change(r.high)}]"
    if r.statistic == "difference":
        return f"{fmt_points(r.value)} [{fmt_bare_points(r.low)}, {fmt_bare_points(r.high)}]"
    return with_term(r.value, r.low, r.high)


def objectives_context(res: Results) -> list[dict]:
    out = []
    for _, r in res.objectives.iterrows():
        got = (with_term(r.value, r.low, r.high) if r.statistic == "chance"
               else f"{fmt_points(r.value)} [{fmt_bare_points(r.low)}, {fmt_bare_points(r.high)}]")
        need = {"chance_at_least": f"chance ≥ {fmt_prob(r.bound)}", "chance_at_most": f"chance ≤ {fmt_prob(r.bound)}",
                "increase_at_most": f"rise ≤ {fmt_points(r.bound).lstrip('+')}",
                "decrease_at_least": f"fall ≥ {fmt_points(r.bound).lstrip('+')}"}[r.requirement]
        out.append(dict(objective=r.objective, option=r.option, event=r.event, need=need, got=got,
                        status=r.status, n=fmt_num(r.n)))
    return out


def comparisons_context(res: Results) -> list[dict]:
    c = res.comparisons[res.comparisons.statistic == "p_better"]
    return [dict(objective=r.objective, option=r.option, versus=r.versus, text=with_term(r.value, r.low, r.high),
                 n=fmt_num(r.n)) for _, r in c.iterrows()]



def iucn_rows(res: Results) -> list[dict]:
    """Indicative criterion E reading per option and species with a generation time."""
    m = res.manifest
    rows = []
    for opt in ["baseline", *m.option_names]:
        for s in m.species:
            # a target's loss is the aim of an option, not a conservation concern
            if s.generation_time is None or s.role == "target":
                continue
            probs = {}
            for h in m.horizons:
                r = risk_row(res.risk, opt, s.name, "quasi_extinction", h)
                if r is not None:
                    probs[float(h)] = float(r.value)
            if not probs:
                continue
            reading = criterion_e_in_units(probs, s.generation_time, m.time_unit)
            tests = []
            for t in reading.tests:
                if t.met is None:
                    tests.append("horizon too short")
                else:
                    # print the saved probability at the horizon used, in the case's time unit
                    h_case = min(probs, key=lambda h: abs(h - t.horizon / years_per_case_unit(m)))
                    tests.append(f"{fmt_prob(probs[h_case])} by {fmt_num(h_case)} {'≥' if t.met else '<'} "
                                 f"{t.threshold:.0%}")
            cat = reading.category
            rows.append(dict(option=opt, species=s.name, generation_time=fmt_num(s.generation_time),
                             tests=tests, category=cat, category_name=CATEGORY_NAMES.get(cat, cat), note=reading.note))
    return rows


def years_per_case_unit(m: Manifest) -> float:
    return years_per_unit(m.time_unit) or 1.0


