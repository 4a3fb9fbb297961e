"""The Voigt profile's closed-form derivatives (mass, sigma, width) against a step-independent
reference written here.

Reference: ``scipy.special.voigt_profile(x - mass, sigma, width / 2)`` normalised on the
window and integrated over each bin by ``scipy.integrate.quad``; its derivatives by central
differences extrapolated twice (Richardson: D(h), D(h/2), D(h/4) -> error O(h^6)), checked
to be step independent (two base steps agree) before the shape is compared with it.  The
shape's derivatives come from the Faddeeva function instead (``scipy.special.wofz``: the
heat equation for sigma, the conjugate harmonic Im w for the width), so the two share no
code.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy import integrate, special

from peaksift import shapes

WINDOW = (100.0, 200.0)
EDGES = np.linspace(100.0, 200.0, 26)
POINTS = np.array([101.0, 141.5, 149.0, 150.5, 156.0, 199.0])


def _integral(a: float, b: float, p: list[float]) -> float:
    m, s, g = p
    return integrate.quad(lambda x: special.voigt_profile(x - m, s, 0.5 * g), a, b,
                          points=[m] if a < m < b else None, epsabs=0.0, epsrel=1e-13,
                          limit=200)[0]


def ref_fractions(p: list[float]) -> np.ndarray:
    total = _integral(*WINDOW, p)
    return np.array([_integral(a, b, p) for a, b in itertools.pairwise(EDGES)]) / total


def ref_pdf(p: list[float]) -> np.ndarray:
    return special.voigt_profile(POINTS - p[0], p[1], 0.5 * p[2]) / _integral(*WINDOW, p)


def richardson(func, p0: list[float], i: int, h: float) -> np.ndarray:
    def central(step):
        up, dn = list(p0), list(p0)
        up[i] += step
        dn[i] -= step
        return (func(up) - func(dn)) / (2.0 * step)

    d1, d2, d3 = central(h), central(h / 2), central(h / 4)
    r1, r2 = (4 * d2 - d1) / 3, (4 * d3 - d2) / 3
    return (16 * r2 - r1) / 15


@pytest.mark.parametrize("p0", [[150.0, 3.0, 4.0], [120.0, 1.0, 12.0], [150.0, 6.0, 0.4]])
def test_voigt_derivatives_match_the_richardson_reference(p0):
    """Bin fractions (1e-9 of the largest, against quad), their three derivatives and those
    of the normalised density (1e-7 of the largest, against the extrapolated differences),
    for a balanced profile, a wide Lorentzian off centre and a nearly Gaussian one."""
    v = shapes.get("voigt")
    frac, grad = v.fractions_and_grad(EDGES, p0, WINDOW)
    ref = ref_fractions(p0)
    np.testing.assert_allclose(frac, ref, rtol=0, atol=1e-9 * ref.max())
    _, pgrad = v.pdf_and_grad(POINTS, p0, WINDOW)
    for i in range(3):
        h = 0.01 * p0[i] if i else 0.05
        rf, rf2 = richardson(ref_fractions, p0, i, h), richardson(ref_fractions, p0, i, 2 * h)
        assert np.max(np.abs(rf - rf2)) < 1e-9 * np.max(np.abs(rf)), i  # step independent
        assert np.max(np.abs(grad[i] - rf)) < 1e-7 * np.max(np.abs(rf)), i
        rp = richardson(ref_pdf, p0, i, h)
        assert np.max(np.abs(pgrad[i] - rp)) < 1e-7 * np.max(np.abs(rp)), i
