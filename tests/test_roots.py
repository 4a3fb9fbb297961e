"""Brent's root finder of the shapes (``shapes/roots.py``) against ``scipy.optimize.brentq``.

Source: scipy.optimize.brentq (scipy's zeros/brentq.c, Brent 1973, ch. 4), which ours
follows step for step: the roots must agree to the bit (tolerance 0), including the
iterations that take the bisection and the inverse-quadratic branches.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import optimize

from peaksift.errors import FitError
from peaksift.shapes.roots import bounded_minimum, brentq

CASES = [
    (lambda x: x**3 - 2.0 * x - 5.0, 2.0, 3.0),            # Wallis' cubic, root 2.0945...
    (lambda x: math.cos(x) - x, 0.0, 1.0),                 # root 0.739085...
    (lambda x: math.exp(-0.5 * (x - 91.2) ** 2 / 1.6**2) - 0.5, 91.2, 95.0),  # a half-maximum
    (lambda x: math.log(x) - 1.0, 0.01, 100.0),            # root e, far from both ends
    (lambda x: x - 0.3 + 0.05 * math.sin(60.0 * x), -2.0, 3.0),  # wiggles: bisections
    (lambda x: math.atan(40.0 * (x - 0.3)), -1.0, 2.0),    # steep: interpolation overshoots
]


@pytest.mark.parametrize("k", range(len(CASES)))
@pytest.mark.parametrize("tol", [(2e-12, 8.881784197001252e-16), (1e-12, 1e-14), (1e-4, 1e-10)])
def test_same_root_as_scipy_to_the_bit(k, tol):
    f, a, b = CASES[k]
    xtol, rtol = tol
    ours = brentq(f, a, b, xtol=xtol, rtol=rtol)
    ref = optimize.brentq(f, a, b, xtol=xtol, rtol=rtol)
    assert ours == ref  # tolerance 0: the same steps in the same arithmetic
    assert abs(f(ours)) <= abs(f(np.nextafter(ours, a))) + abs(f(np.nextafter(ours, b)))


def test_same_signs_and_no_convergence_are_fit_errors():
    with pytest.raises(FitError, match="different signs"):
        brentq(lambda x: x * x + 1.0, -1.0, 1.0)
    # a fifth-power root: scipy does not converge in 100 iterations either
    with pytest.raises(RuntimeError):
        optimize.brentq(lambda x: (x - 1.0) ** 5, 0.0, 3.5)
    with pytest.raises(FitError, match="no convergence"):
        brentq(lambda x: (x - 1.0) ** 5, 0.0, 3.5)


MINIMA = [
    (lambda x: (x - 1.3) ** 2, 0.0, 3.0),                    # a parabola inside
    (lambda x: math.cos(3.0 * x) + 0.1 * x, 0.0, 2.0),       # a cosine's trough
    (lambda x: x**4 - 3.0 * x**3 + 2.0, -1.0, 4.0),          # flat start, minimum at 2.25
    (lambda x: math.exp(x) - 5.0 * x, 0.0, 1.0),             # on the upper bound
    (lambda x: abs(x - 0.4) + 0.01 * math.sin(40.0 * x), 0.0, 1.0),  # kinked, wiggly
    # the mass-scale profile of SignalNuisances.mass_interval: a two-sided parabola plus a
    # log-normal constraint in the factor
    (lambda k: 0.5 * ((150.0 * k - 152.0) / (1.5 if 150.0 * k > 152.0 else 1.7)) ** 2
     + 0.5 * (math.log(k) / math.log1p(0.002)) ** 2, 0.988, 1.012),
]


@pytest.mark.parametrize("k", range(len(MINIMA)))
@pytest.mark.parametrize("xatol", [1e-5, 1e-10])
def test_same_bounded_minimum_as_scipy_to_the_bit(k, xatol):
    """Source: scipy.optimize.minimize_scalar(method="bounded") (Brent 1973, ch. 5), which
    bounded_minimum follows step for step: x and f(x) equal, tolerance 0."""
    f, a, b = MINIMA[k]
    x, fx = bounded_minimum(f, a, b, xatol=xatol)
    ref = optimize.minimize_scalar(f, bounds=(a, b), method="bounded",
                                   options={"xatol": xatol})
    assert x == float(ref.x) and fx == float(ref.fun)
