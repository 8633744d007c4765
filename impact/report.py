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

from .errors import CaseError, ReadError, WriteError
from .iucn import CATEGORY_NAMES, criterion_e_in_units

ASSET_SCHEME = "impact-asset:"
PAPERS = {"a4": "A4", "letter": "letter"}
ASSET_TYPES = {".css": "text/css", ".svg": "image/svg+xml", ".png": "image/png"}
TEXT_COLUMNS = {
    "option", "species", "metric", "unit", "parameter", "regime", "name", "distribution", "arguments",
    "source", "description", "conditional_on", "parameter_i", "parameter_j", "from_regime", "to_regime",
    "kind", "failure", "failed", "converged", "uncertain",
}
RISK_METRICS = (
    ("quasi_extinction", "Quasi-extinction probability"),
    ("expected_minimum", "Expected minimum abundance"),
    ("mean_change", "Paired change in mean abundance"),
    ("outbreak", "Outbreak probability"),
    ("recovery_time", "Recovery time (median [5 %, 95 %])"),
    ("not_recovered", "Probability of no recovery within the horizon"),
)
PROBABILITY_METRICS = {"quasi_extinction", "outbreak", "not_recovered"}
KIND_STYLE = {
    "predation": ("#c0392b", "-", "eats"),
    "scavenging": ("#8e5b2e", "-", "scavenges"),
    "competition": ("#555555", "--", "competes with"),
    "mutualism": ("#1e8449", "-", "benefits"),
}
OPTION_COLOURS = ("#d35400", "#2471a3", "#7d3c98", "#117a65", "#b7950b", "#a93226")
BASELINE_COLOUR = "#566573"
REGIME_COLOURS = {"equilibrium": "#2e86c1", "cycle": "#28b463", "irregular": "#f39c12",
                  "chaotic": "#c0392b", "extinction": "#1c2833"}
MAX_SENSITIVITY_FIGURES = 8


# ----------------------------------------------------------------------------- formatting

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


def fmt_prob(v) -> str:
    """A saved probability as printed: a percentage with one decimal."""
    v = float(v)
    return "n/a" if math.isnan(v) else f"{100 * v:.1f}\u00a0%"


def fmt_change(v) -> str:
    """A saved relative change as printed: a signed whole percentage."""
    v = float(v)
    return "n/a" if math.isnan(v) else ("+∞ %" if math.isinf(v) else f"{100 * v:+.0f}\u00a0%")


def fmt_cell(metric: str, value, low, high) -> str:
    """Value with its interval, in the style of the metric."""
    if metric in PROBABILITY_METRICS:
        lo, hi = (fmt_prob(x).replace("\u00a0%", "") for x in (low, high))
        return f"{fmt_prob(value)} [{lo}, {hi}]"
    if metric == "mean_change":
        return f"{fmt_change(value)} [{fmt_change(low)}, {fmt_change(high)}]"
    return f"{fmt_num(value)} [{fmt_num(low)}, {fmt_num(high)}]"


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
                   read_table(path / "priors.csv"), _read_stage(path / "sensitivity"), _read_stage(path / "dynamics"))


# ----------------------------------------------------------------------------- derived readings

def _row(risk: pd.DataFrame, option: str, species: str, metric: str, horizon: float):
    r = risk[(risk.option == option) & (risk.species == species) & (risk.metric == metric)
             & np.isclose(risk.horizon, horizon)]
    return None if r.empty else r.iloc[0]


def option_names(m: dict) -> list[str]:
    return [o["name"] for o in m["options"]]


def verdict(res: Results, option: str) -> str:
    """One line per option from the saved quasi-extinction probabilities at the last horizon.

    A species counts as raised (lowered) when the option's interval lies wholly above (below)
    the baseline's; otherwise the change is not clear at the saved confidence level.
    """
    m = res.manifest
    H = max(m["horizons"])
    up, down, flat = [], [], []
    for sp in (s["name"] for s in m["species"]):
        o, b = _row(res.risk, option, sp, "quasi_extinction", H), _row(res.risk, "baseline", sp, "quasi_extinction", H)
        if o is None or b is None:
            continue
        text = f"{sp} ({fmt_prob(b.value)} → {fmt_prob(o.value)})"
        if o.low > b.high:
            up.append(text)
        elif o.high < b.low:
            down.append(text)
        else:
            flat.append(sp)
    parts = []
    if up:
        parts.append("raises quasi-extinction risk for " + ", ".join(up))
    if down:
        parts.append("lowers it for " + ", ".join(down))
    if flat:
        parts.append("no clear change for " + ", ".join(flat))
    if not parts:
        return f"{option}: no quasi-extinction probabilities were saved."
    return f"{option}, by {fmt_num(H)} {m['time_unit']} (baseline → option): " + "; ".join(parts) + "."


