"""The verdict a review board reads first, written from the saved tables alone.

Page 1 opens with the bottom line (:mod:`impact.dossier.bottomline`: every option against every objective,
then which options meet them all and the main trade-off). Then, for each option: protected
species first, then the targets (their loss is the aim, an outcome, not a harm), then every
other species whose change is material, largest first, marked direct or indirect, and the
species for which a material change is unlikely. Every number printed here is a value of
``risk.csv``, ``effects.csv``, ``objectives.csv`` or ``comparisons.csv`` passed through
:mod:`impact.dossier.formatting`, so page 1 cannot say something the tables do not.

Listing rule (documented in README): a non-target species is a *material side effect* of an
option when, at some risk horizon, a material change of its mean abundance is more likely than
"unlikely" (probability above 33 %, the upper edge of that term of the likelihood scale), or its
quasi-extinction or outbreak chance changes by at least the case's ``material_risk``.

Horizon rule (stated once in the page's reading box): a species is read at the horizon of the
objective that concerns it (the longest, if several), any other species at the case's last
horizon (:func:`species_risk_time`). A sentence quotes another horizon only when the change is
material there and not at the species' horizon, and then says so. A run with fewer plausible
members than ``min_members`` gets no verdict at all.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from impact.dossier.bottomline import BottomLine, best_by_objective, bottom_line, names_text, run_label
from impact.dossier.formatting import (by_time, fmt_bare_points, fmt_bare_prob, fmt_change, fmt_num, fmt_points,
    fmt_prob, over_period)
from impact.dossier.likelihood import LOWER_TERMS, likelihood_term
from impact.store.manifest import Manifest

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
    protected: tuple[Item, ...]
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
    bottom: BottomLine | None


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


def species_risk_time(m: Manifest, species: str) -> tuple[float, str]:
    """The horizon page 1 reads a species at (the one horizon rule), and its name in words.

    The rule: a species an objective concerns is read at that objective's horizon (the longest, if
    several objectives concern it); every other species at the case's last risk horizon. Where the
    objective's horizon is not a risk horizon, the first risk horizon after it (else the last).
    """
    hs = sorted(float(h) for h in m.horizons)
    own = [float(o.horizon) for o in m.objectives if o.species == species]
    if not own:
        return hs[-1], "the case's last horizon"
    h = max(own)
    return next((x for x in hs if x >= h - 1e-9), hs[-1]), "the horizon of its objective"


def horizon_rule_text(m: Manifest) -> str:
    """The horizon rule in one sentence, with the horizon each species an objective concerns is read at."""
    named = list(dict.fromkeys(o.species for o in m.objectives))
    own = ", ".join(f"{sp} {by_time(species_risk_time(m, sp)[0], m.time_unit)}" for sp in named)
    last = by_time(max(m.horizons), m.time_unit)
    if not named:
        return f"Horizon: every species is read at the case's last horizon ({last}) unless a sentence says why not."
    return (f"Horizons: a species an objective concerns is read at that objective's horizon ({own}), every other "
            f"species at the case's last horizon ({last}); a sentence that quotes another horizon says why.")


def target_line(m: Manifest, risk: pd.DataFrame, effects: pd.DataFrame, option: str, species: str) -> Item:
    """The outcome for a target species: its quasi-extinction chance and its change in abundance."""
    H, _ = species_risk_time(m, species)
    unit = m.time_unit
    parts = []
    q = _one(risk, option=option, species=species, metric="quasi_extinction", horizon=H)
    b = _one(risk, option="baseline", species=species, metric="quasi_extinction", horizon=H)
    if q is not None:
        parts.append(f"chance of falling below its quasi-extinction level {by_time(H, unit)}: "
                     f"{with_term(q.value, q.low, q.high)}"
                     + (f" (without the option {fmt_prob(b.value)})" if b is not None else ""))
    c = _one(effects, option=option, species=species, metric="mean_abundance", horizon=H, statistic="median_change")
    if c is not None:
        parts.append(f"mean abundance {over_period(H, unit)} {fmt_change(c.value)} against doing nothing "
                     f"(median; 5–95 % of members {fmt_change(c.low)} to {fmt_change(c.high)})")
    return Item(f"{species} (target)", "; ".join(parts) + "." if parts else "no outcome saved.")


def introduced_item(m: Manifest, risk: pd.DataFrame, option: str, species: str) -> Item:
    """A species absent today that the option brings in: where it stands at its horizon."""
    H, _ = species_risk_time(m, species)
    r = _one(risk, option=option, species=species, metric="mean_abundance", horizon=H)
    body = "absent without the option, so no paired change exists"
    if r is not None:
        unit = next(s.unit for s in m.species if s.name == species)
        body += (f"; mean abundance {over_period(H, m.time_unit)} under the option {fmt_num(r.value)} {unit} "
                 f"(median; 5–95 % of members {fmt_num(r.low)} to {fmt_num(r.high)})")
    return Item(f"{species} (introduced by this option)", body + ".")


@dataclass(frozen=True)
class _Effect:
    size: float
    item: Item


def _material_chance(effects: pd.DataFrame, option: str, species: str) -> pd.DataFrame:
    e = _pick(effects, option=option, species=species, metric="mean_abundance")
    return e[(e.statistic == "p_material") & (e.n.astype(float) > 0)]


def _abundance_part(effects: pd.DataFrame, option: str, species: str, m: Manifest,
                    listing: float) -> tuple[str, float, float]:
    """The abundance side of an effect at the species' horizon; another horizon only where the change is
    material there and not at the species' horizon (and the sentence says so)."""
    pm = _material_chance(effects, option, species)
    if pm.empty:  # absent without the option: no paired relative change exists
        return "", 0.0, 0.0
    H, _ = species_risk_time(m, species)
    e = _pick(effects, option=option, species=species, metric="mean_abundance")
    at = _one(pm, horizon=H)
    med = _one(e, horizon=H, statistic="median_change")
    if at is None or med is None:
        return "", 0.0, 0.0
    size = abs(math.log1p(max(float(med.value), -0.999999))) if np.isfinite(med.value) else 0.0
    down = _one(e, horizon=H, statistic="p_material_decrease")
    up = _one(e, horizon=H, statistic="p_material_increase")
    text = (f"mean abundance {over_period(H, m.time_unit)} {fmt_change(med.value)} (median paired change; "
            f"5–95 % of members {fmt_change(med.low)} to {fmt_change(med.high)}); chance of a material change "
            f"(±{fmt_change(at.threshold).lstrip('+')}): {with_term(at.value, at.low, at.high)}"
            f" (a fall {fmt_prob(down.value)}, a rise {fmt_prob(up.value)})")
    top = pm.loc[pm.value.astype(float).idxmax()]
    if float(at.value) <= listing < float(top.value):
        other = _one(e, horizon=float(top.horizon), statistic="median_change")
        text += (f"; {over_period(top.horizon, m.time_unit)} instead, quoted because the change is material there "
                 f"and fades by {m.time_unit} {fmt_num(H)}: {fmt_change(other.value)}, chance of a material change "
                 f"{with_term(top.value, top.low, top.high)}")
    return text, float(pm.value.max()), size


