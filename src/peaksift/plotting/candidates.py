"""The candidates figure: the pairs' transverse momentum (log scale) and rapidity in the
search window."""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from .._annotations import draw_header
from .._format import number
from .._style import COLORS, figure_style, new_figure
from .labels import FigureLabels, save

__all__ = ["candidates", "candidates_figure"]


def candidates(collected: Any, outdir: str | os.PathLike[str], *,
               formats: Sequence[str] = ("png", "pdf"),
               labels: FigureLabels | None = None) -> dict[str, Path]:
    """:func:`candidates_figure` saved as ``candidates`` in ``outdir``."""
    return {"candidates": save(candidates_figure(collected, labels), outdir, "candidates",
                               formats)}


def candidates_figure(collected: Any, labels: FigureLabels | None = None) -> Any:
    """Candidates' transverse momentum (log scale, so the tail shows) and rapidity, side
    by side, for the candidates in the search window (stated on the figure)."""
    labels = labels or FigureLabels()
    lo, hi = (float(v) for v in (getattr(collected, "summary_window", None)
                                 or collected.window))
    fig, (a1, a2) = new_figure((9.0, 3.9), 1, 2)
    with figure_style():
        n = collected.pt_histogram.total()
        for ax, h, label, unit in ((a1, collected.pt_histogram, r"$p_{T}$ of the pair", "GeV"),
                                   (a2, collected.rapidity_histogram, "rapidity $y$ of the pair",
                                    "")):
            e = np.asarray(h.edges)
            ax.stairs(h.weight_sum, e, color=COLORS["total"], linewidth=1.4, fill=False)
            ax.stairs(h.weight_sum, e, color=COLORS["total"], alpha=0.15, fill=True)
            ax.set_xlabel(f"{label} [{unit}]" if unit else label)
            ax.set_ylabel(f"candidates / {number(float(np.diff(e)[0]), 3)} {unit}".rstrip())
            nz = np.flatnonzero(h.weight_sum > 0)
            if unit:  # pT: log scale shows the tail; trim the empty end of the axis
                if nz.size:
                    ax.set_yscale("log")
                    ax.set_ylim(0.5 * float(h.weight_sum[nz].min()),
                                3.0 * float(h.weight_sum.max()))
                    ax.set_xlim(e[0], e[min(nz[-1] + 2, e.size - 1)])
            else:
                ax.set_ylim(0, 1.2 * float(max(h.weight_sum.max(), 1.0)))
                ax.set_xlim(e[0], e[-1])
        draw_header(a1, labels.run, f"{number(round(n))} candidates with "
                    f"{lo:g} < ${labels.symbol}$ < {hi:g} GeV (search window)")
        fig.subplots_adjust(wspace=0.3)
    return fig
