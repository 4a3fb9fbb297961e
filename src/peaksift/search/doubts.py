"""Warnings where the search's numbers are doubtful: :func:`doubts` of a results dictionary.

A number printed without its caveat reads as a good number.  These checks look at the
finished results (the content of ``results.json``) and list what a reader must know before
quoting them; the list is the ``warnings`` entry of results.json, a block of the terminal
summary and a section at the top of the report.

* ``fit``             -- the free fit is invalid (its problems quoted).
* ``sideband_fit``    -- blinded: the background fit on the sidebands is invalid or fits
  them badly (goodness-of-fit p below :data:`GOF_P_MIN`).
* ``calibration``     -- the calibration fit is invalid: its mass shift is not a measurement.
* ``local_minimum``   -- the free fit (started at the best mass) or the calibration fit
  (started at the particle's mass) has a lower minimum elsewhere in its window
  (``lower_minimum``, :mod:`peaksift.fitting.elsewhere`): a dip or another peak that
  describes the spectrum better by the quoted Delta(-2 ln L), at least
  :data:`LOWER_MINIMUM_WARN`.
* ``goodness_of_fit`` -- the free fit's (or the calibration fit's) goodness-of-fit p-value is
  below :data:`GOF_P_MIN`: the model does not describe the data (e.g. a known peak inside
  the search window), so its significance and limits inherit a wrong model.
* ``signal_model``    -- the signal model from simulated samples has invalid sample fits,
  a polynomial that misses its points, or a leave-one-out deviation above 3 errors.
* ``limits``          -- observed limits outside the expected +-2 sigma band at more than
  :data:`BAND_OUTSIDE_MAX_FRACTION` of the masses: a background model that misses the data
  (a genuine signal lifts only the masses near it); limits with systematics whose
  profile in the mass scale took a lower well than the nearest one (a mass scale wider
  than the peak: the limit there responds to the data up to 3 of its standard deviations
  away).
* ``significance``    -- with ``[systematics]``: the scan's q0 whose profile in the mass
  scale took a lower well than the nearest one (as for the limits above).
* ``scan``            -- the mass grid steps more than one resolution width somewhere
  (:func:`~peaksift.stats.mass_grid.coarse_grid_note`): local and global significances
  underestimated between hypotheses.
* ``significance``    -- also: the global correction's N0 uncertain by more than
  :data:`N0_ERROR_MAX` (too few background-only toys).
* ``background_model`` -- with ``[systematics]``: candidates over the spurious-signal limit,
  a kept order whose next order still improved the fit (the family needs higher orders).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

from .._vocabulary import FITS
from ..stats.mass_grid import coarse_grid_note

__all__ = ["BAND_OUTSIDE_MAX_FRACTION", "GOF_P_MIN", "LOWER_MINIMUM_WARN", "N0_ERROR_MAX",
           "doubtful_limits_note", "doubts", "fit_doubts"]

#: N0's relative error above this flags the global significance (a quarter: 16 toys'
#: worth at N0 ~ 1; the demo's 100 toys give 3 %)
N0_ERROR_MAX = 0.25

#: a goodness-of-fit p-value below this flags the fit (0.1%: about 1 in 1000 fits of a
#: right model; our choice)
GOF_P_MIN = 1e-3
#: a fit's lower minimum elsewhere (``lower_minimum``) is a warning from this Delta(-2 ln L):
#: below it the two descriptions of the spectrum are equally good at the 68 % level (a
#: background-only continuum's fit had a dip 0.61 lower; our choice); it stays in the fit's
#: notes and results.json either way
LOWER_MINIMUM_WARN = 1.0
#: more than this fraction of limit masses outside the expected +-2 sigma band flags the
#: limits (a right model puts about 5% there; a real signal a few masses near it)
BAND_OUTSIDE_MAX_FRACTION = 0.2
#: an observed limit with systematics below this fraction of the counting floor flags it
#: (a log-normal normalisation of 10% moves the floor by ~20% at 2 sigma; our choice)
FLOOR_FACTOR = 0.5


def doubtful_limits_note(note: Any) -> bool:
    """A limits note that is a warning: the profile in the mass scale took a well away from
    the nearest (:func:`peaksift.stats.scale_scan.several_minima_note`), or asymptotic
    bands where the scale reaches beyond the peak (:func:`~peaksift.stats.scale_scan.
    asimov_band_note`)."""
    return "several minima" in str(note) or "(Asimov data set)" in str(note)


def _num(x: Any) -> float | None:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def _nan(x: Any) -> float:
    """A JSON number, NaN for null or anything else."""
    v = _num(x)
    return math.nan if v is None else v


def _gof_p(fit: Mapping[str, Any] | None) -> float | None:
    gof = fit.get("gof") if isinstance(fit, Mapping) else None
    return _num(gof.get("p_value")) if isinstance(gof, Mapping) else None


def doubts(results: Mapping[str, Any]) -> list[dict[str, str]]:
    """The warnings of a search's results dictionary, each ``{"topic", "message"}``.

    Parameters
    ----------
    results : mapping
        :meth:`SearchResult.to_dict <peaksift.search.SearchResult.to_dict>` (results.json);
        missing sections are skipped (a blinded search has no fit).
    """
    out: list[dict[str, str]] = []

    def add(topic: str, message: str) -> None:
        out.append({"topic": topic, "message": message})

    fit = results.get("fit")
    blinded = bool((results.get("blinding") or {}).get("active"))
    if isinstance(fit, Mapping) and not blinded:
        out += fit_doubts(fit)
    sb = results.get("background_fit")
    if isinstance(sb, Mapping) and sb.get("kind") == "sideband_fit":  # blinded runs
        if not sb.get("valid"):
            probs = "; ".join(str(p) for p in sb.get("problems") or []) or "no reason recorded"
            add("sideband_fit", f"the background fit on the sidebands is invalid ({probs}): "
                                "its extrapolation under the blinded window is not a measurement")
        p = _num(sb.get("gof_p_value"))
        if p is not None and p < GOF_P_MIN:
            add("sideband_fit",
                f"the background fit on the sidebands has goodness-of-fit p = {p:.3g} "
                f"(< {GOF_P_MIN:g}): the background function does not describe the data "
                "around the blinded window; the expectation under it is doubtful")

    cal = results.get("calibration")
    if isinstance(cal, Mapping) and cal:
        name = cal.get("particle") or "calibration peak"
        if "valid" in cal and not cal.get("valid"):
            probs = "; ".join(str(x) for x in cal.get("problems") or [])
            add("calibration", f"the calibration fit of {name} is invalid"
                               f"{' (' + probs + ')' if probs else ''}: its fitted mass and "
                               "mass-scale shift are not measurements")
        cf = cal.get("fit")
        if isinstance(cf, Mapping):
            _lower_minimum(add, cf.get("lower_minimum"), f"the calibration fit of {name}, "
                                                         "started at its table mass,")
        pc = _gof_p(cal)
        if pc is not None and pc < GOF_P_MIN:
            add("goodness_of_fit",
                f"the calibration fit of {name} has goodness-of-fit p = {pc:.3g} (< "
                f"{GOF_P_MIN:g}): its shape does not describe the peak, so the mass-scale "
                "shift is doubtful")

    sy = results.get("systematics")
    if isinstance(sy, Mapping):
        for note in sy.get("notes") or []:
            if "spurious" in str(note):
                add("background_model", str(note))
            # the scan's q0 whose profile in the mass scale took a well away from the
            # nearest one (stats.scale_scan.several_minima_note)
            if "several minima" in str(note):
                add("significance", str(note))
        # limits whose profile in the mass scale took a well away from the nearest one
        # (stats.scale_scan.several_minima_note): they respond to data elsewhere; and
        # asymptotic bands where the scale reaches beyond the peak (asimov_band_note)
        for note in (sy.get("limits") or {}).get("notes") or []:
            if doubtful_limits_note(note):
                add("limits", str(note))
        for c in (sy.get("background_choice") or {}).get("candidates") or []:
            if c.get("chosen") and "still improved" in str(c.get("note") or ""):
                add("background_model", f"{c.get('label')}: the highest order tried still "
                                        "improved the fit significantly; allow higher orders "
                                        "in systematics.background_families")
    sm = results.get("signal_model")
    if isinstance(sm, Mapping) and sm.get("doubtful"):
        add("signal_model", "the signal model from simulated samples is doubtful ("
            + "; ".join(str(n) for n in sm.get("notes") or []) + "): the scan's shape, "
            "resolution and efficiency rest on it")

    low = _below_floor(results.get("limits"), (sy or {}).get("limits") if
                       isinstance(sy, Mapping) else None)
    if low:
        add("limits", "the observed limit with systematics lies more than a factor "
                      f"{1 / FLOOR_FACTOR:g} below the lowest limit CLs can give (the "
                      "counting floor, Read 2002) at " + ", ".join(
                          f"{m:.2f} GeV ({o:.3g} vs {f:.3g})" for m, o, f in low)
                      + ": not a measurement (most likely a failed minimisation)")
    sc = results.get("scan")
    if isinstance(sc, Mapping):
        grid = coarse_grid_note([_nan(m) for m in sc.get("masses") or []],
                                [_nan(x) for x in sc.get("sigma") or []])
        if grid:
            add("scan", grid)
    best = results.get("best")
    n0, n0_err = (_num(best.get("N0")), _num(best.get("N0_error"))) if isinstance(
        best, Mapping) else (None, None)
    # (from toys only: N0 read off the observed scan itself, toys = 0, is the user's stated
    # choice and its source is printed beside it)
    from_toys = isinstance(best, Mapping) and "toys" in str(best.get("n0_source") or "")
    if from_toys and n0 and n0_err is not None and n0_err / n0 > N0_ERROR_MAX:
        add("significance", f"the global correction's up-crossing count N0 = {n0:.3g} +- "
            f"{n0_err:.2g} ({best.get('n0_source') or 'toys'}) is uncertain by "
            f"{n0_err / n0:.0%}: the global p-value is uncertain alike; run more "
            "background-only toys (--toys)")
    band = _outside_band(results.get("limits"))
    if band is not None:
        n_out, n_all, below, above = band
        if n_all and n_out / n_all > BAND_OUTSIDE_MAX_FRACTION:
            add("limits", f"observed limits lie outside the expected +-2 sigma band at {n_out} of "
                          f"{n_all} masses ({below} below, {above} above; more than "
                          f"{BAND_OUTSIDE_MAX_FRACTION:.0%}): the background model does not "
                          "follow the data, so the limits are doubtful")
    return out


def fit_doubts(fit: Mapping[str, Any], started: str = "at the best mass hypothesis"
               ) -> list[dict[str, str]]:
    """The warnings of one free fit's results.json entry (``FitResult.to_dict``): invalid,
    a lower minimum elsewhere, a poor goodness of fit.  ``started``: where its mass started
    (the search's: the best mass; ``peaksift fit``'s: the given mass)."""
    out: list[dict[str, str]] = []

    def add(topic: str, message: str) -> None:
        out.append({"topic": topic, "message": message})

    if "valid" in fit and not fit.get("valid"):
        probs = "; ".join(str(p) for p in fit.get("problems") or []) or "no reason recorded"
        # named as every output names it (_vocabulary.FITS): "signal-plus-background fit"
        # fits the scan's hypotheses as well, and the scan's numbers stand
        add("fit", f"the {FITS['free_fit'][0]} is invalid ({probs}): its mass, width and "
                   "yield are not measurements")
    _lower_minimum(add, fit.get("lower_minimum"), f"the {FITS['free_fit'][0]}, started "
                                                  f"{started},")
    p = _gof_p(fit)
    if p is not None and p < GOF_P_MIN:
        add("goodness_of_fit",
            # the free fit's (its mass floats from the best mass: not "the fit at the best
            # mass", which the report's spectrum caption no longer calls it either)
            f"the {FITS['free_fit'][0]} has goodness-of-fit p = {p:.3g} (< {GOF_P_MIN:g}): the "
            "signal-plus-background model does not describe the spectrum (a known peak in the "
            "window, or the wrong background shape); the significance and limits rest on it")
    return out


def _lower_minimum(add: Any, low: Any, which: str) -> None:
    """The ``local_minimum`` warning of a fit started at a given mass whose
    ``lower_minimum`` (:mod:`peaksift.fitting.elsewhere`) is set."""
    if not isinstance(low, Mapping) or not (_num(low.get("delta_minus_two_ln_l")) or 0.0) \
            >= LOWER_MINIMUM_WARN:
        return
    from ..fitting.elsewhere import elsewhere_text  # (only here: the fits' package is heavy)

    add("local_minimum", f"{which} is a local minimum: the fitter's own starts reach "
                         f"{elsewhere_text(low)}; its numbers describe the peak it was "
                         "started on, not the best description of the spectrum")


def _outside_band(lim: Any) -> tuple[int, int, int, int] | None:
    """(outside, compared, below, above) over masses with an observed limit and a band."""
    if not isinstance(lim, Mapping):
        return None
    obs, lo, hi = (lim.get(k) or [] for k in ("observed", "expected_minus2", "expected_plus2"))
    below = above = n = 0
    for o, a, b in zip(obs, lo, hi):
        o, a, b = _num(o), _num(a), _num(b)
        if o is None or a is None or b is None:
            continue  # blinded or not computed
        n += 1
        below += o < a
        above += o > b
    return below + above, n, below, above


def _below_floor(plain: Any, syst: Any) -> list[tuple[float, float, float]]:
    """(mass, observed, floor) where the observed limit with systematics is below
    ``FLOOR_FACTOR`` times the plain limits' counting floor at the same mass: CLs >= exp(-s)
    (Read, J. Phys. G 28 (2002) 2693), so no data give fewer than -ln(1 - CL) signal events;
    the normalisation uncertainties move that by far less than the factor."""
    if not isinstance(plain, Mapping) or not isinstance(syst, Mapping):
        return []
    w = syst.get("with_systematics")
    if not isinstance(w, Mapping):
        return []
    floor = dict(zip((_num(m) for m in plain.get("masses") or []),
                     (_num(f) for f in plain.get("counting_floor") or [])))
    out = []
    for m, o in zip(w.get("masses") or [], w.get("observed") or []):
        m, o = _num(m), _num(o)
        f = floor.get(m)
        if m is not None and o is not None and f is not None and o < FLOOR_FACTOR * f:
            out.append((m, o, f))
    return out
