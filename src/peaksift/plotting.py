"""Figures of the search, in the peaksift style (:mod:`peaksift._style`), as PNG and PDF.

Which function
--------------
* :func:`search_figures` -- every figure of a :class:`~peaksift.search.SearchResult` into a
  directory: ``spectrum`` (fit, signal component, pulls, fitted numbers; optionally also
  ``spectrum_log``), ``pvalue_scan``, ``limits``, ``candidates`` (not while blinded: its
  histograms include the blinded window), ``calibration``.  Returns name -> PNG path;
  :func:`search_figure` returns one of them as a Figure (``SearchResult.plot``).
* :func:`spectrum_only` -- the selected spectrum without a fit (``peaksift spectrum``);
  :func:`spectrum_figure` its Figure.
* :func:`candidates` -- the candidates' pT (log scale) and rapidity in the search window.
* :func:`scan_figure` -- the p-value scan with the global significance noted; an excess
  beyond the axis floor is clipped there and its p stated (as a power of ten if need be).
* :func:`figure_labels` -- the run label and the pair's mass symbol from a configuration.
* :func:`envelope_figure` -- the background-function envelope: twice the profiled NLL
  against the signal yield at the best mass, one curve per candidate, the envelope over them
  (``background_envelope``, with ``[systematics]`` background families).
* :func:`save` -- write one figure in several formats.

Every figure carries the run label (name, sqrt(s), luminosity, channel) above its axes and
names its mass axis with the pair's symbol (``m_{\\mu\\mu}``); masses are written with two
decimals, significances with two, fitted values rounded to two digits of their error.  No
function here touches pyplot or the matplotlib backend.

The drawing of a fit, a scan and a limit curve belongs to their result objects
(``FitResult.plot``, ``ScanResult.plot``, ``LimitResult.plot``); this module lays them out,
adds what only the search knows (the global significance, the blinded window, the run) and
writes the files.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ._format import fixed, format_pm, number, p_value
from ._style import (
    COLORS,
    RunLabel,
    channel_tex,
    draw_header,
    figure_style,
    margins,
    mass_symbol,
    new_figure,
    particle_tex,
    shade_blinded,
)

__all__ = ["FigureLabels", "candidates", "candidates_figure", "dedx_figure", "envelope_figure",
           "figure_labels", "limits_figure", "save", "scan_expectation", "scan_figure",
           "search_figure", "search_figures", "spectrum_figure", "spectrum_only"]


@dataclass(frozen=True)
class FigureLabels:
    """What every figure of one run says about it: the run label and the mass symbol."""

    run: RunLabel | None = None
    symbol: str = "m"

    def mass_axis(self, unit: str = "GeV") -> str:
        return f"${self.symbol}$ [{unit}]"


def figure_labels(cfg: Any) -> FigureLabels:
    """:class:`FigureLabels` from a validated configuration: the ``[run]`` keys (name,
    sqrt_s, channel; the luminosity is ``limits.luminosity``), the collections and the
    pairing's charge (the channel when ``run.channel`` is not set)."""
    if cfg is None:
        return FigureLabels()
    ob, pr = getattr(cfg, "objects", None), getattr(cfg, "pairing", None)
    first = getattr(ob, "collection", None)
    second = getattr(ob, "second_collection", None)
    charge = getattr(pr, "charge", None)
    run_cfg = getattr(cfg, "run", None)
    lim = getattr(cfg, "limits", None)
    channel = getattr(run_cfg, "channel", "") or channel_tex(first, second, charge)
    run = RunLabel(name=getattr(run_cfg, "name", "") or "",
                   sqrt_s=getattr(run_cfg, "sqrt_s", None),
                   luminosity=getattr(lim, "luminosity", None),
                   channel=channel)
    return FigureLabels(run=run, symbol=mass_symbol(first, second))


def save(fig: Any, outdir: str | os.PathLike[str], name: str,
         formats: Sequence[str] = ("png", "pdf")) -> Path:
    """Save ``fig`` as ``outdir/name.<fmt>`` for each format; return the PNG path.

    PNG is always written (the reports embed it) even when not listed in ``formats``.
    """
    outdir = Path(outdir)
    outdir.mkdir(parents=True, exist_ok=True)
    fmts = list(dict.fromkeys(["png", *formats]))
    with figure_style():
        for fmt in fmts:
            fig.savefig(outdir / f"{name}.{fmt}", format=fmt)
    return outdir / f"{name}.png"


