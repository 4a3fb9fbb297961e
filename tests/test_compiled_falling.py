"""The compiled bin fractions of the power sum and the Bernstein polynomial
(:mod:`peaksift.shapes.compiled_falling`, through ``PowerSum`` / ``Bernstein``).

Checks against ``scipy.integrate.quad`` (adaptive Gauss-Kronrod, QUADPACK; asked for 1e-13
relative) of the densities written out here from their textbook forms:
* power sum: f(x) = sum_j w_j^2 (x/c)^(-k_j) (w_1 = 1, c the window's centre);
* Bernstein of degree n: f(u) = sum_i beta_i C(n, i) u^i (1-u)^(n-i), u = (x-lo)/(hi-lo),
  beta_0 = 1, beta_i = c_i^2 (the basis as in G. G. Lorentz, "Bernstein Polynomials",
  1953, eq. 1.1.1; binomials from ``scipy.special.comb``);
* the window-normalised bin fractions, 1e-10 relative, and their derivatives
  dF_i/dp = (int_bin df/dp - F_i int_window df/dp) / Z from quad's integrals of the
  derivatives of the densities above, 1e-8 of the largest derivative;
* the single-set and stacked calls (one parameter set per row) agree row by row, and the
  compiled path gives the same bits as the numpy reference path (``Shape.fractions_and_grad``
  / ``Shape.bin_fractions``), which a search relies on to keep its numbers unchanged.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy import integrate, special

from peaksift import shapes
from peaksift.shapes import Shape

WINDOW = (110.0, 200.0)
EDGES = np.linspace(100.0, 200.0, 41)   # 2.5 GeV bins; the first 4 lie below the window
C = 0.5 * (WINDOW[0] + WINDOW[1])


def _powersum(p):
    """(density, [d density / d parameter]) in the shape's parameter order."""
    ks = [p[0], *p[1::2]]
    ws = [1.0, *p[2::2]]

    def f(x):
        return sum(w * w * (x / C) ** -k for k, w in zip(ks, ws))

    derivs = []
    for j, (k, w) in enumerate(zip(ks, ws)):
        derivs.append(lambda x, k=k, w=w: -w * w * math.log(x / C) * (x / C) ** -k)
        if j:
            derivs.append(lambda x, k=k, w=w: 2.0 * w * (x / C) ** -k)
    return f, derivs


def _bernstein(p):
    n = len(p)
    beta = [1.0, *(c * c for c in p)]

    def basis(x, i):
        u = (x - WINDOW[0]) / (WINDOW[1] - WINDOW[0])
        return special.comb(n, i) * u ** i * (1.0 - u) ** (n - i)

    def f(x):
        return sum(b * basis(x, i) for i, b in enumerate(beta))

    derivs = [lambda x, i=i: 2.0 * p[i - 1] * basis(x, i) for i in range(1, n + 1)]
    return f, derivs


CASES = [
    (shapes.get("powersum", terms=1), [4.5], _powersum),
    (shapes.get("powersum", terms=2), [3.0, 7.0, 0.4], _powersum),
    (shapes.get("powersum", terms=3), [2.0, 6.0, 0.8, 11.0, -0.3], _powersum),
    (shapes.get("powersum", terms=2), [1.0 + 1e-4, -3.0, 0.2], _powersum),  # k1 near 1: series
    (shapes.get("bernstein", degree=2), [0.7, 0.3], _bernstein),
    (shapes.get("bernstein", degree=4), [0.9, -0.5, 0.4, 0.1], _bernstein),
    (shapes.get("bernstein", degree=6), [1.2, 0.8, -0.6, 0.5, 0.3, 0.2], _bernstein),
]


def _quad(g, a, b):
    return integrate.quad(g, a, b, epsabs=0.0, epsrel=1e-13, limit=200)[0]


@pytest.mark.parametrize("shape,pars,ref", CASES, ids=lambda c: str(c)[:30])
def test_fractions_and_derivatives_match_quad(shape, pars, ref):
    f, derivs = ref(pars)
    x = np.clip(EDGES, *WINDOW)
    z = _quad(f, *WINDOW)
    want = np.array([_quad(f, a, b) if b > a else 0.0 for a, b in itertools.pairwise(x)]) / z
    frac, grad = shape.fractions_and_grad(EDGES, pars, WINDOW)
    np.testing.assert_allclose(frac, want, rtol=1e-10, atol=1e-300)
    np.testing.assert_allclose(shape.bin_fractions(EDGES, pars, WINDOW), want, rtol=1e-10,
                               atol=1e-300)
    assert np.all(frac[:4] == 0.0)  # below the window
    for j, d in enumerate(derivs):
        dz = _quad(d, *WINDOW)
        dwant = np.array([(_quad(d, a, b) if b > a else 0.0) for a, b in
                          itertools.pairwise(x)]) / z - want * dz / z
        np.testing.assert_allclose(grad[j], dwant, rtol=0,
                                   atol=1e-8 * np.max(np.abs(dwant)))


@pytest.mark.parametrize("shape,pars,ref", CASES, ids=lambda c: str(c)[:30])
def test_stacked_rows_equal_single_sets_and_the_numpy_path(shape, pars, ref):
    rng = np.random.default_rng(3)
    rows = [np.asarray(pars) * (1.0 + 0.05 * rng.standard_normal(len(pars)))
            for _ in range(5)]
    stacked = [np.array([[r[j]] for r in rows]) for j in range(len(pars))]
    frac, grad = shape.fractions_and_grad(EDGES, stacked, WINDOW)
    vals = shape.bin_fractions(EDGES, stacked, WINDOW)
    assert frac.shape == (5, EDGES.size - 1) and grad.shape == (len(pars), 5, EDGES.size - 1)
    for b, r in enumerate(rows):
        f1, g1 = shape.fractions_and_grad(EDGES, list(r), WINDOW)
        np.testing.assert_array_equal(frac[b], f1)
        np.testing.assert_array_equal(grad[:, b], g1)
        np.testing.assert_array_equal(vals[b], shape.bin_fractions(EDGES, list(r), WINDOW))
    # the same bits as the numpy path over the shape's primitive (the reference)
    f0, g0 = Shape.fractions_and_grad(shape, EDGES, stacked, WINDOW)
    np.testing.assert_array_equal(frac, f0)
    np.testing.assert_array_equal(grad, g0)
    np.testing.assert_array_equal(vals, Shape.bin_fractions(shape, EDGES, stacked, WINDOW))
    f0, g0 = Shape.fractions_and_grad(shape, EDGES, pars, WINDOW)
    f1, g1 = shape.fractions_and_grad(EDGES, pars, WINDOW)
    np.testing.assert_array_equal(f1, f0)
    np.testing.assert_array_equal(g1, g0)
