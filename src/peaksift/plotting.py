"""Figures of the search, in the peaksift style (:mod:`peaksift._style`), as PNG and PDF.

Which function
--------------
* :func:`search_figures` -- every figure of a :class:`~peaksift.search.SearchResult` into a
  directory: ``spectrum`` (fit, signal component, pulls; optionally also ``spectrum_log``),
  ``pvalue_scan``, ``limits``, ``candidates`` (not while blinded: its histograms include the
  blinded window), ``calibration``.  Returns name -> PNG path.
* :func:`spectrum_only` -- the selected spectrum without a fit (``peaksift spectrum``).
* :func:`candidates` -- the candidates' pT and rapidity.
* :func:`save` -- write one figure in several formats.

The drawing of a fit, a scan and a limit curve belongs to their result objects
(``FitResult.plot``, ``ScanResult.plot``, ``LimitResult.plot``); this module lays them out,
adds what only the search knows (the global significance, the blinded window, the fitted peak
in numbers) and writes the files.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from ._style import COLORS, figure_style, use_headless_backend

__all__ = ["candidates", "save", "search_figures", "spectrum_only"]


def _plt() -> Any:
    use_headless_backend()
    import matplotlib.pyplot as plt

    return plt


def save(fig: Any, outdir: str | os.PathLike[str], name: str,
         formats: Sequence[str] = ("png", "pdf")) -> Path:
    """Save ``fig`` as ``outdir/name.<fmt>`` for each format, close it, return the PNG path.

    PNG is always written (the reports embed it) even when not listed in ``formats``.
    """
    plt = _plt()
    outdir = Path(outdir)
    outdir.mkdir(parents=True, exist_ok=True)
    fmts = list(dict.fromkeys(["png", *formats]))
    for fmt in fmts:
        fig.savefig(outdir / f"{name}.{fmt}", format=fmt)
    plt.close(fig)
    return outdir / f"{name}.png"


def _shade_blind(ax: Any, blind: Sequence[float] | None) -> None:
    if blind is None:
        return
    ax.axvspan(blind[0], blind[1], facecolor=COLORS["blind"], edgecolor="#9a9aa6",
               hatch="///", linewidth=0.0, zorder=0.5, label="blinded")


def _text(ax: Any, lines: Sequence[str], *, loc: str = "upper right") -> None:
    x, ha = (0.97, "right") if "right" in loc else (0.03, "left")
    y, va = (0.95, "top") if "upper" in loc else (0.05, "bottom")
    ax.text(x, y, "\n".join(lines), transform=ax.transAxes, ha=ha, va=va, fontsize=9,
            linespacing=1.4)


# ---------------------------------------------------------------------- spectrum only
def spectrum_only(hist: Any, outdir: str | os.PathLike[str], *,
                  formats: Sequence[str] = ("png", "pdf"), log_scale: bool = False,
                  blind: Sequence[float] | None = None, title: str = "") -> dict[str, Path]:
    """The selected spectrum as points with Poisson-like error bars (``sqrt(sumw2)``).

    With ``blind = (lo, hi)`` every bin overlapping that range is hidden -- the same bins the
    statistics layer leaves out (:func:`peaksift.blinding.blinded_bins`) -- the hidden bins'
    mass range is hatched, and the count in the corner is that of the sidebands only.
    """
    plt = _plt()
    out: dict[str, Path] = {}
    h = hist
    span = None
    if blind is not None:
        from .blinding import blinded_bins, hidden_range

        h = hist.copy()
        inside = blinded_bins(h.edges, blind)
        h.sumw[inside] = np.nan
        h.sumw2[inside] = np.nan
        span = hidden_range(h.edges, blind)
    shown = h.sumw[np.isfinite(h.sumw)]
    total = float(shown.sum())
    where = " outside the blinded window" if span is not None else ""
    count = (f"sum of weights {total:,.1f}{where}" if hist.is_weighted
             else f"{total:,.0f} candidates{where}")
    for log in ([False, True] if log_scale else [False]):
        with figure_style():
            fig, ax = plt.subplots(figsize=(7.0, 4.6))
            h.plot(ax=ax, color=COLORS["data"])
            _shade_blind(ax, span)
            if log:
                ax.set_yscale("log")
                pos = shown[shown > 0]  # the axis range must not reveal the hidden bins
                if pos.size:
                    ax.set_ylim(0.5 * pos.min(), 3.0 * pos.max())
            else:
                ax.set_ylim(0, None)
            _text(ax, [title, count] if title else [count])
            ax.legend(loc="upper left")
            out["spectrum_log" if log else "spectrum"] = save(
                fig, outdir, "spectrum_log" if log else "spectrum", formats)
    return out


# ------------------------------------------------------------------------- candidates
def candidates(collected: Any, outdir: str | os.PathLike[str], *,
               formats: Sequence[str] = ("png", "pdf")) -> dict[str, Path]:
    """Candidates' transverse momentum and rapidity, side by side.

    The histograms hold the candidates whose mass lies in the range the data were collected
    on (the search window, joined with the calibration window when there is one); the
    figure says which.
    """
    plt = _plt()
    e_m = np.asarray(collected.histogram.edges)
    with figure_style():
        fig, (a1, a2) = plt.subplots(1, 2, figsize=(9.0, 3.9))
        fig.suptitle(f"candidates with {e_m[0]:g} < $m$ < {e_m[-1]:g} GeV "
                     f"({collected.histogram.total():,.0f})", fontsize=10.5)
        for ax, h, label, unit in ((a1, collected.pt_histogram, r"$p_\mathrm{T}$ of the pair",
                                    "GeV"),
                                   (a2, collected.rapidity_histogram, "rapidity $y$ of the pair",
                                    "")):
            e = np.asarray(h.edges)
            ax.stairs(h.sumw, e, color=COLORS["total"], linewidth=1.4, fill=False)
            ax.stairs(h.sumw, e, color=COLORS["total"], alpha=0.15, fill=True)
            ax.set_xlabel(f"{label} [{unit}]" if unit else label)
            w = float(np.diff(e)[0])
            ax.set_ylabel(f"candidates / {w:.3g} {unit}".rstrip())
            ax.set_ylim(0, None)
            nz = np.flatnonzero(h.sumw > 0)
            if nz.size and unit:  # trim an empty high-pT tail so the shape is visible
                ax.set_xlim(e[0], e[min(nz[-1] + 2, e.size - 1)])
            else:
                ax.set_xlim(e[0], e[-1])
        fig.tight_layout()
        return {"candidates": save(fig, outdir, "candidates", formats)}


# --------------------------------------------------------------------------- search
def search_figures(result: Any, outdir: str | os.PathLike[str], *,
                   formats: Sequence[str] = ("png", "pdf"), log_scale: bool = False,
                   calibration: tuple[Any, Any] | None = None) -> dict[str, Path]:
    """Every figure of a search result; returns figure name -> PNG path."""
    out: dict[str, Path] = {}
    blind = result.blinding.get("window") if result.blinding.get("active") else None
    if result.fit is None:  # blinded: the spectrum with the blinded bins hidden, no fit
        out.update(spectrum_only(result.histogram, outdir, formats=formats, log_scale=log_scale,
                                 blind=blind, title=_fit_title(result)))
    else:
        for log in ([False, True] if log_scale else [False]):
            name = "spectrum_log" if log else "spectrum"
            out[name] = _fit_figure(result.fit, outdir, name, formats, log=log, blind=blind,
                                    title=_fit_title(result))
    out["pvalue_scan"] = _scan_figure(result, outdir, formats)
    if result.limits is not None:
        out["limits"] = _limits_figure(result, outdir, formats, blind)
    if blind is None:  # the pT/rapidity histograms include the blinded window: withheld
        out.update(candidates(result.collected, outdir, formats=formats))
    if calibration is not None and calibration[1] is not None and result.calibration:
        c = result.calibration
        title = (f"calibration: {c['particle']}, particle-data tables "
                 f"{c['table_mass']:.4f} GeV")
        out["calibration"] = _fit_figure(calibration[1], outdir, "calibration", formats,
                                         log=False, blind=None, title=title,
                                         reference=(c["table_mass"], "mass in the tables"))
    return out


def _fit_title(result: Any) -> str:
    best = result.best
    zl, zg = best.get("z_local"), best.get("z_global")
    parts = [f"best hypothesis {best.get('mass', float('nan')):.2f} GeV"]
    if zl is not None:
        parts.append(f"$Z_\\mathrm{{local}}$ = {zl:.2f}$\\sigma$")
    if zg is not None:
        parts.append(f"$Z_\\mathrm{{global}}$ = {zg:.2f}$\\sigma$")
    return ", ".join(parts)


def _call_plot(obj: Any, **kw: Any) -> Any:
    """Call ``obj.plot`` with the keyword arguments its signature accepts."""
    import inspect

    sig = inspect.signature(obj.plot)
    takes_any = any(p.kind is p.VAR_KEYWORD for p in sig.parameters.values())
    use = {k: v for k, v in kw.items() if takes_any or k in sig.parameters}
    return obj.plot(**use)


def _fit_figure(fr: Any, outdir: str | os.PathLike[str], name: str, formats: Sequence[str], *,
                log: bool, blind: Sequence[float] | None, title: str,
                reference: tuple[float, str] | None = None) -> Path:
    """``FitResult.plot`` (data, model, signal, background, pulls) plus blinding and log;
    ``reference`` = (mass, label) draws a vertical line (e.g. the tabulated mass)."""
    with figure_style():
        fig = fr.plot(title=title)
        ax, axp = fig.axes[0], fig.axes[1]
        if reference is not None:
            for a in (ax, axp):
                a.axvline(reference[0], color=COLORS["accent"], lw=1.0, ls="-.",
                          label=reference[1] if a is ax else None, zorder=1)
            ax.legend(loc="upper right")
        _shade_blind(ax, blind)
        _shade_blind(axp, blind)
        n = np.asarray(fr.observed, dtype=float)
        if log:
            pos = n[n > 0]
            ax.set_yscale("log")
            if pos.size:
                ax.set_ylim(0.3 * pos.min(), 6.0 * pos.max())
        else:  # headroom so the fit's numbers and the legend sit above the data
            ax.set_ylim(0.0, 1.45 * ax.get_ylim()[1])
        return save(fig, outdir, name, formats)


def _scan_figure(result: Any, outdir: str | os.PathLike[str], formats: Sequence[str]) -> Path:
    """``ScanResult.plot`` with the global significance noted."""
    with figure_style():
        fig = result.scan.plot(global_result=dict(result.best))
        return save(fig, outdir, "pvalue_scan", formats)


def _limits_figure(result: Any, outdir: str | os.PathLike[str], formats: Sequence[str],
                   blind: Sequence[float] | None) -> Path:
    plt = _plt()
    with figure_style():
        fig, ax = plt.subplots(figsize=(7.0, 4.6))
        _call_plot(result.limits, ax=ax)
        _shade_blind(ax, blind)
        return save(fig, outdir, "limits", formats)
