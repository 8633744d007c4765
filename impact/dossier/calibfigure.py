"""The report's calibration section: data against posterior predictive bands, prior against posterior.

Reads only the saved tables of ``calibration/`` and the manifest's ``calibration`` entry.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from impact.dossier.chart import mpl_text, new_figure, png_bytes
from impact.dossier.formatting import fmt_num, fmt_prob
from impact.store.manifest import Manifest

DATA_COLOUR = "#1c2833"
BAND_COLOUR = "#2471a3"
PRIOR_COLOUR = "#aab7b8"


def predictive_figure(pred: pd.DataFrame, species: str, unit: str, time_unit: str) -> bytes:
    """One monitored species: its data against the posterior predictive 50 % and 90 % bands."""
    g = pred[pred.species == species].sort_values("time")
    fig = new_figure(6.0, 2.2)
    ax = fig.add_subplot()
    ax.fill_between(g.time, g.q05, g.q95, color=BAND_COLOUR, alpha=0.18, linewidth=0, label="90 % predictive band")
    ax.fill_between(g.time, g.q25, g.q75, color=BAND_COLOUR, alpha=0.38, linewidth=0, label="50 % predictive band")
    ax.plot(g.time, g.q50, color=BAND_COLOUR, linewidth=1.2, label="predictive median")
    ax.plot(g.time, g.observed, "o", color=DATA_COLOUR, markersize=3.5, label="monitoring data")
    kind = str(g.kind.iloc[0]) if len(g) else "count"
    ax.set_ylabel(mpl_text(f"{kind} ({unit})" if kind == "index" and unit else kind), fontsize=8)
    ax.set_xlabel(mpl_text(f"{time_unit} (0 = today)"), fontsize=8)
    ax.set_title(mpl_text(species), fontsize=9)
    ax.tick_params(labelsize=7)
    ax.set_ylim(bottom=0)
    ax.legend(fontsize=6.5, loc="best", frameon=False)
    return png_bytes(fig, "sens")


def posterior_figure(post: pd.DataFrame) -> bytes:
    """Each parameter's 5–95 % interval, prior and posterior, placed on the prior's own 5–95 % range."""
    n = len(post)
    fig = new_figure(6.0, 0.32 * n + 1.0)
    ax = fig.add_subplot()
    for k, (_, r) in enumerate(post.iloc[::-1].iterrows()):
        lo, hi = float(r.prior_q05), float(r.prior_q95)
        span = hi - lo if hi > lo else 1.0

        def at(x):
            return (float(x) - lo) / span

        ax.plot([0, 1], [k + 0.15] * 2, color=PRIOR_COLOUR, linewidth=4, solid_capstyle="butt")
        ax.plot([at(r.posterior_q05), at(r.posterior_q95)], [k - 0.15] * 2, color=BAND_COLOUR, linewidth=4,
                solid_capstyle="butt")
        ax.plot([at(r.prior_q50)], [k + 0.15], "|", color=DATA_COLOUR, markersize=8)
        ax.plot([at(r.posterior_q50)], [k - 0.15], "|", color=DATA_COLOUR, markersize=8)
    ax.set_yticks(range(n), [mpl_text(p) for p in post.parameter.iloc[::-1]], fontsize=7)
    ax.set_xlabel("position within the prior's 5–95 % range (grey: prior, blue: posterior; ticks: medians)",
                  fontsize=7)
    ax.tick_params(axis="x", labelsize=7)
    ax.axvline(0, color=PRIOR_COLOUR, linewidth=0.5)
    ax.axvline(1, color=PRIOR_COLOUR, linewidth=0.5)
    return png_bytes(fig, "sens")


def calibration_context(manifest: Manifest, tables: dict | None, add) -> dict | None:
    """What the report's calibration section prints; ``add(name, bytes, mime)`` stores a figure.

    None when the ensemble was a plain rejection draw with no data (the section then says so).
    """
    cal = manifest.calibration or {}
    tables = tables or {}
    post, pred, gens = tables.get("posterior"), tables.get("predictive"), tables.get("generations")
    if post is None and pred is None and gens is None:
        return None
    units = {s.name: s.unit for s in manifest.species}
    ctx = dict(sampler=cal.get("sampler", ""), simulations=fmt_num(cal.get("simulations")),
               acceptance=fmt_prob(cal.get("acceptance", np.nan)),
               prior_acceptance=fmt_prob(cal.get("prior_acceptance", np.nan)),
               distinct=fmt_prob(cal.get("distinct", np.nan)), seconds=fmt_num(cal.get("seconds")),
               series=manifest.monitoring, limits=manifest.change_limits,
               figures=[], parameters=[], generations=[])
    if pred is not None and not pred.empty:
        for k, sp in enumerate(dict.fromkeys(pred.species)):
            g = pred[pred.species == sp]
            outside = int(((g.observed < g.q05) | (g.observed > g.q95)).sum())
            ctx["figures"].append(dict(
                src=add(f"predictive-{k}.png", predictive_figure(pred, sp, units.get(sp, ""), manifest.time_unit),
                        "image/png"),
                caption=f"Monitoring of {sp} against the calibrated ensemble's posterior predictive bands (replicate "
                        f"data drawn from the observation model, one per member); {outside} of {len(g)} observations "
                        "lie outside the 90 % band (about 1 in 10 is expected)."))
    if post is not None and not post.empty:
        ctx["figures"].append(dict(src=add("posterior.png", posterior_figure(post), "image/png"),
                                   caption="Prior against posterior, parameter by parameter: a shorter blue bar than "
                                           "grey means the data and constraints informed the parameter."))
        for _, r in post.iterrows():
            ctx["parameters"].append(dict(
                name=r.parameter, prior=f"{fmt_num(r.prior_q50)} [{fmt_num(r.prior_q05)}, {fmt_num(r.prior_q95)}]",
                posterior=f"{fmt_num(r.posterior_q50)} [{fmt_num(r.posterior_q05)}, {fmt_num(r.posterior_q95)}]",
                contraction=fmt_prob(max(float(r.contraction), 0.0)),
                informed="yes" if str(r.informed).lower() in ("true", "1") else "no"))
    if gens is not None and not gens.empty:
        for _, r in gens.iterrows():
            ctx["generations"].append(dict(
                generation=int(r.generation), tolerance=fmt_num(r.tolerance), temperature=fmt_num(r.temperature),
                ess=fmt_num(r.ess), acceptance="—" if pd.isna(r.acceptance) else fmt_prob(r.acceptance),
                steps=int(r.steps), simulations=fmt_num(r.simulations)))
    return ctx
