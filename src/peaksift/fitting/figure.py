"""The fit figure: data with Poisson error bars, the model, its components, pulls beneath,
and the fitted numbers as a small table under the legend (or beside it; neither covers a
point, an error bar or a curve: the y axis is raised when no corner is free).

:func:`fit_figure` draws on a new Figure made without pyplot (or on one you pass), so the
user's matplotlib backend is never touched.  :func:`parameter_rows` gives the table's rows
(also used by the calibration figure of a search).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .._format import chi_square, format_interval, number, p_value, pm_parts
from .result import FitResult

__all__ = ["fit_figure", "parameter_rows"]

# parameter name -> (symbol in mathtext, unit is the mass unit?)
_SYMBOLS = {
    "mass": ("mass", True), "sigma": (r"$\sigma$", True), "width": (r"$\Gamma$", True),
    "signal_yield": (r"$N_{sig}$", False), "background_yield": (r"$N_{bkg}$", False),
    "alpha_low": (r"$\alpha_{low}$", False), "n_low": (r"$n_{low}$", False),
    "alpha_high": (r"$\alpha_{high}$", False), "n_high": (r"$n_{high}$", False),
    "alpha": (r"$\alpha$", False), "n": (r"$n$", False),
}


def parameter_rows(result: FitResult, *, background: bool = False
                   ) -> list[tuple[str, str, str, str]]:
    """``(symbol, value, ± error, unit)`` for the signal parameters, the signal yield and
    the background yield (``background=True``: the background shape's parameters too).
    Fixed parameters say "fixed" in the error column; a parameter with a profile-likelihood
    interval shows it (``+0.50 -0.55``, as the summary and the report do) instead of its
    symmetric HESSE error, so the figure and the tables quote the same numbers."""
    sig_names: list[str] = []
    for s in result.model.signals:
        sig_names += [p.name for p in s.parameters]
    names = [n for n in result.parameters
             if n in sig_names or n in ("signal_yield", "background_yield")
             or n.split("_")[0] in sig_names or background]
    order = {n: i for i, n in enumerate(("mass", "sigma", "width"))}
    names.sort(key=lambda n: (order.get(n, 3), n in ("signal_yield", "background_yield")))
    intervals = dict(result.intervals or {})
    rows = []
    for n in names:
        sym, mass_unit = _SYMBOLS.get(n, (n.replace("_", " "), False))
        if n in result.fixed and result.held(n) == "fixed":
            v, e = number(result.values[n]), "(fixed)"
        elif n in result.fixed:  # tied: its value and the error carried from its source
            v, e = pm_parts(result.values[n], result.errors[n])
            e = f"\u00b1 {e} (tied)" if e else "(tied)"
        elif n in intervals and (text := format_interval(result.values[n], *intervals[n],
                                                         bounds=result.bounds[n],
                                                         short=True)) \
                and " +" in text:
            v, _, e = text.partition(" ")
        else:
            v, e = pm_parts(result.values[n], result.errors[n])
            e = f"\u00b1 {e}" if e else ""
        rows.append((sym, v, e, result.unit if mass_unit else ""))
    return rows


def gof_caption(result: FitResult) -> str:
    """``χ²/ndf = 103.8/85, p = 0.077`` (Baker-Cousins); what is missing said plainly."""
    if result.gof_ndf <= 0 or not np.isfinite(result.gof_chi2):
        return r"$\chi^2$ not defined (no degrees of freedom left)"
    return (rf"$\chi^2$/ndf = {chi_square(result.gof_chi2)}/{result.gof_ndf},  "
            f"p = {p_value(result.gof_p_value)}")


def invalid_caption(problems: Any, width: int = 52) -> str:
    """The reasons a fit is not valid, short enough to read whole in the value table: each
    reason up to its remedy (the text after a colon), without its parentheses and its
    second clause (the full text is in the summary, the report and results.json), wrapped
    at ``width`` characters."""
    import re
    import textwrap

    short = []
    for p in problems:
        reason = re.sub(r"\s*\([^)]*\)", "", str(p).split(":")[0]).split(", ")[0].strip()
        short.append(reason or str(p))
    return "\n".join(textwrap.wrap("fit not valid: " + "; ".join(short), width))


def _place_table(ax: Any, legend: Any, draw: Any, keep: tuple[np.ndarray, ...]) -> None:
    """The value table where neither it nor the legend covers a point, an error bar or a
    curve (``keep``: segments for :func:`peaksift._value_table.touched`): under the legend
    (upper right), else the upper left corner, each first with its title on one line, then
    broken after the fit's name (a long model name widens the box over the data); when
    none is free, under the legend with the y axis raised (by 10% of its span a step) until
    both clear everything.  ``draw(corner, wrap)`` draws the table there and returns its
    artists."""
    from .._value_table import touched

    def clear(arts: list[Any]) -> bool:
        return (touched(ax, legend, *keep) == 0
                and (not arts or touched(ax, arts[0], *keep) == 0))

    for wrap in (False, True):
        for corner in ("right", "left"):
            arts = draw(corner, wrap)
            if clear(arts):
                return
            for a in arts:
                a.remove()
    arts = draw("right", True)
    for _ in range(60):
        if clear(arts):
            return
        y0, y1 = ax.get_ylim()  # a tenth of the span, on the axis as it is drawn
        ax.set_ylim(y0, y1 * (y1 / y0) ** 0.1 if ax.get_yscale() == "log"
                    else y1 + 0.1 * (y1 - y0))


def fit_figure(result: FitResult, path: Any = None, *, title: str | None = None,
               fig: Any = None, run: Any = None, symbol: str | None = None,
               note: str = "", marks: Any = (), log: bool = False,
               kind: str = "free_fit") -> Any:
    """Data with Poisson error bars, total model, signal and (dashed) background, a pulls
    panel underneath and the fitted numbers in a table.  Returns the matplotlib Figure
    (saved to ``path`` if given).

    ``fig``: draw on this (empty) Figure instead of a new one.  ``run``: a
    :class:`peaksift._annotations.RunLabel` drawn above the axes; ``note``/``title``: the figure's
    statement under it.  ``symbol``: mathtext of the mass (default ``m``), e.g.
    ``m_{\\mu\\mu}``.  ``marks``: ``(mass, label, colour, linestyle)`` vertical lines drawn
    on both panels and named in the legend (the calibration's fitted and tabulated masses).
    ``log``: a logarithmic count axis (set before the legend and the table are placed).
    ``kind``: which fit this is, a key of :data:`peaksift._vocabulary.FITS` (``"free_fit"``,
    ``"calibration"``): the table's title names the model as every output does.

    Unweighted counts get central 68.3 % Garwood intervals
    (``chi2.ppf(0.1587, 2n)/2``, ``chi2.ppf(0.8413, 2n+2)/2``; Garwood, Biometrika 28
    (1936) 437), computed as ``gammaincinv(n, 0.1587)`` and ``gammaincinv(n + 1, 0.8413)``
    (the same numbers: chi2 with 2n degrees of freedom is twice a Gamma(n) variable), which
    spares a drawing process the import of scipy.stats; weighted bins get sqrt(sum w^2).
    """
    from scipy.special import gammaincinv

    from .._annotations import draw_header
    from .._style import COLORS, figure_style, new_figure
    from .._value_table import value_table
    from .._vocabulary import model_text

    e, n = result.edges, result.observed
    c = 0.5 * (e[1:] + e[:-1])
    bw = np.diff(e)
    if result.weighted:
        lo_err = hi_err = np.sqrt(result.observed_weight_sq_sum)
    else:
        with np.errstate(invalid="ignore"):
            lower = np.where(n > 0, gammaincinv(np.maximum(n, 1e-300), 0.15865), 0.0)
        upper = gammaincinv(n + 1.0, 0.84135)
        lo_err, hi_err = n - lower, upper - n
    xs = np.linspace(result.window[0], result.window[1], 800)
    vals = [result.values[k] for k in result.parameters]
    ref_bw = float(np.median(bw))
    comps = result.model.components(xs, vals)
    total = sum(comps.values())
    grid = {"height_ratios": [3.2, 1], "hspace": 0.05}
    with figure_style():
        if fig is None:
            fig, (a1, a2) = new_figure((7.0, 5.6), 2, 1, sharex=True, gridspec_kw=grid)
        else:
            a1, a2 = fig.subplots(2, 1, sharex=True, gridspec_kw=grid)
        scale_n = ref_bw / bw
        a1.errorbar(c, n * scale_n, yerr=[lo_err * scale_n, hi_err * scale_n], fmt="o",
                    ms=2.8, lw=0.9, color=COLORS["data"], label="data", zorder=3)
        a1.plot(xs, total * ref_bw, color=COLORS["total"], label="signal + background")
        a1.plot(xs, comps["background"] * ref_bw, color=COLORS["background"], ls="--",
                label="background")
        styles = iter(["-", "-.", ":", (0, (5, 1, 1, 1))] * 4)
        for k, v in comps.items():
            if k.startswith("signal"):
                a1.plot(xs, v * ref_bw, color=COLORS["signal"], lw=1.2, ls=next(styles),
                        label=k.replace("_", " "))
        a1.set_ylabel(f"candidates / {number(ref_bw, 3)} {result.unit}")
        top = max(float(np.max((n + hi_err) * scale_n)), float(np.max(total * ref_bw)))
        floor = 0.0
        if log:  # from a third of the smallest count, a quarter of the decades above the
            # top: the table's placement raises it further only as far as the boxes need
            pos = (n * scale_n)[n > 0]
            floor = 0.3 * float(pos.min()) if pos.size else 0.1
            a1.set_yscale("log")
            a1.set_ylim(floor, top * max(top / floor, 10.0) ** 0.25)
        else:
            a1.set_ylim(0, 1.6 * top)  # headroom for the legend and the table, once
        for x, label, color, ls in marks:
            for a in (a1, a2):
                a.axvline(float(x), color=color, lw=1.0, ls=ls, zorder=1,
                          label=label if a is a1 else None)
        leg = a1.legend(loc="upper right")
        caption = gof_caption(result)
        if not result.valid:
            caption += "\n" + invalid_caption(result.problems)
        rows = parameter_rows(result)
        title_t = model_text(kind, [s.name for s in result.model.signals],
                             result.model.background.name)
        draw_header(a1, run, note or title or "")
        # what neither the legend nor the table may cover: the points with their error
        # bars and every curve drawn (its samples)
        curves = [total, *comps.values()]
        drawn = np.concatenate([v * ref_bw for v in curves])
        keep = (np.concatenate([c, np.tile(xs, len(curves))]),  # (a log axis: from its floor)
                np.maximum(np.concatenate([(n - lo_err) * scale_n, drawn]), floor),
                np.maximum(np.concatenate([(n + hi_err) * scale_n, drawn]), floor))
        _place_table(a1, leg, lambda corner, wrap: value_table(
            a1, rows, caption=caption, below=leg if corner == "right" else None,
            corner=corner, title=title_t.replace(": ", ":\n", 1) if wrap else title_t), keep)
        a2.axhline(0, color=COLORS["background"], lw=0.8)
        for lvl in (-2, 2):
            a2.axhline(lvl, color=COLORS["background"], lw=0.6, ls=":")
        # one step patch, not a bar per bin: the same picture at a fraction of the drawing
        # time (~0.15 s a figure in PNG and PDF); a bin without a pull draws nothing
        pulls = np.asarray(result.pulls, float)
        a2.stairs(np.where(np.isfinite(pulls), pulls, 0.0), e, baseline=0.0, fill=True,
                  color=COLORS["total"], alpha=0.75, lw=0)
        lim = max(3.5, float(np.nanmax(np.abs(result.pulls))) * 1.1 if result.pulls.size else 3.5)
        a2.set_ylim(-lim, lim)
        a2.set_ylabel("pull")
        a2.set_xlabel(f"${symbol or 'm'}$ [{result.unit}]")
        a2.set_xlim(result.window)
        if path is not None:
            fig.savefig(path)
    return fig
