"""The background-function envelope figure (discrete profiling): twice the profiled NLL
against the signal yield at the best mass, one curve per candidate function and their
envelope."""

from __future__ import annotations

from typing import Any

import numpy as np

from .._annotations import draw_header
from .._format import fixed, number
from .._style import COLORS, figure_style, new_figure
from .labels import FigureLabels
from .legend import place_legend

__all__ = ["envelope_figure"]


_CURVE_STYLES = ("-", "--", "-.", ":", (0, (5, 1, 1, 1)), (0, (1, 1)))


def envelope_figure(systematics: Any, *, labels: FigureLabels | None = None) -> Any:
    """The envelope figure from a search's ``systematics`` block (results.json form): at the
    best mass, twice the profiled NLL plus the penalty against the signal yield for every
    candidate function (thin), their minimum -- the envelope -- drawn over them (thick), all
    relative to the envelope's minimum; the level 1 marks the 68% interval."""
    labels = labels or FigureLabels()
    env = systematics["envelope"]
    prof = env["profile"]
    s = np.asarray(prof["signal_yield"], float)
    fig, ax = new_figure((7.0, 4.6))
    with figure_style():
        greys = ("#5b6270", "#8a8f98", "#1f6f8b", "#b07a2a", "#6a4c93", "#2e7d4f")
        top = 0.0
        # the envelope first, broad and pale, so the function it follows shows through it
        e = np.asarray(prof["envelope"], float)
        ax.plot(s, e, lw=5.0, color=COLORS["signal"], alpha=0.35, label="envelope",
                solid_capstyle="butt", zorder=2)
        for k, (label, curve) in enumerate(prof["curves"].items()):
            c = np.asarray(curve, float)
            ax.plot(s, c, lw=1.2, ls=_CURVE_STYLES[k % len(_CURVE_STYLES)],
                    color=greys[k % len(greys)], label=label, zorder=3)
            top = max(top, float(np.nanmin(c)))
        ax.axhline(1.0, color=COLORS["accent"], lw=0.8, ls=":")
        ax.text(s[-1], 1.0, " 68%", va="center", ha="left", color=COLORS["accent"],
                fontsize=9, clip_on=False)
        # every curve's minimum in range, with room above it for the legend
        ax.set_ylim(-0.3, max(6.0, min(1.35 * top + 4.0, 55.0)))
        ax.set_xlim(s[0], s[-1])
        ax.set_xlabel("signal yield [events]")
        ax.set_ylabel(r"$-2\,\Delta\ln L$ + penalty")
        draw_header(ax, labels.run, f"discrete profiling at {number(prof['mass'])} GeV: "
                    f"{len(prof['curves'])} functions, penalty {fixed(env['penalty'], 2)} per "
                    "parameter")
        # the legend where no curve runs: the curves sampled finely enough that none passes
        # between two samples across the legend's box
        fine = np.linspace(s[0], s[-1], 600)
        ys = [np.interp(fine, s, np.asarray(c, float)) for c in (e, *prof["curves"].values())]
        place_legend(ax, np.tile(fine, len(ys)), np.concatenate(ys), fontsize=8.5,
                     ncol=min(3, len(prof["curves"]) + 1))
    return fig
