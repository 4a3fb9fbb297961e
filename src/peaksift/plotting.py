"""Figures of the search, in the peaksift style (:mod:`peaksift._style`), as PNG and PDF.

Which function
--------------
* :func:`search_figures` -- every figure of a :class:`~peaksift.search.SearchResult` into a
  directory: ``spectrum`` (fit, signal component, pulls; optionally also ``spectrum_log``),
  ``pvalue_scan``, ``limits``, ``candidates`` (not while blinded: its histograms include the
  blinded window), ``calibration``.  Returns name -> PNG path.
* :func:`spectrum_only` -- the selected spectrum without a fit (``peaksift spectrum``).
* :func:`candidates` -- the candidates' pT and rapidity.
* :func:`scan_figure` -- the p-value scan with the global significance noted; an excess
  beyond the axis floor is clipped there and its p stated (as a power of ten if need be).
* :func:`envelope_figure` -- the background-function envelope: twice the profiled NLL
  against the signal yield at the best mass, one curve per candidate, the envelope over them
  (``background_envelope``, with ``[systematics]`` background families).
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

from ._format import fixed, number, p_value
from ._style import COLORS, figure_style, use_headless_backend

__all__ = ["candidates", "dedx_figure", "envelope_figure", "save", "scan_figure",
           "search_figures", "spectrum_only"]


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
    """The selected spectrum as points with Poisson-like error bars (``sqrt(weight_sq_sum)``).

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
        h.weight_sum[inside] = np.nan
        h.weight_sq_sum[inside] = np.nan
        span = hidden_range(h.edges, blind)
    shown = h.weight_sum[np.isfinite(h.weight_sum)]
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
            ax.stairs(h.weight_sum, e, color=COLORS["total"], linewidth=1.4, fill=False)
            ax.stairs(h.weight_sum, e, color=COLORS["total"], alpha=0.15, fill=True)
            ax.set_xlabel(f"{label} [{unit}]" if unit else label)
            w = float(np.diff(e)[0])
            ax.set_ylabel(f"candidates / {w:.3g} {unit}".rstrip())
            ax.set_ylim(0, None)
            nz = np.flatnonzero(h.weight_sum > 0)
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
    syst = getattr(result, "systematics", None) or {}
    if (syst.get("envelope") or {}).get("profile"):
        out["background_envelope"] = save(envelope_figure(syst), outdir, "background_envelope",
                                          formats)
    if calibration is not None and calibration[1] is not None and result.calibration:
        c = result.calibration
        title = (f"calibration: {c.get('particle')}, particle-data tables "
                 f"{fixed(c.get('table_mass'), 4)} GeV")
        ref = c.get("table_mass")
        out["calibration"] = _fit_figure(calibration[1], outdir, "calibration", formats,
                                         log=False, blind=None, title=title,
                                         reference=(ref, "mass in the tables")
                                         if fixed(ref) != "n/a" else None)
    return out


def _fit_title(result: Any) -> str:
    best = result.best
    zl, zg = fixed(best.get("z_local")), fixed(best.get("z_global"))
    parts = [f"best hypothesis {fixed(best.get('mass'))} GeV"]
    if zl != "n/a":
        parts.append(f"$Z_\\mathrm{{local}}$ = {zl}$\\sigma$")
    if zg != "n/a":
        gt = "> " if best.get("z_global_is_lower_bound") else ""
        parts.append(f"$Z_\\mathrm{{global}}$ = {gt}{zg}$\\sigma$")
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
        return save(scan_figure(result.scan, result.best), outdir, "pvalue_scan", formats)


def scan_figure(sres: Any, best: Any = None) -> Any:
    """The p-value scan figure: ``ScanResult.plot``, the global significance of ``best``
    (the search's ``best`` entry) above the axes, and a note when the curve leaves the axis.

    The log axis stops at a floor (the scan's own choice, about 8 sigma); a larger excess
    (p_local down to 1e-2000 and beyond, 0 as a float) is drawn clipped there, marked with
    a triangle at the best mass and stated in numbers (p as a power of ten).
    """
    from .stats.significance import log10_p, log_p_from_q0

    fig = sres.plot()
    ax = fig.axes[0]
    b = best if isinstance(best, dict) else dict(best or {})
    if b:
        unit = getattr(sres, "unit", "GeV")
        gt = "> " if b.get("z_global_is_lower_bound") else ""
        ax.text(0.0, 1.015, f"best {number(b.get('mass'))} {unit}: "
                f"$Z_{{local}}$ = {fixed(b.get('z_local'))}, $Z_{{global}}$ = "
                f"{gt}{fixed(b.get('z_global'))} ({b.get('global_method') or 'n/a'})",
                transform=ax.transAxes, fontsize=9, va="bottom")
    q = np.where(np.asarray(sres.blinded, bool), np.nan, np.asarray(sres.q0, dtype=float))
    if np.any(np.isfinite(q)):
        i = int(np.nanargmax(q))
        lg = float(log10_p(log_p_from_q0(q[i])))
        floor = float(ax.get_ylim()[0])
        if floor > 0 and lg < np.log10(floor):
            m = float(np.asarray(sres.masses, dtype=float)[i])
            ax.plot([m], [floor], marker="v", ms=8, color=COLORS["signal"], clip_on=False,
                    zorder=5, ls="none")
            ax.text(0.97, 0.05, f"curve clipped at the axis floor p = {p_value(floor)};\n"
                    f"lowest local p = {p_value(10.0 ** lg, lg)} at {number(m)} "
                    f"{getattr(sres, 'unit', 'GeV')} (\u25bc)",
                    transform=ax.transAxes, ha="right", va="bottom", fontsize=8.5,
                    color=COLORS["signal"])
    return fig


