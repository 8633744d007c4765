"""The bottom line a review board reads first: every option against every objective, then one or two sentences.

The decision table has a row for doing nothing and one per option, a column per objective; each
cell is a row of ``objectives.csv`` (its status, its estimate and interval, printed through
:mod:`impact.dossier.formatting`, so the cell is found in the table rounded the same way). Doing nothing
has no cell under an objective on a change against doing nothing.

The sentences say which options meet every objective (only one is named as such, two or more
are all named, none is said in so many words, with what each option misses), and the main
trade-off: per objective, the choice with the highest chance of a good outcome by the one rule
of :func:`impact.risk.effects.best_choices`, read from the ``p_good`` rows of ``comparisons.csv``.
"""

from __future__ import annotations

from dataclasses import dataclass

import pandas as pd

from impact.risk.effects import BASELINE, MET, NOT_MET, UNDECIDED, best_choices
from impact.dossier.formatting import fmt_bare_points, fmt_bare_prob, fmt_points, fmt_prob
from impact.store.manifest import Manifest

BASELINE_LABEL = "doing nothing"
STATUS_WORDS = {MET: "MET", NOT_MET: "NOT MET", UNDECIDED: "UNDECIDED"}


@dataclass(frozen=True)
class Cell:
    """One option under one objective: its status word and its estimate with interval (empty: not judged)."""

    status: str
    estimate: str

    @property
    def text(self) -> str:
        return f"{STATUS_WORDS[self.status]} {self.estimate}" if self.status else "—"


@dataclass(frozen=True)
class Column:
    """One objective: its name and what it requires, in words."""

    objective: str
    requirement: str


@dataclass(frozen=True)
class BottomLine:
    """The decision table (rows: run label and its cells, one per column) and the sentences under it."""

    columns: tuple[Column, ...]
    rows: tuple[tuple[str, tuple[Cell, ...]], ...]
    meets_all: tuple[str, ...]
    sentences: tuple[str, ...]


def run_label(name: str) -> str:
    """A run as the reader names it: doing nothing for the baseline, the option's name in quotes otherwise."""
    return BASELINE_LABEL if name == BASELINE else f"“{name}”"


def names_text(labels) -> str:
    """``a``, ``a and b``, ``a, b and c``."""
    labels = list(labels)
    return labels[0] if len(labels) == 1 else ", ".join(labels[:-1]) + " and " + labels[-1]


def estimate_text(row) -> str:
    """A row of objectives.csv as printed: chance or paired change, with its interval."""
    if row.statistic == "chance":
        return f"{fmt_prob(row.value)} [{fmt_bare_prob(row.low)}, {fmt_bare_prob(row.high)}]"
    return f"{fmt_points(row.value)} [{fmt_bare_points(row.low)}, {fmt_bare_points(row.high)}]"


def requirement_text(row) -> str:
    """What an objective asks, short: its event, then ``chance ≥ 80.0 %``."""
    b = float(row.bound)
    need = {"chance_at_least": f"chance ≥ {fmt_prob(b)}", "chance_at_most": f"chance ≤ {fmt_prob(b)}",
            "increase_at_most": f"rise ≤ {fmt_points(b).lstrip('+')} against doing nothing",
            "decrease_at_least": f"fall ≥ {fmt_points(b).lstrip('+')} against doing nothing"}[row.requirement]
    return f"{row.event}; {need}"


def decision_rows(m: Manifest, objectives: pd.DataFrame):
    """Columns and rows of the decision table from objectives.csv."""
    names = list(dict.fromkeys(objectives.objective))
    first = {n: objectives[objectives.objective == n].iloc[0] for n in names}
    columns = tuple(Column(n, requirement_text(first[n])) for n in names)
    rows = []
    for run in [BASELINE, *(o.name for o in m.options)]:
        cells = []
        for n in names:
            r = objectives[(objectives.objective == n) & (objectives.option == run)]
            cells.append(Cell("", "") if r.empty else Cell(str(r.iloc[0].status), estimate_text(r.iloc[0])))
        rows.append((run, tuple(cells)))
    return columns, tuple(rows)


