"""Results by structure: the weight of every web a case's structural doubts make, and the risk,
effects, objectives and comparisons tables computed on each web's members alone.

Members draw their structure in proportion to the prior weights (and, with monitoring data, the
calibration moves them between structures as the data weigh them: :mod:`impact.ensemble.calibrate`), so the
share of members in a structure is its posterior weight and the headline tables, computed on all
members, are already the average over structures with those weights. The tables here add what each
structure alone says, for the page-1 reading of what holds across structures
(:mod:`impact.dossier.structures_verdict`).

Monte Carlo error of a weight: members drawn by rejection are independent, so a share has an exact
binomial (Clopper–Pearson) interval; an SMC population is not independent (resampled copies share
ancestors), so its interval counts the effective sample size of the last generation instead of the
members (an approximation; the tests hold it to coverage on a case where the weights are known).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from impact.risk import metrics as mx
from impact.risk.runs import PER_MEMBER, Summary, risk_table
from impact.case import Case
from impact.risk.effects import comparisons_table, effects_table, objectives_table
from impact.ensemble.sample import structure_index

WEIGHT_COLUMNS = ("structure", "choices", "prior_weight", "weight", "low", "high", "interval", "level", "members",
                  "n_effective", "evidence")
CHOICE_COLUMNS = ("doubt", "choice", "absent", "prior_weight", "weight", "low", "high", "interval", "level",
                  "members", "n_effective", "evidence")
STRUCTURE_TABLES = {"structures/risk.csv": risk_table, "structures/effects.csv": effects_table,
                    "structures/objectives.csv": objectives_table, "structures/comparisons.csv": comparisons_table}


def member_structures(case: Case, unit: np.ndarray) -> np.ndarray:
    """Each member's structure index from its unit-hypercube row: (M,) int."""
    return structure_index(case, unit)


def effective_members(members: int, generations: list | None) -> float:
    """Members counted as independent for a share's interval: all of them for independent draws; for an
    SMC population the smallest effective sample size of its generations (each generation's members
    descend from that many; the moves decorrelate them only in part), at most the members."""
    ess = [g.get("ess", np.nan) for g in (generations or [])[1:]]
    ess = [e for e in ess if np.isfinite(e)]
    return float(min(members, min(ess))) if ess else float(members)


def evidence_word(prior: float, low: float, high: float) -> str:
    """What the members say of a weight against its prior: only a whole interval away counts."""
    if low > prior:
        return "more likely than its prior"
    if high < prior:
        return "less likely than its prior"
    return "keeps its prior weight"


def _share_row(prior: float, count: int, M: int, n_eff: float, confidence: float) -> dict:
    share = count / M if M else np.nan
    k = np.round(share * n_eff)
    lo, hi = mx.clopper_pearson(k, np.round(n_eff), confidence)
    lo, hi = float(lo), float(hi)
    return dict(prior_weight=prior, weight=share, low=lo, high=hi, interval="clopper_pearson", level=confidence,
                members=count, n_effective=round(n_eff, 1), evidence=evidence_word(prior, lo, hi))


def weights_table(case: Case, index: np.ndarray, generations: list | None = None) -> pd.DataFrame:
    """``structures/weights.csv``: prior and posterior weight of every structure (share of members)."""
    st, M = case.structures, index.size
    n_eff = effective_members(M, generations)
    rows = [dict(structure=s.name, choices="; ".join(d.choices[c].label for d, c in zip(st.doubts, s.choices)),
                 **_share_row(s.weight, int((index == k).sum()), M, n_eff, case.risk.confidence))
            for k, s in enumerate(st.structures)]
    return pd.DataFrame(rows, columns=list(WEIGHT_COLUMNS))


def choices_table(case: Case, index: np.ndarray, generations: list | None = None) -> pd.DataFrame:
    """``structures/choices.csv``: prior and posterior weight of every choice of every doubt."""
    st, M = case.structures, index.size
    n_eff = effective_members(M, generations)
    rows = []
    for d, doubt in enumerate(st.doubts):
        for c, choice in enumerate(doubt.choices):
            ks = [k for k, s in enumerate(st.structures) if s.choices[d] == c]
            prior = float(sum(st.structures[k].weight for k in ks))
            count = int(np.isin(index, ks).sum())
            rows.append(dict(doubt=doubt.name, choice=choice.label, absent=choice.absent,
                             **_share_row(prior, count, M, n_eff, case.risk.confidence)))
    return pd.DataFrame(rows, columns=list(CHOICE_COLUMNS))


def subset(summaries: dict, mask: np.ndarray) -> dict:
    """The summaries of the members ``mask`` selects (every option alike)."""
    return {name: Summary(s.times, s.at, *(getattr(s, f)[mask] for f in PER_MEMBER), s.nfev)
            for name, s in summaries.items()}


def by_structure_tables(case: Case, summaries: dict, index: np.ndarray) -> dict[str, pd.DataFrame]:
    """The risk, effects, objectives and comparisons tables of each structure's members, with a leading
    ``structure`` column (structures without members have no rows)."""
    parts: dict[str, list[pd.DataFrame]] = {rel: [] for rel in STRUCTURE_TABLES}
    for k, s in enumerate(case.structures.structures):
        mask = index == k
        if not mask.any():
            continue
        mine = subset(summaries, mask)
        for rel, fn in STRUCTURE_TABLES.items():
            frame = fn(case, mine)
            frame.insert(0, "structure", s.name)
            parts[rel].append(frame)
    return {rel: pd.concat(frames, ignore_index=True) for rel, frames in parts.items() if frames}


def structure_tables(case: Case, summaries: dict, unit: np.ndarray, generations: list | None = None
                     ) -> dict[str, pd.DataFrame]:
    """Every ``structures/`` table of a case with structural doubts (none without)."""
    if case.structures is None:
        return {}
    index = member_structures(case, unit)
    return {"structures/weights.csv": weights_table(case, index, generations),
            "structures/choices.csv": choices_table(case, index, generations),
            **by_structure_tables(case, summaries, index)}
