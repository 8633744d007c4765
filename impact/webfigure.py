"""The food-web diagram a reviewer recognises: trophic levels bottom to top, energy flowing upwards.

Species are placed by trophic level (Levine 1980, as computed by networkx: producers and the carrion
pool at level 1, a consumer one level above the mean of what it eats); arrows of feeding links point
from the resource to the consumer, the way energy flows; every link carries a label; species that an
option's interventions act on are drawn with a heavy outline and listed in the legend.
"""

from __future__ import annotations

import io
from typing import Sequence

import networkx as nx
import numpy as np

from .chart import mpl_text
from .manifest import InteractionRecord, Manifest

FEEDING = ("predation", "scavenging", "alternative-food")
KIND_STYLE = {
    "predation": ("#c0392b", "-"),
    "scavenging": ("#8e5b2e", "-"),
    "alternative-food": ("#8e5b2e", "--"),
    "competition": ("#555555", "--"),
    "mutualism": ("#1e8449", "-"),
    "life-stage": ("#7d3c98", ":"),
}
RESPONSE_LABELS = {"holling1": "Holling I", "holling2": "Holling II", "holling3": "Holling III",
                   "beddington-deangelis": "Beddington–DeAngelis"}
TOUCHED_COLOUR = "#d35400"


def trophic_positions(names: list[str], links: Sequence[InteractionRecord]) -> tuple[dict, dict]:
    """Trophic level and (x, y) position of every node.

    Parameters
    ----------
    names : list of str
        Species (and the carrion pool) in declaration order.
    links : sequence of InteractionRecord
        Saved interactions (``kind``, ``actor``: the consumer or actor, ``target``).

    Returns
    -------
    levels, positions : dict of str -> float, dict of str -> (float, float)
    """
    g = nx.DiGraph()
    g.add_nodes_from(names)
    for it in links:
        if it.kind in FEEDING:
            g.add_edge(it.target, it.actor)  # resource → consumer
    try:
        levels = {k: float(v) for k, v in nx.trophic_levels(g).items()}
    except (nx.NetworkXError, np.linalg.LinAlgError, ZeroDivisionError):
        levels = {n: 1.0 for n in names}  # a web without a basal node: draw it flat rather than fail
    rows: dict[int, list[str]] = {}
    for n in names:
        rows.setdefault(int(round(levels[n])), []).append(n)
    pos = {}
    for lvl, members in rows.items():
        xs = np.linspace(-1, 1, len(members) + 2)[1:-1] if len(members) > 1 else [0.0]
        # stagger alternate rows so vertical arrows do not hide each other
        shift = 0.12 if lvl % 2 else 0.0
        for x, n in zip(xs, members):
            pos[n] = (float(x) + shift, float(levels[n]))
    return levels, pos


def food_web_svg(m: Manifest) -> bytes:
    """The diagram as SVG, from the manifest's species, interactions and options."""
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D
    from matplotlib.patches import FancyArrowPatch

    links = m.interactions
    names = [s.name for s in m.species]
    for it in links:
        for end in (it.actor, it.target):
            if end not in names:
                names.append(end)
    levels, pos = trophic_positions(names, links)
    touched: dict[str, list[str]] = {}
    for o in m.options:
        for sp in o.touches:
            touched.setdefault(sp, []).append(o.name)
    roles = {s.name: s.role for s in m.species}
    fig = Figure(figsize=(6.4, 1.4 + 1.15 * max(1.0, max(levels.values()))))
    fig.set_layout_engine("constrained")
    ax = fig.add_subplot()
    ax.axis("off")
    for it in links:
        colour, style = KIND_STYLE.get(it.kind, ("#000000", ":"))
        src, dst = (it.target, it.actor) if it.kind in FEEDING else (it.actor, it.target)
        a, b = np.array(pos[src]), np.array(pos[dst])
        both = "<|-|>" if it.kind == "competition" else "-|>"
        ax.add_patch(FancyArrowPatch(a, b, arrowstyle=both, mutation_scale=12, color=colour, linestyle=style,
                                     linewidth=1.4, connectionstyle="arc3,rad=0.12", shrinkA=16, shrinkB=16))
        if it.kind in FEEDING:
            label = RESPONSE_LABELS.get(it.response or "", it.kind)
        else:  # a mutualism saved with response "obligate" is drawn as such
            label = f"{it.response} {it.kind}" if it.response == "obligate" else it.kind
        mid = (a + b) / 2 + np.array([0.04, 0.0])
        ax.text(*mid, mpl_text(label), fontsize=6, color=colour, ha="center", va="center",
                bbox=dict(boxstyle="round,pad=0.1", fc="white", ec="none", alpha=0.85))
    present = {s.name: s.present for s in m.species}
    for n, (x, y) in pos.items():
        tag = {"target": "\n(target)", "protected": "\n(protected)"}.get(roles.get(n, "other"), "")
        edge = TOUCHED_COLOUR if n in touched else "#1c2833"
        ax.text(x, y, mpl_text(n) + tag, ha="center", va="center", fontsize=8,
                bbox=dict(boxstyle="round,pad=0.35", fc="#fdfefe" if present.get(n, True) else "#eaeded", ec=edge,
                          lw=2.4 if n in touched else 0.9))
    ys = [p[1] for p in pos.values()]
    ax.set_xlim(-1.35, 1.45)
    ax.set_ylim(min(ys) - 0.45, max(ys) + 0.45)
    ax.set_ylabel("trophic level")
    handles = [Line2D([], [], color=KIND_STYLE[k][0], linestyle=KIND_STYLE[k][1], label=k)
               for k in dict.fromkeys(it.kind for it in links) if k in KIND_STYLE]
    handles += [Line2D([], [], color=TOUCHED_COLOUR, lw=2.4, label=f"acted on by: {mpl_text(n)} ({', '.join(map(mpl_text, o))})")
                for n, o in touched.items()]
    if handles:
        ax.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, -0.02), fontsize=6.5, frameon=False, ncol=2)
    buf = io.BytesIO()
    fig.savefig(buf, format="svg", bbox_inches="tight", metadata={"Date": None})
    return buf.getvalue()