def _event_parts(effects: pd.DataFrame, risk: pd.DataFrame, option: str, species: str, m: Manifest) -> list[str]:
    """Quasi-extinction and outbreak chances that move by at least the material risk, at the species' horizon
    (another horizon only where the move is material there and not at the species' horizon, saying so)."""
    H, _ = species_risk_time(m, species)
    out = []
    for metric, name in EVENT_NAMES.items():
        d = _pick(effects, option=option, species=species, metric=metric, statistic="difference")
        d = d[np.isfinite(d.value.astype(float))]
        if d.empty:
            continue
        r = d.loc[d.value.abs().idxmax()]
        if abs(float(r.value)) + 1e-12 < float(r.threshold):
            continue
        at = _one(d, horizon=H)
        if at is not None and abs(float(at.value)) + 1e-12 >= float(at.threshold):
            r, why = at, ""
        else:
            why = (f" (quoted {by_time(r.horizon, m.time_unit)}, where the change is largest: it is below the "
                   f"material level {by_time(H, m.time_unit)})")
        out.append(f"{name} chance {by_time(r.horizon, m.time_unit)} "
                   f"{_risk_pair(risk, option, species, metric, float(r.horizon))} "
                   f"({fmt_points(r.value)} [{fmt_bare_points(r.low)}, {fmt_bare_points(r.high)}]){why}")
    return out


def _lost_by_chance(m: Manifest, risk: pd.DataFrame, option: str, species: str) -> list[str]:
    """A species counted in individuals whose chance of falling to none (``extinct`` in risk.csv) under
    the option reaches the material risk at its horizon: named as a loss by chance at low numbers."""
    H, _ = species_risk_time(m, species)
    o = _one(risk, option=option, species=species, metric="extinct", horizon=H)
    if o is None or not np.isfinite(float(o.value)) or float(o.value) + 1e-12 < m.judgement.material_risk:
        return []
    b = _one(risk, option="baseline", species=species, metric="extinct", horizon=H)
    return [f"could be lost by chance at low numbers: chance of falling to zero individuals "
            f"{by_time(H, m.time_unit)} {with_term(o.value, o.low, o.high)}"
            + (f" (doing nothing {fmt_prob(b.value)})" if b is not None else "")]


def _quiet_text(m: Manifest, effects: pd.DataFrame, option: str, species: str) -> str:
    H, _ = species_risk_time(m, species)
    pm = _one(effects, option=option, species=species, metric="mean_abundance", horizon=H, statistic="p_material")
    return "" if pm is None or pm.n <= 0 else f"{with_term(pm.value, pm.low, pm.high)} {by_time(H, m.time_unit)}"


