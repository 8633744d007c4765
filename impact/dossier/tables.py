"""The report's tables: risk, paired effects, objectives, comparisons and the indicative IUCN reading,
formatted from the saved numbers."""

from __future__ import annotations

import pandas as pd

from impact.dossier.bottomline import run_label
from impact.dossier.formatting import (PROBABILITY_METRICS, by_time, fmt_bare_points, fmt_bare_prob, fmt_cell,
    fmt_change, fmt_num, fmt_points, fmt_prob)
from impact.dossier.iucn import CATEGORY_NAMES, criterion_e_in_units, years_per_unit
from impact.risk.metrics import describe_interval
from impact.store.manifest import Manifest
from impact.store.results import Results
from impact.dossier.verdict import with_term

RISK_METRICS = (
    ("quasi_extinction", "Quasi-extinction probability"),
    # only for a species counted in individuals at low numbers: a population of zero, by chance or removal
    ("extinct", "Probability that none is left (counted in individuals)"),
    ("expected_minimum", "Expected minimum abundance"),
    ("mean_change", "Paired change in mean abundance"),
    ("outbreak", "Outbreak probability"),
    ("recovery_time", "Recovery time (median [5 %, 95 %])"),
    ("not_recovered", "Probability of no recovery within the horizon"),
)
# the paired change in mean abundance is the effects table's first row, the same numbers: printed once
PDF_RISK_METRICS = tuple(x for x in RISK_METRICS if x[0] != "mean_change")
# The PDF prints at most this many rows of an option's risk or effects table (about two pages);
# the rows of the species beyond it stay in the CSV, and the table says how many and where.
MAX_TABLE_ROWS = 40


def interval_caption(table: pd.DataFrame, labels: dict) -> str:
    """Which interval each measure of a table carries, read from its ``interval`` and ``level`` columns."""
    groups: dict[str, list[str]] = {}
    for key, g in table.groupby(["interval", "level"], sort=False):
        kind, level = key
        names = [labels.get(x, x) for x in dict.fromkeys(g[g.columns[_label_column(g)]])]
        groups.setdefault(describe_interval(kind, float(level)), []).extend(names)
    return "; ".join(f"{', '.join(dict.fromkeys(v))}: {k}" for k, v in groups.items()) + "."


def _label_column(g: pd.DataFrame) -> int:
    # risk.csv names its measure in `metric`; effects.csv in `statistic`
    return list(g.columns).index("statistic" if "statistic" in g.columns else "metric")


def _n_note(n, kept: int) -> str:
    return "" if pd.isna(n) or int(n) == kept else f"n {int(n)}"


class RowIndex:
    """Rows of a saved table by a key of its columns and by horizon: one pass over the table instead of a
    scan of the whole table per cell."""

    def __init__(self, table: pd.DataFrame, keys: tuple[str, ...]):
        self.groups: dict[tuple, list] = {}
        for r in table.itertuples(index=False):
            self.groups.setdefault(tuple(getattr(r, k) for k in keys), []).append(r)

    def get(self, key: tuple, horizon: float):
        """The first row of ``key`` at ``horizon`` (equal as ``np.isclose`` compares), or None."""
        h = float(horizon)
        # np.isclose's test, written out: this runs once per printed cell
        return next((r for r in self.groups.get(key, ()) if abs(float(r.horizon) - h) <= 1e-8 + 1e-5 * abs(h)), None)


def species_order(res: Results, option: str) -> list[str]:
    """Species in the order a reader needs them in an option's tables: targets, protected species, species an
    objective names and species the option acts on first (declaration order), then the others, the likeliest
    material change first."""
    m = res.manifest
    touched = set(next((o.touches for o in m.options if o.name == option), ()))
    named = {o.species for o in m.objectives}
    e = res.effects[(res.effects.option == option) & (res.effects.statistic == "p_material")]
    chance = e.groupby("species").value.max().to_dict() if not e.empty else {}
    first = [s.name for s in m.species if s.role in ("target", "protected") or s.name in named or s.name in touched]
    rest = sorted((s.name for s in m.species if s.name not in first), key=lambda sp: -float(chance.get(sp, 0.0)))
    return first + rest


