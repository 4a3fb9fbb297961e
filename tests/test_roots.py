"""Brent's root finder of the shapes (``shapes/_roots.py``) against ``scipy.optimize.brentq``.

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
from peaksift.shapes._roots import brentq

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