def option_reading(m: Manifest, risk: pd.DataFrame, effects: pd.DataFrame, objectives: pd.DataFrame,
                   option: str) -> OptionReading:
    """Protected species, targets, other material side effects (largest first) and the quiet species of one option."""
    objs = tuple(objective_line(r) for _, r in objectives[objectives.option == option].iterrows())
    protected, targets, sides, quiet = [], [], [], []
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
        listing = PROTECTED_LISTING_PROBABILITY if s.role == "protected" else LISTING_PROBABILITY
        abundance, p_mat, size = _abundance_part(effects, option, sp, m, listing)
        events = _event_parts(effects, risk, option, sp, m)
        if s.role == "protected":
            events += _lost_by_chance(m, risk, option, sp)
        tag = ("protected, " if s.role == "protected" else "") + (
            "direct: the option acts on it" if sp in touched else "indirect: through the food web")
        if p_mat > listing or events:
            item = Item(f"{sp} ({tag})", "; ".join(x for x in [abundance, *events] if x) + ".")
            if s.role == "protected":
                protected.append(item)
            else:
                sides.append(_Effect(size, item))
        elif s.role == "protected":  # a protected species is always read first, even when little changes
            protected.append(Item(f"{sp} ({tag})", f"no material change likely: chance of a material change of its "
                                                   f"mean abundance {_quiet_text(m, effects, option, sp)}; its "
                                                   "quasi-extinction and outbreak chances move by less than the "
                                                   "material level."))
        else:
            flags = "direct" if sp in touched else ""
            quiet.append(f"{sp}{' (' + flags + ')' if flags else ''} {_quiet_text(m, effects, option, sp)}".rstrip())
    sides.sort(key=lambda e: -e.size)
    unchanged = ("Material change unlikely for: " + "; ".join(quiet) + " (chance of a material change of mean "
                 "abundance; their quasi-extinction and outbreak chances move by less than the material level)."
                 if quiet else "")
    return OptionReading(option, objs, tuple(protected), tuple(targets), tuple(e.item for e in sides), unchanged)


def best_lines(comparisons: pd.DataFrame) -> tuple[str, ...]:
    """Per objective: each run's chance of a good outcome, the best by the one rule, and the paired chance that
    the best has it where the runner-up does not (and the reverse)."""
    out = []
    best = best_by_objective(comparisons)
    good = comparisons[comparisons.statistic == "p_good"]
    only = comparisons[comparisons.statistic == "p_only"]
    for obj, g in good.groupby("objective", sort=False):
        g = g.sort_values("value", ascending=False, kind="stable")
        winners = best[obj][0]
        parts = [f"{run_label(r.option)} {fmt_prob(r.value)} [{fmt_bare_prob(r.low)}, {fmt_bare_prob(r.high)}]"
                 for _, r in g.iterrows()]
        text = (f"“{obj}”: chance of a good outcome: " + "; ".join(parts)
                + f". Best: {names_text(run_label(n) for n in winners)}"
                + (", tied" if len(winners) > 1 else "") + ".")
        if len(g) > 1:
            a, b = g.option.iloc[0], g.option.iloc[1]
            ab = _one(only, objective=obj, option=a, versus=b)
            ba = _one(only, objective=obj, option=b, versus=a)
            if ab is not None and ba is not None:
                text += (f" Member by member, {run_label(a)} has a good outcome where {run_label(b)} has none in "
                         f"{fmt_prob(ab.value)} [{fmt_bare_prob(ab.low)}, {fmt_bare_prob(ab.high)}] of members, the "
                         f"reverse in {fmt_prob(ba.value)} [{fmt_bare_prob(ba.low)}, {fmt_bare_prob(ba.high)}].")
        out.append(text)
    return tuple(out)


def reading(manifest: Manifest, risk: pd.DataFrame, effects: pd.DataFrame, objectives: pd.DataFrame,
            comparisons: pd.DataFrame) -> Reading:
    """The whole page-1 verdict from the saved manifest and tables."""
    thin, why = thin_run(manifest)
    if thin:
        return Reading(True, why, (), (), None)
    opts = tuple(option_reading(manifest, risk, effects, objectives, o.name) for o in manifest.options)
    return Reading(False, "", opts, best_lines(comparisons), bottom_line(manifest, objectives, comparisons))


def reading_text(r: Reading) -> str:
    """The verdict as plain text for the terminal (the same sentences as page 1; the bottom line is
    :func:`impact.dossier.bottomline.bottom_line_text`, which ends the terminal summary)."""
    if r.thin:
        return r.thin_reason
    lines = []
    for o in r.options:
        lines.append(f"option “{o.option}”:")
        lines += [f"  protected: {x.text()}" for x in o.protected]
        lines += [f"  {x.text()}" for x in o.targets]
        lines += [f"  side effect: {x.text()}" for x in o.side_effects] or ["  no other material side effects found."]
        if o.unchanged:
            lines.append(f"  {o.unchanged}")
    if r.best:
        lines.append("choices compared by their chance of a good outcome, member by member:")
        lines += [f"  {x}" for x in r.best]
    return "\n".join(lines)
