"""The dE/dx identification figure of a search with ``[identification]``:
:func:`dedx_figure` (the tracks' dE/dx against momentum, every hypothesis's expected curve
and the selection band), in the peaksift style without pyplot.  Apart from
:mod:`peaksift.plotting` so that each module stays one concept and readable in one sitting."""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from ._annotations import draw_header
from ._style import COLORS, figure_style, margins, new_figure
from .plotting import save

__all__ = ["dedx_figure", "draw_dedx"]

# one colour per mass hypothesis, from the peaksift palette (deuteron: a muted plum)
_HYPOTHESIS_COLORS = {"pion": COLORS["total"], "kaon": COLORS["signal"],
                      "proton": COLORS["accent"], "electron": COLORS["background"],
                      "deuteron": "#6b5b95"}


def dedx_figure(outcome: Any, outdir: str | os.PathLike[str], *,
                formats: Sequence[str] = ("png", "pdf"), hypotheses: Sequence[str] = (),
                band: float = 3.0, run: Any = None) -> Path:
    """:func:`draw_dedx` saved as ``dedx`` in ``outdir``."""
    return save(draw_dedx(outcome, hypotheses=hypotheses, band=band, run=run), outdir, "dedx",
                formats)


def draw_dedx(outcome: Any, *, hypotheses: Sequence[str] = (), band: float = 3.0,
              run: Any = None) -> Any:
    """dE/dx against momentum: the tracks' density (log momentum axis), the expected curve of
    every mass hypothesis, and the ±``band`` sigma selection band of the pairing hypotheses.

    ``outcome`` holds ``p_edges``, ``dedx_edges``, ``counts`` (momentum x dE/dx) and the
    ``response`` (:class:`peaksift.energy_loss.DedxResponse`) the pairing used.  The band is
    drawn with the resolution at the reference number of samples; ``run`` (a run label) heads
    it as every figure of the run.
    """
    from matplotlib.colors import LinearSegmentedColormap, LogNorm

    from .energy_loss import HYPOTHESES, hypothesis_mass

    r = outcome.response
    counts = np.asarray(outcome.counts, dtype=float)
    p_edges = np.asarray(outcome.p_edges, dtype=float)
    d_edges = np.asarray(outcome.dedx_edges, dtype=float)
    grid = np.geomspace(p_edges[0], p_edges[-1], 400)
    ramp = LinearSegmentedColormap.from_list(
        "peaksift_density", ["#ffffff", COLORS["band2"], COLORS["band1"], COLORS["total"],
                             COLORS["data"]])
    fig, ax = new_figure((7.0, 5.0))
    margins(fig, right=1.1)  # room for the colour bar
    with figure_style():
        if counts.max() > 0:
            m = ax.pcolormesh(p_edges, d_edges, np.where(counts > 0, counts, np.nan).T,
                              cmap=ramp, norm=LogNorm(vmin=1.0, vmax=counts.max()),
                              shading="flat", rasterized=True)
            fig.colorbar(m, ax=ax, pad=0.02).set_label("tracks per bin")
        chosen = list(dict.fromkeys(hypotheses))
        for h in HYPOTHESES:
            e = r.expected(grid, hypothesis_mass(h))
            c = _HYPOTHESIS_COLORS.get(h, COLORS["data"])
            if h in chosen:
                lo, hi = e * (1 - band * r.resolution), e * (1 + band * r.resolution)
                ax.fill_between(grid, lo, hi, color=c, alpha=0.22, lw=0,
                                label=f"{h}: \u00b1{band:g}\u03c3 selection band")
                ax.plot(grid, e, color=c, lw=1.8, label=f"{h} (Bethe \u00d7 scale)")
            else:
                ax.plot(grid, e, color=c, lw=1.0, ls="--", label=h)
        ax.set_xscale("log")
        used = np.flatnonzero(counts.sum(axis=1) > 0)  # the momenta the tracks occupy
        if used.size:
            ax.set_xlim(p_edges[max(used[0] - 2, 0)], p_edges[min(used[-1] + 3, p_edges.size - 1)])
        else:
            ax.set_xlim(p_edges[0], p_edges[-1])
        ax.set_ylim(d_edges[0], d_edges[-1])
        ax.set_xlabel("momentum p [GeV]")
        ax.set_ylabel(f"measured dE/dx (field '{r.field}', detector units)")
        ax.legend(loc="upper right", ncol=1)
        draw_header(ax, run, (f"{r.material.name}: scale {r.scale:.4g}, "
                               f"\u03c3/\u27e8dE/dx\u27e9 {r.resolution:.3g}"))
    return fig
