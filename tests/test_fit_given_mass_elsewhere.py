"""A fit started at a given mass says when a lower minimum -- a dip -- lies elsewhere.

The spectrum (no random numbers): 5,000 exponential events (slope -1 in t = (x - 150) / 50
on 100-200 GeV, 100 bins), a peak of 90 events at 140 GeV (sigma 3) and a deficit of 160
events at 176 GeV (sigma 5), the expected counts rounded.  Started at 140 GeV the fit
stays on the peak (a local minimum, valid); the lowest point of the likelihood is the dip.

Reference: the extended binned Poisson likelihood in Baker and Cousins' form,
sum(mu - n + n ln(n / mu)) (Nucl. Instrum. Meth. 221 (1984) 437, eq. 11), mu = s f(m, w)
+ b g(b1) with the bin fractions of ``exp_gauss_reference`` (scipy.special.ndtr and the
exponential's closed-form CDF), minimised by iminuit's MIGRAD: from the given start for the
fit's own minimum, and from a grid over mass (110-190 GeV), width (2-16 GeV) and both signs
of the yield for the lowest.  Checks: the fit's NLL equals iminuit's local minimum within
1e-3; ``lower_minimum`` is that grid's lowest (a dip; mass within 0.05 of iminuit's HESSE
error, Delta(-2 ln L) within 2e-3 of iminuit's); a held mass and a yield bounded at zero
report none (``docs/decisions/given-mass-lower-minimum.md``).
"""

from __future__ import annotations

import numpy as np
import pytest
from exp_gauss_reference import EDGES, WINDOW, exp_fractions, gauss_fractions
from iminuit import Minuit

import peaksift
from peaksift.fitting import FitResult
from peaksift.histogram import MassHistogram

COUNTS = np.round(5000.0 * exp_fractions(-1.0) + 90.0 * gauss_fractions(140.0, 3.0)
                  - 160.0 * gauss_fractions(176.0, 5.0))


def _hist() -> MassHistogram:
    h = MassHistogram(EDGES)
    h.weight_sum, h.weight_sq_sum = COUNTS.copy(), COUNTS.copy()
    return h


def _nll(mass, sigma, s, b1, b):
    n = COUNTS
    mu = s * gauss_fractions(mass, sigma) + b * exp_fractions(b1)
    if not np.all(mu > 0):
        return 1e30
    return float(np.sum(mu - n + n * np.log(np.where(n > 0, n / mu, 1.0))))


def _migrad(mass, sigma, s) -> Minuit:
    m = Minuit(_nll, mass=mass, sigma=sigma, s=s, b1=-1.0, b=COUNTS.sum() - s)
    m.errordef = 0.5
    m.limits["mass"] = WINDOW
    m.limits["sigma"] = (0.1, 50.0)
    m.limits["b1"] = (-30.0, 30.0)
    m.migrad()
    return m


@pytest.fixture(scope="module")
def given():
    return peaksift.fit(_hist(), "gaussian", "exponential", WINDOW, binned=True,
                        start={"mass": 140.0})


def test_the_given_mass_fit_reports_the_lower_dip(given):
    local = _migrad(140.0, 3.0, 90.0)
    assert local.valid and abs(local.values["mass"] - 140.0) < 5.0  # (the reference)
    lowest = min((_migrad(m, w, s) for m in np.arange(110.0, 191.0, 10.0)
                  for w in (2.0, 4.0, 8.0, 16.0) for s in (100.0, -100.0)),
                 key=lambda m: m.fval if m.valid else np.inf)
    lowest.hesse()
    assert lowest.values["s"] < 0  # (the reference: the dip is the lowest point)
    # the fit itself: the local minimum at the given peak, valid, its numbers unchanged
    v = given.values
    assert given.valid
    assert abs(_nll(v["mass"], v["sigma"], v["signal_yield"], v["b1"],
                    v["background_yield"]) - local.fval) < 1e-3
    assert abs(v["mass"] - local.values["mass"]) < 0.05 * local.errors["mass"]
    low = given.lower_minimum
    assert low is not None and low["kind"] == "dip"
    assert low["signal_yield"] < 0
    assert abs(low["mass"] - lowest.values["mass"]) < 0.05 * lowest.errors["mass"]
    assert abs(low["width"] - lowest.values["sigma"]) < 0.05 * lowest.errors["sigma"]
    assert abs(low["delta_minus_two_ln_l"] - 2.0 * (local.fval - lowest.fval)) < 2e-3
    assert any(n.startswith("a lower minimum exists elsewhere: a dip") for n in given.notes)


def test_the_lower_minimum_survives_json(given):
    """results.json carries it: ``to_dict`` then ``from_dict`` gives an equal value (the
    round trip, not a comparison with the code's own numbers)."""
    d = given.to_dict()
    assert d["lower_minimum"]["kind"] == "dip"
    back = FitResult.from_dict(d)
    assert back == given and back.lower_minimum["kind"] == "dip"


def test_a_held_mass_or_a_positive_yield_reports_none():
    """A held mass asks a question at that mass only; a yield bounded at zero allows no
    dip: neither reports a lower minimum (the fits' NLLs against iminuit from the same
    start, within 1e-3, so the fits are the ones meant)."""
    held = peaksift.fit(_hist(), "gaussian", "exponential", WINDOW, binned=True,
                        fixed={"mass": 140.0})
    assert held.lower_minimum is None
    m = Minuit(lambda sigma, s, b1, b: _nll(140.0, sigma, s, b1, b), sigma=3.0, s=90.0,
               b1=-1.0, b=COUNTS.sum() - 90.0)
    m.errordef = 0.5
    m.limits["sigma"] = (0.1, 50.0)
    m.migrad()
    v = held.values
    assert abs(_nll(140.0, v["sigma"], v["signal_yield"], v["b1"], v["background_yield"])
               - m.fval) < 1e-3
    positive = peaksift.fit(_hist(), "gaussian", "exponential", WINDOW, binned=True,
                            start={"mass": 140.0}, limits={"signal_yield": (0.0, 1e5)})
    assert positive.lower_minimum is None or positive.lower_minimum["kind"] == "peak"
