"""The fit figure: data with Poisson error bars, the model, its components, pulls beneath."""

from __future__ import annotations

from typing import Any

import numpy as np

from .result import FitResult, format_value

__all__ = ["fit_figure"]


def fit_figure(result: FitResult, path: Any = None, *, title: str | None = None) -> Any:
    """Data with Poisson error bars, total model, signal and (dashed) background, and a
    pulls panel underneath.  Returns the matplotlib Figure (saved to ``path`` if given).

    Unweighted counts get central 68.3 % Garwood intervals
    (``chi2.ppf(0.1587, 2n)/2``, ``chi2.ppf(0.8413, 2n+2)/2``; Garwood, Biometrika 28
    (1936) 437); weighted bins get sqrt(sum w^2).
    """
    from .._style import COLORS, figure_style, use_headless_backend

    use_headless_backend()
    import matplotlib.pyplot as plt
    from scipy import stats

    e, n = result.edges, result.observed
    c = 0.5 * (e[1:] + e[:-1])
    bw = np.diff(e)
    if result.weighted:
        lo_err = hi_err = np.sqrt(result.observed_weight_sq_sum)
    else:
        lower = np.where(n > 0, stats.chi2.ppf(0.15865, 2 * n) / 2.0, 0.0)
        upper = stats.chi2.ppf(0.84135, 2 * n + 2) / 2.0
        lo_err, hi_err = n - lower, upper - n
    xs = np.linspace(result.window[0], result.window[1], 800)
    vals = [result.values[k] for k in result.parameters]
    ref_bw = float(np.median(bw))
    comps = result.model.components(xs, vals)
    total = sum(comps.values())
    with figure_style():
        fig, (a1, a2) = plt.subplots(2, 1, sharex=True, figsize=(7.0, 5.6),
                                     gridspec_kw={"height_ratios": [3.2, 1], "hspace": 0.05})
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
        a1.set_ylabel(f"events / {ref_bw:.3g} {result.unit}")
        top = max(float(np.max((n + hi_err) * scale_n)), float(np.max(total * ref_bw)))
        a1.set_ylim(0, 1.45 * top)  # headroom for the legend and the numbers
        txt = (f"m = {format_value(result.peak_mass, result.peak_mass_error)} {result.unit}\n"
               f"{result.width_parameter} = {format_value(result.peak_width, result.peak_width_error)} "
               f"{result.unit}\n"
               f"N_sig = {format_value(*result.signal_yield)}\n"
               f"chi2/ndf = {result.gof_chi2:.1f}/{result.gof_ndf}")
        if not result.valid:
            txt += "\nINVALID FIT"
        a1.text(0.03, 0.96, txt, transform=a1.transAxes, va="top", fontsize=9)
        a1.legend(loc="upper right")
        if title:
            a1.set_title(title)
        a2.axhline(0, color=COLORS["background"], lw=0.8)
        for lvl in (-2, 2):
            a2.axhline(lvl, color=COLORS["background"], lw=0.6, ls=":")
        a2.bar(c, result.pulls, width=bw, color=COLORS["total"], alpha=0.75)
        lim = max(3.5, float(np.nanmax(np.abs(result.pulls))) * 1.1 if result.pulls.size else 3.5)
        a2.set_ylim(-lim, lim)
        a2.set_ylabel("pull")
        a2.set_xlabel(f"m [{result.unit}]")
        a2.set_xlim(result.window)
        if path is not None:
            fig.savefig(path)
    return fig