def _meeting_sentence(options: list[str], rows) -> tuple[tuple[str, ...], str]:
    status = {run: [c.status for c in cells] for run, cells in rows if run != BASELINE}
    meets = tuple(o for o in options if all(s == MET for s in status[o]))
    if meets:
        if len(meets) == len(options):
            head = ("Every option meets every objective" if len(options) > 1
                    else f"{run_label(meets[0])} meets every objective")
        elif len(meets) == 1:
            head = f"Only {run_label(meets[0])} meets every objective"
        else:
            head = f"{names_text(run_label(o) for o in meets)} meet every objective"
        return meets, head + "."
    return meets, "No option meets every objective."


def _misses(columns, rows, options: list[str]) -> str:
    """What each option falls short on: objectives not met, and those the interval cannot decide."""
    parts = []
    cells = dict(rows)
    for o in options:
        miss = [f"“{c.objective}”" for c, x in zip(columns, cells[o]) if x.status == NOT_MET]
        open_ = [f"“{c.objective}”" for c, x in zip(columns, cells[o]) if x.status == UNDECIDED]
        bits = ([f"misses {names_text(miss)}"] if miss else []) + (
            [f"cannot yet be judged on {names_text(open_)} (interval straddles the requirement)"] if open_ else [])
        if bits:
            parts.append(f"{run_label(o)} " + " and ".join(bits))
    return "; ".join(parts)


def best_by_objective(comparisons: pd.DataFrame) -> dict[str, tuple[tuple[str, ...], float]]:
    """Per objective, the best runs by :func:`impact.risk.effects.best_choices` on the ``p_good`` rows, and their chance."""
    out = {}
    good = comparisons[comparisons.statistic == "p_good"]
    for obj, g in good.groupby("objective", sort=False):
        names, chances = list(g.option), g.value.to_numpy(float)
        best = best_choices(names, chances)
        out[obj] = (best, float(chances[names.index(best[0])]) if best else float("nan"))
    return out


def trade_off(comparisons: pd.DataFrame) -> str:
    """The main trade-off: which choice is likeliest to go well for each objective (one sentence)."""
    best = best_by_objective(comparisons)
    if not best:
        return ""
    winners = [set(b) for b, _ in best.values()]
    common = set.intersection(*winners)
    if common:
        names = [n for n in best[next(iter(best))][0] if n in common]
        return (f"{names_text(run_label(n) for n in names)} {'has' if len(names) == 1 else 'have'} the highest "
                "chance of a good outcome on every objective (comparisons.csv), so there is no trade-off between "
                "objectives.")
    parts = [f"“{obj}”: {names_text(run_label(n) for n in b)}{', tied' if len(b) > 1 else ''} ({fmt_prob(p)})"
             for obj, (b, p) in best.items()]
    return ("Trade-off: no choice is best on every objective. Highest chance of a good outcome "
            "(comparisons.csv): " + "; ".join(parts) + ".")


def bottom_line(m: Manifest, objectives: pd.DataFrame, comparisons: pd.DataFrame) -> BottomLine | None:
    """The decision table and its sentences; None when the case declares no objectives."""
    if objectives.empty:
        return None
    columns, rows = decision_rows(m, objectives)
    options = [o.name for o in m.options]
    meets, head = _meeting_sentence(options, rows)
    missing = _misses(columns, rows, [o for o in options if o not in meets])
    first = head[:-1] + (f": {missing}." if missing else ".")
    second = trade_off(comparisons)
    return BottomLine(columns, rows, meets, tuple(x for x in (first, second) if x))


def bottom_line_text(b: BottomLine | None) -> str:
    """The bottom line for the terminal: the decision table as lines, then the sentences."""
    if b is None:
        return "bottom line: the case declares no objectives, so no option is judged against one."
    lines = ["bottom line (the same as the top of page 1):"]
    for run, cells in b.rows:
        judged = [f"    “{c.objective}”: {x.text}" for c, x in zip(b.columns, cells) if x.status]
        if judged:  # doing nothing is not judged against a limit on its own change
            lines += [f"  {run_label(run)}:", *judged]
    lines += [f"  {s}" for s in b.sentences]
    return "\n".join(lines)
