"""Page 1's sentences on eradication: for each surveyed target and each option acting on it, the chance the
eradication succeeds (with its interval), the empty surveys that would confirm it, and reinvasion.

Read only from ``eradication.csv`` (:mod:`impact.risk.eradication`) and the manifest, rounded by
:mod:`impact.dossier.formatting`, so every number is found in the table. The horizon of a sentence is
the first risk horizon at or after the option's last intervention on the target ends (the last
horizon when none is that late): the effort has then had its time.
"""

from __future__ import annotations

import math

import pandas as pd

from impact.dossier.bottomline import run_label
from impact.dossier.formatting import by_time, fmt_bare_prob, fmt_num, fmt_prob
from impact.dossier.likelihood import likelihood_term
from impact.store.manifest import Manifest


def reading_horizon(m: Manifest, option: str, species: str) -> float | None:
    """The horizon page 1 judges ``option``'s eradication of ``species`` at; None when it does not act on it."""
    names = next((o.interventions for o in m.options if o.name == option), ())
    ends = [iv.end for iv in m.interventions if iv.name in names and iv.species == species]
    if not ends:
        return None
    later = [h for h in m.horizons if h >= max(ends) - 1e-9]
    return min(later) if later else max(m.horizons)


def _row(table: pd.DataFrame, option: str, species: str, h: float):
    r = table[(table.option == option) & (table.species == species) & ((table.horizon - h).abs() < 1e-9)]
    return None if r.empty else r.iloc[0]


def eradication_sentence(m: Manifest, table: pd.DataFrame, option: str, species: str) -> str | None:
    """One option's eradication of one target in words (None when the option does not act on it)."""
    h = reading_horizon(m, option, species)
    row = None if h is None else _row(table, option, species, h)
    if row is None:
        return None
    unit, tu = str(row.unit), m.time_unit
    p = float(row.chance_success)
    text = (f"{run_label(option)} removes {species}: success {by_time(h, tu)} in {fmt_prob(p)} "
            f"[{fmt_bare_prob(row.success_low)}, {fmt_bare_prob(row.success_high)}] of plausible futures "
            f"({likelihood_term(p)}; success: below {fmt_num(row.gone_below)} {unit} and not founded again from "
            "outside).")
    k, survey = float(row.surveys_needed), str(row.survey)
    level = fmt_prob(row.confidence)
    if math.isnan(k):
        text += (f" No run of empty {survey}s (up to 1000) from {tu} {fmt_num(h)} would declare it gone at {level} "
                 "confidence: too few plausible futures end with it gone.")
    else:
        text += (f" Declaring it gone at {level} confidence takes {fmt_num(k)} empty {survey}"
                 f"{'' if k == 1 else 's'} in a row from {tu} {fmt_num(h)} (detection {fmt_num(row.detection_mean)} "
                 "per survey on average, itself uncertain).")
    last = _row(table, option, species, max(m.horizons))
    if last is not None and not math.isnan(float(last.chance_reinvaded)):
        text += f" Once gone, reinvasion {by_time(last.horizon, tu)}: {fmt_prob(last.chance_reinvaded)}."
    return text


def eradication_sentences(m: Manifest, table: pd.DataFrame | None) -> tuple[str, ...]:
    """Every surveyed target under every option acting on it, in option then table order."""
    if table is None or table.empty:
        return ()
    species = list(dict.fromkeys(table.species))
    out = (eradication_sentence(m, table, o.name, s) for o in m.options for s in species)
    return tuple(x for x in out if x)
