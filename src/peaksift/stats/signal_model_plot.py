"""Figures of a :class:`~peaksift.stats.signal_model_result.SignalModel` (in the project's style,
drawn on :func:`peaksift._style.new_figure`: no pyplot, the user's backend untouched).

* :func:`plot_parameters` -- one panel per modelled quantity against mass: the per-sample
  points with errors, the fitted polynomial and its 1-sigma band.
* :func:`plot_shapes`     -- every sample's histogram (normalised) with its fitted shape.

Each returns its Figure (saved to ``path`` when given).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

__all__ = ["plot_parameters", "plot_shapes"]

_LABELS = {"mass_shift": "peak shift [GeV]", "sigma": "$\\sigma$ [GeV]",
           "width": "width [GeV]", "efficiency": "efficiency $\\times$ acceptance"}


def plot_parameters(model: Any, path: Any = None, *, run: Any = None, symbol: str = "m") -> Any:
    from .._annotations import as_run_label, text_width
    from .._style import COLORS, figure_style, new_figure

    run = as_run_label(run)

    keys = list(model.quantities)
    ncol = 3 if len(keys) > 4 else 2
    nrow = math.ceil(len(keys) / ncol)
    m = np.asarray(model.sample_masses)
    grid = np.linspace(m[0], m[-1], 200)
    fig, axes = new_figure((3.6 * ncol, 2.8 * nrow), nrow, ncol, squeeze=False, sharex=True)
    with figure_style():
        for ax, k in zip(axes.ravel(), keys):
            name = "mass" if k == "mass_shift" else k
            val = np.asarray(model.value(name, grid), float)
            if k == "mass_shift":
                val = val - grid
            band = np.asarray(model.band(name, grid), float)
            ax.fill_between(grid, val - band, val + band, color=COLORS["band1"], lw=0,
                            label="1$\\sigma$ band")
            ax.plot(grid, val, color=COLORS["total"], label="polynomial fit")
            pts = model.points[k]
            if k == "efficiency":
                lo, hi = np.asarray(model.efficiency_interval).T
                yerr = [pts["value"] - lo, hi - pts["value"]]
            else:
                yerr = np.where(np.isfinite(pts["error"]), pts["error"], 0.0)
            ax.errorbar(m, pts["value"], yerr=yerr, fmt="o", ms=4, color=COLORS["data"],
                        label="samples")
            dev = model.closure[k]["max_deviation"]
            ax.set_title(f"{k} (order {model.polynomials[k]['order']}): leave-one-out max "
                         f"{dev:.2f}$\\sigma$", fontsize=9)
            ax.set_ylabel(_LABELS.get(k, k))
        for ax in axes[-1]:
            ax.set_xlabel(f"generated mass ${symbol}$ [GeV]")
        for ax in axes.ravel()[len(keys):]:
            ax.set_visible(False)
        axes.ravel()[0].legend(loc="best", fontsize=8)
        fig.tight_layout(rect=(0.0, 0.0, 1.0, 0.93))
        # the run label over the whole grid (each panel has its own title)
        if run and run.name:
            fig.text(0.01, 0.985, run.name, fontsize=9.5, fontweight="bold", va="top",
                     color=COLORS["label"])
        shift = ((text_width(run.name, 9.5, "bold") + 9.0) / 72.0 / fig.get_figwidth()
                 if run and run.name else 0.0)
        fig.text(0.01 + shift, 0.985,
                 "  ".join(p for p in ((run.conditions() if run else ""),
                                       "signal model from the simulated samples") if p),
                 fontsize=9.5, va="top", color=COLORS["data"])
        if path is not None:
            fig.savefig(path)
    return fig


def plot_shapes(model: Any, path: Any = None, *, run: Any = None, symbol: str = "m") -> Any:
    from matplotlib import colormaps

    from .. import shapes
    from .._annotations import draw_header
    from .._style import COLORS, figure_style, new_figure

    shape = shapes.get(model.shape)
    names = shape.parameter_names
    cmap = colormaps["viridis"]
    fig, ax = new_figure((7.0, 4.6))
    with figure_style():
        n = len(model.histograms)
        for j, ((edges, counts), vals, win) in enumerate(zip(model.histograms,
                                                             model.fit_values, model.windows)):
            edges, counts = np.asarray(edges, float), np.asarray(counts, float)
            width = np.diff(edges)
            tot = counts.sum()
            if tot <= 0:
                continue
            col = cmap(0.1 + 0.75 * j / max(n - 1, 1))
            centres = 0.5 * (edges[1:] + edges[:-1])
            ax.plot(centres, counts / tot / width, ".", ms=2.5, color=col)
            x = np.linspace(edges[0], edges[-1], 600)
            p = [vals[k] for k in names]
            ax.plot(x, shape.pdf(x, p, (float(win[0]), float(win[1]))), color=col, lw=1.3,
                    label=f"{model.sample_masses[j]:g} GeV")
        ax.set_xlabel(f"${symbol}$ [GeV]")
        ax.set_ylabel("probability density [1/GeV]")
        draw_header(ax, run, f"signal samples and fitted {model.shape} shapes")
        ax.legend(loc="upper right", title="generated mass", fontsize=8)
        ax.text(0.01, 0.98, "points: simulated samples", transform=ax.transAxes, va="top",
                fontsize=8, color=COLORS["data"])
        if path is not None:
            fig.savefig(path)
    return fig
