"""The assessment document: a PDF rebuilt from a saved results directory alone.

The report reads ``manifest.json`` and the CSV tables written by ``impact assess`` (and the
``sensitivity/`` and ``dynamics/`` sub-directories when those stages ran), draws its figures
with matplotlib as SVG, fills the jinja2 templates and lets WeasyPrint typeset the result.
It never re-simulates and prints no number that is not in the saved results: verdicts, warnings
and the IUCN reading are classifications and wording of saved numbers.

Templates
---------
The canonical templates live in the repository's top-level ``templates/`` folder.  The build
maps that folder to the package ``impact.templates`` (``package-dir`` in ``pyproject.toml``),
so a non-editable ``pip install .`` ships them as package data; a source checkout finds them
next to the package.

Safety
------
Case text (titles, names, sources) is untrusted: templates are rendered with autoescaping and
WeasyPrint gets :class:`AssetFetcher`, which serves only the named template assets and the
figures of the current report under the ``impact-asset:`` scheme and refuses every other URL
(files, network, data URIs).
"""

from __future__ import annotations

import io
import json
import math
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path

import numpy as np
import pandas as pd

from .cautions import cautions, share_text
from .errors import CaseError, ReadError, WriteError
from .formatting import PROBABILITY_METRICS, fmt_bare_points, fmt_cell, fmt_change, fmt_num, fmt_points, fmt_prob
from .metrics import describe_interval
from .verdict import reading, thin_run, with_term
from .webfigure import food_web_svg
from .iucn import CATEGORY_NAMES, criterion_e_in_units

ASSET_SCHEME = "impact-asset:"
PAPERS = {"a4": "A4", "letter": "letter"}
ASSET_TYPES = {".css": "text/css", ".svg": "image/svg+xml", ".png": "image/png"}
TEXT_COLUMNS = {
    "option", "species", "metric", "unit", "role", "direct", "statistic", "interval", "objective", "measure", "event",
    "requirement", "status", "versus", "output", "best_choice", "parameter", "regime", "name", "distribution", "arguments",
    "source", "description", "conditional_on", "parameter_i", "parameter_j", "from_regime", "to_regime",
    "kind", "failure", "failed", "converged", "uncertain", "reason", "basis", "extinct_species", "extinct",
}
RISK_METRICS = (
    ("quasi_extinction", "Quasi-extinction probability"),
    ("expected_minimum", "Expected minimum abundance"),
    ("mean_change", "Paired change in mean abundance"),
    ("outbreak", "Outbreak probability"),
    ("recovery_time", "Recovery time (median [5 %, 95 %])"),
    ("not_recovered", "Probability of no recovery within the horizon"),
)
KIND_STYLE = {
    "predation": ("#c0392b", "-", "eats"),
    "scavenging": ("#8e5b2e", "-", "scavenges"),
    "alternative-food": ("#8e5b2e", "--", "eats"),
    "competition": ("#555555", "--", "competes with"),
    "mutualism": ("#1e8449", "-", "benefits"),
    "life-stage": ("#7d3c98", ":", "matures into"),
}
OPTION_COLOURS = ("#d35400", "#2471a3", "#7d3c98", "#117a65", "#b7950b", "#a93226")
BASELINE_COLOUR = "#566573"
REGIME_COLOURS = {"equilibrium": "#2e86c1", "cycle": "#28b463", "aperiodic": "#f39c12", "undetermined": "#aab7b8",
                  "chaotic": "#c0392b", "extinction": "#1c2833"}


# ----------------------------------------------------------------------------- loading

@dataclass
class Results:
    """A results directory read back: the manifest and its tables.

    ``sensitivity`` and ``dynamics`` map file stems to tables (``None`` when the stage did not run).
    """

    path: Path
    manifest: dict
    risk: pd.DataFrame
    bands: pd.DataFrame
    priors: pd.DataFrame
    effects: pd.DataFrame
    objectives: pd.DataFrame
    comparisons: pd.DataFrame
    sensitivity: dict | None = None
    dynamics: dict | None = None


