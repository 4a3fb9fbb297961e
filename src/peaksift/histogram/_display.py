"""How a :class:`~peaksift.histogram.MassHistogram` shows itself: ``plot`` (points with error
bars on a Figure made without pyplot) and the notebook table (``_repr_html_``)."""

from __future__ import annotations

from typing import Any


def plot(hist: Any, ax: Any, density: bool, kwargs: dict[str, Any]) -> Any:
    """``MassHistogram.plot``; returns the Figure."""
    from .._style import COLORS, figure_style, new_figure

    if ax is None:
        _, ax = new_figure((7, 4.5))
    scale = 1.0 / hist.widths if (density or not hist._regular) else 1.0
    y = hist._values * scale
    yerr = hist.errors * scale
    kwargs.setdefault("fmt", "o")
    kwargs.setdefault("ms", 3)
    kwargs.setdefault("color", COLORS["data"])
    kwargs.setdefault("elinewidth", 0.9)
    kwargs.setdefault("label", "data")
    with figure_style():
        ax.errorbar(hist.centers, y, yerr=yerr,
                    xerr=0.5 * hist.widths if hist.nbins < 80 else None, **kwargs)
    ax.set_xlabel(f"${hist.label}$ [{hist.unit}]" if hist.label.isalpha() else
                  f"{hist.label} [{hist.unit}]")
    if density or not hist._regular:
        ax.set_ylabel(f"candidates / {hist.unit}")
    else:
        ax.set_ylabel(f"candidates / {hist.widths[0]:.3g} {hist.unit}")
    ax.set_xlim(hist.lo, hist.hi)
    return ax.figure


def html_table(hist: Any) -> str:
    """``MassHistogram._repr_html_``: the binning, sum of weights and flows as a table."""
    import html

    kind = "regular" if hist._regular else "variable"
    rows = (("bins", f"{hist.nbins} {kind} on [{hist.lo:g}, {hist.hi:g}] {hist.unit}"),
            ("sum of weights", f"{hist.total():.6g}"),
            ("weighted", "yes" if hist.is_weighted else "no"),
            ("underflow / overflow", f"{hist.underflow:.6g} / {hist.overflow:.6g}"))
    cells = "".join(f"<tr><td>{html.escape(k)}</td><td>{html.escape(v)}</td></tr>"
                    for k, v in rows)
    return f"<div><b>MassHistogram</b><table>{cells}</table></div>"
