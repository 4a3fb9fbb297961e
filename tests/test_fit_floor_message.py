"""A width within one error of its floor says why it is doubtful: a spike narrower than the
binning, or a wide width the data do not measure.

Both fits are flagged invalid by the same rule (the width at its floor, 0.1 of the narrowest
bin, or within one error of it: ``fitting/outcome.at_floor``); what the flag tells the user
to do differs.  A width narrower than the narrowest bin is a spike the binning cannot resolve
(finer bins or an unbinned fit help); a width of several bins whose error reaches down to the
floor is not measured (finer bins would not help; fixing or constraining it would).  The
reference is the binning itself: the widths are compared with the bin width of
``numpy.histogram`` edges made here, not with anything the fit reports about itself.

Spectra: an exponential (scale 40 or 60 GeV) from 110 GeV, 45 or 90 bins on 110-200 GeV;
the second with 25 events of a broad Gaussian (sigma 12 GeV) at 150 GeV added.
"""

from __future__ import annotations

import numpy as np

import peaksift

WINDOW = (110.0, 200.0)


def _spectrum(state: int, scale: float, n: int, bins: int, bump: int) -> tuple:
    rng = np.random.default_rng(state)
    m = WINDOW[0] + rng.exponential(scale, size=n)
    m = np.concatenate([m, rng.normal(150.0, 12.0, size=bump)])
    m = m[(m > WINDOW[0]) & (m < WINDOW[1])]
    edges = np.histogram_bin_edges(m, bins=bins, range=WINDOW)
    return peaksift.MassHistogram.from_masses(m, edges=edges), float(np.diff(edges).min())


def _floor_problem(result) -> str:
    found = [p for p in result.problems if "floor" in p]
    assert len(found) == 1, result.problems
    return found[0]


def test_a_wide_width_the_data_do_not_measure_is_not_called_narrower_than_the_bins():
    h, bin_width = _spectrum(40, 60.0, 400, 45, 25)
    r = peaksift.fit(h, "gaussian", "exponential")
    assert not r.valid
    sigma, err = r.values["sigma"], r.errors["sigma"]
    assert sigma > 3 * bin_width and err >= sigma - 0.1 * bin_width  # the case: wide, error to the floor
    text = _floor_problem(r)
    assert "not measured" in text and "fix or constrain" in text
    assert "narrower than the binning" not in text


def test_a_spike_narrower_than_a_bin_is_still_told_to_use_finer_bins():
    h, bin_width = _spectrum(0, 40.0, 3000, 90, 0)
    r = peaksift.fit(h, "gaussian", "exponential")
    assert not r.valid
    assert r.values["sigma"] < bin_width  # the case: a spike inside one bin
    text = _floor_problem(r)
    assert "narrower than the binning resolves" in text
    assert "not measured" not in text
