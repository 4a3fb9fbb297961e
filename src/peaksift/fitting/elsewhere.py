"""A lower minimum elsewhere: what a fit started at a given mass says of the rest of the window.

A fit whose peak mass the caller starts (``fit(..., start={"mass": M})``, ``peaksift fit
--mass M``, the search's free fit from its best mass, a calibration fit at a particle's
mass) is a fit of *that* peak: its starts are made around M, with no scan of the window
for other peaks or for dips (a negative signal yield), so it can end in a local minimum
while a lower one lies elsewhere (on ``scripts/check_fit_minima.py``'s set, given_start/22:
a valid peak at 142.8 GeV 1.1 in -2 ln L above a wide dip of -254 events at 181 GeV).
Its result stays the fit of the given peak (what the caller asked for), and says so: the
fit is made once more from the fitter's own starts (the coarse scan of the window, dips
included wherever the signal yield's bounds allow a negative one), and a minimum lower by
more than :data:`LOWER_ELSEWHERE` in -2 ln L is reported in ``FitResult.lower_minimum``
(its mass, width, yield and Delta(-2 ln L)) and in a note -- when that minimum is itself a
valid fit, and wider than a bin (:func:`one_bin`: a one-bin fluctuation, which every
spectrum has somewhere; the demo's dielectron channel has a dip of -9 events in one bin 5.5
lower, given_start/35 a spike 4.1 lower).  An invalid one (a width at a bound, a mass at
the window's edge) is no better description of the spectrum but a sign of the model's
trouble (on a background-only continuum a Gaussian of sigma at its 50 GeV bound takes up
the curvature, 1.2 lower than narrow peaks): the fits report such trouble themselves.  A fit whose mass is held asks a question at that mass only and is not compared
(``docs/decisions/given-mass-lower-minimum.md``).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from typing import Any

from .._format import mass_text, number

__all__ = ["LOWER_ELSEWHERE", "elsewhere_note", "elsewhere_text", "given_masses",
           "lower_minimum", "one_bin", "with_lower_minimum"]

#: Delta(-2 ln L) by which the fitter's own minimum must lie below the given-mass fit's
#: before the result reports it (below it the two are the same minimum for any purpose
#: here; the bar of ``checks.LOWER_MINIMUM_NOTE``, our choice)
LOWER_ELSEWHERE = 0.1


def given_masses(model: Any, start: Mapping[str, float] | None,
                 fixed: Mapping[str, float] | None, tied: Mapping[str, Any] | None
                 ) -> list[str]:
    """The names of the signal masses the caller started (given in ``start``, floating:
    neither fixed nor tied), where that signal's yield floats; empty otherwise."""
    start, fixed, tied = dict(start or {}), dict(fixed or {}), dict(tied or {})
    names = model.parameter_names
    out = []
    for shape, sl, iy in model.blocks[:-1]:
        pn = list(names[sl])
        local = list(shape.parameter_names)
        if "mass" not in local:
            continue
        m = pn[local.index("mass")]
        if m in start and m not in fixed and m not in tied and names[iy] not in fixed:
            out.append(m)
    return out


def lower_minimum(fr: Any, ref: Any) -> dict[str, Any] | None:
    """``FitResult.lower_minimum`` of the given-mass fit ``fr`` from ``ref``, the fit from
    the fitter's own starts (None where ``ref`` is not lower by ``LOWER_ELSEWHERE``)."""
    gap = 2.0 * (float(fr.nll) - float(ref.nll))
    if not (math.isfinite(gap) and gap > LOWER_ELSEWHERE):
        return None
    if not ref.valid or one_bin(ref):  # (module guide: only a minimum that is a fit)
        return None
    y = float(ref.values["signal_yield"])
    return {"mass": float(ref.peak_mass), "width": float(ref.peak_width),
            "width_parameter": ref.width_parameter, "signal_yield": y,
            "kind": "dip" if y < 0 else "peak", "delta_minus_two_ln_l": gap}


def one_bin(ref: Any) -> bool:
    """Whether the fit ``ref``'s peak (or dip) is narrower than a bin of its binning (FWHM
    below the narrowest bin; an unbinned fit: of the binning of its goodness of fit): a
    fluctuation of one bin, which a spectrum of many bins always has somewhere (in 90 bins
    the largest is ~2.5 standard deviations, ~6 in -2 ln L) and which no resolution makes a
    peak (the fit is usually flagged invalid for it too: a width at its floor).  Not
    reported as a lower minimum."""
    import numpy as np

    edges = np.asarray(ref.edges, float)
    if edges.size < 2:
        return False
    fw = float(ref.fwhm)
    return not (math.isfinite(fw) and fw >= float(np.min(np.diff(edges))))


def elsewhere_text(low: Mapping[str, Any], unit: str = "GeV") -> str:
    """A ``lower_minimum`` entry in words: ``a dip of -254 events at 180.56 GeV (sigma 15.3
    GeV), -2 ln L lower by 1.11``."""
    what = (f"a {low.get('kind', 'peak')} of {number(low.get('signal_yield'), 3)} events at "
            f"{mass_text(low.get('mass'))} {unit} ({low.get('width_parameter', 'width')} "
            f"{number(low.get('width'), 3)} {unit})")
    return f"{what}, -2 ln L lower by {number(low.get('delta_minus_two_ln_l'), 3)}"


def elsewhere_note(low: Mapping[str, Any], unit: str = "GeV") -> str:
    """The fit's note for a ``lower_minimum`` entry."""
    return (f"a lower minimum exists elsewhere: {elsewhere_text(low, unit)}; this fit, "
            "started at the given mass, is a local minimum")


def with_lower_minimum(fr: Any, ref: Any) -> Any:
    """``fr`` with ``lower_minimum`` and its note set from ``ref`` (see :func:`lower_minimum`),
    and ``ref``'s evaluations counted in ``n_calls``."""
    low = lower_minimum(fr, ref)
    calls = int(fr.n_calls) + int(getattr(ref, "n_calls", 0))
    if low is None:
        return dataclasses.replace(fr, n_calls=calls)
    return dataclasses.replace(fr, lower_minimum=low, n_calls=calls,
                               notes=(*fr.notes, elsewhere_note(low, fr.unit)))
