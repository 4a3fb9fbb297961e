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
from .legend import place_legend

__all__ = ["limits_figure"]


def limits_figure(result: Any, outdir: str | os.PathLike[str], formats: Sequence[str],
                  labels: FigureLabels | None = None) -> Path:
    """The limits figure of a search result (``limits.png`` and the other formats)."""
    labels = labels or figure_labels(getattr(result, "config", None))
    return save(_limits_figure(result, labels), outdir, "limits", formats)


def _limits_figure(result: Any, labels: FigureLabels) -> Any:
    fig = result.limits.plot(run=labels.run, symbol=labels.symbol)
    lim_s = ((getattr(result, "systematics", None) or {}).get("limits") or {})
    w = lim_s.get("with_systematics")
    if w:
        _limits_with_systematics(fig.axes[0], w)
    lim = result.limits
    curves = [lim.observed, lim.expected]
    if w:
        curves += [[np.nan if v is None else v for v in w[k]] for k in ("observed", "expected")]
    _legend_clear(fig.axes[0], np.asarray(lim.masses, float), curves,
                  (lim.expected_minus2, lim.expected_plus2), fontsize=8.5 if w else None)
    return fig


def _legend_clear(ax: Any, m: np.ndarray, curves: Any, band: Any,
                  fontsize: float | None) -> None:
    """The legend where it covers no limit curve and no part of the ±2 sigma band, both
    sampled finely along the mass axis (straight between points on the log axis, as
    drawn)."""
    fine = np.linspace(m[0], m[-1], 400)

    def on(v: Any) -> np.ndarray:
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.exp(np.interp(fine, m, np.log(np.asarray(v, float))))

    xs = [fine] + [fine] * len(curves)
    lo = [on(band[0])] + [on(c) for c in curves]
    hi = [on(band[1])] + [on(c) for c in curves]
    kw = {"ncol": 2} | ({"fontsize": fontsize} if fontsize else {})
    with figure_style():
        place_legend(ax, np.concatenate(xs), np.concatenate(lo), np.concatenate(hi),
                     log=ax.get_yscale() == "log", **kw)


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
