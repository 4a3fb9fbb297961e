"""The fit figure's number box quotes the profile-likelihood intervals that the summary and
the report quote, not the symmetric HESSE errors, when the fit has them.

Reference: MINOS intervals (James & Roos 1975, as implemented in iminuit) of an extended
binned Poisson likelihood written here with scipy's normal and exponential CDFs; the
intervals are invariant under the background's parametrisation, so they must agree with
peaksift's to the rounding the figure prints (two significant digits of the smaller error,
common practice; one unit of the last digit allowed for the rounding of a number within
~1e-3 of a rounding edge).
"""

from __future__ import annotations

import re

import matplotlib

matplotlib.use("Agg")

import numpy as np
from iminuit import Minuit
from iminuit.cost import ExtendedBinnedNLL
from scipy import stats

from peaksift.fitting import fit
from peaksift.fitting.figure import fit_figure
from peaksift.histogram import MassHistogram

WINDOW = (100.0, 200.0)


def _spectrum() -> MassHistogram:
    rng = np.random.default_rng(20261204)
    x = 100.0 + rng.exponential(40.0, 6000)
    x = np.concatenate([x[x < 200.0], rng.normal(150.0, 3.0, 250)])
    return MassHistogram.from_masses(x, bins=100, range=WINDOW)


def _minos(h: MassHistogram) -> dict[str, tuple[float, float]]:
    """MINOS errors of mass, sigma and signal yield (Gaussian + exponential, written here)."""
    lo, hi = WINDOW

    def cdf(xe, s, b, m, sg, tau):
        sig = stats.norm.cdf(xe, m, sg) - stats.norm.cdf(lo, m, sg)
        sig /= stats.norm.cdf(hi, m, sg) - stats.norm.cdf(lo, m, sg)
        bkg = stats.expon.cdf(xe - lo, scale=tau) / stats.expon.cdf(hi - lo, scale=tau)
        return s * sig + b * bkg

    cost = ExtendedBinnedNLL(np.asarray(h.counts(), float), np.asarray(h.edges, float), cdf)
    m = Minuit(cost, s=250.0, b=float(np.sum(h.counts())) - 250.0, m=150.0, sg=3.0, tau=40.0)
    m.limits["sg"] = (0.1, 20.0)
    m.limits["tau"] = (1.0, 1000.0)
    m.migrad()
    m.minos("m", "sg", "s")
    assert m.valid
    return {"mass": (m.merrors["m"].lower, m.merrors["m"].upper),
            "sigma": (m.merrors["sg"].lower, m.merrors["sg"].upper),
            "signal_yield": (m.merrors["s"].lower, m.merrors["s"].upper)}


def _close(text: str, err: float) -> bool:
    """``text`` (a printed error) equals ``err`` to its printed last digit, +-1 unit."""
    dec = len(text.split(".")[1]) if "." in text else 0
    return abs(float(text) - abs(err)) <= 1.01 * 10.0 ** -dec


def test_the_number_box_shows_the_profile_likelihood_intervals():
    h = _spectrum()
    res = fit(h, "gaussian", "exponential", WINDOW, intervals=["mass", "sigma", "signal_yield"])
    assert res.valid
    ref = _minos(h)
    fig = fit_figure(res)
    texts = [t.get_text() for ax in fig.axes for t in ax.texts]
    pairs = [re.fullmatch(r"\+([\d.,]+) -([\d.,]+)", t) for t in texts]
    shown = [(float(m[1].replace(",", "")), float(m[2].replace(",", ""))) for m in pairs if m]
    shown_text = [(m[1], m[2]) for m in pairs if m]
    # three rows with intervals (mass, sigma, signal yield), none with a HESSE "±" there
    assert len(shown) == 3, texts
    for name, (up_txt, down_txt) in zip(("mass", "sigma", "signal_yield"), shown_text):
        lower, upper = ref[name]
        assert _close(up_txt, upper) and _close(down_txt, lower), (name, up_txt, down_txt,
                                                                   lower, upper)
    # the background yield has no interval asked for: its HESSE error with "±"
    assert any(t.startswith("\u00b1 ") for t in texts)
