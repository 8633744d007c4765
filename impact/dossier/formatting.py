"""How saved numbers are printed: one rounding for the report, the verdict and the terminal.

A number printed on page 1 must be found, rounded the same way, in the tables behind it, so
every printed number goes through these functions.
"""

from __future__ import annotations

import math

PROBABILITY_METRICS = {"quasi_extinction", "extinct", "outbreak", "not_recovered"}


def fmt_num(v) -> str:
    """A saved number as printed: 3 significant digits, no exponent above 100, ∞ for infinity."""
    try:
        v = float(v)
    except (TypeError, ValueError):
        return str(v)
    if math.isnan(v):
        return "n/a"
    if math.isinf(v):
        return "∞" if v > 0 else "−∞"
    if abs(v) >= 100:
        return f"{v:.0f}"
    return f"{v:.3g}"


def fmt_amount(v) -> str:
    """An amount of money or value as printed: 3 significant digits, thousands separated
    (20,600 rather than 20600); small amounts as :func:`fmt_num`."""
    try:
        v = float(v)
    except (TypeError, ValueError):
        return str(v)
    if not math.isfinite(v) or abs(v) < 1000:
        return fmt_num(v)
    return f"{float(f'{v:.3g}'):,.0f}"


def fmt_index(v) -> str:
    """A share of variance (a sensitivity index) as printed: two decimals, never "-0.00"."""
    v = float(v)
    return "n/a" if not math.isfinite(v) else f"{round(v, 2) + 0.0:.2f}"  # + 0.0 turns -0.0 into 0.0


def fmt_prob(v) -> str:
    """A saved probability as printed: a percentage with one decimal."""
    v = float(v)
    return "n/a" if math.isnan(v) else f"{100 * v:.1f}\u00a0%"


def fmt_change(v) -> str:
    """A saved relative change as printed: a signed whole percentage."""
    v = float(v)
    return "n/a" if math.isnan(v) else ("+∞ %" if math.isinf(v) else f"{100 * v:+,.0f}\u00a0%")


def fmt_points(v) -> str:
    """A saved difference of two probabilities as printed: signed percentage points, one decimal."""
    v = float(v)
    return "n/a" if math.isnan(v) else f"{100 * v:+.1f}\u00a0points"


def fmt_bare_prob(v) -> str:
    """A probability as a bare percentage number (inside brackets after a full one)."""
    return fmt_prob(v).replace("\u00a0%", "")


def fmt_bare_points(v) -> str:
    """A probability difference as bare signed points (inside brackets after a full one)."""
    return fmt_points(v).replace("\u00a0points", "")


def fmt_cell(metric: str, value, low, high) -> str:
    """Value with its interval, in the style of the metric."""
    if metric in PROBABILITY_METRICS:
        lo, hi = (fmt_prob(x).replace("\u00a0%", "") for x in (low, high))
        return f"{fmt_prob(value)} [{lo}, {hi}]"
    if metric == "mean_change":
        return f"{fmt_change(value)} [{fmt_change(low)}, {fmt_change(high)}]"
    return f"{fmt_num(value)} [{fmt_num(low)}, {fmt_num(high)}]"


def plural(unit: str) -> str:
    """A time unit in the plural (``year`` → ``years``)."""
    unit = str(unit)
    return unit if unit.endswith("s") else unit + "s"


def by_time(h, unit: str) -> str:
    """A horizon as read on the page: ``by year 10``, ``by week 15.5``."""
    return f"by {unit}\u00a0{fmt_num(h)}"


def over_period(h, unit: str) -> str:
    """The period from today to a horizon: ``over years 0–40``."""
    return f"over {plural(unit)} 0–{fmt_num(h)}"