def warnings_from_results(res: Results) -> list[str]:
    """Specific warnings read from the saved counts, regimes and convergence verdicts."""
    m = res.manifest
    c = m["counts"]
    out = []
    if m["case"].get("invented"):
        out.append("The case file is marked INVENTED: it is an example, not real site data.")
    tried, kept, wanted = c.get("tried", 0), c.get("kept", 0), c.get("wanted", c.get("kept", 0))
    if kept < wanted:
        out.append(f"Only {kept} of the {wanted} wanted plausible members were found within the draw limit; "
                   "intervals are wider than planned.")
    # more than half of the draws rejected: a rule of thumb for priors at odds with what is observed
    if tried and kept / tried < 0.5:
        out.append(f"High share of implausible draws: {kept} of {tried} draws tried were kept "
                   f"({c.get('failed', 0)} failed numerically, {c.get('extinct', 0)} lost a species, "
                   f"{c.get('out_of_range', 0)} lay outside an observed range). The priors and the observations disagree.")
    elif c.get("failed", 0):
        out.append(f"{c['failed']} of {tried} draws failed numerically during spin-up and were not kept.")
    for opt, f in (c.get("failed_by_option") or {}).items():
        if f.get("failed"):
            reasons = ", ".join(f"{k}: {v}" for k, v in f.items() if k != "failed")
            out.append(f"{f['failed']} of {kept} members failed numerically under {opt}"
                       + (f" ({reasons})" if reasons else "") + "; they are counted, not dropped silently.")
    dyn = res.dynamics or {}
    shares = dyn.get("regime_shares")
    if shares is not None and not shares.empty:
        for _, r in shares.iterrows():
            if r.regime in ("chaotic", "irregular", "cycle") and r.share > 0:
                what = "cycling" if r.regime == "cycle" else r.regime
                finite = "horizon_median" in r and not pd.isna(r.horizon_median) and np.isfinite(r.horizon_median)
                if finite:
                    out.append(f"Under {r.option}, {fmt_prob(r.share)} of members are {what}; median predictability "
                               f"horizon {fmt_num(r.horizon_median)} {m['time_unit']}: individual trajectories cannot "
                               "be predicted further ahead; read the bands, not single runs.")
                else:
                    out.append(f"Under {r.option}, {fmt_prob(r.share)} of members are {what}: errors in today's state "
                               "do not grow exponentially, but the timing of peaks and troughs is uncertain; read the "
                               "bands, not single runs.")
    sens = res.sensitivity or {}
    conv = sens.get("convergence")
    if conv is not None and not conv.empty:
        bad = conv[conv.converged.astype(str).str.lower().isin(["false", "0", "no"])]
        # one line per option: a reviewer needs the extent, the full list is in convergence.csv
        for opt, g in bad.groupby("option", sort=False):
            total = int((conv.option == opt).sum())
            names = [f"{r.metric} of {r.species}" for _, r in g.head(4).iterrows()]
            more = f" and {len(g) - len(names)} more" if len(g) > len(names) else ""
            out.append(f"Under {opt}, the sensitivity indices of {len(g)} of {total} outputs did not converge "
                       f"(interval width or N/2 shift above the tolerance of {fmt_num(g.tolerance.iloc[0])}), e.g. "
                       f"{', '.join(names)}{more}; their rankings are provisional (list in sensitivity/convergence.csv).")
    meta = sens.get("sensitivity")
    if isinstance(meta, dict) and meta.get("failures"):
        f = meta["failures"]
        if isinstance(f, dict):
            by_opt = f.get("points_failed_by_option", {}) or {}
            n_failed = sum(int(v) for v in by_opt.values())
            if n_failed or f.get("refused_outputs"):
                out.append(f"{n_failed} sensitivity design runs failed numerically across options "
                           f"({', '.join(f'{k}: {v}' for k, v in by_opt.items())}) and "
                           f"{f.get('refused_outputs', 0)} outputs were refused for too many failures.")
        else:
            out.append(f"{f} of {meta.get('runs', '?')} sensitivity runs failed numerically.")
    return out


