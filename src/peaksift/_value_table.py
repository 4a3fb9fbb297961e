"""The fitted numbers as a small table on a figure, and where a box may go (base layer).

* :func:`value_table` -- quantity | value | ± error | unit, aligned on the ± sign, with a
  title row and a caption line (goodness of fit), in an upper corner of the axes or under
  the legend; :func:`value_table_height` -- its height before it is drawn.
* :func:`touched` -- how many data points, error bars or curve samples a legend or a table
  covers, measured on the figure's renderer: the fit figure and the legends use it to choose
  a corner (and, when neither is free, to raise the y axis); :func:`line_segments` -- a
  drawn curve as such segments, so a line passing through a box counts where no sample of
  it lies inside.

Drawn in the figure style of :mod:`peaksift._style` (its colours), with the text measure
and point transform of :mod:`peaksift._annotations`; nothing here imports pyplot.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from ._annotations import points_at, text_width
from ._style import COLORS

__all__ = ["line_segments", "touched", "value_table", "value_table_height"]

#: the table's font size in points (its rows are 1.55 of it apart)
_TABLE_FONT = 8.8


def value_table_height(n_rows: int, *, caption: str = "", title: str = "") -> float:
    """Height in points of :func:`value_table` with ``n_rows`` rows."""
    lines = (n_rows + (caption.count("\n") + 1 if caption else 0)
             + (title.count("\n") + 1 if title else 0))
    return lines * _TABLE_FONT * 1.55 + 8.0


def touched(ax: Any, artist: Any, x: Any, lo: Any, hi: Any, pad: float = 3.0) -> int:
    """How many of the vertical segments ``(x, lo)``-``(x, hi)`` in data coordinates (points
    with their error bars; ``lo = hi`` for a curve's samples) come within ``pad`` points
    (about a marker's radius) of ``artist``'s box (a legend, a table's patch), measured on
    the figure's renderer with the axes as they are now."""
    import numpy as np

    box = artist.get_window_extent(ax.figure.canvas.get_renderer())
    pad *= ax.figure.dpi / 72.0
    a = ax.transData.transform(np.c_[x, lo])
    b = ax.transData.transform(np.c_[x, hi])
    ok = np.isfinite(a).all(axis=1) & np.isfinite(b).all(axis=1)
    inside_x = (a[:, 0] >= box.x0 - pad) & (a[:, 0] <= box.x1 + pad)
    bottom, top = np.minimum(a[:, 1], b[:, 1]), np.maximum(a[:, 1], b[:, 1])
    inside_y = (top >= box.y0 - pad) & (bottom <= box.y1 + pad)
    return int(np.count_nonzero(ok & inside_x & inside_y))


def line_segments(x: Any, y: Any, *, log: bool = False, pieces: int = 8) -> tuple[Any, Any, Any]:
    """The polyline through ``(x, y)`` as drawn (straight between samples in ``log10 y`` on
    a log axis) as vertical segments ``(x, lo, hi)`` for :func:`touched`: each step cut in
    ``pieces`` in x, each piece the segment over its y range at its middle.  A near-vertical
    step (a p-value falling by hundreds of decades between two masses) is covered over its
    whole height, where samples alone leave it between two points far apart."""
    import numpy as np

    x, y = np.asarray(x, float), np.asarray(y, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        v = np.log10(np.where(y > 0, y, np.nan)) if log else y
    t = np.linspace(0.0, 1.0, pieces + 1)
    xs = x[:-1, None] + (x[1:] - x[:-1])[:, None] * t  # (steps, pieces + 1)
    vs = v[:-1, None] + (v[1:] - v[:-1])[:, None] * t
    mid = 0.5 * (xs[:, 1:] + xs[:, :-1]).ravel()
    lo = np.minimum(vs[:, 1:], vs[:, :-1]).ravel()
    hi = np.maximum(vs[:, 1:], vs[:, :-1]).ravel()
    if log:
        lo, hi = 10.0 ** lo, 10.0 ** hi
    return mid, lo, hi


def value_table(ax: Any, rows: Sequence[tuple[str, str, str, str]], *, caption: str = "",
                below: Any = None, corner: str = "right", title: str = "") -> list[Any]:
    """Fitted numbers as a small table: quantity | value | ± error | unit, aligned on the
    ± sign, with an optional ``title`` (one row a line) and a ``caption`` line (goodness of
    fit) under it.

    Placed in the upper ``corner`` ("right" or "left") of ``ax``, below the legend
    ``below`` when given (measured on the figure's renderer).  Returns its artists, the
    box first (what :func:`touched` measures; remove them all to place it elsewhere).
    """
    from matplotlib.patches import FancyBboxPatch

    if not rows:
        return []
    size = _TABLE_FONT
    pad, gap, row_h = 5.0, 5.0, size * 1.55
    cols = list(zip(*rows))
    widths = [max(text_width(c, size) for c in col) if any(col) else 0.0 for col in cols]
    inner = sum(widths) + gap * (len(widths) - 1)
    # a long plain-text line renders up to ~4% wider on the Agg canvas (hinting) than its
    # path measures (mathtext measures true)
    cap_w = max((text_width(c, size - 0.6) * (1.0 if "$" in c else 1.04)
                 for c in caption.split("\n")), default=0.0) if caption else 0.0
    title_w = max((text_width(t, size, "bold") for t in title.split("\n")), default=0.0) \
        if title else 0.0
    inner = max(inner, cap_w, title_w)
    height = value_table_height(len(rows), caption=caption, title=title)
    top = -6.0  # points below the axes' top
    if below is not None:
        renderer = ax.figure.canvas.get_renderer()
        bb = below.get_window_extent(renderer)
        ax_top = ax.get_window_extent(renderer).y1
        top = -(ax_top - bb.y0) * 72.0 / ax.figure.dpi - 2.0
    x0 = -8.0 - inner - 2 * pad if corner == "right" else 8.0
    ax_x = 1.0 if corner == "right" else 0.0
    tr = points_at(ax, ax_x, 1.0)
    out = [ax.add_patch(FancyBboxPatch((x0, top - height), inner + 2 * pad, height,
                                       boxstyle="round,pad=0,rounding_size=3", transform=tr,
                                       facecolor=COLORS["table"], edgecolor="#d3d7dc",
                                       lw=0.6, zorder=4, clip_on=False))]
    y = top - pad - size
    for line in title.split("\n") if title else ():
        out.append(ax.text(x0 + pad, y, line, transform=tr, fontsize=size,
                           fontweight="bold", color=COLORS["label"], va="baseline",
                           ha="left", zorder=5))
        y -= row_h
    for row in rows:
        x = x0 + pad
        for j, (cell, w) in enumerate(zip(row, widths)):
            right = j == 1  # the value column ends at the ± sign
            out.append(ax.text(x + w if right else x, y, cell, transform=tr, fontsize=size,
                               ha="right" if right else "left", va="baseline", zorder=5,
                               color=COLORS["data"] if j else COLORS["muted"]))
            x += w + (2.5 if j == 1 else gap)
        y -= row_h
    for line in caption.split("\n") if caption else ():
        out.append(ax.text(x0 + pad, y, line, transform=tr, fontsize=size - 0.6, ha="left",
                           va="baseline", color=COLORS["muted"], zorder=5))
        y -= row_h
    return out
