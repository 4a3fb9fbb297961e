"""The joint loop's closed form outside the signal's span (peaksift.stats.joint_spans)
against the extended binned Poisson NLL and its Newton sums written out here bin by bin
with numpy: exponential bin fractions from the exponential's CDF (common practice), their
derivative in the slope by complex step (Squire and Trapp, SIAM Review 40 (1998) 110),
a Gaussian signal's fractions from ``scipy.stats.norm``."""

from __future__ import annotations

import numpy as np
import pytest
from joint_reference import background, bin_sums, closed_form, dbackground
from scipy import stats

LO, HI = 100.0, 300.0
EDGES = np.linspace(LO, HI, 401)
T = (EDGES - 0.5 * (LO + HI)) * (2.0 / (HI - LO))   # the window-scaled edges
DT = np.diff(EDGES) * (2.0 / (HI - LO))


def _signal(mass, sigma):
    c = stats.norm.cdf(EDGES, mass, sigma)
    return np.diff(c) / (c[-1] - c[0])


@pytest.mark.parametrize("mass, s, shift", [(180.0, 250.0, 0.004), (120.0, -30.0, -0.2),
                                            (290.0, 900.0, 0.45)])
def test_closed_form_matches_the_bin_sums(mass, s, shift):
    """NLL to 1e-13 of its summed magnitude, each Newton sum to 1e-12 of its summed
    magnitude (rounding of ~400 terms and of the closed forms: ~1e-14 seen), at slopes
    away from the one the moments are built at (``shift``)."""
    rng = np.random.default_rng(7)
    theta_ref = -1.67
    b = 60_000.0
    g0 = background(T, theta_ref)
    f = _signal(mass, 0.01 * mass)
    n = rng.poisson(b * g0 + 200.0 * f).astype(float)
    h = 1e-4   # the curvature held at theta_ref, by central differences
    d2 = (dbackground(T, theta_ref + h) - dbackground(T, theta_ref - h)) / (2 * h)
    theta = theta_ref + shift
    done, nll, sm, span = closed_form(T, DT, n, f, d2, s, b, theta, theta_ref)
    assert done
    assert 0 < span[1] - span[0] < 0.4 * f.size   # most bins are in closed form
    ref_nll, terms = bin_sums(T, n, f, d2, s, b, theta)
    assert nll == pytest.approx(ref_nll.sum(), rel=0, abs=1e-13 * np.abs(ref_nll).sum())
    for k, term in enumerate(terms):
        assert sm[k] == pytest.approx(term.sum(), rel=0, abs=1e-12 * np.abs(term).sum()), k


def test_declines_where_the_signal_outside_its_span_matters():
    """A signal so large that its fractions below 1e-22 reach 2^-60 of a bin's background,
    or a slope beyond the series' reach: the bin-by-bin path must answer."""
    theta_ref = -1.67
    f = _signal(180.0, 1.8)
    n = np.full(f.size, 100.0)
    d2 = np.zeros(f.size)
    assert closed_form(T, DT, n, f, d2, 250.0, 60_000.0, theta_ref, theta_ref)[0]
    assert not closed_form(T, DT, n, f, d2, 1e20, 60_000.0, theta_ref, theta_ref)[0]
    assert not closed_form(T, DT, n, f, d2, 250.0, 60_000.0, theta_ref + 0.6, theta_ref)[0]
    assert not closed_form(T, DT, n, f, d2, 250.0, -5.0, theta_ref, theta_ref)[0]
