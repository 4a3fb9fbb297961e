"""The order test's fits on spectra unlike the demo's: steep, blinded, weighted, a wide
falling spectrum on logarithmic bins.

Every candidate of every family is checked against scipy.optimize.minimize (L-BFGS-B from
the fitted point, the default start and six scattered starts) on the binned Poisson NLL
written here, sum(nu - n ln nu) with nu = b g k and b = sum n / sum(g k) profiled (k the
scaled-Poisson factor sum(w) / sum(w^2) of a bin, Bohm and Zech, NIM A 748 (2014) 1; n the
effective counts k sum(w)), on the unblinded bins.  Tolerance 1e-6 in NLL.  And a higher
order never fits worse than the lower one it contains (Wilks' nesting), by more than 1e-8.

Before the nested fits recomputed their curvature (``fit_background(curvature_after=)``)
these spectra failed: powersum2 of the steep spectrum stopped 1.7e-4 above the minimum and
above powersum1; bernstein3 of the blinded one 0.013 above; powersum3 of the weighted one
4.7e-4 above (and above powersum2); bernstein3 of the wide one 50 above.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from background_reference import assert_orders_nested
from scipy import optimize

from peaksift.histogram import MassHistogram
from peaksift.stats.background_choice import candidate_shapes, choose_background

FAMILIES = {"powersum": [1, 2, 3], "exppoly": [1, 2, 3], "bernstein": [2, 3, 4, 5, 6],
            "dijet": [2, 3, 4]}
EDGES = np.linspace(100.0, 200.0, 101)


def _spectra(state: int) -> dict:
    """Spectra drawn in turn from one RandomState: ``name -> (masses, weights, edges,
    blind)``."""
    r = np.random.RandomState(state)
    out = {}
    m = 100 + r.exponential(6.0, 40000)
    out["steep"] = (m[m < 200], None, EDGES, None)
    r.uniform(100, 200, 3000), r.exponential(40.0, 120)  # (spectra not used here)
    m = 100 + r.exponential(30.0, 8000)
    m = m[m < 200]
    out["weighted"] = (m, r.gamma(4.0, 0.25, m.size), EDGES, None)
    m = 100 + r.exponential(25.0, 10000)
    out["blinded"] = (m[m < 200], None, EDGES, (140.0, 160.0))
    m = 500 * (1 - r.uniform(0, 1, 20000)) ** (-1 / 4.0)
    out["wide"] = (m[m < 2000], None, np.geomspace(500, 2000, 61), None)
    return out


@pytest.mark.parametrize(("state", "name"), [(100, "steep"), (100, "blinded"),
                                             (101, "weighted"), (102, "wide")])
def test_order_test_fits_reach_an_independent_minimum_and_nest(state, name):
    m, w, e, blind = _spectra(state)[name]
    h = MassHistogram(e)
    h.fill(m) if w is None else h.fill(m, weight=w)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        choice = choose_background(h, FAMILIES, blind=blind)
    wsum = np.histogram(m, e, weights=w)[0].astype(float)
    w2 = np.histogram(m, e, weights=None if w is None else w * w)[0].astype(float)
    k = np.where(w2 > 0, wsum / np.where(w2 > 0, w2, 1.0), wsum.sum() / w2.sum())
    n = wsum * k
    c = 0.5 * (e[:-1] + e[1:])
    used = np.ones(c.size, bool) if blind is None else ~((c > blind[0]) & (c < blind[1]))
    window = (float(e[0]), float(e[-1]))
    shapes_ = candidate_shapes(FAMILIES)
    for cand in choice.candidates:
        shape = shapes_[cand.label]

        def nll(theta, shape=shape):
            g = (np.asarray(shape.bin_fractions(e, list(theta), window), float) * k)[used]
            if not (np.all(g > 0) and np.all(np.isfinite(g))):
                return 1e30
            nu = n[used].sum() / g.sum() * g
            return float(np.sum(nu - n[used] * np.log(nu)))

        pars = shape.parameters_for(window)
        lo = np.array([p.lower for p in pars], float)
        hi = np.array([p.upper for p in pars], float)
        bounds = [(a if np.isfinite(a) else None, b if np.isfinite(b) else None)
                  for a, b in zip(lo, hi)]
        fitted = np.array(list(cand.parameters.values()))
        default = np.array([p.start if np.isfinite(p.start) else 0.0 for p in pars])
        r = np.random.RandomState(7)
        starts = [fitted, default] + [
            default + r.normal(0, 1, default.size) * np.maximum(np.abs(default), 0.5)
            for _ in range(6)]
        best = min(optimize.minimize(nll, np.clip(x0, lo, hi), method="L-BFGS-B",
                                     bounds=bounds, options={"ftol": 1e-15, "gtol": 1e-10,
                                                             "maxiter": 20000}).fun
                   for x0 in starts)
        assert nll(fitted) <= best + 1e-6, (cand.label, nll(fitted) - best)
    assert_orders_nested(choice, 1e-8)
