"""The combination's figure: :func:`pvalue_figure`, the local p-value against the mass
hypothesis of each channel (thin lines) and of their combination (thick), with the 1-5
sigma levels and the caution that a local excess is not a discovery.  Drawn on
:func:`peaksift._style.new_figure` (no pyplot)."""

from __future__ import annotations

from typing import Any

import numpy as np

from .._annotations import RunLabel, draw_header, shade_blinded
from .._format import fixed, mass_text
from .._style import COLORS, figure_style, new_figure
from .significance import p_from_q0

__all__ = ["pvalue_figure"]


def pvalue_figure(comb: Any, path: Any = None, *, title: str | None = None,
                  run: RunLabel | None = None, symbol: str = "m",
                  channel_scans: Any = None) -> Any:
    """Local p-values of a :class:`~peaksift.stats.channels.Combination` (one line per
    channel and the combination); saved to ``path`` when given.  ``symbol``: the mass
    symbol of the axis (mathtext); ``run``: the run label drawn above the axes with
    ``title`` (default: the combination's best excess) under it.  ``channel_scans``:
    channel name -> ``(masses, p_local)`` drawn instead of the channel's single-function
    scan (its own background-envelope scan, when the combined line profiles the envelope
    too)."""
    palette = [COLORS["total"], COLORS["signal"], COLORS["accent"], COLORS["background"]]
    fig, ax = new_figure()
    with figure_style():
        m = comb.masses
        lows = []
        own = dict(channel_scans or {})
        for j, (name, s) in enumerate(comb.channels.items()):
            if name in own:
                mc, pc = (np.asarray(v, float) for v in own[name])
                p = np.maximum(pc, 1e-300)
                ax.plot(mc, p, lw=1.1, color=palette[j % len(palette)],
                        label=f"{name} (background envelope)")
            else:
                p = np.where(s.blinded, np.nan, np.maximum(s.p_local, 1e-300))
                ax.plot(m, p, lw=1.1, color=palette[j % len(palette)], label=name)
            lows.append(np.nanmin(p) if np.isfinite(p).any() else 0.1)
        p = np.where(comb.blinded, np.nan, np.maximum(comb.p_local, 1e-300))
        ax.plot(m, p, lw=2.0, color=COLORS["observed"], label="combined")
        lows.append(np.nanmin(p) if np.isfinite(p).any() else 0.1)
        lowest = max(min(min(lows), p_from_q0(9.0)) * 0.3, p_from_q0(64.0))
        ax.set_yscale("log")
        ax.set_ylim(lowest, 1.0)
        ax.set_xlim(m[0], m[-1])
        for k in range(1, 6):
            pk = p_from_q0(float(k * k))
            if pk < lowest:
                break
            ax.axhline(pk, color=COLORS["accent"], lw=0.8, ls=":")
            ax.text(m[-1], pk, f" {k}$\\sigma$", va="center", ha="left",
                    color=COLORS["accent"], fontsize=9, clip_on=False)
        shade_blinded(ax, comb.blind)  # drawn as on every figure
        ax.set_xlabel(f"${symbol}$ hypothesis [GeV]")
        ax.set_ylabel("local p-value")
        ax.legend(loc="lower left")
        ax.text(0.99, 0.02, "local p-values: a local excess is not a discovery",
                transform=ax.transAxes, fontsize=8.5, va="bottom", ha="right")
        if title is None:
            b = comb.best
            title = (f"combined: best {mass_text(b['mass'])} GeV, $Z_{{local}}$ = "
                     f"{fixed(b['z_local'])}" if np.isfinite(b["z_local"])
                     else "combined local p-values")
        draw_header(ax, run, title)
    if path is not None:
        fig.savefig(path)
    return fig
