"""Figures of the statistics results drawn by their ``plot()`` methods (no pyplot: every
figure is made with :func:`peaksift._style.new_figure`, the user's backend is left alone).

* :func:`envelope_figure` -- :meth:`EnvelopeResult.plot`: the local p-value of the
  discrete-profiling envelope against the mass hypothesis over each candidate function's
  own, the function the envelope takes marked along its curve.
* :func:`combined_limits_figure` -- :meth:`CombinedLimits.plot`: the combination's
  observed and expected limits with their bands, and each channel's expected limit.
* :func:`background_choice_figure` -- :meth:`BackgroundChoice.plot`: each candidate
  function's goodness of fit and the order test between consecutive orders.
* :func:`background_candidate_figure` -- :meth:`BackgroundCandidate.plot`: one candidate's
  background-only fit over the spectrum, the pulls beneath.

Every figure takes the run label (``run``, a :class:`peaksift._annotations.RunLabel`) and the
pair's mass symbol (``symbol``, mathtext) where the result itself does not know them.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .._annotations import draw_header, plain_log_ticks, shade_blinded
from .._format import chi_square, fixed, mass_text, number, p_value
from .._style import COLORS, figure_style, margins, new_figure
from .._vocabulary import method_words
from .significance import p_from_q0

__all__ = ["background_candidate_figure", "background_choice_figure",
           "combined_limits_figure", "envelope_figure"]

#: candidate functions and channels, one colour and line style each
_PALETTE = (COLORS["total"], COLORS["accent"], COLORS["mark"], COLORS["background"],
            "#2e7d4f", "#b07a2a")
_STYLES = ("--", "-.", ":", (0, (5, 1, 1, 1)), (0, (1, 1)), (0, (3, 1)))


def _sigma_levels(ax: Any, lowest: float) -> None:
    """Dotted lines at the 1-5 sigma local p-values that fall in the axis range."""
    for k in range(1, 6):
        pk = float(p_from_q0(float(k * k)))
        if pk < lowest:
            break
        ax.axhline(pk, color=COLORS["accent"], lw=0.8, ls=":", zorder=1)
        ax.text(1.0, pk, f" {k}$\\sigma$", va="center", ha="left", color=COLORS["accent"],
                fontsize=9, clip_on=False, transform=ax.get_yaxis_transform())


def _span(masses: np.ndarray, hidden: np.ndarray) -> tuple[float, float] | None:
    """The mass range of the hypotheses left out by blinding (None when none is)."""
    return (float(masses[hidden].min()), float(masses[hidden].max())) if hidden.any() else None


def envelope_figure(env: Any, path: Any = None, *, run: Any = None, symbol: str | None = None,
                    title: str | None = None) -> Any:
    """Local p-value of the envelope (thick) and of each candidate function alone (thin)
    against the mass hypothesis; the dots on the envelope's curve take the colour of the
    function it chose there; the best hypothesis ringed; 1-5 sigma where in range."""
    m = np.asarray(env.masses, float)
    hidden = np.asarray(env.blinded, bool)
    fig, ax = new_figure()
    with figure_style():
        colors = {}
        lows = []
        for k, label in enumerate(env.labels):
            q = np.asarray(env.candidate_q0[label], float)
            p = np.where(hidden, np.nan, np.maximum(p_from_q0(np.nan_to_num(q)), 1e-300))
            colors[label] = _PALETTE[k % len(_PALETTE)]
            ax.plot(m, p, lw=1.0, ls=_STYLES[k % len(_STYLES)], color=colors[label],
                    label=f"{label} alone")
            lows.append(np.nanmin(p) if np.isfinite(p).any() else 0.1)
        p = np.where(hidden, np.nan, np.maximum(np.asarray(env.p_local, float), 1e-300))
        ax.plot(m, p, lw=2.0, color=COLORS["observed"], zorder=3,
                label="envelope (dots: the function it takes)")
        chosen = np.asarray(env.chosen, int)
        ok = np.isfinite(p)
        ax.scatter(m[ok], p[ok], s=14, zorder=4, edgecolors="none",
                   c=[colors[env.labels[c]] for c in chosen[ok]])
        lows.append(np.nanmin(p) if ok.any() else 0.1)
        lowest = max(min(min(lows), float(p_from_q0(9.0))) * 0.3, float(p_from_q0(64.0)))
        ax.set_yscale("log")
        ax.set_ylim(lowest, 1.0)
        ax.set_xlim(m[0], m[-1])
        _sigma_levels(ax, lowest)
        b = env.best
        if ok.any():
            ax.plot([b["mass"]], [max(b["p_local"], lowest)], marker="o", ms=8, mfc="none",
                    mec=COLORS["signal"], mew=1.5, ls="none", zorder=5,
                    label=f"best: {mass_text(b['mass'])} {env.unit}, $Z_{{local}}$ = "
                          f"{fixed(b['z_local'])}")
        shade_blinded(ax, _span(m, hidden))
        ax.set_xlabel(f"${symbol or 'm'}$ hypothesis [{env.unit}]")
        ax.set_ylabel("local p-value")
        ax.legend(loc="lower left", fontsize=8.5)
        if title is None:
            title = (f"discrete profiling of {len(env.labels)} background functions (penalty "
                     f"{fixed(env.penalty)} per parameter): best with {b['function']}")
        draw_header(ax, run, title)
    if path is not None:
        fig.savefig(path)
    return fig


def combined_limits_figure(lim: Any, path: Any = None, *, run: Any = None,
                           symbol: str | None = None, log: bool = True) -> Any:
    """The combination's observed limit and expected median with its +-1 and +-2 sigma
    bands, each channel's own expected limit (thin), the channels and the method above."""
    m = np.asarray(lim.masses, float)
    fig, ax = new_figure()
    with figure_style():
        ax.fill_between(m, lim.expected_minus2, lim.expected_plus2, color=COLORS["band2"],
                        lw=0, label=r"expected $\pm 2\sigma$")
        ax.fill_between(m, lim.expected_minus1, lim.expected_plus1, color=COLORS["band1"],
                        lw=0, label=r"expected $\pm 1\sigma$")
        ax.plot(m, lim.expected, ls="--", color=COLORS["expected"], label="expected, combined")
        obs = np.asarray(lim.observed, float)
        if np.isfinite(obs).any():
            ax.plot(m, obs, color=COLORS["observed"], marker="o", ms=2.5, lw=1.4,
                    label="observed, combined")
        values = [lim.expected_plus2, lim.expected_minus2, obs]
        blind = None
        for k, (name, r) in enumerate(lim.channels.items()):
            ax.plot(r.masses, r.expected, lw=1.0, ls=_STYLES[k % len(_STYLES)],
                    color=_PALETTE[(k + 1) % len(_PALETTE)], label=f"expected, {name} alone")
            values.append(r.expected)
            blind = blind or getattr(r, "blind", None)
        shade_blinded(ax, blind, label="blinded (expected only)")
        v = np.concatenate([np.ravel(np.asarray(x, float)) for x in values])
        v = v[np.isfinite(v) & (v > 0)]
        if log:
            ax.set_yscale("log")
            if v.size:
                ax.set_ylim(v.min() / 1.25, v.max() * 2.2)  # room for the legend
                plain_log_ticks(ax)
        elif v.size:
            ax.set_ylim(0.0, v.max() * 1.35)
        ax.set_xlim(m[0], m[-1])
        ax.set_xlabel(f"${symbol or 'm'}$ [GeV]")
        what = "signal yield [events]" if lim.unit == "events" else \
            rf"$\sigma \times B$ [{lim.unit}]"
        ax.set_ylabel(f"{lim.cl:.0%} CL upper limit on {what}")
        ax.legend(loc="upper right", ncol=2, fontsize=8.5)
        note = f"combined CLs ({method_words(lim.method)}) of {' + '.join(lim.channels)}"
        if lim.nuisances:  # a line of its own: beside the rest it ran off the figure
            note += f"\nprofiled: {', '.join(lim.nuisances)}"
            margins(fig, top=0.78)
        draw_header(ax, run, note)
    if path is not None:
        fig.savefig(path)
    return fig


