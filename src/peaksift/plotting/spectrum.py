"""The mass spectrum and fit figures: the selected spectrum without a fit
(:func:`spectrum_only`, :func:`spectrum_figure`; while blinded with the sideband fit and its
pulls), a search's fit with blinding and log scale, and the calibration peak's fit with its
fitted and tabulated masses (:func:`calibration_figure`)."""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from .._annotations import draw_header, particle_tex, shade_blinded
from .._format import chi_square, fixed, format_pm, number, p_value
from .._style import COLORS, figure_style, margins, new_figure
from .labels import FigureLabels, save
from .legend import place_legend

__all__ = ["calibration_figure", "calibration_fit_figure", "spectrum_figure", "spectrum_only"]


def spectrum_only(hist: Any, outdir: str | os.PathLike[str], *,
                  formats: Sequence[str] = ("png", "pdf"), log_scale: bool = False,
                  blind: Sequence[float] | None = None, title: str = "",
                  labels: FigureLabels | None = None,
                  background: Any = None) -> dict[str, Path]:
    """:func:`spectrum_figure` saved as ``spectrum`` (and ``spectrum_log`` with
    ``log_scale``) in ``outdir``; returns name -> PNG path."""
    out: dict[str, Path] = {}
    for log in ([False, True] if log_scale else [False]):
        name = "spectrum_log" if log else "spectrum"
        out[name] = save(spectrum_figure(hist, log=log, blind=blind, title=title,
                                         labels=labels, background=background),
                         outdir, name, formats)
    return out


def spectrum_figure(hist: Any, *, log: bool = False, blind: Sequence[float] | None = None,
                    title: str = "", labels: FigureLabels | None = None,
                    background: Any = None) -> Any:
    """The selected spectrum as points with Poisson-like error bars (``sqrt(weight_sq_sum)``);
    with ``background`` (a sideband fit) the fit and its pulls.  Returns the Figure.

    With ``blind = (lo, hi)`` every bin overlapping that range is hidden -- the same bins the
    statistics layer leaves out (:func:`peaksift.blinding.blinded_bins`) -- the hidden bins'
    mass range is hatched, and the count stated is that of the sidebands only.
    """
    labels = labels or FigureLabels()
    h = hist
    span = None
    if blind is not None:
        from ..blinding import blinded_bins, hidden_range

        h = hist.copy()
        inside = blinded_bins(h.edges, blind)
        h.weight_sum[inside] = np.nan
        h.weight_sq_sum[inside] = np.nan
        span = hidden_range(h.edges, blind)
    shown = h.weight_sum[np.isfinite(h.weight_sum)]
    total = float(shown.sum())
    where = " outside the blinded window" if span is not None else ""
    count = (f"sum of weights {number(total)}{where}" if hist.is_weighted
             else f"{number(round(total))} candidates{where}")
    if background is None:
        fig, ax = new_figure((7.0, 4.6))
        axp = None
    else:  # the sideband fit: pulls beneath, as under every fit
        fig, (ax, axp) = new_figure((7.0, 5.6), 2, 1, sharex=True,
                                    gridspec_kw={"height_ratios": [3.2, 1], "hspace": 0.05})
    with figure_style():
        h.plot(ax=ax, color=COLORS["data"])
        # what the legend must not cover: the points with their error bars (as h.plot
        # draws them: per GeV for variable bins) and the sideband fit's curve
        per = 1.0 if h.is_regular else 1.0 / h.widths
        y, err = h.weight_sum * per, np.sqrt(h.weight_sq_sum) * per
        keep = (h.centers, y - err, y + err)
        shade_blinded(ax, span)
        if background is not None:
            cx, cy = _draw_sideband_fit(ax, axp, background, span)
            keep = tuple(np.r_[a, b] for a, b in zip(keep, (cx, cy, cy)))
        if log:
            ax.set_yscale("log")
            pos = shown[shown > 0]  # the axis range must not reveal the hidden bins
            if pos.size:
                ax.set_ylim(0.5 * pos.min(), 3.0 * pos.max())
        elif shown.size:
            ax.set_ylim(0, 1.3 * float(np.max(shown + np.sqrt(np.abs(shown)))))
        (axp if axp is not None else ax).set_xlabel(labels.mass_axis(hist.unit))
        if axp is not None:
            ax.set_xlabel("")
            ax.set_xlim(float(hist.edges[0]), float(hist.edges[-1]))
        note = "\n".join(p for p in (title, count) if p)
        if "\n" in note:  # a second statement line above the axes
            margins(fig, top=0.78)
        draw_header(ax, labels.run, note)
        place_legend(ax, *keep, log=log)  # last: on the final axes
    return fig


