"""The verdict a review board reads first, written from the saved tables alone.

For each option: whether each declared objective is met (with its probability, interval and
calibrated likelihood term), what happens to the targets (as an outcome, not a harm), then every
other species whose change is material, largest first, marked direct or indirect, and the
species for which a material change is unlikely. Every number printed here is a value of
``risk.csv``, ``effects.csv`` or ``objectives.csv`` passed through :mod:`impact.formatting`,
so page 1 cannot say something the tables do not.

Listing rule (documented in README): a non-target species is a *material side effect* of an
option when, at some risk horizon, a material change of its mean abundance is at least "about as
likely as not" (probability above 33 %, the lower edge of that term of the likelihood scale), or
its quasi-extinction or outbreak chance changes by at least the case's ``material_risk``. The
horizon shown is the one where the effect is largest. A run with fewer plausible members than
``min_members`` gets no verdict at all.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .formatting import fmt_bare_points, fmt_bare_prob, fmt_change, fmt_num, fmt_points, fmt_prob
from .likelihood import LOWER_TERMS, likelihood_term
from .manifest import Manifest

# a material change is listed once it is more than "unlikely" on the likelihood scale; for a species
# the case protects, once it is more than "very unlikely" (a board wants a one-in-five chance of
# harming a protected species named, not filed under "unlikely"; common practice, no source)
LISTING_PROBABILITY = LOWER_TERMS[-1][0]
PROTECTED_LISTING_PROBABILITY = LOWER_TERMS[-2][0]
EVENT_NAMES = {"quasi_extinction": "quasi-extinction", "outbreak": "outbreak"}
REQUIREMENT_TEXT = {
    "chance_at_least": "needs a chance of at least {b}",
    "chance_at_most": "needs a chance of at most {b}",
    "increase_at_most": "its chance may rise by at most {p} against doing nothing",
    "decrease_at_least": "its chance must fall by at least {p} against doing nothing",
}
STATUS_TEXT = {"met": "MET", "not met": "NOT MET",
               "undecided": "UNDECIDED (the interval straddles the requirement; more members would narrow it)"}


@dataclass(frozen=True)
class Item:
    """One statement: a short head (species or objective, with its tag) and the sentence that follows."""

    head: str
    body: str

    def text(self) -> str:
        return f"{self.head}: {self.body}"


@dataclass(frozen=True)
class OptionReading:
    """What one option does, in sentences built from the tables."""

    option: str
    objectives: tuple[Item, ...]
    targets: tuple[Item, ...]
    side_effects: tuple[Item, ...]
    unchanged: str


@dataclass(frozen=True)
class Reading:
    """The page-1 verdict: per-option readings, or the reason there is none."""

    thin: bool
    thin_reason: str
    options: tuple[OptionReading, ...]
    best: tuple[str, ...]


def with_term(p: float, low: float, high: float) -> str:
    """``"85.3 % [83.0, 87.4], likely"``: the number, its interval, then the calibrated term."""
    return f"{fmt_prob(p)} [{fmt_bare_prob(low)}, {fmt_bare_prob(high)}], {likelihood_term(float(p))}"


def _pick(df: pd.DataFrame, **eq) -> pd.DataFrame:
    mask = np.ones(len(df), bool)
    for k, v in eq.items():
        col = df[k].to_numpy()
        mask &= np.isclose(col.astype(float), float(v)) if k == "horizon" else (col == v)
    return df[mask]


def _one(df: pd.DataFrame, **eq):
    r = _pick(df, **eq)
    return None if r.empty else r.iloc[0]


def thin_run(manifest: Manifest) -> tuple[bool, str]:
    """Whether the run holds too few plausible members for a verdict, and why (empty when not)."""
    kept = manifest.counts.kept
    need = manifest.judgement.min_members
    if kept >= need:
        return False, ""
    # widest exact 95 % half-width is at p = 1/2; about 1/sqrt(n) (normal approximation)
    half = 1.0 / math.sqrt(max(kept, 1))
    wanted = manifest.counts.wanted
    remedy = (f"ask for at least {need} members (--members, or case.members)" if wanted < need else
              "widen the priors or the observed ranges, or raise case.max_draws, so that more draws are plausible")
    return True, (f"NO VERDICT: only {kept} plausible members were kept, fewer than the {need} this case requires "
                  f"before a verdict is given (risk.min_members). With {kept} members a probability near 50 % is known "
                  f"only to within about ±{100 * min(half, 0.5):.0f} percentage points, wider than the bands of the "
                  "likelihood scale. The tables that follow still hold every number; read them as indicative only, "
                  f"and {remedy} before judging the options.")


def objective_line(row) -> Item:
    """One objective judged under one option (a row of objectives.csv)."""
    b = float(row.bound)
    need = REQUIREMENT_TEXT[row.requirement].format(b=fmt_prob(b), p=fmt_points(b).lstrip("+"))
    if row.statistic == "chance":
        got = f"chance {with_term(row.value, row.low, row.high)}"
    else:
        got = (f"chance {'rises' if row.statistic == 'increase' else 'falls'} by {fmt_points(row.value)} "
               f"[{fmt_bare_points(row.low)}, {fmt_bare_points(row.high)}]")
    return Item(f"“{row.objective}” {STATUS_TEXT[row.status]}", f"{row.event}; {need}. Under this option: {got}.")


def _risk_pair(risk: pd.DataFrame, option: str, species: str, metric: str, h: float) -> str:
    o = _one(risk, option=option, species=species, metric=metric, horizon=h)
    b = _one(risk, option="baseline", species=species, metric=metric, horizon=h)
    if o is None or b is None:
        return ""
    return f"{fmt_prob(b.value)} → {fmt_prob(o.value)}"


def target_line(m: Manifest, risk: pd.DataFrame, effects: pd.DataFrame, option: str, species: str) -> Item:
    """The outcome for a target species: its quasi-extinction chance and its change in abundance."""
    H = max(m.horizons)
    unit = m.time_unit
    parts = []
    q = _one(risk, option=option, species=species, metric="quasi_extinction", horizon=H)
    b = _one(risk, option="baseline", species=species, metric="quasi_extinction", horizon=H)
    if q is not None:
        parts.append(f"chance of falling below its quasi-extinction level by {fmt_num(H)} {unit}: "
                     f"{with_term(q.value, q.low, q.high)}"
                     + (f" (without the option {fmt_prob(b.value)})" if b is not None else ""))
    c = _one(effects, option=option, species=species, metric="mean_abundance", horizon=H, statistic="median_change")
    if c is not None:
        parts.append(f"mean abundance over 0–{fmt_num(H)} {unit} {fmt_change(c.value)} against doing nothing "
                     f"(median; 5–95 % of members {fmt_change(c.low)} to {fmt_change(c.high)})")
    return Item(f"{species} (target)", "; ".join(parts) + "." if parts else "no outcome saved.")


def introduced_item(m: Manifest, risk: pd.DataFrame, option: str, species: str) -> Item:
    """A species absent today that the option brings in: where it stands by the last horizon."""
    H = max(m.horizons)
    r = _one(risk, option=option, species=species, metric="mean_abundance", horizon=H)
    body = "absent without the option, so no paired change exists"
    if r is not None:
        unit = next(s.unit for s in m.species if s.name == species)
        body += (f"; mean abundance over 0–{fmt_num(H)} {m.time_unit} under the option {fmt_num(r.value)} {unit} "
                 f"(median; 5–95 % of members {fmt_num(r.low)} to {fmt_num(r.high)})")
    return Item(f"{species} (introduced by this option)", body + ".")


@dataclass(frozen=True)
class _Effect:
    size: float
    item: Item


def _abundance_part(effects: pd.DataFrame, option: str, species: str, m: Manifest) -> tuple[str, float, float]:
    """The abundance side of an effect at the horizon where a material change is likeliest."""
    e = _pick(effects, option=option, species=species, metric="mean_abundance")
    pm = e[(e.statistic == "p_material") & (e.n.astype(float) > 0)]
    if pm.empty:  # absent without the option: no paired relative change exists
        return "", 0.0, 0.0
    # the latest horizon among those with the highest chance of a material change
    best = pm[pm.value == pm.value.max()].iloc[-1]
    h = float(best.horizon)
    med = _one(e, horizon=h, statistic="median_change")
    size = abs(math.log1p(max(float(med.value), -0.999999))) if med is not None and np.isfinite(med.value) else 0.0
    down = _one(e, horizon=h, statistic="p_material_decrease")
    up = _one(e, horizon=h, statistic="p_material_increase")
    text = (f"mean abundance over 0–{fmt_num(h)} {m.time_unit} {fmt_change(med.value)} (median paired change; "
            f"5–95 % of members {fmt_change(med.low)} to {fmt_change(med.high)}); chance of a material change "
            f"(±{fmt_change(best.threshold).lstrip('+')}): {with_term(best.value, best.low, best.high)}"
            f" (a fall {fmt_prob(down.value)}, a rise {fmt_prob(up.value)})")
    return text, float(best.value), size


def _event_parts(effects: pd.DataFrame, risk: pd.DataFrame, option: str, species: str, m: Manifest) -> list[str]:
    """Quasi-extinction and outbreak chances that move by at least the material risk."""
    out = []
    for metric, name in EVENT_NAMES.items():
        d = _pick(effects, option=option, species=species, metric=metric, statistic="difference")
        d = d[np.isfinite(d.value.astype(float))]
        if d.empty:
            continue
        r = d.loc[d.value.abs().idxmax()]
        if abs(float(r.value)) + 1e-12 < float(r.threshold):
            continue
        out.append(f"{name} by {fmt_num(r.horizon)} {m.time_unit} "
                   f"{_risk_pair(risk, option, species, metric, float(r.horizon))} "
                   f"({fmt_points(r.value)} [{fmt_bare_points(r.low)}, {fmt_bare_points(r.high)}])")
    return out


def option_reading(m: Manifest, risk: pd.DataFrame, effects: pd.DataFrame, objectives: pd.DataFrame,
                   option: str) -> OptionReading:
    """Objectives, targets, material side effects (largest first) and the quiet species of one option."""
    objs = tuple(objective_line(r) for _, r in objectives[objectives.option == option].iterrows())
    targets, sides, quiet = [], [], []
    touched = set(next(o for o in m.options if o.name == option).touches)
    for s in m.species:
        sp = s.name
        if s.role == "target":
            targets.append(target_line(m, risk, effects, option, sp))
            continue
        if not s.present:
            if sp in touched:
                sides.append(_Effect(math.inf, introduced_item(m, risk, option, sp)))
            continue
        abundance, p_mat, size = _abundance_part(effects, option, sp, m)
        events = _event_parts(effects, risk, option, sp, m)
        tag = ("protected, " if s.role == "protected" else "") + (
            "direct: the option acts on it" if sp in touched else "indirect: through the food web")
        listing = PROTECTED_LISTING_PROBABILITY if s.role == "protected" else LISTING_PROBABILITY
        if p_mat > listing or events:
            body = "; ".join(x for x in [abundance, *events] if x) + "."
            sides.append(_Effect(size, Item(f"{sp} ({tag})", body)))
        else:
            pm = _one(effects, option=option, species=sp, metric="mean_abundance", horizon=max(m.horizons),
                      statistic="p_material")
            flags = [f for f in ("protected" if s.role == "protected" else "", "direct" if sp in touched else "") if f]
            quiet.append(f"{sp}{' (' + ', '.join(flags) + ')' if flags else ''}"
                         + (f" {with_term(pm.value, pm.low, pm.high)}" if pm is not None and pm.n > 0 else ""))
    sides.sort(key=lambda e: -e.size)
    unchanged = ("Material change unlikely for: " + "; ".join(quiet) + " (chance of a material change of mean "
                 "abundance over the whole period; their quasi-extinction and outbreak chances move by less than the "
                 "material level)."
                 if quiet else "")
    return OptionReading(option, objs, tuple(targets), tuple(e.item for e in sides), unchanged)


def best_lines(comparisons: pd.DataFrame) -> tuple[str, ...]:
    """Per objective, the run that is best in the most members (doing nothing included)."""
    out = []
    best = comparisons[comparisons.statistic == "share_best"]
    for obj, g in best.groupby("objective", sort=False):
        g = g.sort_values("value", ascending=False)
        parts = [f"{r.option} {fmt_prob(r.value)} [{fmt_bare_prob(r.low)}, {fmt_bare_prob(r.high)}]"
                 for _, r in g.iterrows()]
        out.append(f"“{obj}”: share of members in which each choice does best (ties count for each): "
                   + "; ".join(parts) + ".")
    return tuple(out)


def reading(manifest: Manifest, risk: pd.DataFrame, effects: pd.DataFrame, objectives: pd.DataFrame,
            comparisons: pd.DataFrame) -> Reading:
    """The whole page-1 verdict from the saved manifest and tables."""
    thin, why = thin_run(manifest)
    if thin:
        return Reading(True, why, (), ())
    opts = tuple(option_reading(manifest, risk, effects, objectives, o.name) for o in manifest.options)
    return Reading(False, "", opts, best_lines(comparisons))


def reading_text(r: Reading) -> str:
    """The verdict as plain text for the terminal (the same sentences as page 1)."""
    if r.thin:
        return r.thin_reason
    lines = []
    for o in r.options:
        lines.append(f"option “{o.option}”:")
        lines += [f"  objective {x.text()}" for x in o.objectives]
        lines += [f"  {x.text()}" for x in o.targets]
        lines += [f"  side effect: {x.text()}" for x in o.side_effects] or ["  no material side effects found."]
        if o.unchanged:
            lines.append(f"  {o.unchanged}")
    if r.best:
        lines.append("options compared, member by member:")
        lines += [f"  {x}" for x in r.best]
    return "\n".join(lines)
