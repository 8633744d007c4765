"""Page 1's sentence on eradication: for each surveyed target, under each option acting on it, the chance the
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
from impact.store.manifest import Manifest


def reading_risk_time(m: Manifest, option: str, species: str) -> float | None:
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


def _each(parts: list[str], labels: list[str]) -> str:
    """``x under “a”`` for one option; ``x under “a”, y under “b”`` for several."""
    return ", ".join(f"{x} under {lab}" for x, lab in zip(parts, labels)) if len(parts) > 1 else parts[0]


def eradication_sentence(m: Manifest, table: pd.DataFrame, species: str) -> str | None:
    """One surveyed target under every option acting on it, in one sentence (None when no option acts on it)."""
    rows, labels = [], []
    for o in m.options:
        h = reading_risk_time(m, o.name, species)
        row = None if h is None else _row(table, o.name, species, h)
        if row is not None:
            rows.append((h, row, _row(table, o.name, species, max(m.horizons))))
            labels.append(run_label(o.name))
    if not rows:
        return None
    tu, first = m.time_unit, rows[0][1]
    one = len({h for h, _, _ in rows}) == 1  # one horizon for every option: said once
    at = (lambda h: "") if one else (lambda h: f"{by_time(h, tu)} ")
    success = _each([f"{at(h)}{fmt_prob(r.chance_success)} [{fmt_bare_prob(r.success_low)}, "
                     f"{fmt_bare_prob(r.success_high)}]" for h, r, _ in rows], labels)
    surveys = _each([(f"{fmt_num(r.surveys_needed)}" + ("" if one else f" from {tu} {fmt_num(h)}"))
                     if not math.isnan(float(r.surveys_needed)) else "none up to 1000" for h, r, _ in rows], labels)
    h0 = rows[0][0]
    text = (f"Eradication of {species} (gone below {fmt_num(first.gone_below)} {first.unit}, not founded again from "
            f"outside): success{' ' + by_time(h0, tu) if one else ''} {success}; empty {first.survey}s in a row"
            f"{f' from {tu} {fmt_num(h0)}' if one else ''} to declare it gone at {fmt_prob(first.confidence)} "
            f"confidence: {surveys} (detection {fmt_num(first.detection_mean)} per survey, mean over members)")
    back = [(last, lab) for (_, _, last), lab in zip(rows, labels)
            if last is not None and not math.isnan(float(last.chance_reinvaded))]
    if back:
        text += (f"; once gone, reinvasion {by_time(back[0][0].horizon, tu)}: "
                 + _each([fmt_prob(b.chance_reinvaded) for b, _ in back], [lab for _, lab in back]))
    text += "."
    return text


def eradication_sentences(m: Manifest, table: pd.DataFrame | None) -> tuple[str, ...]:
    """One sentence per surveyed target some option acts on, in table order."""
    if table is None or table.empty:
        return ()
    said = (eradication_sentence(m, table, species) for species in dict.fromkeys(table.species))
    return tuple(x for x in said if x)
