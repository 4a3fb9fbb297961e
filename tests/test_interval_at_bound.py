"""A profile-likelihood interval that reaches the parameter's bound is written as such.

A peak at the window's upper edge (100 bins on 100-200 GeV: 2,500 exponential events, slope
-1 in t = (x - 150) / 50, and 40 events of a normal peak at 198.8 GeV, sigma 1.5, the
expected counts rounded): the mass's profile likelihood has not risen by 1/2 in -ln L when
the mass reaches 200 GeV, so MINOS stops at the bound and returns the distance to it, which
read as "+1.4" as if it were an error.

Reference: the extended binned Poisson likelihood in Baker and Cousins' form (Nucl. Instrum.
Meth. 221 (1984) 437, eq. 11) with the bin fractions of ``exp_gauss_reference`` (scipy's
ndtr and the exponential's closed-form CDF), profiled by iminuit's MIGRAD with the mass
held at the bound 200 GeV: its rise over the minimum must be below 1/2 (tolerance: the
check is a strict inequality with the value printed).  Checks: the fit's upper end of the
mass interval lies on the bound (1e-9 relative), the fit notes it, and every text of the
interval (repr, the summary's and the report's rows) writes that end ``?`` with the bound.
"""

from __future__ import annotations

import numpy as np
import pytest
from exp_gauss_reference import EDGES, WINDOW, exp_fractions, gauss_fractions
from iminuit import Minuit

import peaksift
from peaksift._format import fit_interval_text, format_interval
from peaksift.histogram import MassHistogram

COUNTS = np.round(2500.0 * exp_fractions(-1.0) + 40.0 * gauss_fractions(198.8, 1.5))


def _nll(mass, sigma, s, b1, b):
    n = COUNTS
    mu = s * gauss_fractions(mass, sigma) + b * exp_fractions(b1)
    if not np.all(mu > 0):
        return 1e30
    return float(np.sum(mu - n + n * np.log(np.where(n > 0, n / mu, 1.0))))


@pytest.fixture(scope="module")
def result():
    h = MassHistogram(EDGES)
    h.weight_sum, h.weight_sq_sum = COUNTS.copy(), COUNTS.copy()
    return peaksift.fit(h, "gaussian", "exponential", WINDOW, binned=True, intervals=["mass"])


def test_the_upper_end_of_the_mass_interval_is_the_bound(result):
    v = result.values
    at_min = _nll(v["mass"], v["sigma"], v["signal_yield"], v["b1"], v["background_yield"])
    m = Minuit(lambda sigma, s, b1, b: _nll(200.0, sigma, s, b1, b), sigma=v["sigma"],
               s=v["signal_yield"], b1=v["b1"], b=v["background_yield"])
    m.errordef = 0.5
    m.limits["sigma"] = (0.1, 50.0)
    m.migrad()
    assert m.fval - at_min < 0.5, m.fval - at_min  # (the reference: no rise of 1/2 yet)
    hi = result.intervals["mass"][1]
    assert abs(v["mass"] + hi - WINDOW[1]) <= 1e-9 * WINDOW[1]
    assert any("interval of mass: its upper end is the bound 200" in n for n in result.notes)
    text = repr(result)
    line = next(ln for ln in text.splitlines() if ln.strip().startswith("mass "))
    assert "+? -" in line and "(upper end at the bound 200)" in line, line
    from peaksift.fitting.figure import parameter_rows  # the fit figure's table

    mass_row = next(r for r in parameter_rows(result) if r[0].startswith("mass"))
    assert mass_row[2].startswith("+? -") and mass_row[2].endswith("(bound 200)"), mass_row
    d = result.to_dict()
    row = fit_interval_text(d, "peak_mass", "mass", "GeV")
    assert row.startswith(f"{v['mass']:.2f} +? -") and row.endswith(
        "GeV (upper end at the bound 200)"), row


def test_the_interval_texts():
    """Rounding to two significant digits of the smaller error (common practice); ends
    at a bound or missing written ``?`` with the reason."""
    assert format_interval(152.244, -0.55, 0.50, "GeV") == "152.24 +0.50 -0.55 GeV"
    assert format_interval(10.0, -10.0, 3.1, bounds=(0.0, None)) == \
        "10.0 +3.1 -? (lower end at the bound 0)"
    assert format_interval(5.0, -0.2, float("nan"), "GeV") == \
        "5.00 +? -0.20 GeV (no valid upper end)"
    assert format_interval(5.0, None, None, "GeV") == "5 GeV"


def test_an_invalid_fit_has_no_intervals():
    """A spike in one bin (+25 events at 150-151 GeV on the exponential above, no peak):
    the fit started there ends with sigma at or within one error of its floor (0.1 GeV, a
    tenth of a bin), invalid.
    Its intervals are not made (their ends would read as errors of a width that is not
    measured: '0 +42 -42 GeV').  Reference: iminuit's MIGRAD on the likelihood above
    (sigma bounded at the same floor): -ln L at the floor lies within 1/2 of its minimum,
    so the width is not measured."""
    n = np.round(2500.0 * exp_fractions(-1.0))
    n[50] += 25.0
    h = MassHistogram(EDGES)
    h.weight_sum, h.weight_sq_sum = n.copy(), n.copy()
    r = peaksift.fit(h, "gaussian", "exponential", WINDOW, binned=True,
                     start={"mass": 150.5, "sigma": 1.0}, intervals=True)

    def nll(mass, sigma, s, b1, b):
        mu = s * gauss_fractions(mass, sigma) + b * exp_fractions(b1)
        return 1e30 if not np.all(mu > 0) else float(
            np.sum(mu - n + n * np.log(np.where(n > 0, n / mu, 1.0))))

    m = Minuit(nll, mass=150.5, sigma=1.0, s=25.0, b1=-1.0, b=n.sum() - 25.0)
    m.errordef = 0.5
    m.limits["sigma"] = (0.1, 50.0)
    m.limits["mass"] = WINDOW
    m.migrad()
    v = dict(zip(m.parameters, m.values))
    # (the reference: the width is not told from its floor, -ln L there within 1/2)
    assert nll(v["mass"], 0.1, v["s"], v["b1"], v["b"]) - m.fval < 0.5
    assert not r.valid and any("sigma at or within one error of its floor" in p
                               for p in r.problems)
    assert r.intervals is None
    assert "profile-likelihood intervals not made: the fit is not valid" in r.notes
