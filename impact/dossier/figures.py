"""The report's figures (matplotlib, PNG bytes) and the assets WeasyPrint may fetch."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from impact.dossier.chart import mpl_text, new_figure, png_bytes
from impact.store.results import Results

ASSET_SCHEME = "impact-asset:"
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


# margins of the band panels, inches: fixed, because the constrained layout engine measured every
# tick label of every panel twice and was most of the figure's cost; wide enough for a
# six-digit tick label and a unit beside it (matplotlib writes 10^6 and more with an exponent)
BAND_MARGINS = dict(left=0.75, right=0.12, top=0.3, bottom=0.5, between_columns=0.85, between_rows=0.45)
BAND_PANEL_HEIGHT = 1.9
BAND_WIDTH = 6.6


def bands_figure(res: Results, option: str, colour: str) -> bytes:
    """Median and 50 %/90 % bands per species, baseline and option on shared axes (PNG)."""
    return png_bytes(bands_drawing(res, option, colour), "bands")


def bands_drawing(res: Results, option: str, colour: str):
    """The matplotlib figure of :func:`bands_figure`."""
    from matplotlib.ticker import MaxNLocator

    m = res.manifest
    species = [s.name for s in m.species]
    units = {s.name: s.unit for s in m.species}
    ncol = 2 if len(species) > 1 else 1
    nrow = math.ceil(len(species) / ncol)
    height = BAND_PANEL_HEIGHT * nrow + 0.5
    fig = new_figure(BAND_WIDTH, height, layout=None)
    g = BAND_MARGINS
    panel_w = (BAND_WIDTH - g["left"] - g["right"] - (ncol - 1) * g["between_columns"]) / ncol
    panel_h = (height - g["top"] - g["bottom"] - (nrow - 1) * g["between_rows"]) / nrow
    fig.subplots_adjust(left=g["left"] / BAND_WIDTH, right=1 - g["right"] / BAND_WIDTH, top=1 - g["top"] / height,
                        bottom=g["bottom"] / height, wspace=g["between_columns"] / panel_w,
                        hspace=g["between_rows"] / panel_h)
    axes = fig.subplots(nrow, ncol, sharex=True, squeeze=False)
    levels = objective_levels(m)
    ivs = {iv.name: iv for iv in m.interventions}
    chosen = next((o.interventions for o in m.options if o.name == option), ())
    runs = {key: b.sort_values("time") for key, b in res.bands[res.bands.option.isin(["baseline", option])]
            .groupby(["option", "species"], sort=False)}
    for k, sp in enumerate(species):
        ax = axes[k // ncol][k % ncol]
        for name, col in (("baseline", BASELINE_COLOUR), (option, colour)):
            b = runs.get((name, sp))
            if b is None or b.empty:
                continue
            t = b.time.to_numpy(float)
            ax.fill_between(t, b.q05.to_numpy(float), b.q95.to_numpy(float), color=col, alpha=0.15, linewidth=0)
            ax.fill_between(t, b.q25.to_numpy(float), b.q75.to_numpy(float), color=col, alpha=0.35, linewidth=0)
            ax.plot(t, b.q50.to_numpy(float), color=col, linewidth=1.4, label=mpl_text(name))
        for ivn in chosen:
            iv = ivs.get(ivn)
            if iv is not None:
                ax.axvline(iv.start, color="#7f8c8d", linewidth=0.7, linestyle=":")
        for level, label in levels.get(sp, ()):
            ax.axhline(level, color="#1c2833", linewidth=0.8, linestyle="--")
            ax.text(0.99, level, mpl_text(label), transform=ax.get_yaxis_transform(), ha="right", va="bottom",
                    fontsize=6, color="#1c2833")
        # an explicit title height: matplotlib otherwise measures the axis below it to place the title
        ax.set_title(mpl_text(sp), fontsize=9, y=1.0)
        ax.set_ylabel(mpl_text(units.get(sp, "")), fontsize=7)
        ax.tick_params(labelsize=7)
        ax.yaxis.set_major_locator(MaxNLocator(nbins=4))
        ax.xaxis.set_major_locator(MaxNLocator(nbins=5))
        top = max([ax.get_ylim()[1]] + [1.15 * lv for lv, _ in levels.get(sp, ())])
        ax.set_ylim(0, top)
    for k in range(len(species), nrow * ncol):
        axes[k // ncol][k % ncol].axis("off")
        if nrow > 1:  # the panel above an empty slot is the lowest of its column: it carries the time axis
            above = axes[k // ncol - 1][k % ncol]
            above.xaxis.set_tick_params(labelbottom=True)
            above.set_xlabel(mpl_text(m.time_unit), fontsize=8)
    for ax in axes[-1]:
        ax.set_xlabel(mpl_text(m.time_unit), fontsize=8)
    axes[0][0].legend(fontsize=7, loc="best")
    return fig


def objective_levels(m) -> dict[str, list[tuple[float, str]]]:
    """Per species, the levels its objectives are judged against, with a short label: the abundance
    level of an abundance objective, else the species' quasi-extinction or outbreak level."""
    sp = {s.name: s for s in m.species}
    out: dict[str, list[tuple[float, str]]] = {}
    for o in m.objectives:
        s = sp.get(o.species)
        level = (o.level if o.measure == "abundance" else s.quasi_extinction if o.measure == "quasi_extinction"
                 else s.outbreak) if s is not None else None
        if level is None or not np.isfinite(level) or level <= 0:
            continue
        what = {"abundance": "level", "quasi_extinction": "quasi-extinction", "outbreak": "outbreak"}[o.measure]
        out.setdefault(o.species, []).append((float(level), f"“{o.name}”: {what} {level:g}"))
    return out


