"""The food-web diagram a reviewer recognises: trophic levels bottom to top, energy flowing upwards.

Species are ranked by trophic level (Levine 1980, as computed by networkx: producers and the carrion
pool at level 1, a consumer one level above the mean of what it eats; species of one rounded level
share a rank); arrows of feeding links point from the resource to the consumer, the way energy
flows; every link carries a label; species that an option's interventions act on are drawn with a
heavy outline.

The layout is Graphviz's ``dot`` (Gansner et al. 1993, "A technique for drawing directed graphs",
IEEE Trans. Software Eng. 19:214–230), run as a program from Debian's ``graphviz`` package. Why dot
and not a hand-placed matplotlib drawing: dot ranks the nodes in layers (here the trophic levels),
orders each layer to reduce edge crossings, routes the edges as splines around the boxes, and places
every edge label as a node of its own, so no label lands on a box or on another label; a drawing
placed by hand clipped and stacked labels as soon as two links crossed. The same layout, as JSON
(:func:`web_layout`), gives the coordinates of every box and label for the geometry check.
"""

from __future__ import annotations

import json
import shutil
import subprocess
from dataclasses import dataclass
from typing import Sequence

import networkx as nx
import numpy as np

from impact.errors import InstallationError
from impact.store.manifest import InteractionRecord, Manifest

FEEDING = ("predation", "scavenging", "alternative-food")
KIND_STYLE = {
    "predation": ("#c0392b", "solid"),
    "scavenging": ("#8e5b2e", "solid"),
    "alternative-food": ("#8e5b2e", "dashed"),
    "competition": ("#555555", "dashed"),
    "mutualism": ("#1e8449", "solid"),
    "life-stage": ("#7d3c98", "dotted"),
}
RESPONSE_LABELS = {"holling1": "Holling I", "holling2": "Holling II", "holling3": "Holling III",
                   "beddington-deangelis": "Beddington–DeAngelis"}
TOUCHED_COLOUR = "#d35400"
FONT = "DejaVu Sans"
POINTS_PER_INCH = 72.0
DOT_TIMEOUT = 60  # seconds; a web of a few dozen species lays out in well under one


def trophic_levels(names: list[str], links: Sequence[InteractionRecord]) -> dict[str, float]:
    """Trophic level of every node (networkx, Levine 1980); 1 for all when the web has no basal node.

    Parameters
    ----------
    names : list of str
        Species (and the carrion pool) in declaration order.
    links : sequence of InteractionRecord
        Saved interactions (``kind``, ``actor``: the consumer or actor, ``target``).
    """
    g = nx.DiGraph()
    g.add_nodes_from(names)
    for it in links:
        if it.kind in FEEDING:
            g.add_edge(it.target, it.actor)  # resource → consumer
    try:
        return {k: float(v) for k, v in nx.trophic_levels(g).items()}
    except (nx.NetworkXError, np.linalg.LinAlgError, ZeroDivisionError):
        return {n: 1.0 for n in names}  # a web without a basal node: draw it flat rather than fail


def _q(s) -> str:
    """A DOT string literal."""
    return '"' + str(s).replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n") + '"'


def link_label(it: InteractionRecord) -> str:
    """The words on a link: the functional response of a feeding link, else its kind."""
    if it.kind in FEEDING:
        return RESPONSE_LABELS.get(it.response or "", it.kind)
    return f"{it.response} {it.kind}" if it.response == "obligate" else it.kind  # an obligate mutualism says so


