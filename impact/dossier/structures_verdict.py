"""Page 1 across structures: for each objective and each material side effect of each option, whether
it holds under every web with material weight or which structural doubt it hinges on.

Read from saved tables only (``structures/*.csv`` beside the whole-ensemble tables). A web counts when
its weight (its share of the members) is at least :data:`MATERIAL_WEIGHT`. A statement holds across
structures when every such web gives the same status (an objective's MET / NOT MET / UNDECIDED; a side
effect listed, and in the same direction); otherwise the sentence names the choice of one doubt that
marks exactly the webs that differ ("holds unless rats do not eat skinks (weight 30 %)"), or, when no
single choice does, the webs themselves with their weights.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from impact.dossier.bottomline import STATUS_WORDS
from impact.dossier.formatting import fmt_bare_prob, fmt_prob
from impact.store.manifest import Manifest
from impact.dossier.verdict import option_reading

HOLDS = "holds under every web with material weight"
MATERIAL_WEIGHT = 0.05  # a web with less than 5 % of the members does not decide a sentence (common practice, no source)


@dataclass(frozen=True)
class StructureReading:
    """What page 1 says about the structural doubts: their weights, and per option the sentences."""

    weights: tuple[str, ...]
    options: tuple[tuple[str, tuple[str, ...]], ...]
    note: str
    summary: str = ""  # one sentence: how many statements hold in every web that counts
    hinges: tuple[tuple[str, tuple[str, ...]], ...] = ()  # per option, only the statements a web decides


def _webs(tables: dict) -> tuple[pd.DataFrame, pd.DataFrame]:
    return tables["weights"], tables["choices"]


def _choice_map(weights: pd.DataFrame, choices: pd.DataFrame) -> dict[str, dict[str, str]]:
    """For each web, the choice it makes for every doubt (web names join the choices' labels, in doubt order)."""
    doubts = list(dict.fromkeys(choices.doubt))
    labels = {d: list(choices[choices.doubt == d].choice) for d in doubts}
    out = {}
    for name, joined in zip(weights.structure, weights.choices):
        parts = joined.split("; ")
        picked = {}
        for d in doubts:
            hit = [lab for lab in labels[d] if lab in parts]
            picked[d] = hit[0] if hit else ""
        out[name] = picked
    return out


def _explain(differ: set[str], material: list[str], cmap: dict, choices: pd.DataFrame) -> tuple[str, str] | None:
    """A doubt's choice marking exactly the differing webs among the material ones: (label, weight text)."""
    for _, c in choices.iterrows():
        marked = {w for w in material if cmap[w].get(c.doubt) == c.choice}
        if marked == differ:
            return c.choice, f"weight {fmt_prob(c.weight)} [{fmt_bare_prob(c.low)}, {fmt_bare_prob(c.high)}]"
    return None


def _sentence(head: str, overall: str, per: dict[str, str], material: list[str], weights: pd.DataFrame,
              cmap: dict, choices: pd.DataFrame) -> str:
    def weight(w):
        return fmt_prob(float(weights[weights.structure == w].weight.iloc[0]))

    differ = {w for w in material if per.get(w) != overall and per.get(w) != "UNDECIDED"}
    open_ = {w for w in material if per.get(w) == "UNDECIDED" and overall != "UNDECIDED"}
    if not differ and not open_:
        return f"{head} {overall}: {HOLDS} ({len(material)} of {len(weights)})."
    if not differ:
        why = _explain(open_, material, cmap, choices)
        where = (f"the webs where {why[0]} ({why[1]})" if why is not None
                 else "; ".join(f"“{w}” ({weight(w)})" for w in sorted(open_)))
        return (f"{head} {overall}: no web with material weight contradicts it, but within {where} alone it is "
                "UNDECIDED (the interval there straddles the requirement).")
    why = _explain(differ, material, cmap, choices)
    other = "; ".join(sorted({per.get(w, 'no members') for w in differ}))
    if why is not None:
        return f"{head} {overall}: holds unless {why[0]} ({why[1]}); then {other}."
    listed = "; ".join(f"“{w}” ({weight(w)}): {per.get(w, 'no members')}" for w in sorted(differ | open_))
    return f"{head} {overall} overall, but it depends on the web: {listed}."


def _side_effects(m: Manifest, risk, effects, objectives, option: str) -> dict[str, str]:
    """Species listed as material side effects, with the direction of their median change."""
    out = {}
    r = option_reading(m, risk, effects, objectives, option)
    for item in r.side_effects:
        species = item.head.split(" (")[0]
        e = effects[(effects.option == option) & (effects.species == species) & (effects.metric == "mean_abundance")
                    & (effects.statistic == "median_change")]
        v = float(e.value.iloc[-1]) if not e.empty else np.nan
        out[species] = "a material change, a rise" if v > 0 else "a material change, a fall" if v < 0 else "a material change"
    return out


def _part(tables: dict, name: str, web: str) -> pd.DataFrame:
    frame = tables[name]
    return frame[frame.structure == web].drop(columns="structure").reset_index(drop=True)


def structure_reading(m: Manifest, risk: pd.DataFrame, effects: pd.DataFrame, objectives: pd.DataFrame,
                      tables: dict | None) -> StructureReading | None:
    """The reading across structures, or None for a case without structural doubts."""
    if not tables or "weights" not in tables:
        return None
    weights, choices = _webs(tables)
    cmap = _choice_map(weights, choices)
    material = [w for w, v in zip(weights.structure, weights.weight) if v >= MATERIAL_WEIGHT]
    lines = tuple(f"{c.doubt}: {c.choice}: prior weight {fmt_prob(c.prior_weight)}, among the plausible members "
                  f"{fmt_prob(c.weight)} [{fmt_bare_prob(c.low)}, {fmt_bare_prob(c.high)}] ({c.evidence})."
                  for _, c in choices.iterrows())
    per_web = {w: (_part(tables, "risk", w), _part(tables, "effects", w), _part(tables, "objectives", w))
               for w in material}
    options = []
    for opt in (o.name for o in m.options):
        out = []
        mine = objectives[objectives.option == opt]
        for _, row in mine.iterrows():
            per = {}
            for w, (_, _, ob) in per_web.items():
                hit = ob[(ob.option == opt) & (ob.objective == row.objective)]
                per[w] = STATUS_WORDS.get(hit.status.iloc[0], hit.status.iloc[0]) if not hit.empty else "no members"
            out.append(_sentence(f"objective “{row.objective}”", STATUS_WORDS[row.status], per, material,
                                 weights, cmap, choices))
        pooled = _side_effects(m, risk, effects, objectives, opt)
        webs = {w: _side_effects(m, rk, ef, ob, opt) for w, (rk, ef, ob) in per_web.items()}
        for species, what in pooled.items():
            per = {w: webs[w].get(species, "no material change") for w in material}
            out.append(_sentence(f"side effect on {species}:", what, per, material, weights, cmap, choices))
        options.append((opt, tuple(out)))
    note = (f"The case declares {len(choices.doubt.unique())} structural doubt(s), making {len(weights)} webs; "
            f"{len(material)} carry at least {fmt_prob(MATERIAL_WEIGHT)} of the members. A web's weight is its share "
            "of the plausible members (its prior weight, weighed by the plausibility rules, limits and monitoring data); "
            "the verdicts on this page are over all webs, with these weights.")
    hinges = tuple((opt, tuple(x for x in sentences if HOLDS not in x)) for opt, sentences in options)
    hinges = tuple((opt, sentences) for opt, sentences in hinges if sentences)
    total = sum(len(sentences) for _, sentences in options)
    held = total - sum(len(sentences) for _, sentences in hinges)
    summary = (f"{'All' if held == total else held} {'' if held == total else f'of the {total} '}objective verdicts "
               f"and material side effects on this page hold under every web with material weight "
               f"({len(material)} of {len(weights)} webs"
               + (f"; the other {len(weights) - len(material)} hold less than {fmt_prob(MATERIAL_WEIGHT)} of the "
                  "plausible members, so the data and the plausibility rules all but rule them out" if
                  len(material) < len(weights) else "") + ")"
               + ("." if held == total else "; the others depend on the web, as follows."))
    return StructureReading(lines, tuple(options), note, summary, hinges)


def structure_text(r: StructureReading | None) -> str:
    """The reading across structures as plain text (terminal summary), empty without doubts."""
    if r is None:
        return ""
    lines = ["across the structural doubts:", f"  {r.note}"]
    lines += [f"  {x}" for x in r.weights]
    for opt, sentences in r.options:
        lines.append(f"  option “{opt}”:")
        lines += [f"    {s}" for s in sentences]
    return "\n".join(lines)


__all__ = ["MATERIAL_WEIGHT", "StructureReading", "structure_reading", "structure_text"]