def cut_rows(rows: list[dict], order: list[str], table: pd.DataFrame, option: str, file: str,
             max_rows: int) -> tuple[list[dict], dict | None]:
    """The rows of whole species, chosen in ``order`` while they fit in ``max_rows`` and printed in their own
    order; the note names the species left out and the rows of ``file`` (the saved table, this option) holding them."""
    by_species: dict[str, int] = {}
    for r in rows:
        by_species[r["species"]] = by_species.get(r["species"], 0) + 1
    chosen, left, n = set(), [], 0
    for sp in [x for x in order if x in by_species]:
        if not left and (n + by_species[sp] <= max_rows or not chosen):
            chosen.add(sp)
            n += by_species[sp]
        else:
            left.append(sp)
    if not left:
        return rows, None
    csv_rows = int(((table.option == option) & table.species.isin(left)).sum())
    return [r for r in rows if r["species"] in chosen], dict(species=left, rows=len(rows) - n, csv_rows=csv_rows,
                                                             file=file)


def risk_table_context(res: Results, option: str, max_rows: int | None = None) -> dict:
    """Per species and horizon the option's risk with the baseline's beneath; at most ``max_rows`` rows
    (default ``MAX_TABLE_ROWS``), the rest named in ``cut``."""
    m = res.manifest
    hs = list(m.horizons)
    kept = m.counts.kept
    index = RowIndex(res.risk, ("option", "species", "metric"))
    rows = []
    for s in m.species:
        sp = s.name
        for metric, label in PDF_RISK_METRICS:
            cells, any_value = [], False
            for h in hs:
                o = index.get((option, sp, metric), h)
                b = index.get(("baseline", sp, metric), h)
                if o is None:
                    cells.append(None)
                    continue
                any_value = True
                cells.append(dict(option=fmt_cell(metric, o.value, o.low, o.high), n=_n_note(o.n, kept),
                                  baseline=None if b is None else fmt_cell(metric, b.value, b.low, b.high),
                                  unit="" if metric in PROBABILITY_METRICS else o.unit))
            if any_value:
                rows.append(dict(species=sp, metric=label, cells=cells))
    rows, cut = cut_rows(rows, species_order(res, option), res.risk, option, "risk.csv", max_rows or MAX_TABLE_ROWS)
    # the caption speaks of the measures printed, nothing else of risk.csv
    shown = res.risk[res.risk.option.isin([option, "baseline"]) & res.risk.metric.isin([x[0] for x in PDF_RISK_METRICS])]
    return dict(horizons=[fmt_num(h) for h in hs], rows=rows, cut=cut,
                caption=interval_caption(shown, dict(RISK_METRICS)))


EFFECT_LABELS = {"median_change": "paired change in mean abundance (median)",
                 "p_material": "material change; of which a fall, a rise",
                 "p_material_decrease": "material fall", "p_material_increase": "material rise",
                 "p_worse": "worse than doing nothing", "difference": "change in chance"}
# The statistics of effects.csv the PDF prints: the ones page 1 quotes (a material change and its split
# into falls and rises among them). The chance that a member does worse than under doing nothing
# (p_worse) stays in effects.csv; the table says how many rows. The fall and the rise share the
# material change's cell (one row, not three, per species).
SPLIT_STATISTICS = (("p_material_decrease", "fall"), ("p_material_increase", "rise"))
PDF_EFFECTS = (("mean_abundance", ("median_change", "p_material"), "abundance"),
               ("quasi_extinction", ("difference",), "quasi-extinction"),
               ("outbreak", ("difference",), "outbreak"))
CSV_ONLY_LABELS = {"p_worse": "chance of doing worse than doing nothing (p_worse)"}