def read_table(path: Path) -> pd.DataFrame:
    """Read a results CSV keeping names as text (a species called "NA" stays "NA").

    The table is checked against the results schema (:data:`impact.results.TABLES`) first: a
    missing column or text in a number column is refused naming the file and the column.
    """
    from .results import check_table

    path = Path(path)
    relative = f"{path.parent.name}/{path.name}" if path.parent.name in ("sensitivity", "dynamics") else path.name
    try:
        df = pd.read_csv(path, dtype=str, keep_default_na=False)
    except FileNotFoundError:
        raise CaseError(str(path.parent), path.name, "not found; point at a directory written by `impact assess`") from None
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise CaseError(str(path), "", f"is not a readable CSV table ({exc})") from None
    except OSError as exc:
        raise ReadError(str(path), "", f"cannot be read ({exc.strerror or exc})") from None
    check_table(df, path, relative)
    for c in df.columns:
        if c not in TEXT_COLUMNS:
            df[c] = pd.to_numeric(df[c].replace("", "nan"), errors="coerce")
    return df


def _read_stage(folder: Path) -> dict | None:
    if not folder.is_dir():
        return None
    out = {}
    for p in sorted(folder.iterdir()):
        if p.suffix == ".csv":
            out[p.stem] = read_table(p)
        elif p.suffix == ".json":
            try:
                out[p.stem] = json.loads(p.read_bytes().decode("utf-8"))
            except (json.JSONDecodeError, UnicodeDecodeError) as exc:
                raise CaseError(str(p), "", f"is not valid UTF-8 JSON ({exc}); the results folder is damaged") from None
            except OSError as exc:
                raise ReadError(str(p), "", f"cannot be read ({exc.strerror or exc})") from None
    return out or None


def load_results(path) -> Results:
    """Read a results directory written by ``impact assess``, checked against the results schema."""
    from .results import read_manifest

    path = Path(path)
    if not path.is_dir():
        raise CaseError(str(path), "", "is not a results directory (run `impact assess` first)")
    manifest = read_manifest(path)
    return Results(path, manifest, read_table(path / "risk.csv"), read_table(path / "bands.csv"),
                   read_table(path / "priors.csv"), read_table(path / "effects.csv"),
                   read_table(path / "objectives.csv"), read_table(path / "comparisons.csv"),
                   _read_stage(path / "sensitivity"), _read_stage(path / "dynamics"))


# ----------------------------------------------------------------------------- derived readings

def _row(risk: pd.DataFrame, option: str, species: str, metric: str, horizon: float):
    r = risk[(risk.option == option) & (risk.species == species) & (risk.metric == metric)
             & np.isclose(risk.horizon, horizon)]
    return None if r.empty else r.iloc[0]


def option_names(m: dict) -> list[str]:
    return [o["name"] for o in m["options"]]


def iucn_rows(res: Results) -> list[dict]:
    """Indicative criterion E reading per option and species with a generation time."""
    m = res.manifest
    rows = []
    for opt in ["baseline", *option_names(m)]:
        for s in m["species"]:
            # a target's loss is the aim of an option, not a conservation concern
            if s.get("generation_time") is None or s["role"] == "target":
                continue
            probs = {}
            for h in m["horizons"]:
                r = _row(res.risk, opt, s["name"], "quasi_extinction", h)
                if r is not None:
                    probs[float(h)] = float(r.value)
            if not probs:
                continue
            reading = criterion_e_in_units(probs, s["generation_time"], m["time_unit"])
            tests = []
            for t in reading.tests:
                if t.met is None:
                    tests.append("horizon too short")
                else:
                    # print the saved probability at the horizon used, in the case's time unit
                    h_case = min(probs, key=lambda h: abs(h - t.horizon / _years(m)))
                    tests.append(f"{fmt_prob(probs[h_case])} by {fmt_num(h_case)} {'≥' if t.met else '<'} "
                                 f"{t.threshold:.0%}")
            cat = reading.category
            rows.append(dict(option=opt, species=s["name"], generation_time=fmt_num(s["generation_time"]),
                             tests=tests, category=cat, category_name=CATEGORY_NAMES.get(cat, cat), note=reading.note))
    return rows


def _years(m: dict) -> float:
    from .iucn import years_per_unit

    return years_per_unit(m["time_unit"]) or 1.0


