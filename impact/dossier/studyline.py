"""Page 1's sentence on which study to fund (and the same sentence in ``summary.txt``).

A study is named only when its value is material, and always with its interval:

* where the case values its outcomes (``[outcome_values]``), the study with the highest expected net
  benefit of sampling among those worth their cost even at the lower limit of their EVSI
  (``worth_cost == "yes"`` in ``sensitivity/studies.csv``);
* otherwise, the study with the highest EVSI under any one objective among those whose EVSI's lower
  limit is above 0 and whose EVSI reaches the case's material change in a chance (``[risk]
  material_risk``): without a value scale the tool never calls a study worth its cost.

Without such a study there is no sentence: the "Which study to fund" section says why.
"""

from __future__ import annotations

import pandas as pd

from impact.dossier.formatting import fmt_amount, fmt_bare_points, fmt_points
from impact.store.results import VALUED_TOGETHER


def best_study_sentence(studies: pd.DataFrame | None, material_risk: float) -> str:
    """The sentence, or "" when no study's value is material (or none was declared)."""
    if studies is None or studies.empty:
        return ""
    valued = studies[(studies.objective == VALUED_TOGETHER) & (studies.worth_cost == "yes")]
    if len(valued):
        r = valued.sort_values("enbs", ascending=False, kind="stable").iloc[0]
        return (f"Study worth funding: “{r.study}”, its information worth {fmt_amount(r.evsi)} [{fmt_amount(r.low)}, "
                f"{fmt_amount(r.high)}] {r.unit} to the choice against a cost of {fmt_amount(r.cost)} (a model's estimate; "
                f"sensitivity/studies.csv).")
    if (studies.objective == VALUED_TOGETHER).any():
        return ""  # values declared and no study is shown worth its cost: page 1 names none
    per = studies[(studies.low > 0) & (studies.evsi >= material_risk)]
    if per.empty:
        return ""
    r = per.sort_values("evsi", ascending=False, kind="stable").iloc[0]
    return (f"Study with the most material value: “{r.study}” would raise the chance of a good outcome for "
            f"“{r.objective}” by {fmt_points(r.evsi)} [{fmt_bare_points(r.low)}, {fmt_bare_points(r.high)}] in "
            f"expectation (sensitivity/studies.csv); the case puts no value on its outcomes, so whether that is worth "
            f"its cost of {fmt_amount(r.cost)} {r.cost_unit} is the board's call.")
