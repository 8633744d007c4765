"""The bottom line of page 1: the decision table is objectives.csv, and its sentences name the right options."""

from __future__ import annotations

import re
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest

from impact.dossier.bottomline import bottom_line, bottom_line_text
from impact.risk.effects import best_choices


def _manifest(options):
    return SimpleNamespace(options=tuple(SimpleNamespace(name=o) for o in options), time_unit="year")


def _objectives(status: dict) -> pd.DataFrame:
    """objectives.csv rows for chance objectives; ``status``: {(objective, run): (status, value)}."""
    rows = []
    for (obj, run), (st, v) in status.items():
        rows.append(dict(objective=obj, option=run, species="x", measure="quasi_extinction", horizon=10.0,
                         event=f"x falls below its quasi-extinction level by year 10 ({obj})",
                         requirement="chance_at_least", bound=0.8, statistic="chance", value=v, low=v - 0.05,
                         high=min(v + 0.05, 1.0), interval="clopper_pearson", level=0.95, n=200, status=st))
    return pd.DataFrame(rows)


def _comparisons(good: dict) -> pd.DataFrame:
    rows = []
    for (obj, run), v in good.items():
        rows.append(dict(objective=obj, option=run, versus="none", statistic="p_good", value=v, low=v, high=v,
                         interval="clopper_pearson", level=0.95, n=200))
    return pd.DataFrame(rows)


def _case(statuses: dict):
    """A hand-built case: two objectives, runs baseline, A, B, C; statuses per option and objective."""
    st, good = {}, {}
    for obj in ("o1", "o2"):
        st[(obj, "baseline")], good[(obj, "baseline")] = ("not met", 0.1), 0.1
        for run, pair in statuses.items():
            s = pair[0 if obj == "o1" else 1]
            v = {"met": 0.95, "not met": 0.3, "undecided": 0.8}[s]
            st[(obj, run)], good[(obj, run)] = (s, v), v
    return _manifest(list(statuses)), _objectives(st), _comparisons(good)


def test_exactly_one_option_meeting_every_objective_is_named_alone():
    m, o, c = _case({"A": ("met", "met"), "B": ("met", "not met"), "C": ("undecided", "met")})
    b = bottom_line(m, o, c)
    assert b.meets_all == ("A",)
    assert b.sentences[0].startswith("Only “A” meets every objective")
    assert "“B” misses “o2”" in b.sentences[0] and "“C” cannot yet be judged on “o1”" in b.sentences[0]


def test_no_option_meeting_every_objective_is_said_in_so_many_words():
    m, o, c = _case({"A": ("not met", "met"), "B": ("met", "not met")})
    b = bottom_line(m, o, c)
    assert b.meets_all == ()
    assert b.sentences[0].startswith("No option meets every objective")
    assert "“A” misses “o1”" in b.sentences[0] and "“B” misses “o2”" in b.sentences[0]
    # neither is best on both objectives: the trade-off names who is best for which
    assert b.sentences[1].startswith("Trade-off") and "“o1”: “B”" in b.sentences[1]
    assert "“o2”: “A”" in b.sentences[1]


def test_two_options_tied_on_every_objective_are_both_named():
    m, o, c = _case({"A": ("met", "met"), "B": ("met", "met"), "C": ("not met", "not met")})
    b = bottom_line(m, o, c)
    assert b.meets_all == ("A", "B")
    assert b.sentences[0].startswith("“A” and “B” meet every objective")
    assert "“A” and “B” have the highest chance of a good outcome on every objective" in b.sentences[1]
    assert "bottom line" in bottom_line_text(b)


def test_best_choices_names_every_tie_and_nothing_else():
    assert best_choices(["baseline", "A", "B"], [0.2, 0.9, 0.9]) == ("A", "B")
    assert best_choices(["baseline", "A"], [0.5, 0.4]) == ("baseline",)
    assert best_choices(["A"], [np.nan]) == ()


@pytest.fixture(scope="module")
def demo_folder(tmp_path_factory):
    """The invented demo at 120 members with the value-of-information stage (no dynamics, no PDF)."""
    from pathlib import Path

    from impact.cli import main

    case = Path(__file__).resolve().parents[2] / "casework" / "island_mesopredator.toml"
    out = tmp_path_factory.mktemp("demo") / "out"
    assert main(["assess", str(case), "--out", str(out), "--quiet", "--workers", "1", "--members", "120",
                 "--no-dynamics", "--no-report"]) == 0
    return out


def test_every_decision_cell_is_a_row_of_objectives_csv_rounded_the_same_way(demo_folder):
    """Each cell's status and numbers equal objectives.csv's row, printed to one decimal (the rounding of
    every percentage in the report), read here from the CSV text itself."""
    from impact.dossier import load_results
    from impact.dossier.verdict import reading

    res = load_results(demo_folder)
    b = reading(res.manifest, res.risk, res.effects, res.objectives, res.comparisons).bottom
    raw = pd.read_csv(demo_folder / "objectives.csv")
    checked = 0
    for run, cells in b.rows:
        for col, cell in zip(b.columns, cells):
            row = raw[(raw.objective == col.objective) & (raw.option == run)]
            if row.empty:
                assert not cell.status  # no paired change for doing nothing
                continue
            r = row.iloc[0]
            assert cell.status == r.status
            got = [float(x.replace(",", "")) for x in re.findall(r"[+-]?\d[\d,]*\.\d", cell.estimate)]
            assert got == [round(100 * float(r[k]), 1) for k in ("value", "low", "high")], (cell.estimate, r)
            checked += 1
    assert checked >= 2 * len(b.columns)


def test_the_best_choice_is_the_same_on_page_one_in_comparisons_and_on_the_value_of_information_page(demo_folder):
    """One notion of best: page 1 (best_by_objective on the p_good rows), comparisons.csv (best rows) and the
    value-of-information page (information.csv's best_choice, which its sentence prints) name the same runs."""
    from impact.dossier.bottomline import best_by_objective
    from impact.dossier import load_results

    res = load_results(demo_folder)
    page1 = {obj: set(b) for obj, (b, _) in best_by_objective(res.comparisons).items()}
    c = res.comparisons[res.comparisons.statistic == "best"]
    table = {obj: set(g.option[g.value == 1.0]) for obj, g in c.groupby("objective")}
    info = res.sensitivity["information"]
    voi = {obj: set(str(g.best_choice.iloc[0]).split("; ")) for obj, g in info.groupby("objective")}
    assert page1 == table == voi, (page1, table, voi)
    assert len(page1) == 3