def effects_table_context(res: Results, option: str, max_rows: int | None = None) -> dict:
    """Per species and horizon: the paired change, its chance of being material, and event chance changes; at
    most ``max_rows`` rows (default ``MAX_TABLE_ROWS``), the rest named in ``cut``, the statistics of effects.csv
    not printed counted in ``others``."""
    e = res.effects[res.effects.option == option]
    kept = res.manifest.counts.kept
    hs = list(res.manifest.horizons)
    index = RowIndex(e, ("species", "metric", "statistic"))
    direct = e.groupby("species", sort=False).direct.first().to_dict()
    rows = []
    for s in res.manifest.species:
        sp = s.name
        if sp not in direct:
            continue
        tag = s.role + ", " + ("direct" if str(direct[sp]).lower() == "true" else "indirect")
        for metric, stats, label in PDF_EFFECTS:
            for stat in stats:
                cells = []
                for h in hs:
                    r = index.get((sp, metric, stat), h)
                    text = None if r is None else _effect_cell(r)
                    if text and stat == "p_material":
                        parts = [(index.get((sp, metric, x), h), word) for x, word in SPLIT_STATISTICS]
                        text += "; " + ", ".join(f"{word} {_interval(x)}" for x, word in parts if x is not None)
                    cells.append(None if r is None else dict(text=text, n=_n_note(r.n, kept)))
                if any(cells):
                    rows.append(dict(species=sp, tag=tag, measure=f"{label}: {EFFECT_LABELS[stat]}", cells=cells))
    rows, cut = cut_rows(rows, species_order(res, option), res.effects, option, "effects.csv",
                         max_rows or MAX_TABLE_ROWS)
    printed = {x for _, stats, _ in PDF_EFFECTS for x in stats} | {x for x, _ in SPLIT_STATISTICS}
    elsewhere = e[e.species.isin({r["species"] for r in rows}) & ~e.statistic.isin(printed)]
    others = None if elsewhere.empty else dict(
        rows=len(elsewhere), statistics=[CSV_ONLY_LABELS.get(x, x) for x in dict.fromkeys(elsewhere.statistic)])
    return dict(horizons=[fmt_num(h) for h in hs], rows=rows, cut=cut, others=others,
                caption=interval_caption(e[e.statistic.isin(printed)], EFFECT_LABELS))


def _interval(r) -> str:
    return f"{fmt_prob(r.value)} [{fmt_bare_prob(r.low)}, {fmt_bare_prob(r.high)}]"


def _effect_cell(r) -> str:
    if r.statistic == "median_change":
        return f"{fmt_change(r.value)} [{fmt_change(r.low)}, {fmt_change(r.high)}]"
    if r.statistic == "difference":
        return f"{fmt_points(r.value)} [{fmt_bare_points(r.low)}, {fmt_bare_points(r.high)}]"
    return with_term(r.value, r.low, r.high)


def objectives_context(res: Results) -> list[dict]:
    out = []
    for _, r in res.objectives.iterrows():
        got = (with_term(r.value, r.low, r.high) if r.statistic == "chance"
               else f"{fmt_points(r.value)} [{fmt_bare_points(r.low)}, {fmt_bare_points(r.high)}]")
        need = {"chance_at_least": f"chance ≥ {fmt_prob(r.bound)}", "chance_at_most": f"chance ≤ {fmt_prob(r.bound)}",
                "increase_at_most": f"rise ≤ {fmt_points(r.bound).lstrip('+')}",
                "decrease_at_least": f"fall ≥ {fmt_points(r.bound).lstrip('+')}"}[r.requirement]
        out.append(dict(objective=r.objective, option=r.option, event=r.event, need=need, got=got,
                        status=r.status, n=fmt_num(r.n)))
    return out