# ---------------------------------------------------------------------- spectrum only
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
        from .blinding import blinded_bins, hidden_range

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
        shade_blinded(ax, span)
        if background is not None:
            _draw_sideband_fit(ax, axp, background, span)
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
        ax.legend(loc="upper right")
        note = "\n".join(p for p in (title, count) if p)
        if "\n" in note:  # a second statement line above the axes
            margins(fig, top=0.78)
        draw_header(ax, labels.run, note)
    return fig


def _draw_sideband_fit(ax: Any, axp: Any, sb: Any, span: Sequence[float] | None) -> None:
    """The background fitted on the sidebands (``search.sideband.SidebandFit``): solid
    where it was fitted, dashed across the blinded window where it is extrapolated, its
    goodness of fit in the legend; the pulls of the sideband bins beneath."""
    e = np.asarray(sb.edges, float)
    c = 0.5 * (e[1:] + e[:-1])
    bw = np.diff(e)
    ref = float(np.median(bw))
    y = np.asarray(sb.expected, float) * ref / bw
    hid = np.asarray(sb.blinded, bool)
    # the dashed part reaches one bin into each sideband, so the two parts join
    near = hid | np.r_[hid[1:], False] | np.r_[False, hid[:-1]]
    gof = (f"$\\chi^2$/ndf = {fixed(sb.gof_chi2, 1)}/{sb.gof_ndf}, "
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


# ------------------------------------------------------------------------- candidates
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
                    f"{fixed(lo, 1)} < ${labels.symbol}$ < {fixed(hi, 1)} GeV (search window)")
        fig.subplots_adjust(wspace=0.3)
    return fig


# --------------------------------------------------------------------------- search
#: the figures of a search, in the order the report shows them
SEARCH_FIGURES = ("spectrum", "pvalue_scan", "limits", "candidates", "background_envelope",
                  "calibration")


def search_figures(result: Any, outdir: str | os.PathLike[str], *,
                   formats: Sequence[str] = ("png", "pdf"), log_scale: bool = False,
                   calibration: tuple[Any, Any] | None = None,
                   labels: FigureLabels | None = None,
                   names: Sequence[str] = SEARCH_FIGURES,
                   expected: tuple[Any, str] | None = None) -> dict[str, Path]:
    """Every figure of a search result among ``names`` (default: all) that the result has
    the results for; returns figure name -> PNG path (``spectrum`` brings ``spectrum_log``
    with ``log_scale``).  ``expected``: the p-value scan's expected curve
    (:func:`scan_expectation`), computed here when not given."""
    labels = labels or figure_labels(getattr(result, "config", None))
    out: dict[str, Path] = {}
    for name in names:
        if (name == "calibration" and calibration is not None
                and calibration[1] is not None and result.calibration):
            out[name] = calibration_figure(result.calibration, calibration[1], outdir,
                                           formats, labels)
        for log in ([False, True] if name == "spectrum" and log_scale else [False]):
            fig = search_figure(result, name, labels=labels, log=log, expected=expected)
            if fig is not None:
                key = f"{name}_log" if log else name
                out[key] = save(fig, outdir, key, formats)
    return out


def search_figure(result: Any, name: str = "spectrum", *, labels: FigureLabels | None = None,
                  log: bool = False, expected: tuple[Any, str] | None = None) -> Any:
    """The Figure ``name`` (one of :data:`SEARCH_FIGURES` but ``calibration``) of a search
    result, or None when the result has nothing to draw for it (no limits, blinded
    candidates, no envelope).  While blinded the spectrum shows the sideband fit."""
    labels = labels or figure_labels(getattr(result, "config", None))
    blind = result.blinding.get("window") if result.blinding.get("active") else None
    env = (getattr(result, "systematics", None) or {}).get("envelope") or {}
    if name == "spectrum" and result.fit is None:  # blinded: the blinded bins hidden
        return spectrum_figure(result.histogram, log=log, blind=blind, labels=labels,
                               title=_fit_title(result), background=result.background_fit)
    if name == "spectrum":
        return _fit_figure(result.fit, log=log, blind=blind, title=_fit_title(result),
                           labels=labels)
    if name == "pvalue_scan":
        return _scan_figure(result, labels, expected)
    if name == "limits" and result.limits is not None:
        return _limits_figure(result, labels)
    if name == "candidates" and blind is None and result.collected is not None:
        return candidates_figure(result.collected, labels)  # (they include the blinded window)
    if name == "background_envelope" and env.get("profile"):
        return envelope_figure(result.systematics, labels=labels)
    return None


