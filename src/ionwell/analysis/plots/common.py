"""What every figure shares: the Agg pyplot, the resolution, saving, the caution stamp.

Sizes are in inches and points, as matplotlib takes them.
"""

from __future__ import annotations

import io
import logging
import textwrap
from pathlib import Path

__all__ = [
    "CAUTION_FONTSIZE",
    "COMPARISON_DPI",
    "DPI",
    "png_bytes",
    "pyplot",
    "save",
    "stamp_caution",
]

log = logging.getLogger("ionwell.analysis.plots")

#: Resolution (dots per inch) of the figures written into ``analysis/``.
DPI = 120

#: Resolution of the report's comparison figures (drawn in memory).
COMPARISON_DPI = 110

#: Font size (pt) of the caution stamped along the bottom of a figure.
CAUTION_FONTSIZE = 6.5


def pyplot():
    """matplotlib's pyplot on the Agg backend (files only, no display)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def stamp_caution(fig, caution: str | None, *, fontsize: float = CAUTION_FONTSIZE) -> None:
    """Write ``caution`` in small wrapped text along the bottom edge of ``fig``.

    The figure grows by the height the text needs and everything already placed (axes, figure
    texts such as the suptitle) keeps its size and position in inches, so nothing is covered. A
    PNG that travels without the report still carries its caution. Call it once the layout is
    final (after ``tight_layout``). ``None`` or an empty string: nothing is written.
    """
    if not caution or not caution.strip():
        return
    width, height = (float(v) for v in fig.get_size_inches())
    # mean glyph width of the default sans-serif font is about 0.55 em
    chars = max(30, int(0.96 * width * 72.0 / (0.56 * fontsize)))
    lines = textwrap.wrap(" ".join(caution.split()), chars)
    pad = 4.0 / 72.0  # inches below and above the text
    extra = len(lines) * 1.3 * fontsize / 72.0 + 2 * pad
    total = height + extra

    def lift(y: float) -> float:
        return (y * height + extra) / total

    for ax in fig.axes:
        pos = ax.get_position()
        ax.set_position([pos.x0, lift(pos.y0), pos.width, pos.height * height / total])
    for text in fig.texts:
        if text.get_transform() == fig.transFigure:
            text.set_y(lift(text.get_position()[1]))
    fig.set_size_inches(width, total)
    fig.text(
        0.5 * pad / width,
        pad / total,
        "\n".join(lines),
        ha="left",
        va="bottom",
        fontsize=fontsize,
        color="0.3",
        gid="caution",
    )


def save(fig, path: Path, caution: str | None = None) -> None:
    """Lay ``fig`` out, stamp ``caution`` under it, write the PNG ``path`` and close ``fig``."""
    fig.tight_layout()
    stamp_caution(fig, caution)
    fig.savefig(path)
    pyplot().close(fig)
    log.debug("figure written to %s", path)


def png_bytes(fig) -> bytes:
    """The PNG of a figure made with ``matplotlib.figure.Figure`` (its own Agg canvas, so no
    global backend switch and no file); the figure is not registered with pyplot."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return buf.getvalue()
