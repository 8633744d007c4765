"""Matplotlib figures as the report's images: one way to make a figure and to write it as PNG bytes.

Charts go in as PNG: drawn as SVG, each cost the PDF engine a fifth of a second or more, for no gain
at print resolution. 150 dpi keeps 7-point labels sharp on paper. The image is written without an
alpha channel (the figures are opaque), so the PDF engine stores one image stream, not an image and
a transparency mask.
"""

from __future__ import annotations

import io

PNG_DPI = 150


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


def png_bytes(fig, tight: bool = False, dpi: int = PNG_DPI) -> bytes:
    """The figure as an opaque RGB PNG.

    ``tight`` trims the white border, at the price of one more layout pass; a figure laid out by its
    layout engine or with fixed margins has none to trim.
    """
    from PIL import Image

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, bbox_inches="tight" if tight else None, facecolor="white",
                pil_kwargs={"compress_level": 1})
    out = io.BytesIO()
    # the PDF engine compresses the pixels again; a fast first compression is enough here
    Image.open(io.BytesIO(buf.getvalue())).convert("RGB").save(out, format="png", compress_level=1)
    return out.getvalue()