def _fit_title(result: Any) -> str:
    best = result.best
    zl, zg = fixed(best.get("z_local")), fixed(best.get("z_global"))
    parts = [f"best hypothesis {fixed(best.get('mass'))} GeV"]
    if zl != "n/a":
        parts.append(f"$Z_{{local}}$ = {zl}")
    if zg != "n/a":
        gt = "> " if best.get("z_global_is_lower_bound") else ""
        parts.append(f"$Z_{{global}}$ = {gt}{zg}")
    # the same rule as the report's Result table: with [systematics] the significances are
    # the profiled ones, not the single function's drawn below
    tag = " (with systematics)" if getattr(result, "systematics", None) else ""
    return ",  ".join(parts) + tag


def _fit_figure(fr: Any, *, log: bool, blind: Sequence[float] | None, title: str,
                labels: FigureLabels) -> Any:
    """``FitResult.plot`` (data, model, signal, background, pulls, numbers) plus blinding
    and log scale."""
    fig = fr.plot(run=labels.run, symbol=labels.symbol, note=title)
    ax, axp = fig.axes[0], fig.axes[1]
    with figure_style():
        shade_blinded(ax, blind)
        shade_blinded(axp, blind, label=None)
        n = np.asarray(fr.observed, dtype=float)
        if log:
            pos = n[n > 0]
            ax.set_yscale("log")
            if pos.size:
                ax.set_ylim(0.3 * pos.min(), 30.0 * pos.max())
    return fig


def calibration_figure(cal: Any, fr: Any, outdir: str | os.PathLike[str],
                       formats: Sequence[str], labels: FigureLabels) -> Path:
    """The calibration peak's fit with the fitted mass (solid) and the tables' mass
    (dash-dotted) drawn, and the shift between them stated above the axes."""
    name = particle_tex(cal.get("particle"))
    fm, fe = cal.get("fitted_mass") or {}, None
    if isinstance(fm, dict):
        fm, fe = fm.get("value"), fm.get("error")
    ref = cal.get("table_mass")
    note = (f"calibration: {name},  fitted {format_pm(fm, fe, 'GeV')},  tables "
            f"{fixed(ref, 4)} GeV,  shift {fixed(cal.get('shift'), 3, signed=True)} GeV "
            f"({fixed(cal.get('shift_relative_permille'), 2, signed=True)}\u2030)")
    from .fitting.figure import fit_figure

    marks = []
    if fixed(fm) != "n/a":
        marks.append((float(fm), "fitted mass", COLORS["mark"], "-"))
    if fixed(ref) != "n/a":
        marks.append((float(ref), "mass in the tables", COLORS["accent"], "-."))
    fig = fit_figure(fr, run=labels.run, symbol=labels.symbol, note=note, marks=marks)
    return save(fig, outdir, "calibration", formats)


def scan_expectation(scan: Any) -> tuple[np.ndarray, str] | None:
    """The p-value scan's expected curve and its legend label: the expected local Z of a
    signal of the size the scan fitted at its best mass (None without one).  Statistics,
    not drawing: a search computes it where its scan's kernels are loaded and hands it to
    the drawer (``search_figures(expected=...)``)."""
    if getattr(scan, "model", None) is None or not 0 <= scan.best_index < scan.masses.size:
        return None
    # the scan's own yield at its best mass, with the scan's signal shape: the free fit's
    # yield has its own width (a broad free fit can hold twice the events, and the curve
    # then promises a significance no hypothesis of the scan could show)
    s = float(scan.signal_yield[scan.best_index])
    if not (np.isfinite(s) and s > 0):
        return None
    label = f"expected for a signal of {number(s, 3)} events (the scan's best fit)"
    return np.asarray(scan.expected_z(s), float), label


def _scan_figure(result: Any, labels: FigureLabels, expected: Any = None) -> Any:
    """``ScanResult.plot`` with the global significance noted and the expected p-value of
    a signal of the size the scan fitted at its best mass (``expected``: that curve and
    label from :func:`scan_expectation`, computed here when not given)."""
    scan = result.scan
    if expected is None:
        expected = scan_expectation(scan)
    fig = scan_figure(scan, result.best, labels=labels, expected=expected)
    env = ((getattr(result, "systematics", None) or {}).get("envelope") or {})
    # results.json files written before the key took EnvelopeResult's name say "mass"
    masses = env.get("masses", env.get("mass"))
    if env.get("z_local") is not None and len(env["z_local"]) and masses is not None:
        _with_systematics(fig.axes[0], masses, env["z_local"], result.best)
    return fig