def _draw_sideband_fit(ax: Any, axp: Any, sb: Any, span: Sequence[float] | None
                       ) -> tuple[np.ndarray, np.ndarray]:
    """The background fitted on the sidebands (``search.sideband.SidebandFit``): solid
    where it was fitted, dashed across the blinded window where it is extrapolated, its
    goodness of fit in the legend; the pulls of the sideband bins beneath.  Returns the
    curve drawn (bin centres, values)."""
    e = np.asarray(sb.edges, float)
    c = 0.5 * (e[1:] + e[:-1])
    bw = np.diff(e)
    ref = float(np.median(bw))
    y = np.asarray(sb.expected, float) * ref / bw
    hid = np.asarray(sb.blinded, bool)
    # the dashed part reaches one bin into each sideband, so the two parts join
    near = hid | np.r_[hid[1:], False] | np.r_[False, hid[:-1]]
    gof = (f"$\\chi^2$/ndf = {chi_square(sb.gof_chi2)}/{sb.gof_ndf}, "
           f"p = {p_value(sb.gof_p_value)}")
    ax.plot(c, np.where(hid, np.nan, y), color=COLORS["total"], lw=1.4,
            label=f"background fit to the sidebands ({gof})")
    if np.any(hid):
        ax.plot(c, np.where(near, y, np.nan), color=COLORS["total"], lw=1.4, ls="--",
                label="its extrapolation (blinded)")
    pulls = np.asarray(sb.pulls, float)
    axp.axhline(0, color=COLORS["background"], lw=0.8)
    for lvl in (-2, 2):
        axp.axhline(lvl, color=COLORS["background"], lw=0.6, ls=":")
    axp.bar(c, np.nan_to_num(pulls), width=bw, color=COLORS["total"], alpha=0.75)
    shade_blinded(axp, span, label=None)
    lim = max(3.5, 1.1 * float(np.nanmax(np.abs(pulls)))) if np.any(np.isfinite(pulls)) \
        else 3.5
    axp.set_ylim(-lim, lim)
    axp.set_ylabel("pull")
    return c, y


def _fit_figure(fr: Any, *, log: bool, blind: Sequence[float] | None, title: str,
                labels: FigureLabels) -> Any:
    """``FitResult.plot`` (data, model, signal, background, pulls, numbers) plus blinding
    and log scale."""
    fig = fr.plot(run=labels.run, symbol=labels.symbol, note=title, log=log)
    ax, axp = fig.axes[0], fig.axes[1]
    with figure_style():
        shade_blinded(ax, blind)
        shade_blinded(axp, blind, label=None)
    return fig


def calibration_figure(cal: Any, fr: Any, outdir: str | os.PathLike[str],
                       formats: Sequence[str], labels: FigureLabels) -> Path:
    """:func:`calibration_fit_figure` saved as ``calibration`` in ``outdir``."""
    return save(calibration_fit_figure(cal, fr, labels), outdir, "calibration", formats)


def calibration_fit_figure(cal: Any, fr: Any, labels: FigureLabels) -> Any:
    """The calibration peak's fit ``fr`` (a FitResult) with the fitted mass (solid) and the
    tables' mass (dash-dotted) drawn, and the shift between them stated above the axes
    (``cal``: results.json's ``calibration``)."""
    name = particle_tex(cal.get("particle"))
    fm, fe = cal.get("fitted_mass") or {}, None
    if isinstance(fm, dict):
        fm, fe = fm.get("value"), fm.get("error")
    ref = cal.get("table_mass")
    note = (f"calibration: {name},  fitted {format_pm(fm, fe, 'GeV')},  tables "
            f"{fixed(ref, 4)} GeV,  shift {fixed(cal.get('shift'), 3, signed=True)} GeV "
            f"({fixed(cal.get('shift_relative_permille'), 2, signed=True)}\u2030)")
    from ..fitting.figure import fit_figure

    marks = []
    if fixed(fm) != "n/a":
        marks.append((float(fm), "fitted mass", COLORS["mark"], "-"))
    if fixed(ref) != "n/a":
        marks.append((float(ref), "mass in the tables", COLORS["accent"], "-."))
    return fit_figure(fr, run=labels.run, symbol=labels.symbol, note=note, marks=marks,
                      kind="calibration")