def food_web_dot(m: Manifest) -> str:
    """The web as a DOT graph: ranks by trophic level (producers at the bottom), labelled links."""
    links = m.interactions
    names = [s.name for s in m.species]
    for it in links:
        for end in (it.actor, it.target):
            if end not in names:
                names.append(end)
    levels = trophic_levels(names, links)
    touched = {sp for o in m.options for sp in o.touches}
    roles = {s.name: s.role for s in m.species}
    present = {s.name: s.present for s in m.species}
    out = ["digraph web {",
           f'  graph [rankdir=BT, nodesep=0.3, ranksep=0.45, pad=0.08, fontname={_q(FONT)}, bgcolor="white"];',
           f'  node [shape=box, style="rounded,filled", fontname={_q(FONT)}, fontsize=10, color="#1c2833", '
           'penwidth=0.9, margin="0.10,0.05"];',
           f"  edge [fontname={_q(FONT)}, fontsize=8, arrowsize=0.7, penwidth=1.2];"]
    for n in names:
        tag = {"target": "\n(target)", "protected": "\n(protected)"}.get(roles.get(n, "other"), "")
        extra = f", color={_q(TOUCHED_COLOUR)}, penwidth=2.4" if n in touched else ""
        fill = "#fdfefe" if present.get(n, True) else "#eaeded"
        out.append(f"  {_q(n)} [label={_q(n + tag)}, fillcolor={_q(fill)}{extra}];")
    rows: dict[int, list[str]] = {}
    for n in names:
        rows.setdefault(int(round(levels[n])), []).append(n)
    for lvl in sorted(rows):
        out.append("  { rank=same; " + " ".join(_q(n) + ";" for n in rows[lvl]) + " }")
    drawn = set()
    for it in links:
        colour, style = KIND_STYLE.get(it.kind, ("#000000", "dotted"))
        src, dst = (it.target, it.actor) if it.kind in FEEDING else (it.actor, it.target)
        key = (it.kind, it.response, frozenset((src, dst)))
        if it.kind in ("mutualism", "competition") and key in drawn:
            continue  # a link declared both ways is one double-headed arrow
        drawn.add(key)
        both = it.kind == "competition" or (it.kind == "mutualism" and any(
            x.kind == it.kind and x.response == it.response and (x.actor, x.target) == (it.target, it.actor)
            for x in links))
        attrs = [f"label={_q(link_label(it))}", f"color={_q(colour)}", f"fontcolor={_q(colour)}", f"style={style}"]
        if both:
            attrs.append("dir=both")
        if it.kind not in FEEDING and round(levels[src]) != round(levels[dst]):
            # only feeding sets the ranks; a link between ranks follows them, while a link within a rank
            # orders its two ends side by side, so its label sits beside a straight line
            attrs.append("constraint=false")
        out.append(f"  {_q(src)} -> {_q(dst)} [{', '.join(attrs)}];")
    out.append("}")
    return "\n".join(out) + "\n"


def run_dot(source: str, fmt: str) -> bytes:
    """Lay the graph out with Graphviz's dot and write it as ``fmt`` (``svg``, ``json``)."""
    exe = shutil.which("dot")
    if exe is None:
        raise InstallationError("Graphviz's dot program draws the food-web figure and was not found; install "
                                "Graphviz (on Debian and Ubuntu: apt-get install graphviz)")
    try:
        done = subprocess.run([exe, f"-T{fmt}"], input=source.encode("utf-8"), capture_output=True,
                              timeout=DOT_TIMEOUT, check=False)
    except (OSError, subprocess.TimeoutExpired) as exc:
        raise InstallationError(f"Graphviz's dot could not lay out the food web ({exc})") from None
    if done.returncode != 0:
        raise InstallationError("Graphviz's dot could not lay out the food web: "
                                + done.stderr.decode("utf-8", "replace").strip()[:300])
    return done.stdout


def dot_available() -> bool:
    """Graphviz's dot is on this machine (without it the figure lists the web instead of drawing it)."""
    return shutil.which("dot") is not None


def food_web_svg(m: Manifest) -> bytes:
    """The diagram as SVG, laid out and drawn by dot; a listing of the web where dot is not installed."""
    return run_dot(food_web_dot(m), "svg") if dot_available() else listed_web_svg(m)


def listed_web_svg(m: Manifest) -> bytes:
    """The web without a layout engine: species by trophic level (highest first) and every link, as text.

    A report must still be written on a machine without Graphviz (the figure says so and how to draw it);
    nothing is placed by hand, so nothing can overlap.
    """
    from xml.sax.saxutils import escape

    names = list(dict.fromkeys([s.name for s in m.species]
                               + [end for it in m.interactions for end in (it.actor, it.target)]))
    levels = trophic_levels(names, m.interactions)
    rows = ["Graphviz's dot was not found on this machine: the web is listed, not drawn",
            "(install Graphviz, e.g. apt-get install graphviz, and rebuild the report to draw it).", ""]
    for lv in sorted({round(v) for v in levels.values()}, reverse=True):
        rows.append(f"trophic level {lv}: " + ", ".join(n for n in names if round(levels[n]) == lv))
    rows.append("")
    rows += [f"{it.actor} → {it.target}: {link_label(it)}" for it in m.interactions]
    line, width = 16, 9 + 6.2 * max(len(r) for r in rows)
    text = "".join(f'<text x="8" y="{line * (i + 1)}">{escape(r)}</text>' for i, r in enumerate(rows) if r)
    return (f'<svg xmlns="http://www.w3.org/2000/svg" width="{width:.0f}" height="{line * (len(rows) + 1)}" '
            f'font-family="{FONT}" font-size="11">{text}</svg>').encode("utf-8")