def _with_systematics(ax: Any, masses: Any, z_local: Any, best: Any) -> None:
    """The local p-value with the systematics (background function profiled as an envelope,
    signal nuisances profiled) over the scan without them: the header's numbers are on this
    curve, so it is drawn bold, its best point marked, and the single-function curve thin."""
    from scipy.special import ndtr

    m = np.asarray(masses, float)
    z = np.array([np.nan if v is None else v for v in z_local], float)
    rank: dict[Any, int] = {}  # legend order: each curve followed by its best point
    with figure_style():
        for line in ax.get_lines():
            label = str(line.get_label())
            if label == "observed":
                line.set_label("observed, no systematics")
                line.set_linewidth(0.9)
                line.set_alpha(0.55)
                rank[line] = 0
            elif label.startswith("best:"):  # the mass is in the header
                line.set_label(f"its best: $Z_{{local}}$ = {label.rpartition('= ')[2]}")
                line.set_alpha(0.55)
                rank[line] = 1
        rank[ax.plot(m, ndtr(-z), color=COLORS["signal"], lw=1.8,
                     label="observed, with systematics", zorder=4)[0]] = 2
        b = dict(best or {})
        if b.get("mass") is not None and b.get("z_local") is not None:
            rank[ax.plot([float(b["mass"])], [float(ndtr(-float(b["z_local"])))], ls="none",
                         marker="o", ms=6, color=COLORS["signal"], zorder=5,
                         label=f"its best: $Z_{{local}}$ = {fixed(b['z_local'])}")[0]] = 3
        handles, names = ax.get_legend_handles_labels()
        keep = sorted(range(len(handles)), key=lambda i: (rank.get(handles[i], 4), i))
        ax.legend([handles[i] for i in keep], [names[i] for i in keep], loc="lower left",
                  fontsize=8.5)


def scan_figure(sres: Any, best: Any = None, *, labels: FigureLabels | None = None,
                expected: Any = None) -> Any:
    """The p-value scan figure: ``ScanResult.plot``, the global significance of ``best``
    (the search's ``best`` entry) above the axes, and a note when the curve leaves the axis.

    The log axis stops at a floor (the scan's own choice, at most about 8 sigma); a larger
    excess (p_local down to 1e-2000 and beyond, 0 as a float) is drawn clipped there, marked
    with a triangle at the best mass and stated in numbers (p as a power of ten).
    """
    from .stats.significance import log10_p, log_p_from_q0

    labels = labels or FigureLabels()
    b = best if isinstance(best, dict) else dict(best or {})
    note = ""
    if b:
        unit = getattr(sres, "unit", "GeV")
        gt = "> " if b.get("z_global_is_lower_bound") else ""
        note = (f"best {fixed(b.get('mass'))} {unit}:  $Z_{{local}}$ = "
                f"{fixed(b.get('z_local'))},  $Z_{{global}}$ = {gt}{fixed(b.get('z_global'))} "
                f"({b.get('global_method') or 'n/a'})")
    fig = sres.plot(run=labels.run, symbol=labels.symbol, expected=expected, title=note)
    ax = fig.axes[0]
    q = np.where(np.asarray(sres.blinded, bool), np.nan, np.asarray(sres.q0, dtype=float))
    if np.any(np.isfinite(q)):
        i = int(np.nanargmax(q))
        lg = float(log10_p(log_p_from_q0(q[i])))
        floor = float(ax.get_ylim()[0])
        if floor > 0 and lg < np.log10(floor):
            m = float(np.asarray(sres.masses, dtype=float)[i])
            with figure_style():
                ax.plot([m], [floor], marker="v", ms=8, color=COLORS["signal"],
                        clip_on=False, zorder=5, ls="none")
                ax.text(0.97, 0.05, f"curve clipped at the axis floor p = {p_value(floor)};\n"
                        f"lowest local p = {p_value(10.0 ** lg, lg)} at {fixed(m)} "
                        f"{getattr(sres, 'unit', 'GeV')} (\u25bc)",
                        transform=ax.transAxes, ha="right", va="bottom", fontsize=8.5,
                        color=COLORS["signal"])
    return fig


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


# ------------------------------------------------------------- background envelope
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
        draw_header(ax, None, (f"{r.material.name}: scale {r.scale:.4g}, "
                               f"\u03c3/\u27e8dE/dx\u27e9 {r.resolution:.3g}"))
    return save(fig, outdir, "dedx", formats)