def comparisons_context(res: Results) -> list[dict]:
    """One row per objective and run: its chance of a good outcome, whether it is best (comparisons.csv's ``best``
    rows), and the paired chances that it has a good outcome where each other run has none."""
    c = res.comparisons
    out = []
    for (obj, run), g in c.groupby(["objective", "option"], sort=False):
        good = g[g.statistic == "p_good"]
        if good.empty:
            continue
        r = good.iloc[0]
        best = g[g.statistic == "best"]
        only = [f"{run_label(x.versus)}: {fmt_prob(x.value)} [{fmt_bare_prob(x.low)}, {fmt_bare_prob(x.high)}]"
                for x in g[g.statistic == "p_only"].itertuples()]
        out.append(dict(objective=obj, run=run_label(run), good=with_term(r.value, r.low, r.high), only=only,
                        best=bool(len(best)) and float(best.value.iloc[0]) == 1.0, n=fmt_num(r.n)))
    return out


def iucn_rows(res: Results) -> list[dict]:
    """Indicative criterion E reading per option and species with a generation time."""
    m = res.manifest
    index = RowIndex(res.risk, ("option", "species", "metric"))
    rows = []
    for opt in ["baseline", *m.option_names]:
        for s in m.species:
            # a target's loss is the aim of an option, not a conservation concern
            if s.generation_time is None or s.role == "target":
                continue
            probs = {}
            for h in m.horizons:
                r = index.get((opt, s.name, "quasi_extinction"), h)
                if r is not None:
                    probs[float(h)] = float(r.value)
            if not probs:
                continue
            reading = criterion_e_in_units(probs, s.generation_time, m.time_unit)
            tests = []
            for t in reading.tests:
                if t.met is None:
                    tests.append("horizon too short")
                else:
                    # print the saved probability at the horizon used, in the case's time unit
                    h_case = min(probs, key=lambda h: abs(h - t.horizon / years_per_case_unit(m)))
                    tests.append(f"{fmt_prob(probs[h_case])} {by_time(h_case, m.time_unit)} {'≥' if t.met else '<'} "
                                 f"{t.threshold:.0%}")
            cat = reading.category
            rows.append(dict(option=opt, species=s.name, generation_time=fmt_num(s.generation_time),
                             tests=tests, category=cat, category_name=CATEGORY_NAMES.get(cat, cat), note=reading.note))
    return rows


def iucn_context(res: Results) -> dict:
    """The IUCN rows worth a line: those meeting a category, and doing nothing's row for the same species; the
    other rows (no threshold met: below VU, or the horizons too short to judge one) as one sentence."""
    rows = iucn_rows(res)
    flagged = {r["species"] for r in rows if r["category"] in CATEGORY_NAMES}
    shown = [r for r in rows if r["species"] in flagged and (r["category"] in CATEGORY_NAMES or r["option"] == "baseline")]
    rest: dict[str, list[str]] = {}
    for r in rows:
        if r not in shown:
            rest.setdefault(r["species"], []).append(run_label(r["option"]))
    runs = len({r["option"] for r in rows})
    quiet = "; ".join(f"{sp} ({'every run' if len(o) == runs else ', '.join(o)})" for sp, o in rest.items())
    return dict(rows=shown, quiet=quiet, any=bool(rows))


def years_per_case_unit(m: Manifest) -> float:
    return years_per_unit(m.time_unit) or 1.0




def first_rows(rows, max_rows: int | None = None) -> list:
    """The rows a per-row table prints: at most ``max_rows`` (default ``MAX_TABLE_ROWS``), in their order."""
    return list(rows)[:MAX_TABLE_ROWS if max_rows is None else max_rows]


def rows_note(rows, file: str, max_rows: int | None = None) -> str:
    """What a per-row table cut by :func:`first_rows` leaves out, and where all its rows are: ``""`` when
    nothing is cut, else e.g. "First 40 of 212 rows printed; all 212 in members.csv in the results directory."."""
    n, cap = len(list(rows)), MAX_TABLE_ROWS if max_rows is None else max_rows
    return "" if n <= cap else f"First {cap} of {n} rows printed; all {n} in {file} in the results directory."
