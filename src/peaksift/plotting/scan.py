"""The p-value scan figure: ``ScanResult.plot`` with the global significance, the expected
curve of a signal of the fitted size (:func:`scan_expectation`), a clipped excess stated in
numbers, and the curve with systematics over the one without."""

from __future__ import annotations

from typing import Any

import numpy as np

from .._format import fixed, mass_text, number, p_value
from .._style import COLORS, figure_style
from .labels import FigureLabels

__all__ = ["scan_expectation", "scan_figure"]


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

    from ..stats.scan_result import place_scan_legend

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
        place_scan_legend(ax, [handles[i] for i in keep], [names[i] for i in keep],
                          fontsize=8.5)


def scan_figure(sres: Any, best: Any = None, *, labels: FigureLabels | None = None,
                expected: Any = None) -> Any:
    """The p-value scan figure: ``ScanResult.plot``, the global significance of ``best``
    (the search's ``best`` entry) above the axes, and a note when the curve leaves the axis.

    The log axis stops at a floor (the scan's own choice, at most about 8 sigma); a larger
    excess (p_local down to 1e-2000 and beyond, 0 as a float) is drawn clipped there, marked
    with a triangle at the best mass and stated in numbers (p as a power of ten).
    """
    from ..stats.scan_result import place_scan_legend
    from ..stats.significance import log10_p, log_p_from_q0

    labels = labels or FigureLabels()
    b = best if isinstance(best, dict) else dict(best or {})
    note = ""
    if b:
        unit = getattr(sres, "unit", "GeV")
        gt = "> " if b.get("z_global_is_lower_bound") else ""
        note = (f"best {mass_text(b.get('mass'))} {unit}:  $Z_{{local}}$ = "
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
                place_scan_legend(ax)  # placed again: off this note too
    return fig
