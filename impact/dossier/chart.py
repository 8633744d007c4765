"""Matplotlib figures as the report's images: one way to make a figure and to write it as PNG bytes.

Charts go in as PNG: drawn as SVG, each cost the PDF engine a fifth of a second or more, for no gain
at print resolution. Each figure is drawn once, at the size it is printed: :data:`PNG_DPI` pixels per
inch of the page (150 dpi keeps 7-point labels sharp on paper), not per inch of the figure, which the
page shrinks. The image is written without an alpha channel (the figures are opaque), so the PDF
engine stores one image stream, not an image and a transparency mask.
"""

from __future__ import annotations

import io

PNG_DPI = 150
MM = 1 / 25.4
# how wide report.css prints each class of figure (img.bands, img.sens, img.dyn), inches;
# tests/dossier/test_report.py checks these against the stylesheet
SHOWN_WIDTH = {"bands": 145 * MM, "sens": 130 * MM, "dyn": 130 * MM}


def mpl_text(s) -> str:
    """Case text as matplotlib text: a ``$`` must not switch matplotlib into mathtext."""
    return str(s).replace("$", r"\$")


def new_figure(w: float, h: float, layout: str | None = "constrained"):
    """A figure of ``w`` by ``h`` inches outside pyplot (no global state, no GUI backend)."""
    from matplotlib.figure import Figure

    fig = Figure(figsize=(w, h))
    if layout:
        fig.set_layout_engine(layout)
    return fig


def png_bytes(fig, shown: str) -> bytes:
    """The figure as an opaque RGB PNG with :data:`PNG_DPI` pixels per printed inch.

    ``shown`` is the figure's class in report.css (a key of :data:`SHOWN_WIDTH`): the figure is drawn
    at the resolution that class prints it, whatever its own size in inches. The canvas's pixels are
    written once, straight to PNG (no intermediate RGBA file decoded again).
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from PIL import Image

    fig.set_dpi(PNG_DPI * SHOWN_WIDTH[shown] / fig.get_figwidth())
    fig.set_facecolor("white")
    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    rgb = Image.frombuffer("RGBA", canvas.get_width_height(), canvas.buffer_rgba(), "raw", "RGBA", 0, 1).convert("RGB")
    out = io.BytesIO()
    # the PDF engine decodes the pixels and compresses them again; a fast first compression is enough here
    rgb.save(out, format="png", compress_level=1)
    return out.getvalue()