def iucn_rows(res: Results) -> list[dict]:
    """Indicative criterion E reading per option and species with a generation time."""
    m = res.manifest
    rows = []
    for opt in ["baseline", *option_names(m)]:
        for s in m["species"]:
            if s.get("generation_time") is None:
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


def food_web_figure(m: dict) -> bytes:
    """Nodes for the species (and the carrion pool), arrows for the saved interactions."""
    from matplotlib.lines import Line2D
    from matplotlib.patches import FancyArrowPatch

    inter = m.get("interactions") or []
    names = [s["name"] for s in m["species"]]
    for it in inter:
        for end in (it["from"], it["to"]):
            if end not in names:
                names.append(end)
    n = len(names)
    ang = np.pi / 2 - 2 * np.pi * np.arange(n) / max(n, 1)
    pos = {nm: (np.cos(a), np.sin(a)) for nm, a in zip(names, ang)}
    fig = _figure(6.0, 4.2)
    ax = fig.add_subplot()
    ax.set_aspect("equal")
    ax.axis("off")
    for it in inter:
        colour, style, _ = KIND_STYLE.get(it["kind"], ("#000000", ":", it["kind"]))
        a, b = np.array(pos[it["from"]]), np.array(pos[it["to"]])
        arrow = FancyArrowPatch(a, b, arrowstyle="-|>", mutation_scale=14, color=colour, linestyle=style,
                                linewidth=1.6, connectionstyle="arc3,rad=0.18", shrinkA=22, shrinkB=22)
        ax.add_patch(arrow)
        if it.get("response"):
            mid = (a + b) / 2
            perp = np.array([-(b - a)[1], (b - a)[0]]) * 0.16
            ax.text(*(mid - perp), {"holling1": "I", "holling2": "II", "holling3": "III"}.get(it["response"], _label(it["response"])),
                    fontsize=7, color=colour, ha="center", va="center",
                    bbox=dict(boxstyle="round,pad=0.1", fc="white", ec="none"))
    present = {s["name"]: s.get("present", True) for s in m["species"]}
    for nm, (x, y) in pos.items():
        face = "#fdfefe" if present.get(nm, True) else "#eaeded"
        ax.text(x, y, _label(nm), ha="center", va="center", fontsize=9,
                bbox=dict(boxstyle="round,pad=0.4", fc=face, ec="#1c2833", lw=1))
    ax.set_xlim(-1.45, 1.45)
    ax.set_ylim(-1.3, 1.3)
    kinds = sorted({it["kind"] for it in inter})
    handles = [Line2D([], [], color=KIND_STYLE.get(k, ("#000", ":", k))[0], linestyle=KIND_STYLE.get(k, ("#000", ":", k))[1],
                      label=f"{k}: arrow from the one that {KIND_STYLE.get(k, ('', '', 'acts on'))[2]} the other") for k in kinds]
    if handles:
        ax.legend(handles=handles, loc="lower center", bbox_to_anchor=(0.5, -0.14), fontsize=7, frameon=False, ncol=1)
    return _svg(fig)


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


def sensitivity_figure(group: pd.DataFrame, title: str) -> bytes:
    """First-order and total-order indices with their confidence half-widths."""
    g = group.sort_values("ST", ascending=True)
    y = np.arange(len(g))
    fig = _figure(6.0, 0.32 * len(g) + 1.1)
    ax = fig.add_subplot()
    ax.barh(y + 0.18, g.ST, height=0.36, xerr=g.ST_conf, color="#2471a3", label="total order ST", error_kw=dict(lw=0.8))
    ax.barh(y - 0.18, g.S1, height=0.36, xerr=g.S1_conf, color="#f5b041", label="first order S1", error_kw=dict(lw=0.8))
    ax.set_yticks(y, [_label(p) for p in g.parameter], fontsize=7)
    ax.axvline(0, color="black", linewidth=0.6)
    ax.set_xlabel("Sobol index", fontsize=8)
    ax.tick_params(labelsize=7)
    ax.set_title(_label(title), fontsize=9)
    ax.legend(fontsize=7, loc="lower right")
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


def _risk_table(res: Results, option: str) -> dict:
    m = res.manifest
    hs = list(m["horizons"])
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
                cells.append(dict(option=fmt_cell(metric, o.value, o.low, o.high),
                                  baseline=None if b is None else fmt_cell(metric, b.value, b.low, b.high),
                                  unit="" if metric in PROBABILITY_METRICS or metric == "mean_change" else o.unit))
            if any_value:
                rows.append(dict(species=sp, metric=label, cells=cells))
    return dict(horizons=[fmt_num(h) for h in hs], rows=rows)