# ----------------------------------------------------------------------------- figures

def _label(s) -> str:
    # case text must not switch matplotlib into mathtext
    return str(s).replace("$", r"\$")


def _svg(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="svg", bbox_inches="tight", metadata={"Date": None})
    return buf.getvalue()


# Data-heavy charts (many lines, bars or points) go in as PNG: as SVG each costs seconds to write
# and seconds more for the PDF engine to draw, for no gain at print resolution.
PNG_DPI = 200


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=PNG_DPI, bbox_inches="tight", metadata={"Software": None})
    return buf.getvalue()


def _figure(w, h):
    from matplotlib.figure import Figure

    fig = Figure(figsize=(w, h))
    fig.set_layout_engine("constrained")
    return fig


def bands_figure(res: Results, option: str, colour: str) -> bytes:
    """Median and 50 %/90 % bands per species, baseline and option on shared axes."""
    m = res.manifest
    species = [s["name"] for s in m["species"]]
    units = {s["name"]: s.get("unit", "") for s in m["species"]}
    ncol = 2 if len(species) > 1 else 1
    nrow = math.ceil(len(species) / ncol)
    fig = _figure(6.6, 1.9 * nrow + 0.5)
    axes = fig.subplots(nrow, ncol, sharex=True, squeeze=False)
    ivs = {iv["name"]: iv for iv in m.get("interventions", [])}
    opt = next((o for o in m["options"] if o["name"] == option), {"interventions": []})
    for k, sp in enumerate(species):
        ax = axes[k // ncol][k % ncol]
        for name, col in (("baseline", BASELINE_COLOUR), (option, colour)):
            b = res.bands[(res.bands.option == name) & (res.bands.species == sp)].sort_values("time")
            if b.empty:
                continue
            ax.fill_between(b.time, b.q05, b.q95, color=col, alpha=0.15, linewidth=0)
            ax.fill_between(b.time, b.q25, b.q75, color=col, alpha=0.35, linewidth=0)
            ax.plot(b.time, b.q50, color=col, linewidth=1.4, label=_label(name))
        for ivn in opt.get("interventions", []):
            iv = ivs.get(ivn)
            if iv is not None:
                ax.axvline(iv["start"], color="#7f8c8d", linewidth=0.7, linestyle=":")
        ax.set_title(_label(sp), fontsize=9)
        ax.set_ylabel(_label(units.get(sp, "")), fontsize=7)
        ax.tick_params(labelsize=7)
        ax.set_ylim(bottom=0)
    for k in range(len(species), nrow * ncol):
        axes[k // ncol][k % ncol].axis("off")
    for ax in axes[-1]:
        ax.set_xlabel(_label(m["time_unit"]), fontsize=8)
    axes[0][0].legend(fontsize=7, loc="best")
    return _png(fig)


def regime_figure(shares: pd.DataFrame) -> bytes:
    """Share of members in each dynamical regime, per option."""
    opts = list(dict.fromkeys(shares.option))
    fig = _figure(6.0, 0.45 * len(opts) + 1.2)
    ax = fig.add_subplot()
    left = np.zeros(len(opts))
    for reg in dict.fromkeys(shares.regime):
        vals = np.array([shares[(shares.option == o) & (shares.regime == reg)].share.sum() for o in opts])
        ax.barh(range(len(opts)), vals, left=left, color=REGIME_COLOURS.get(reg, "#95a5a6"), label=_label(reg))
        left += vals
    ax.set_yticks(range(len(opts)), [_label(o) for o in opts], fontsize=8)
    ax.set_xlim(0, 1)
    ax.set_xlabel("share of members", fontsize=8)
    ax.tick_params(labelsize=7)
    ax.legend(fontsize=7, ncol=5, loc="upper center", bbox_to_anchor=(0.5, -0.25), frameon=False)
    return _svg(fig)


def distribution_figure(regimes: pd.DataFrame, unit: str) -> bytes:
    """Histograms of the largest Lyapunov exponent and the predictability horizon, per option."""
    fig = _figure(6.6, 2.6)
    axes = fig.subplots(1, 2)
    for k, opt in enumerate(dict.fromkeys(regimes.option)):
        r = regimes[regimes.option == opt]
        col = BASELINE_COLOUR if opt == "baseline" else OPTION_COLOURS[(k - 1) % len(OPTION_COLOURS)]
        for ax, col_name in zip(axes, ("lyapunov", "horizon_time")):
            v = r[col_name].to_numpy(float)
            v = v[np.isfinite(v)]
            if v.size:
                ax.hist(v, bins=30, histtype="step", color=col, label=_label(opt), linewidth=1.2)
    axes[0].set_xlabel(f"largest Lyapunov exponent (1/{_label(unit)})", fontsize=8)
    axes[1].set_xlabel(f"predictability horizon ({_label(unit)})", fontsize=8)
    for ax in axes:
        ax.set_ylabel("members", fontsize=8)
        ax.tick_params(labelsize=7)
    axes[0].legend(fontsize=7)
    return _png(fig)


def scan_figure(scan: pd.DataFrame, parameter: str) -> bytes:
    """Bifurcation diagram: section values against the scanned parameter, coloured by regime."""
    s = scan[scan.parameter == parameter]
    fig = _figure(6.0, 3.0)
    ax = fig.add_subplot()
    for reg in dict.fromkeys(s.regime):
        r = s[s.regime == reg]
        ax.scatter(r.value, r.section_value, s=2, color=REGIME_COLOURS.get(reg, "#95a5a6"), label=_label(reg), linewidths=0)
    ax.set_xlabel(_label(parameter), fontsize=8)
    ax.set_ylabel("section value", fontsize=8)
    ax.tick_params(labelsize=7)
    ax.legend(fontsize=7, markerscale=4)
    return _png(fig)


# ----------------------------------------------------------------------------- document model

@dataclass
class Assets:
    """Named bytes served to WeasyPrint under ``impact-asset:NAME``."""

    files: dict = field(default_factory=dict)  # name -> (bytes, mime type)

    def add(self, name: str, data: bytes, mime: str) -> str:
        self.files[name] = (data, mime)
        return ASSET_SCHEME + name


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


def _risk_table(res: Results, option: str) -> dict:
    m = res.manifest
    hs = list(m["horizons"])
    kept = int(m["counts"]["kept"])
    rows = []
    for s in m["species"]:
        sp = s["name"]
        for metric, label in RISK_METRICS:
            cells, any_value = [], False
            for h in hs:
                o = _row(res.risk, option, sp, metric, h)
                b = _row(res.risk, "baseline", sp, metric, h)
                if o is None:
                    cells.append(None)
                    continue
                any_value = True
                cells.append(dict(option=fmt_cell(metric, o.value, o.low, o.high), n=_n_note(o.n, kept),
                                  baseline=None if b is None else fmt_cell(metric, b.value, b.low, b.high),
                                  unit="" if metric in PROBABILITY_METRICS or metric == "mean_change" else o.unit))
            if any_value:
                rows.append(dict(species=sp, metric=label, cells=cells))
    shown = res.risk[res.risk.option.isin([option, "baseline"])]
    return dict(horizons=[fmt_num(h) for h in hs], rows=rows,
                caption=interval_caption(shown, dict(RISK_METRICS)))


EFFECT_LABELS = {"median_change": "paired change in mean abundance (median)", "p_material": "material change",
                 "p_worse": "worse than doing nothing", "difference": "change in chance"}


def _effects_table(res: Results, option: str) -> dict:
    """Per species and horizon: the paired change, its material and worse chances, and event chance changes."""
    e = res.effects[res.effects.option == option]
    kept = int(res.manifest["counts"]["kept"])
    hs = list(res.manifest["horizons"])
    rows = []
    for s in res.manifest["species"]:
        sp = s["name"]
        es = e[e.species == sp]
        if es.empty:
            continue
        tag = s["role"] + ", " + ("direct" if bool(str(es.direct.iloc[0]).lower() == "true") else "indirect")
        for metric, stats, label in (("mean_abundance", ("median_change", "p_material", "p_worse"), "abundance"),
                                     ("quasi_extinction", ("difference", "p_worse"), "quasi-extinction"),
                                     ("outbreak", ("difference", "p_worse"), "outbreak")):
            for stat in stats:
                cells = []
                for h in hs:
                    r = _row_stat(es, metric, stat, h)
                    cells.append(None if r is None else dict(text=_effect_cell(r), n=_n_note(r.n, kept)))
                if any(cells):
                    rows.append(dict(species=sp, tag=tag, measure=f"{label}: {EFFECT_LABELS[stat]}", cells=cells))
    return dict(horizons=[fmt_num(h) for h in hs], rows=rows, caption=interval_caption(e, EFFECT_LABELS))


def _row_stat(e: pd.DataFrame, metric: str, stat: str, h: float):
    r = e[(e.metric == metric) & (e.statistic == stat) & np.isclose(e.horizon, h)]
    return None if r.empty else r.iloc[0]


def _effect_cell(r) -> str:
    if r.statistic == "median_change":
        return f"{fmt_change(r.value)} [{fmt_change(r.low)}, {fmt_change(r.high)}]"
    if r.statistic == "difference":
        return f"{fmt_points(r.value)} [{fmt_bare_points(r.low)}, {fmt_bare_points(r.high)}]"
    return with_term(r.value, r.low, r.high)


def _objectives_context(res: Results) -> list[dict]:
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


def _comparisons_context(res: Results) -> list[dict]:
    c = res.comparisons[res.comparisons.statistic == "p_better"]
    return [dict(objective=r.objective, option=r.option, versus=r.versus, text=with_term(r.value, r.low, r.high),
                 n=fmt_num(r.n)) for _, r in c.iterrows()]


# the sensitivity section stays within two pages: per option at most this many outputs, each with
# its top parameters; the full tables are in sensitivity/*.csv
MAX_DRIVER_ROWS = 8
TOP_DRIVERS = 3
TOP_INFORMATION = 5
NEGLIGIBLE = 1e-9  # estimates below this are float noise of an exact zero


def _index_text(r) -> str:
    v, lo, hi = (_clean(x) for x in (r.value, r.low, r.high))
    return f"{v:.2f} [{lo:.2f}, {hi:.2f}]"


def _information_context(info: pd.DataFrame) -> list[dict]:
    out = []
    for obj, g in info.groupby("objective", sort=False):
        evpi = g[g.kind == "evpi"].iloc[0]
        params = g[g.kind == "evppi"].sort_values("value", ascending=False)
        top = params.iloc[0] if len(params) else None
        best = "doing nothing (the baseline)" if evpi.best_choice == "baseline" else f"“{evpi.best_choice}”"
        sentence = (f"Choosing now, the best choice for “{obj}” is {best} (a good outcome in "
                    f"{fmt_prob(evpi.best_chance)} of members). Knowing every uncertain number exactly would raise that "
                    f"chance by {fmt_points(_clean(evpi.value))} [{fmt_bare_points(_clean(evpi.low))}, "
                    f"{fmt_bare_points(_clean(evpi.high))}] on average (EVPI)")
        if top is not None and _clean(top.value) > 0:
            sentence += (f"; the single number most worth measuring is {top.parameter} "
                         f"({fmt_points(_clean(top.value))} [{fmt_bare_points(_clean(top.low))}, "
                         f"{fmt_bare_points(_clean(top.high))}], EVPPI).")
        else:
            sentence += "; no single number is worth measuring for this choice (every EVPPI is zero)."
        shown = pd.concat([params.head(TOP_INFORMATION), g[g.kind == "group evppi"]])
        rows = [dict(parameter=r.parameter + (" (group)" if r.kind == "group evppi" else ""),
                     value=f"{fmt_points(_clean(r.value))} [{fmt_bare_points(_clean(r.low))}, "
                           f"{fmt_bare_points(_clean(r.high))}]",
                     share=fmt_prob(_clean(r.value) / evpi.value) if evpi.value > NEGLIGIBLE else "—")
                for _, r in shown.iterrows()]
        out.append(dict(objective=obj, sentence=sentence, rows=rows, n=fmt_num(evpi.n)))
    return out


def _clean(v) -> float:
    v = float(v)
    return 0.0 if abs(v) < NEGLIGIBLE else v


def _drivers_context(drv: pd.DataFrame, roles: dict | None = None) -> list[dict]:
    # objectives first, then targets and protected species, then the rest in declaration order
    roles = roles or {}
    rank = {"target": 1, "protected": 1}
    out = []
    for opt, g in drv.groupby("option", sort=False):
        rows = []
        for (output, sp), h in g.groupby(["output", "species"], sort=False):
            h = h[np.isfinite(h.value.astype(float))].sort_values("value", ascending=False).head(TOP_DRIVERS)
            if h.empty:
                continue
            rows.append(dict(output=output, species=sp, order=0 if output.startswith("objective") else
                             2 - rank.get(roles.get(sp), 0), top=[f"{r.parameter} {_index_text(r)}" for _, r in h.iterrows()]))
        rows.sort(key=lambda r: r["order"])  # stable: declaration order within each rank
        out.append(dict(option=opt, rows=rows[:MAX_DRIVER_ROWS], omitted=max(len(rows) - MAX_DRIVER_ROWS, 0),
                        n=fmt_num(g.n.iloc[0]), conditional_on=g.conditional_on.iloc[0]))
    return out


def _screen_context(s: dict) -> dict | None:
    """One paragraph on the Saltelli screen of the prior box: what makes today's web implausible, convergence."""
    idx, cv = s.get("indices"), s.get("convergence")
    if idx is None or idx.empty:
        return None
    meta = s.get("sensitivity") if isinstance(s.get("sensitivity"), dict) else {}
    plaus = idx[(idx.metric == "plausible") & (idx.option == "baseline")]
    plaus = plaus[np.isfinite(plaus.ST.astype(float))].sort_values("ST", ascending=False).head(TOP_DRIVERS)
    drivers = "; ".join(f"{r.parameter} (total order {fmt_num(r.ST)} ± {fmt_num(r.ST_conf)})"
                        + (" — interval crosses 0 or 1" if r.ST - r.ST_conf < 0 or r.ST + r.ST_conf > 1 else "")
                        for _, r in plaus.iterrows())
    settled = cv is not None and bool(cv[(cv.option == "baseline") & (cv.metric == "plausible")].converged
                                      .astype(str).str.lower().isin(["true", "1", "yes"]).all())
    if drivers and not settled:
        # an unconverged ranking is no headline: say so in the same sentence
        drivers += " (NOT converged: indicative only)"
    bad = 0 if cv is None else int((~cv.converged.astype(str).str.lower().isin(["true", "1", "yes"])).sum())
    total = 0 if cv is None else len(cv)
    return dict(N=meta.get("N", "not recorded"), runs=meta.get("runs", "not recorded"), drivers=drivers,
                converged=f"{total - bad} of {total} outputs converged" if total else "convergence not recorded",
                bad=bad)


def hinges_text(res: Results) -> str:
    """Plain sentences for the terminal: what each objective's choice hinges on, and what drives each outcome."""
    s = res.sensitivity or {}
    info, drv = s.get("information"), s.get("drivers")
    lines = []
    if info is not None and not info.empty:
        lines += [t["sentence"] for t in _information_context(info)]
    if drv is not None and not drv.empty:
        for t in _drivers_context(drv):
            for r in t["rows"]:
                if r["output"].startswith("objective"):
                    name = r["output"].removeprefix("objective ").removesuffix(": good outcome")
                    lines.append(f"Under “{t['option']}”, whether {name} goes well depends mostly on "
                                 + " and ".join(r["top"][:2]) + " (share of its variance explained, with interval).")
    return "\n".join(lines)


def _sensitivity_context(res: Results, assets: Assets) -> dict | None:
    s = res.sensitivity
    if not s:
        return None
    info, drv = s.get("information"), s.get("drivers")
    return dict(information=_information_context(info) if info is not None and not info.empty else [],
                drivers=_drivers_context(drv, {x["name"]: x["role"] for x in res.manifest["species"]})
                if drv is not None and not drv.empty else [],
                screen=_screen_context(s), files=sorted(f"sensitivity/{k}.csv" for k, v in s.items()
                                                        if isinstance(v, pd.DataFrame)))


def _dynamics_context(res: Results, assets: Assets) -> dict | None:
    d = res.dynamics
    if not d:
        return None
    unit = res.manifest["time_unit"]
    ctx = dict(figures=[], shares=[], transitions=[], scan_run=False)
    sh = d.get("regime_shares")
    if sh is not None and not sh.empty:
        ctx["figures"].append(dict(src=assets.add("regimes.svg", regime_figure(sh), "image/svg+xml"),
                                   caption="Share of screened members in each dynamical regime, per option "
                                           "(long-run attractor, noise off; intervals in regime_shares.csv)."))
        for _, r in sh.iterrows():
            ctx["shares"].append(dict(option=r.option, regime=r.regime, share=share_text(r), count=fmt_num(r["count"]),
                                      lyapunov=fmt_num(r.lyapunov_median), horizon=fmt_num(r.horizon_median)))
    rg = d.get("regimes")
    if rg is not None and not rg.empty:
        ctx["figures"].append(dict(src=assets.add("lyapunov.png", distribution_figure(rg, unit), "image/png"),
                                   caption="Distribution over members of the largest Lyapunov exponent and of the "
                                           "predictability horizon, per option."))
    sc = d.get("scan")
    if sc is not None and not sc.empty:
        ctx["scan_run"] = True
        for k, p in enumerate(dict.fromkeys(sc.parameter)):
            ctx["figures"].append(dict(src=assets.add(f"scan-{k}.png", scan_figure(sc, p), "image/png"),
                                       caption=f"Bifurcation diagram: long-run section values as {p} is scanned."))
    tr = d.get("transitions")
    if tr is not None and not tr.empty:
        for _, r in tr.iterrows():
            ctx["transitions"].append(dict(parameter=r.parameter, between=f"{fmt_num(r.from_value)} – {fmt_num(r.to_value)}",
                                           change=f"{r.from_regime} → {r.to_regime}", kind=r.kind))
    return ctx


def report_context(res: Results, assets: Assets) -> dict:
    """Everything the template prints, already formatted from the saved numbers."""
    m = res.manifest
    counts = m["counts"]
    failed = {k: int(v.get("failed", 0)) for k, v in (counts.get("failed_by_option") or {}).items()}
    options = []
    for k, o in enumerate(m["options"]):
        colour = OPTION_COLOURS[k % len(OPTION_COLOURS)]
        options.append(dict(name=o["name"], description=o.get("description", ""), interventions=o.get("interventions", []),
                            touches=o["touches"], failed=failed.get(o["name"], 0),
                            figure=assets.add(f"bands-{k}.png", bands_figure(res, o["name"], colour), "image/png"),
                            risk=_risk_table(res, o["name"]), effects=_effects_table(res, o["name"])))
    thin, why = thin_run(m)
    verdict = reading(m, res.risk, res.effects, res.objectives, res.comparisons)
    warnings = cautions(m, res.objectives, why, res.dynamics, res.sensitivity)
    priors = [dict(name=r["name"], distribution=r.get("arguments", r.get("distribution", "")), unit=r.get("unit", ""),
                   source=r.get("source", ""), description=r.get("description", "")) for _, r in res.priors.iterrows()]
    failed_by_option = [dict(option=k, failed=v.get("failed", 0)) for k, v in (counts.get("failed_by_option") or {}).items()]
    return dict(
        m=m, case=m["case"], title=m["case"].get("title", ""), date=str(m.get("started_utc", ""))[:10],
        verdict=verdict, caution=m.get("caution", ""), warnings=[w.text for w in warnings],
        # the thin-run statement has its own box on page 1; the others that matter most go above the verdict
        top_warnings=[w.text for w in warnings if 0 < w.rank <= 3], judgement=m["judgement"],
        objectives=_objectives_context(res), comparisons=_comparisons_context(res), failed_baseline=failed.get("baseline", 0),
        species=m["species"], interactions=m.get("interactions") or [], equations=m.get("equations", []),
        foodweb=assets.add("foodweb.svg", food_web_svg(m), "image/svg+xml"), priors=priors, thin=thin,
        interventions=m.get("interventions", []), options=options, iucn=iucn_rows(res),
        sensitivity=_sensitivity_context(res, assets), dynamics=_dynamics_context(res, assets),
        counts=counts, failed_by_option=failed_by_option, fmt_num=fmt_num, fmt_prob=fmt_prob,
        horizons=[fmt_num(h) for h in m["horizons"]], kind_verbs={k: v[2] for k, v in KIND_STYLE.items()},
        command=" ".join(str(a) for a in m.get("command", [])), packages=m.get("packages", {}),
        assumptions=m.get("assumptions", []), plausibility=m.get("plausibility", ""),
    )


# ----------------------------------------------------------------------------- rendering

def template_root():
    """Folder holding report.html and its assets (installed package data or the source checkout)."""
    try:
        root = resources.files("impact.templates")
        if root.joinpath("report.html").is_file():
            return root
    except ModuleNotFoundError:
        pass
    root = Path(__file__).resolve().parent.parent / "templates"
    if (root / "report.html").is_file():
        return root
    raise CaseError("installation", "templates", "report templates not found; reinstall impact")


def template_assets(root) -> Assets:
    """Every stylesheet or image shipped beside the templates, by file name."""
    a = Assets()
    for entry in root.iterdir():
        mime = ASSET_TYPES.get(Path(entry.name).suffix)
        if mime and entry.is_file():
            a.add(entry.name, entry.read_bytes(), mime)
    return a


def _fetcher_class():
    from weasyprint.urls import URLFetcher, URLFetcherResponse

    class AssetFetcher(URLFetcher):
        """Serve only named assets; refuse files, network and every other scheme."""

        def __init__(self, assets: Assets):
            super().__init__(allowed_protocols=())
            self.assets = assets
            self.served: list[str] = []
            self.refused: list[str] = []

        def fetch(self, url, headers=None):
            name = url[len(ASSET_SCHEME):] if url.startswith(ASSET_SCHEME) else None
            if name is None or name not in self.assets.files:
                self.refused.append(url)
                raise ValueError(f"refused to fetch {url!r}: only the report's own assets are served")
            data, mime = self.assets.files[name]
            self.served.append(url)
            return URLFetcherResponse(url, body=data, headers={"Content-Type": mime})

    return AssetFetcher


def make_fetcher(assets: Assets):
    """A WeasyPrint URL fetcher serving ``assets`` only."""
    return _fetcher_class()(assets)


def render_pdf(html: str, assets: Assets):
    """Typeset HTML with the restricted fetcher; returns (pdf bytes, fetcher)."""
    import logging

    from weasyprint import HTML

    fetcher = make_fetcher(assets)
    # refused fetches are expected for hostile input; keep them out of the user's terminal
    logging.getLogger("weasyprint").setLevel(logging.ERROR)
    pdf = HTML(string=html, base_url=ASSET_SCHEME, url_fetcher=fetcher).write_pdf()
    return pdf, fetcher


def report_html(res: Results, paper: str = "a4") -> tuple[str, Assets]:
    """The filled template and the assets it links to."""
    import jinja2

    if paper not in PAPERS:
        raise CaseError("command line", "--paper", f"must be one of {', '.join(PAPERS)}")
    root = template_root()
    assets = template_assets(root)
    env = jinja2.Environment(loader=jinja2.FunctionLoader(lambda n: root.joinpath(n).read_text(encoding="utf-8")),
                             autoescape=True, undefined=jinja2.StrictUndefined, trim_blocks=True, lstrip_blocks=True)
    ctx = report_context(res, assets)
    html = env.get_template("report.html").render(**ctx, paper=PAPERS[paper], asset=ASSET_SCHEME)
    return html, assets


def write_report(results_dir, out=None, paper: str = "a4") -> Path:
    """Build the PDF from a saved results directory; written to a temporary name, then renamed."""
    res = load_results(results_dir)
    out = Path(out) if out is not None else Path(results_dir) / "report.pdf"
    html, assets = report_html(res, paper)
    pdf, _ = render_pdf(html, assets)
    from .results import write_file_atomic

    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        write_file_atomic(out, pdf)  # mode from the umask, like the tables beside it
    except OSError as exc:
        raise WriteError(exc.filename or out, f"cannot write the report ({exc.strerror or exc})") from None
    return out
