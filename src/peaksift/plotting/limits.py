"""The limits figure of a search: ``LimitResult.plot`` and, with ``[systematics]``, the
limits with every systematic profiled over the plain ones."""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from .._style import COLORS, figure_style
from .labels import FigureLabels, figure_labels, save

__all__ = ["limits_figure"]


def limits_figure(result: Any, outdir: str | os.PathLike[str], formats: Sequence[str],
                  labels: FigureLabels | None = None) -> Path:
    """The limits figure of a search result (``limits.png`` and the other formats)."""
    labels = labels or figure_labels(getattr(result, "config", None))
    return save(_limits_figure(result, labels), outdir, "limits", formats)


def _limits_figure(result: Any, labels: FigureLabels) -> Any:
    fig = result.limits.plot(run=labels.run, symbol=labels.symbol)
    lim_s = ((getattr(result, "systematics", None) or {}).get("limits") or {})
    if lim_s.get("with_systematics"):
        _limits_with_systematics(fig.axes[0], lim_s["with_systematics"])
    return fig


def _limits_with_systematics(ax: Any, w: Any) -> None:
    """The limits with every systematic profiled (mass scale, resolution, background
    function as well as L and efficiency) over the plain ones, which carry only L and
    efficiency: a reader must not take one for the other."""
    m = np.asarray(w["masses"], float)

    def arr(key: str) -> np.ndarray:
        return np.array([np.nan if v is None else v for v in w[key]], float)

    with figure_style():
        for line in ax.get_lines():
            label = str(line.get_label())
            if label in ("observed", "expected"):
                line.set_label(f"{label}, L and \u03b5 only")
        ax.plot(m, arr("expected"), color=COLORS["signal"], lw=1.3, ls="--",
                label="expected, all systematics", zorder=4)
        ax.plot(m, arr("observed"), color=COLORS["signal"], lw=1.6, marker="o", ms=3,
                label="observed, all systematics", zorder=5)
        ax.legend(loc="upper right", ncol=2, fontsize=8.5)