def _sensitivity_context(res: Results, assets: Assets) -> dict | None:
    s = res.sensitivity
    if not s:
        return None
    ctx = dict(meta=s.get("sensitivity") if isinstance(s.get("sensitivity"), dict) else {}, figures=[], rankings=[],
               convergence=[], omitted=0)
    idx = s.get("indices")
    if idx is not None and not idx.empty:
        groups = list(idx.groupby(["option", "metric", "species"], sort=False))
        for k, ((opt, metric, sp), g) in enumerate(groups):
            if k >= MAX_SENSITIVITY_FIGURES:
                ctx["omitted"] = len(groups) - MAX_SENSITIVITY_FIGURES
                break
            cond = g.conditional_on.iloc[0] if "conditional_on" in g and str(g.conditional_on.iloc[0]) not in ("", "nan") else ""
            title = f"{metric} of {sp} under {opt}"
            ctx["figures"].append(dict(src=assets.add(f"sens-{k}.png", sensitivity_figure(g, title), "image/png"),
                                       caption=f"Sobol indices (first and total order, bars ± confidence) of {title}"
                                               + (f", conditional on {cond}" if cond else "")
                                               + (f"; N = {fmt_num(g.N.iloc[0])}" if "N" in g else "") + "."))
    rk = s.get("ranking")
    if rk is not None and not rk.empty:
        for (opt, metric, sp), g in rk.groupby(["option", "metric", "species"], sort=False):
            ctx["rankings"].append(dict(title=f"{metric} of {sp} under {opt}", rows=[
                dict(rank=fmt_num(r["rank"]), parameter=r.parameter, ST=f"{fmt_num(r.ST)} ± {fmt_num(r.ST_conf)}",
                     S1=fmt_num(r.S1), interaction=fmt_num(r.interaction)) for _, r in g.sort_values("rank").iterrows()]))
    cv = s.get("convergence")
    if cv is not None and not cv.empty:
        for _, r in cv.iterrows():
            ok = str(r.converged).lower() in ("true", "1", "yes")
            ctx["convergence"].append(dict(option=r.option, metric=r.metric, species=r.species,
                                           shift=fmt_num(r.max_shift), width=fmt_num(r.max_ci_width),
                                           tolerance=fmt_num(r.tolerance), verdict="converged" if ok else "NOT converged"))
    return ctx


def _dynamics_context(res: Results, assets: Assets) -> dict | None:
    d = res.dynamics
    if not d:
        return None
    unit = res.manifest["time_unit"]
    ctx = dict(figures=[], shares=[], transitions=[], scan_run=False)
    sh = d.get("regime_shares")
    if sh is not None and not sh.empty:
        ctx["figures"].append(dict(src=assets.add("regimes.svg", regime_figure(sh), "image/svg+xml"),
                                   caption="Share of members in each dynamical regime, per option."))
        for _, r in sh.iterrows():
            ctx["shares"].append(dict(option=r.option, regime=r.regime, share=fmt_prob(r.share), count=fmt_num(r["count"]),
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
    opts = option_names(m)
    counts = m["counts"]
    options = []
    for k, o in enumerate(m["options"]):
        colour = OPTION_COLOURS[k % len(OPTION_COLOURS)]
        options.append(dict(name=o["name"], description=o.get("description", ""), interventions=o.get("interventions", []),
                            figure=assets.add(f"bands-{k}.png", bands_figure(res, o["name"], colour), "image/png"),
                            risk=_risk_table(res, o["name"])))
    priors = [dict(name=r["name"], distribution=r.get("arguments", r.get("distribution", "")), unit=r.get("unit", ""),
                   source=r.get("source", ""), description=r.get("description", "")) for _, r in res.priors.iterrows()]
    failed_by_option = [dict(option=k, failed=v.get("failed", 0)) for k, v in (counts.get("failed_by_option") or {}).items()]
    return dict(
        m=m, case=m["case"], title=m["case"].get("title", ""), date=str(m.get("started_utc", ""))[:10],
        verdicts=[verdict(res, o) for o in opts], caution=m.get("caution", ""), warnings=warnings_from_results(res),
        species=m["species"], interactions=m.get("interactions") or [], equations=m.get("equations", []),
        foodweb=assets.add("foodweb.svg", food_web_figure(m), "image/svg+xml"), priors=priors,
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
