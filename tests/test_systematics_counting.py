"""A counting experiment with a background uncertainty, profiled by the likelihood core.

The core's constrained profile (``Model`` + ``BinnedCost`` with a Gaussian
``Constraint`` on the background yield, minimised by ``likelihood.minimize``) on the Asimov
count n = s + b, against

* Cowan, "Discovery sensitivity for a counting experiment with background uncertainty"
  (2012 note), the closed form for a background known to sigma_b (auxiliary measurement):

      Z = sqrt(2 [ (s+b) ln((s+b)(b+sb^2) / (b^2+(s+b) sb^2))
                  - (b^2/sb^2) ln(1 + sb^2 s / (b (b+sb^2))) ])

  derived with a Poisson auxiliary count; a Gaussian constraint of the same width agrees to
  second order in sb/b (the two constraint shapes differ in their skewness), tolerance 2%;
* the exact Gaussian-constraint answer written out here (profile over b with
  ``scipy.optimize.minimize_scalar``), tolerance 1e-6;
* the limit sb -> 0: Cowan, Cranmer, Gross, Vitells 2011 eq. 97, tolerance 1e-6.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import optimize

from peaksift.likelihood import BinnedCost, Constraint, Model, minimize


def _cowan_2012(s: float, b: float, sb: float) -> float:
    v = sb * sb
    t1 = (s + b) * math.log((s + b) * (b + v) / (b * b + (s + b) * v))
    t2 = (b * b / v) * math.log1p(v * s / (b * (b + v)))
    return math.sqrt(2.0 * (t1 - t2))


def _core_z(s: float, b: float, sb: float) -> float:
    model = Model("gaussian", "bernstein", (0.0, 1.0))
    names = model.parameter_names
    iy, ib = names.index("signal_yield"), names.index("background_yield")
    full = np.array([0.5, 100.0, s] + [1.0] * (len(names) - 4) + [b])  # one bin: fractions 1
    n, edges = np.array([s + b]), np.array([0.0, 1.0])
    con = [(ib, Constraint.gaussian(b, sb))]

    def profile(free: list[int], fixed_s: float) -> float:
        f = full.copy()
        f[iy] = fixed_s
        cost = BinnedCost(model, f, np.array(free), con, edges, n, np.ones(1))
        lo = np.array([-1e9 if i == iy else 1e-9 for i in free])
        mo = minimize(cost, f[free], lo, np.full(len(free), np.inf),
                      [names[i] for i in free], edm_goal=1e-14)
        return mo.fval

    return math.sqrt(max(2.0 * (profile([ib], 0.0) - profile([iy, ib], s)), 0.0))


def _exact_gaussian(s: float, b: float, sb: float) -> float:
    n = s + b

    def nll0(beta: float) -> float:
        return beta - n * math.log(beta) + 0.5 * ((beta - b) / sb) ** 2

    lo = optimize.minimize_scalar(nll0, bounds=(1e-6, 10 * n), method="bounded",
                                  options={"xatol": 1e-12})
    best = n - n * math.log(n)  # s_hat = s, b_hat = b: the constraint term is 0
    return math.sqrt(2.0 * (lo.fun - best))


@pytest.mark.parametrize("s,b,sb", [(20.0, 100.0, 10.0), (10.0, 100.0, 5.0),
                                    (50.0, 1000.0, 50.0), (30.0, 400.0, 10.0)])
def test_counting_significance_with_background_uncertainty(s, b, sb):
    z = _core_z(s, b, sb)
    assert z == pytest.approx(_exact_gaussian(s, b, sb), rel=1e-6)
    assert z == pytest.approx(_cowan_2012(s, b, sb), rel=0.02)
    assert z < math.sqrt(2 * ((s + b) * math.log1p(s / b) - s))  # uncertainty costs


def test_small_uncertainty_reaches_the_known_background_formula():
    s, b = 10.0, 100.0
    z0 = math.sqrt(2 * ((s + b) * math.log1p(s / b) - s))  # CCGV 2011 eq. 97
    assert _core_z(s, b, 1e-4) == pytest.approx(z0, rel=1e-6)
    assert _cowan_2012(s, b, 1e-4) == pytest.approx(z0, rel=1e-6)
