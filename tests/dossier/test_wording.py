"""Words and lines scaled to what they carry: "depends mostly on" only where one parameter explains most of an
outcome; intervals and units kept on one line; objective levels and the assessment horizon drawn on the figures."""

from __future__ import annotations

from types import SimpleNamespace

import pandas as pd

from impact.dossier.sections import DOMINANT_SHARE, hinges_text


def _drivers(rows):
    out = []
    for output, param, v, lo, hi in rows:
        out.append(dict(option="A", output=output, species="x", parameter=param, value=v, low=lo, high=hi,
                        interval="bootstrap_percentile", level=0.95, n=200, conditional_on="plausible members"))
    return pd.DataFrame(out)


def test_mostly_needs_half_the_variance_at_the_lower_end_of_the_interval():
    # "mostly" read literally (more than half; common practice, no source)
    assert DOMINANT_SHARE == 0.5
    d = _drivers([("objective “big”: good outcome", "p", 0.81, 0.70, 0.88),
                  ("objective “big”: good outcome", "q", 0.05, 0.01, 0.10),
                  ("objective “small”: good outcome", "q", 0.23, 0.10, 0.40),
                  ("objective “small”: good outcome", "p", 0.02, 0.01, 0.08),
                  ("objective “edge”: good outcome", "p", 0.55, 0.45, 0.65)])
    text = hinges_text(SimpleNamespace(sensitivity={"drivers": d}))
    lines = {k: next(x for x in text.splitlines() if f"“{k}”" in x) for k in ("big", "small", "edge")}
    assert "depends mostly on p 0.81 [0.70, 0.88]" in lines["big"]
    assert "mostly" not in lines["small"] and "no single parameter dominates" in lines["small"]
    assert "q 0.23 [0.10, 0.40]" in lines["small"]
    # a point estimate above one half whose interval reaches below it is not "mostly"
    assert "mostly" not in lines["edge"] and "no single parameter dominates" in lines["edge"]


def test_intervals_units_and_hyphenated_words_are_kept_on_one_line_by_markup_alone():
    from impact.dossier.render import keep_together

    html = "<head><style>a-b {}</style></head><body><td>12 plants/ha, press-harvest [98.7 %, 100.0]</td></body>"
    out = keep_together(html)
    for token in ("plants/ha", "press-harvest", "[98.7 %, 100.0]"):
        assert f'<span class="nb">{token}</span>' in out
    assert "<style>a-b {}</style>" in out  # the head is left alone
    # the text itself is unchanged (copying and searching the PDF still find it)
    assert out.replace('<span class="nb">', "").replace("</span>", "") == html


def _manifest_with_objectives():
    from impact.store.manifest import CaseRecord, Counts, Judgement, Manifest, ObjectiveRecord, SpeciesRecord

    return Manifest(case=CaseRecord("case.toml", "0" * 64, "levels"), counts=Counts(1, 1, 1), time_unit="year",
                    horizons=(10.0,), species=(SpeciesRecord("rat", "other", quasi_extinction=0.5, outbreak=60.0),
                                               SpeciesRecord("vole", "target", quasi_extinction=1.0)),
                    options=(), judgement=Judgement(0.2, 0.05, 100),
                    objectives=(ObjectiveRecord("no plague", "rat", "outbreak", 10.0, "chance_at_most", 0.2),
                                ObjectiveRecord("few voles", "vole", "abundance", 10.0, "chance_at_least", 0.8,
                                                level=30.0)))


def test_each_objective_level_is_drawn_on_its_species():
    from impact.dossier.figures import objective_levels

    levels = objective_levels(_manifest_with_objectives())
    assert levels == {"rat": [(60.0, "“no plague”: outbreak 60")], "vole": [(30.0, "“few voles”: level 30")]}


def test_predictability_axis_stops_at_the_horizon_and_an_empty_panel_says_so():
    import numpy as np

    from impact.dossier.figures import distribution_drawing

    r = pd.DataFrame(dict(option=["baseline"] * 4 + ["A"] * 4, lyapunov=[-0.1, -0.2, 0.01, -0.3] * 2,
                          horizon_time=[np.inf, 14_000.0, 12.0, np.inf, np.inf, 5.0, np.inf, 30.0]))
    fig = distribution_drawing(r, "year", 20.0)
    ax = fig.axes[1]
    assert ax.get_xlim()[1] < 1.5 * 20.0  # not 14,000
    assert [t.get_text() for t in ax.get_xticklabels()][-2:] == ["20", "beyond"]
    from matplotlib.patches import Rectangle

    heights = sorted(p.get_height() for p in ax.patches if isinstance(p, Rectangle) and p.get_x() > 20.0)
    assert heights == [3.0, 3.0]  # members beyond the horizon (∞ included), one bar per run
    empty = distribution_drawing(r.assign(horizon_time=np.nan, lyapunov=np.nan), "year", 20.0)
    texts = [t.get_text() for a in empty.axes for t in a.texts]
    assert any("No member has a predictability horizon" in t for t in texts)
    assert any("No member has a finite Lyapunov exponent" in t for t in texts)


def test_amounts_of_money_print_with_three_significant_digits_and_thousands_separated():
    """Page 1's study sentence and the study and budget paragraphs print amounts like this (the
    project's own convention, common practice in reports, no source): the interval's ends are rounded
    like the estimate, never more precise."""
    from impact.dossier.formatting import fmt_amount

    assert [fmt_amount(v) for v in (20600, 11895, 27058, 6000, 750_000, 1_234_567)] == \
        ["20,600", "11,900", "27,100", "6,000", "750,000", "1,230,000"]
    assert [fmt_amount(v) for v in (999.4, 12.345, 0.0, -25_400)] == ["999", "12.3", "0", "-25,400"]
    assert fmt_amount(float("nan")) == "n/a" and fmt_amount(float("inf")) == "∞"
