"""Words scaled to size: "depends mostly on" only where one parameter explains most of an outcome."""

from __future__ import annotations

from types import SimpleNamespace

import pandas as pd

from impact.report.sections import DOMINANT_SHARE, hinges_text


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