def background_choice_figure(choice: Any, path: Any = None, *, run: Any = None) -> Any:
    """Left: each candidate's goodness-of-fit p-value against its number of free
    parameters, one line per family (kept candidates filled).  Right: the order test's
    p-value of each order against the next, with the test size: below it the next order
    fits significantly better."""
    from matplotlib.ticker import MaxNLocator

    fig, (a1, a2) = new_figure((9.0, 4.2), 1, 2)
    cands = list(choice.candidates)
    families = list(dict.fromkeys(c.family for c in cands))
    floor = 1e-12  # smaller p-values are drawn here (the axis says so)
    ps = [c.gof_p_value for c in cands] + [c.order_p_value for c in cands
                                          if c.order_p_value is not None] + [choice.size]
    ps = [max(float(p), floor) for p in ps if p is not None and np.isfinite(p)]
    low = min(min(ps, default=0.01) / 10.0, 1e-3)
    with figure_style():
        for k, fam in enumerate(families):
            cs = sorted((c for c in cands if c.family == fam), key=lambda c: c.n_parameters)
            col = _PALETTE[k % len(_PALETTE)]
            n = np.array([c.n_parameters for c in cs], float)
            gof = np.array([max(c.gof_p_value, floor) for c in cs], float)
            a1.plot(n, gof, color=col, lw=1.0, label=fam)
            for c, x, y in zip(cs, n, gof):
                a1.plot([x], [y], marker="o", ms=7, color=col, ls="none",
                        mfc=col if c.chosen else "white", mew=1.4)
            tested = [c for c in cs if c.order_p_value is not None]
            if tested:
                a2.plot([c.n_parameters for c in tested],
                        [max(c.order_p_value, floor) for c in tested], color=col, lw=1.0,
                        marker="s", ms=5, label=fam)
        n_all = [c.n_parameters for c in cands]
        for ax in (a1, a2):
            ax.set_yscale("log")
            ax.set_ylim(low, 2.0)
            ax.set_xlim(min(n_all) - 0.5, max(n_all) + 0.5)
            ax.xaxis.set_major_locator(MaxNLocator(integer=True))
            ax.xaxis.set_minor_locator(MaxNLocator(integer=True))
            ax.set_xlabel("free parameters (shape and yield)")
        a2.axhline(choice.size, color=COLORS["signal"], lw=0.9, ls=":")
        a2.text(0.02, choice.size * 1.3, f"test size {number(choice.size)}", ha="left",
                va="bottom", color=COLORS["signal"], fontsize=8.5,
                transform=a2.get_yaxis_transform())
        a1.set_ylabel("goodness-of-fit p-value")
        a2.set_ylabel("order test p-value (vs the next order)")
        a1.plot([], [], marker="o", ms=7, color=COLORS["muted"], ls="none", label="kept")
        a1.plot([], [], marker="o", ms=7, color=COLORS["muted"], mfc="white", ls="none",
                label="not kept")
        a1.legend(loc="best", fontsize=8.5)
        a2.legend(loc="best", fontsize=8.5)
        fig.subplots_adjust(wspace=0.3)
        lo, hi = choice.window
        note = (f"background functions on {fixed(lo, 1)}-{fixed(hi, 1)} GeV "
                f"({choice.n_bins} bins): kept {', '.join(choice.labels) or 'none'}")
        if min(ps, default=1.0) <= floor:
            note += f";  p-values below {p_value(floor)} drawn at it"
        draw_header(a1, run, note)
    if path is not None:
        fig.savefig(path)
    return fig