def _limits_figure(result: Any, outdir: str | os.PathLike[str], formats: Sequence[str],
                   blind: Sequence[float] | None) -> Path:
    plt = _plt()
    with figure_style():
        fig, ax = plt.subplots(figsize=(7.0, 4.6))
        _call_plot(result.limits, ax=ax)
        _shade_blind(ax, blind)
        return save(fig, outdir, "limits", formats)


# ------------------------------------------------------------- background envelope
_CURVE_STYLES = ("-", "--", "-.", ":", (0, (5, 1, 1, 1)), (0, (1, 1)))


def envelope_figure(systematics: Any) -> Any:
    """The envelope figure from a search's ``systematics`` block (results.json form): at the
    best mass, twice the profiled NLL plus the penalty against the signal yield for every
    candidate function (thin), their minimum -- the envelope -- drawn over them (thick), all
    relative to the envelope's minimum; the level 1 marks the 68% interval."""
    plt = _plt()
    env = systematics["envelope"]
    prof = env["profile"]
    s = np.asarray(prof["signal_yield"], float)
    with figure_style():
        fig, ax = plt.subplots(figsize=(7.0, 4.6))
        greys = ("#5b6270", "#8a8f98", "#1f6f8b", "#b07a2a", "#6a4c93", "#2e7d4f")
        top = 0.0
        for k, (label, curve) in enumerate(prof["curves"].items()):
            c = np.asarray(curve, float)
            ax.plot(s, c, lw=1.1, ls=_CURVE_STYLES[k % len(_CURVE_STYLES)],
                    color=greys[k % len(greys)], label=label)
            top = max(top, float(np.nanmin(c)))
        e = np.asarray(prof["envelope"], float)
        ax.plot(s, e, lw=2.6, color=COLORS["signal"], alpha=0.85, label="envelope", zorder=4)
        ax.axhline(1.0, color=COLORS["accent"], lw=0.8, ls=":")
        ax.text(s[-1], 1.0, " 68%", va="center", ha="left", color=COLORS["accent"],
                fontsize=9, clip_on=False)
        ax.set_ylim(-0.3, max(6.0, min(top + 4.0, 40.0)))
        ax.set_xlim(s[0], s[-1])
        ax.set_xlabel("signal yield [events]")
        ax.set_ylabel(r"$-2\,\Delta\ln L$ + penalty")
        ax.text(0.0, 1.015, f"discrete profiling at {number(prof['mass'])} GeV: "
                f"{len(prof['curves'])} functions, penalty {fixed(env['penalty'], 2)} per "
                "parameter", transform=ax.transAxes, fontsize=9, va="bottom")
        ax.legend(loc="upper center", fontsize=8.5, ncol=min(3, len(prof["curves"]) + 1))
    return fig


# ------------------------------------------------------------------ dE/dx identification
# one colour per mass hypothesis, from the peaksift palette (deuteron: a muted plum)
_HYPOTHESIS_COLORS = {"pion": COLORS["total"], "kaon": COLORS["signal"],
                      "proton": COLORS["accent"], "electron": COLORS["background"],
                      "deuteron": "#6b5b95"}


def dedx_figure(outcome: Any, outdir: str | os.PathLike[str], *,
                formats: Sequence[str] = ("png", "pdf"), hypotheses: Sequence[str] = (),
                band: float = 3.0) -> Path:
    """dE/dx against momentum: the tracks' density (log momentum axis), the expected curve of
    every mass hypothesis, and the ±``band`` sigma selection band of the pairing hypotheses.

    ``outcome`` holds ``p_edges``, ``dedx_edges``, ``counts`` (momentum x dE/dx) and the
    ``response`` (:class:`peaksift.energy_loss.DedxResponse`) the pairing used.  The band is
    drawn with the resolution at the reference number of samples.
    """
    from matplotlib.colors import LinearSegmentedColormap, LogNorm

    from .energy_loss import HYPOTHESES, hypothesis_mass

    plt = _plt()
    r = outcome.response
    counts = np.asarray(outcome.counts, dtype=float)
    p_edges = np.asarray(outcome.p_edges, dtype=float)
    d_edges = np.asarray(outcome.dedx_edges, dtype=float)
    grid = np.geomspace(p_edges[0], p_edges[-1], 400)
    ramp = LinearSegmentedColormap.from_list(
        "peaksift_density", ["#ffffff", COLORS["band2"], COLORS["band1"], COLORS["total"],
                             COLORS["data"]])
    with figure_style():
        fig, ax = plt.subplots(figsize=(7.0, 5.0))
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
        _text(ax, [(f"{r.material.name}: scale {r.scale:.4g}, \u03c3/\u27e8dE/dx\u27e9 "
                   f"{r.resolution:.3g}")], loc="lower left")
        return save(fig, outdir, "dedx", formats)
