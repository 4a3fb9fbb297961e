"""The compiled Faddeeva function and the binned Voigt in extreme regimes, against scipy.

* ``faddeeva_line`` against ``scipy.special.wofz`` for Im z from 0 to 1e15 (gamma << sigma
  to gamma >> sigma) and |Re z| from 1e-6 to 1e15 (far tails, |z| large): 5e-14 relative
  to |w| (Weideman, SIAM J. Numer. Anal. 31 (1994) 1497, bounds his N = 40 rule's error
  by ~2e-14 |w|; measured at most 1.3e-14).
* ``voigt_density`` against ``scipy.special.voigt_profile`` (near-zero widths, one width
  1e6-1e12 times the other): 1e-14 of the peak absolutely, and pointwise within 5e-14 of
  |w(z)| / (sigma sqrt(2 pi)) (the error is relative to |w|, not to Re w: in a nearly
  Gaussian tail the profile's relative error grows, 2.3e-11 at 1e-6 of the peak).
* ``Voigt.fit_fractions`` (the binned fit's path) against ``scipy.integrate.quad`` of
  ``voigt_profile`` per bin (the peak a break point, relative tolerance 1e-13) normalised
  on the window, for bins 1e3-1e5 times wider than the peak: 1e-11 absolutely (measured at
  most 3.1e-12).
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy import integrate
from scipy.special import voigt_profile, wofz

from peaksift import shapes
from peaksift.shapes.faddeeva import faddeeva_line, voigt_density


@pytest.mark.parametrize("y", [0.0, 1e-300, 1e-9, 1e-3, 0.5, 30.0, 1e5, 1e10, 1e15])
def test_faddeeva_line_against_wofz_in_extreme_regimes(y):
    t = np.concatenate([-np.logspace(-6, 15, 300)[::-1], [0.0], np.logspace(-6, 15, 300)])
    w = faddeeva_line(t, y)
    ref = wofz(t + 1j * y)
    assert np.all(np.isfinite(w))
    assert np.max(np.abs(w - ref) / np.abs(ref)) < 5e-14


@pytest.mark.parametrize(("s", "g"), [(1e-6, 1.0), (1.0, 1e-9), (1e-3, 1e3), (1e-9, 1e-9),
                                      (1e3, 1e-3), (1.0, 1.0)])
def test_voigt_density_against_voigt_profile(s, g):
    x = np.concatenate([np.linspace(-50, 50, 2001), np.linspace(-1e4, 1e4, 201)]) * max(s, g)
    d = voigt_density(x, 0.0, s, g)
    ref = voigt_profile(x, s, g / 2)
    assert np.max(np.abs(d - ref)) < 1e-14 * ref.max()
    # pointwise: within 5e-14 of |w(z)| / (sigma sqrt(2 pi)), the bound's scale
    size = np.abs(wofz((x + 0.5j * g) / (s * np.sqrt(2.0)))) / (s * np.sqrt(2.0 * np.pi))
    assert np.all(np.abs(d - ref) <= 5e-14 * size)


def _quad_fractions(e, m, s, g, window):
    def f(x):
        return voigt_profile(x - m, s, g / 2)

    def q(a, b):
        return integrate.quad(f, a, b, points=[m] if a < m < b else None, limit=500,
                              epsabs=0, epsrel=1e-13)[0]

    return np.array([q(a, b) for a, b in itertools.pairwise(e)]) / q(*window)


@pytest.mark.parametrize(("m", "s", "g"), [(150.3, 0.01, 0.001), (150.3, 1e-4, 10.0),
                                           (150.3, 1e-3, 1e-3), (150.3, 5.0, 1e-6),
                                           (100.5, 0.02, 3.0), (199.99, 0.5, 0.5)])
def test_binned_voigt_fractions_with_bins_much_wider_than_the_peak(m, s, g):
    e = np.linspace(100.0, 200.0, 11)
    f = np.asarray(shapes.get("voigt").fit_fractions(e, [m, s, g], (100.0, 200.0)), float)
    assert np.max(np.abs(f - _quad_fractions(e, m, s, g, (100.0, 200.0)))) < 1e-11