def background_candidate_figure(cand: Any, path: Any = None, *, run: Any = None,
                                symbol: str | None = None) -> Any:
    """The spectrum (points with central 68% Poisson intervals, Garwood, Biometrika 28
    (1936) 437; the blinded bins hidden and hatched), one candidate's background-only fit
    (solid where fitted, dashed across the blinded window where extrapolated, its goodness
    of fit in the legend) and the pulls (n - mu)/sqrt(mu) beneath."""
    from scipy.special import gammaincinv

    pulls = cand.pulls  # (refuses a candidate without its spectrum, in a PeaksiftError)
    e = np.asarray(cand.edges, float)
    c, bw = 0.5 * (e[1:] + e[:-1]), np.diff(e)
    ref = float(np.median(bw))
    hid = np.asarray(cand.blinded, bool)
    n = np.asarray(cand.observed, float)
    with np.errstate(invalid="ignore"):
        lower = np.where(n > 0, gammaincinv(np.maximum(n, 1e-300), 0.15865), 0.0)
        upper = gammaincinv(n + 1.0, 0.84135)
    scale = ref / bw
    mu = np.asarray(cand.expected, float) * scale
    # the dashed part reaches one bin into each sideband, so the two parts join
    near = hid | np.r_[hid[1:], False] | np.r_[False, hid[:-1]]
    span = (float(e[:-1][hid].min()), float(e[1:][hid].max())) if hid.any() else None
    grid = {"height_ratios": [3.2, 1], "hspace": 0.05}
    fig, (ax, axp) = new_figure((7.0, 5.6), 2, 1, sharex=True, gridspec_kw=grid)
    with figure_style():
        ax.errorbar(c, n * scale, yerr=[(n - lower) * scale, (upper - n) * scale], fmt="o",
                    ms=2.8, lw=0.9, color=COLORS["data"], label="data", zorder=3)
        gof = (f"$\\chi^2$/ndf = {chi_square(cand.chi2)}/{cand.ndf}, "
               f"p = {p_value(cand.gof_p_value)}")
        ax.plot(c, np.where(hid, np.nan, mu), color=COLORS["total"], lw=1.4,
                label=f"{cand.label}, background only ({gof})")
        if hid.any():
            ax.plot(c, np.where(near, mu, np.nan), color=COLORS["total"], lw=1.4, ls="--",
                    label="its extrapolation (blinded)")
        shade_blinded(ax, span)
        shown = np.concatenate([(upper * scale)[~hid], mu])
        ax.set_ylim(0, 1.45 * float(np.nanmax(shown)))
        what = "effective counts" if cand.weighted else "candidates"
        ax.set_ylabel(f"{what} / {number(ref, 3)} GeV")
        ax.legend(loc="upper right", fontsize=8.5)
        axp.axhline(0, color=COLORS["background"], lw=0.8)
        for lvl in (-2, 2):
            axp.axhline(lvl, color=COLORS["background"], lw=0.6, ls=":")
        axp.stairs(np.where(np.isfinite(pulls), pulls, 0.0), e, baseline=0.0, fill=True,
                   color=COLORS["total"], alpha=0.75, lw=0)
        shade_blinded(axp, span, label=None)
        big = float(np.nanmax(np.abs(pulls))) if np.any(np.isfinite(pulls)) else 0.0
        axp.set_ylim(-max(3.5, 1.1 * big), max(3.5, 1.1 * big))
        axp.set_ylabel("pull")
        axp.set_xlabel(f"${symbol or 'm'}$ [GeV]")
        axp.set_xlim(e[0], e[-1])
        kept = "kept" if cand.chosen else "not kept"
        where = "its sidebands" if span is not None else "the spectrum"
        draw_header(ax, run, f"background candidate {cand.label} ({cand.n_parameters} free "
                    f"parameters, {kept}) fitted to {where}, {fixed(e[0], 1)}-"
                    f"{fixed(e[-1], 1)} GeV")
    if path is not None:
        fig.savefig(path)
    return fig