def regime_figure(shares: pd.DataFrame) -> bytes:
    """Share of members in each dynamical regime, per option."""
    opts = list(dict.fromkeys(shares.option))
    fig = new_figure(6.0, 0.3 * len(opts) + 0.9)
    ax = fig.add_subplot()
    left = np.zeros(len(opts))
    for reg in dict.fromkeys(shares.regime):
        vals = np.array([shares[(shares.option == o) & (shares.regime == reg)].share.sum() for o in opts])
        ax.barh(range(len(opts)), vals, left=left, color=REGIME_COLOURS.get(reg, "#95a5a6"), label=mpl_text(reg))
        left += vals
    ax.set_yticks(range(len(opts)), [mpl_text(o) for o in opts], fontsize=8)
    ax.set_xlim(0, 1)
    ax.set_xlabel("share of members", fontsize=8)
    ax.tick_params(labelsize=7)
    ax.legend(fontsize=7, ncol=5, loc="upper center", bbox_to_anchor=(0.5, -0.25), frameon=False)
    return png_bytes(fig, "dyn")


HORIZON_BINS = 20
EMPTY_PANEL_STYLE = dict(ha="center", va="center", fontsize=8, color="#566573", wrap=True)


def _empty_panel(ax, sentence: str) -> None:
    """A sentence in place of a panel with nothing to draw."""
    ax.set_xticks([])
    ax.set_yticks([])
    ax.text(0.5, 0.5, sentence, transform=ax.transAxes, **EMPTY_PANEL_STYLE)


def distribution_figure(regimes: pd.DataFrame, unit: str, horizon: float) -> bytes:
    """Histograms of the largest Lyapunov exponent and of the predictability horizon, per option (PNG)."""
    return png_bytes(distribution_drawing(regimes, unit, horizon), "dyn")


