"""The figure of "Which study to fund": each study's EVSI against its sample size, under its ceiling."""

from __future__ import annotations

import numpy as np
import pandas as pd

from impact.dossier.chart import mpl_text, new_figure, png_bytes
from impact.dossier.figures import OPTION_COLOURS

PANEL_WIDTH = 1.65  # inches per study; four studies fill the text width
HEIGHT = 1.5


def study_sizes_figure(sizes: pd.DataFrame, objective: str) -> bytes:
    """EVSI (points, with their bootstrap interval) against sample size, one panel per study (PNG).

    ``sizes`` is ``sensitivity/study_sizes.csv``; only the rows of ``objective`` are drawn. The dashed
    line is the study's ceiling, the EVPPI of what it measures (EVSI tends to it as the sample grows); the
    declared size is the filled point.
    """
    s = sizes[sizes.objective == objective]
    studies = list(dict.fromkeys(s.study))
    n = max(1, len(studies))
    fig = new_figure(min(6.6, PANEL_WIDTH * n + 0.4), HEIGHT)
    axes = np.atleast_1d(fig.subplots(1, n, sharey=True, squeeze=False)[0])
    unit = str(s.unit.iloc[0]) if len(s) else ""
    for k, (ax, name) in enumerate(zip(axes, studies)):
        g = s[s.study == name].sort_values("samples")
        x = g.samples.to_numpy(float)
        y = g.evsi.to_numpy(float)
        col = OPTION_COLOURS[k % len(OPTION_COLOURS)]
        err = np.vstack([np.maximum(y - g.low.to_numpy(float), 0), np.maximum(g.high.to_numpy(float) - y, 0)])
        ax.errorbar(x, y, yerr=err, color=col, marker="o", markersize=3, markerfacecolor="white", linewidth=1,
                    elinewidth=0.8, capsize=2)
        d = g[g.declared.astype(str) == "True"]  # read back as text
        ax.plot(d.samples, d.evsi, "o", color=col, markersize=4)
        ax.axhline(float(g.ceiling.iloc[0]), color="#1c2833", linestyle="--", linewidth=0.8)
        ax.set_xscale("log")
        ax.set_xticks(x, [f"{v:g}" for v in x])
        ax.minorticks_off()
        ax.set_title(mpl_text(_wrap(name)), fontsize=7)
        ax.set_xlabel("sample size", fontsize=7)
        ax.tick_params(labelsize=6)
        ax.set_ylim(bottom=0)
    axes[0].set_ylabel(mpl_text(f"EVSI ({unit})" if len(unit) < 20 else "EVSI"), fontsize=7)
    return png_bytes(fig, "sens")


def _wrap(name: str, width: int = 22) -> str:
    """A study's name on at most two lines."""
    if len(name) <= width:
        return name
    cut = name.rfind(" ", 0, width + 1)
    cut = cut if cut > 0 else width
    return name[:cut] + "\n" + name[cut:].strip()
