"""The compiled Faddeeva function (Weideman's approximation) and the Voigt shape built on it,
against scipy: ``scipy.special.wofz`` (S. G. Johnson's Faddeeva package), and
``scipy.integrate.quad`` of ``scipy.special.voigt_profile`` for the bin fractions."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy import integrate, special

from peaksift import shapes
from peaksift.shapes import faddeeva


def test_faddeeva_matches_scipy_wofz_over_the_upper_half_plane():
    """|w - wofz| <= 3e-14 |wofz| on |Re z| in [1e-4, 1e4] (and 0), Im z in [1e-9, 1e5]
    (the Voigt arguments: Im z = gamma / (sigma sqrt 2), sigma and gamma within a factor
    1e4 of each other and more); Weideman (SIAM J. Numer. Anal. 31 (1994) 1497) with N = 40
    terms measured ~2e-14 there."""
    t = np.concatenate([-np.logspace(-4, 4, 301), [0.0], np.logspace(-4, 4, 301)])
    for y in np.logspace(-9, 5, 43):
        ref = special.wofz(t + 1j * y)
        w = faddeeva.faddeeva_line(t, y)
        assert np.all(np.abs(w - ref) <= 3e-14 * np.abs(ref)), y


@pytest.mark.parametrize("p", [(0.0, 3.0, 4.0), (5.0, 0.01, 2.0), (-2.0, 2.0, 1e-4)])
def test_voigt_density_matches_scipy_voigt_profile(p):
    """The compiled profile against scipy.special.voigt_profile(x - m, sigma, width/2):
    within 1e-13 of the profile's peak value everywhere (the error is relative to |w|, so
    absolute in the far tails) and 1e-12 relative where the profile is above 1e-3 of it."""
    m, s, g = p
    x = m + np.linspace(-200.0, 200.0, 4001)
    ref = special.voigt_profile(x - m, s, 0.5 * g)
    got = faddeeva.voigt_density(x, m, s, g)
    top = special.voigt_profile(0.0, s, 0.5 * g)
    np.testing.assert_allclose(got, ref, rtol=0, atol=1e-13 * top)
    big = ref > 1e-3 * top
    np.testing.assert_allclose(got[big], ref[big], rtol=1e-12)


@pytest.mark.parametrize("p", [[170.0, 3.0, 4.0], [170.0, 3.0, 0.002], [170.0, 0.02, 5.0],
                               [101.0, 1.0, 1.0], [250.0, 40.0, 60.0]])
def test_voigt_fractions_and_derivatives_match_scipy_quad(p):
    """Bin fractions of 200 bins on (100, 300) (the compiled primitive) against
    scipy.integrate.quad of scipy.special.voigt_profile, normalised on the window:
    1e-12 absolute; their derivatives against central differences of the quad fractions
    (step 1e-4 of the width scale): 1e-6 absolute."""
    s = shapes.get("voigt")
    window = (100.0, 300.0)
    edges = np.linspace(*window, 201)
    m, sg, g = p
    scale = max(sg, g)
    pts = [m + k * scale for k in (-30, -10, -3, -1, 0, 1, 3, 10, 30)]

    def quad_fractions(q):
        def f(t):
            return special.voigt_profile(t - q[0], q[1], 0.5 * q[2])

        def integral(a, b):
            inner = [u for u in pts if a < u < b]
            return integrate.quad(f, a, b, points=inner or None, limit=400, epsabs=1e-16,
                                  epsrel=1e-13)[0]
        parts = np.array([integral(a, b) for a, b in itertools.pairwise(edges)])
        return parts / parts.sum()

    ref = quad_fractions(p)
    frac, grad = s.fractions_and_grad(edges, p, window)
    np.testing.assert_allclose(frac, ref, rtol=0, atol=1e-12)
    np.testing.assert_allclose(s.fit_fractions(edges, p, window), ref, rtol=0, atol=1e-12)
    for i in range(3):
        h = 1e-4 * min(sg, g) if i == 0 else 1e-4 * p[i]
        up, dn = list(p), list(p)
        up[i] += h
        dn[i] -= h
        num = (quad_fractions(up) - quad_fractions(dn)) / (2 * h)
        np.testing.assert_allclose(grad[i], num, rtol=0, atol=1e-6 * max(1.0, abs(num).max()))