def distribution_drawing(regimes: pd.DataFrame, unit: str, horizon: float):
    """The matplotlib figure of :func:`distribution_figure`.

    The horizon axis stops at the assessment horizon: members predictable beyond it (an infinite
    horizon included) are one bar per option past a dashed line, labelled "beyond". A panel with
    nothing to draw holds a sentence saying so.
    """
    fig = new_figure(6.6, 2.2)
    axes = fig.subplots(1, 2)
    H = float(horizon)
    edges = np.linspace(0.0, H, HORIZON_BINS + 1)
    opts = list(dict.fromkeys(regimes.option))
    beyond_x, width = H * 1.2, 1.5 * H / HORIZON_BINS  # one bar per option, side by side, past the horizon
    drawn = [False, False]
    for k, opt in enumerate(opts):
        r = regimes[regimes.option == opt]
        col = BASELINE_COLOUR if opt == "baseline" else OPTION_COLOURS[(k - 1) % len(OPTION_COLOURS)]
        lam = r.lyapunov.to_numpy(float)
        lam = lam[np.isfinite(lam)]
        if lam.size:
            axes[0].hist(lam, bins=30, histtype="step", color=col, label=mpl_text(opt), linewidth=1.2)
            drawn[0] = True
        h = r.horizon_time.to_numpy(float)
        h = h[~np.isnan(h)]
        if h.size:
            within = h[h <= H]
            if within.size:
                axes[1].hist(within, bins=edges, histtype="step", color=col, linewidth=1.2)
            axes[1].bar(beyond_x + (k - (len(opts) - 1) / 2) * width / len(opts), int((h > H).sum()),
                        width=width / len(opts), fill=False, edgecolor=col, linewidth=1.2, hatch="//")
            drawn[1] = True
    axes[0].set_xlabel(f"largest Lyapunov exponent (1/{mpl_text(unit)})", fontsize=8)
    axes[1].set_xlabel(f"predictability horizon ({mpl_text(unit)})", fontsize=8)
    if drawn[1]:
        axes[1].axvline(H, color="#1c2833", linestyle="--", linewidth=0.8)
        axes[1].set_xlim(0, beyond_x + width)
        ticks = [t for t in axes[1].get_xticks() if 0 <= t < H * 0.8] + [H, beyond_x]
        axes[1].set_xticks(ticks, [f"{t:g}" for t in ticks[:-2]] + [f"{H:g}", "beyond"])
    else:
        _empty_panel(axes[1], "No member has a predictability horizon\n(none was diagnosed).")
    if not drawn[0]:
        _empty_panel(axes[0], "No member has a finite Lyapunov exponent\n(none was diagnosed).")
    from matplotlib.ticker import MaxNLocator

    axes[0].xaxis.set_major_locator(MaxNLocator(nbins=4))  # tick labels that never run together
    for ax, d in zip(axes, drawn):
        if d:
            ax.set_ylabel("members", fontsize=8)
            ax.tick_params(labelsize=7)
    if drawn[0]:
        axes[0].legend(fontsize=7)
    return fig


def scan_figure(scan: pd.DataFrame, parameter: str) -> bytes:
    """Bifurcation diagram: section values against the scanned parameter, coloured by regime."""
    s = scan[scan.parameter == parameter]
    fig = new_figure(6.0, 3.0)
    ax = fig.add_subplot()
    for reg in dict.fromkeys(s.regime):
        r = s[s.regime == reg]
        ax.scatter(r.value, r.section_value, s=2, color=REGIME_COLOURS.get(reg, "#95a5a6"), label=mpl_text(reg), linewidths=0)
    ax.set_xlabel(mpl_text(parameter), fontsize=8)
    ax.set_ylabel("section value", fontsize=8)
    ax.tick_params(labelsize=7)
    ax.legend(fontsize=7, markerscale=4)
    return png_bytes(fig, "dyn")



@dataclass
class Assets:
    """Named bytes served to WeasyPrint under ``impact-asset:NAME``."""

    files: dict = field(default_factory=dict)  # name -> (bytes, mime type)

    def add(self, name: str, data: bytes, mime: str) -> str:
        self.files[name] = (data, mime)
        return ASSET_SCHEME + name