@dataclass(frozen=True)
class Box:
    """An axis-aligned box in the layout's points (origin bottom left): what it holds and its edges."""

    what: str
    x0: float
    y0: float
    x1: float
    y1: float

    def overlaps(self, other: "Box", gap: float = 0.0) -> bool:
        return not (self.x1 + gap <= other.x0 or other.x1 + gap <= self.x0
                    or self.y1 + gap <= other.y0 or other.y1 + gap <= self.y0)

    def inside(self, other: "Box", tol: float = 0.5) -> bool:
        """Within ``other``, to ``tol`` points (dot rounds a node's size to 1/100 inch, 0.72 pt)."""
        return (self.x0 >= other.x0 - tol and self.y0 >= other.y0 - tol and self.x1 <= other.x1 + tol
                and self.y1 <= other.y1 + tol)


def web_layout(m: Manifest) -> dict:
    """dot's layout of the web as parsed JSON (``-Tjson``: objects with ``pos``, ``width``, ``height``, edges
    with ``lp`` and the drawing operations of their labels)."""
    return json.loads(run_dot(food_web_dot(m), "json").decode("utf-8"))


def _text_boxes(ops, what: str) -> list[Box]:
    """Boxes of the text operations of a label (``T``: baseline point, alignment, width; ``F``: font size).
    The box spans from a descender (a quarter of the size) below the baseline to the size above it."""
    out, size = [], 10.0
    for op in ops or ():
        if op.get("op") == "F":
            size = float(op["size"])
        elif op.get("op") == "T":
            x, y = (float(v) for v in op["pt"])
            w = float(op["width"])
            x0 = {"l": x, "r": x - w}.get(op.get("align", "c"), x - w / 2)
            out.append(Box(what, x0, y - 0.25 * size, x0 + w, y + size))
    return out


def layout_boxes(layout: dict) -> tuple[Box, list[Box], list[Box]]:
    """The drawing's bounding box, the species boxes and the link-label boxes of a dot layout."""
    x0, y0, x1, y1 = (float(v) for v in layout["bb"].split(","))
    nodes = []
    for o in layout.get("objects", ()):
        if "pos" not in o:
            continue
        x, y = (float(v) for v in o["pos"].split(","))
        w, h = float(o["width"]) * POINTS_PER_INCH / 2, float(o["height"]) * POINTS_PER_INCH / 2
        nodes.append(Box(o["name"], x - w, y - h, x + w, y + h))
    labels = [b for e in layout.get("edges", ()) for b in _text_boxes(e.get("_ldraw_"), e.get("label", ""))]
    return Box("drawing", x0, y0, x1, y1), nodes, labels


KIND_WORDS = {"predation": "red, solid", "scavenging": "brown, solid", "alternative-food": "brown, dashed",
              "competition": "grey, dashed, both ways", "mutualism": "green", "life-stage": "purple, dotted"}


def web_legend(m: Manifest) -> str:
    """The figure's key in words (for its caption): the link kinds drawn and who each option acts on."""
    kinds = [k for k in dict.fromkeys(it.kind for it in m.interactions) if k in KIND_WORDS]
    touched: dict[str, list[str]] = {}
    for o in m.options:
        for sp in o.touches:
            touched.setdefault(sp, []).append(o.name)
    text = "Links: " + "; ".join(f"{k} ({KIND_WORDS[k]})" for k in kinds) + "." if kinds else ""
    if touched:
        text += (" Acted on directly (heavy orange outline): "
                 + "; ".join(f"{sp} by {', '.join(f'“{o}”' for o in opts)}" for sp, opts in touched.items()) + ".")
    return text.strip()
