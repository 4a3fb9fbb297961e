"""The width path of the start finding (:func:`peaksift.likelihood.width_path.width_path`:
a Gaussian peak's profile likelihood along its width, the mass free, the background's shape
relaxed) against a profile written here.

Source: the extended binned Poisson NLL sum(mu - n ln mu) (Baker and Cousins, Nucl.
Instrum. Meth. 221 (1984) 437, eq. 11; the saturated term left out, as the kernel does),
mu = a f(m, w) + b g(b1), with f the bin fractions of a normal distribution truncated to
the window from ``scipy.special.ndtr`` and g those of exp(b1 t), t = (x - 150) / 50, from
its closed-form CDF; minimised at each width by iminuit's MIGRAD (strategy 2, tight
tolerance) from three masses, the lowest kept.  With the shape held (no derivative rows)
the kernel's profile is exact up to its stopping rule: NLL within 2e-3 (its mass steps stop
once the next would gain < 1e-3), mass within 0.05 of iminuit's HESSE error.  With the
slope's derivative row, its NLL is the shape-held profile lowered by one Newton step in
every parameter: within 0.01 + 10 % of what freeing b1 gains in iminuit's profile (a
second-order estimate from the expected information; the slope moves by up to ~0.05 here,
gaining up to ~1.2, and the estimate errs by up to 7 % of that, on the low side at the
widest widths).  And the dip's start taken along it (``start_widths.lowest_width``), against
the same profile minimised over the wider widths.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from exp_gauss_reference import EDGES, WINDOW, exp_fractions, gauss_fractions
from iminuit import Minuit

from peaksift.likelihood.start_widths import OTHER_FACTORS, lowest_width
from peaksift.likelihood.width_path import width_path
from peaksift.shapes import Gaussian

LO, HI = WINDOW
BAND = 7.0
B1 = -1.2


def _counts(seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return rng.poisson(8000 * exp_fractions(B1) + 300 * gauss_fractions(152.0, 4.0)
                       ).astype(float)


def _profile(n: np.ndarray, w: float, b1_free: bool, masses, a0: float = 300.0,
             b1: float = B1) -> Minuit:
    """iminuit's profile at width ``w`` (the lowest from ``masses``), the signal yield
    started at ``a0`` and bounded to its sign (a deficit's below 0)."""
    def cost(m, a, b, b1):
        mu = a * gauss_fractions(m, w) + b * exp_fractions(b1)
        if not np.all(mu > 0):  # also NaN
            return 1e30
        return float(np.sum(mu - n * np.log(mu)))

    best = None
    for m0 in masses:
        mi = Minuit(cost, m=m0, a=a0, b=float(n.sum()) - a0, b1=b1)
        mi.errordef = 0.5
        mi.limits["m"] = (LO, HI)
        if a0 < 0:
            mi.limits["a"] = (None, 0.0)
        mi.fixed["b1"] = not b1_free
        mi.strategy, mi.tol = 2, 1e-6
        mi.migrad()
        mi.hesse()
        if mi.valid and (best is None or mi.fval < best.fval):
            best = mi
    assert best is not None
    return best


def _path(n: np.ndarray, own_fit: Minuit, widths: np.ndarray, own: int, dg: np.ndarray,
          rise: float = math.inf) -> np.ndarray:
    out = np.empty((widths.size, 4))
    g = exp_fractions(B1)
    assert width_path(EDGES.copy(), LO, HI, n, np.ones(n.size), g, dg,
                      own_fit.values["m"], LO, HI, widths, own, BAND, own_fit.values["a"],
                      own_fit.values["b"], rise, out)
    return out


def _slope_row() -> np.ndarray:
    """d g / d b1 by central differences of the closed form (error ~1e-11)."""
    h = 1e-5
    return ((exp_fractions(B1 + h) - exp_fractions(B1 - h)) / (2 * h))[None, :]


def _own_minimum(seed: int):
    """The counts, iminuit's fit at the own width of 4 GeV, and the widths walked (steps of
    sqrt 2 from 0.35 to 4 times it)."""
    n = _counts(seed)
    own_w = 4.0
    return n, _profile(n, own_w, False, [152.0]), own_w * 2.0 ** (np.arange(-3, 5) / 2)


@pytest.mark.parametrize("seed", [11, 12])
def test_the_mass_profile_along_the_width_against_iminuit(seed):
    n, own_fit, widths = _own_minimum(seed)
    out = _path(n, own_fit, widths, 3, np.zeros((0, n.size)))
    for j, w in enumerate(widths):
        ref = _profile(n, w, False, [own_fit.values["m"] + d for d in (-w, 0.0, w)])
        assert abs(out[j, 3] - ref.fval) < 2e-3, (w, out[j, 3], ref.fval)
        assert abs(out[j, 0] - ref.values["m"]) < 0.05 * ref.errors["m"], (w, out[j, 0],
                                                                            ref.values["m"])


@pytest.mark.parametrize("seed", [11, 12])
def test_the_relaxed_background_shape_against_iminuit(seed):
    n, own_fit, widths = _own_minimum(seed)
    out = _path(n, own_fit, widths, 3, _slope_row())
    held = _path(n, own_fit, widths, 3, np.zeros((0, n.size)))
    for j, w in enumerate(widths):
        starts = [own_fit.values["m"] + d for d in (-w, 0.0, w)]
        ref = _profile(n, w, True, starts)
        relaxed = _profile(n, w, False, starts).fval - ref.fval  # what b1 free gains
        assert abs(out[j, 3] - ref.fval) < 0.01 + 0.1 * relaxed, (w, out[j, 3], ref.fval)
        assert out[j, 3] <= held[j, 3] + 1e-9  # relaxing a parameter never raises it


def test_the_walk_stops_once_the_profile_has_risen():
    """With ``rise`` 5 the walk leaves the widths beyond the first one whose profile lies
    more than 5 above the own width's (iminuit's profile, rising) uncomputed (NaN)."""
    n = _counts(13)
    own_fit = _profile(n, 4.0, False, [152.0])
    widths = 4.0 * 2.0 ** (np.arange(-8, 9) / 2)
    own = 8
    out = _path(n, own_fit, widths, own, np.zeros((0, n.size)), rise=5.0)
    computed = np.flatnonzero(np.isfinite(out[:, 3]))
    assert computed.size < widths.size
    lo, hi = computed.min(), computed.max()
    assert np.all(np.isfinite(out[lo:hi + 1, 3]))  # one run of widths around the own one
    for end in (lo, hi):
        if end in (0, widths.size - 1):
            continue
        ref = _profile(n, widths[end], False, [own_fit.values["m"]])
        assert ref.fval > own_fit.fval + 5.0


def test_a_dips_start_goes_to_the_lowest_wider_width():
    """``start_widths.lowest_width`` from a narrow dip's start (1.25 GeV at 197 GeV) on a
    spectrum whose deficit is centred on the window's upper edge (80 events of a Gaussian
    of 5 GeV at 200 GeV below 10,000 on exp(-0.8 t)): the width it picks among the wider
    ones (steps of sqrt 2 up to 8 times) against iminuit's profile at each (mass, both
    yields and the slope minimised, strategy 2, from three masses).  Checks: iminuit's
    profile at the picked width lies within 0.05 of its lowest over those widths and more
    than 1 below the start's own width; the picked mass within 0.1 of that width of
    iminuit's mass there, its yield negative and within 10 % of iminuit's (the path's
    slope is one Newton step, not a minimum)."""
    b1 = -0.8
    n = np.random.default_rng(21).poisson(10000 * exp_fractions(b1)
                                          - 80 * gauss_fractions(200.0, 5.0)).astype(float)
    h = 1e-5
    dg = ((exp_fractions(b1 + h) - exp_fractions(b1 - h)) / (2 * h))[None, :]
    btot = n.sum() + 30.0
    found = lowest_width(Gaussian(), EDGES.copy(), n, None,
                         (btot * exp_fractions(b1), btot * dg), 197.0, 1.25, -30.0, 0.1,
                         50.0, LO, HI, WINDOW, -1.0)
    assert found is not None
    factor, y, _, mass = found

    ref = {f: _profile(n, 1.25 * f, True, (197.0, HI - 1.25 * f, HI - 0.1), -30.0, b1)
           for f in OTHER_FACTORS[OTHER_FACTORS >= 1.0].tolist()}
    lowest = min(r.fval for r in ref.values())
    at = ref[factor]
    assert at.fval <= lowest + 0.05, (factor, at.fval, lowest)
    assert at.fval < ref[1.0].fval - 1.0
    assert abs(mass - at.values["m"]) < 0.1 * 1.25 * factor, (mass, at.values["m"])
    assert y < 0 and abs(y / at.values["a"] - 1.0) < 0.1, (y, at.values["a"])
