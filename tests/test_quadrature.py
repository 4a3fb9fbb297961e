"""The compiled Gauss-Legendre bin integrals of exppoly (order 2-3) and dijet.

Checks against ``scipy.integrate.quad`` (adaptive Gauss-Kronrod, QUADPACK; asked for 1e-13
relative), bin by bin:
* the window-normalised bin fractions, 1e-10 relative (the rule's error estimate in
  :mod:`peaksift.shapes.quadrature` is below 1e-14 for these shapes; 1e-10 leaves room
  for quad's own error on steep shapes);
* their derivatives in each parameter, from quad's integrals of d f / d p_j = phi_j f
  (written out here from the shapes' formulae, not from the module's basis), 1e-8 of the
  largest derivative;
* stacked rows (one parameter set per row) equal the single-set results (a row's result
  does not depend on its neighbours), and bins outside the window get 0.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy import integrate

from peaksift import shapes

WINDOW = (300.0, 800.0)
EDGES = np.linspace(250.0, 800.0, 23)   # 25 GeV bins; the first 2 lie below the window


def _exppoly(order):
    def log_f(x, p):
        t = (x - 550.0) / 250.0
        return sum(p[j] * t ** (j + 1) for j in range(order))

    def dlog(x, p, j):
        return ((x - 550.0) / 250.0) ** (j + 1)
    return log_f, dlog


def _dijet(npar, sqrt_s):
    rs = 2.0 * WINDOW[1] if sqrt_s is None else sqrt_s
    xc = 550.0 / rs

    def parts(x):
        u = x / rs
        return [math.log1p(-u) - math.log1p(-xc), -(math.log(u) - math.log(xc)),
                -(math.log(u) ** 2 - math.log(xc) ** 2)]

    def log_f(x, p):
        return sum(pj * b for pj, b in zip(p, parts(x)[: npar - 1]))

    def dlog(x, p, j):
        return parts(x)[j]
    return log_f, dlog


CASES = [
    (shapes.get("exppoly", order=2), [-3.0, 0.5], _exppoly(2)),
    (shapes.get("exppoly", order=3), [-5.0, 1.0, -0.7], _exppoly(3)),
    (shapes.get("exppoly", order=3), [-60.0, 20.0, 5.0], _exppoly(3)),   # at the bound
    (shapes.get("exppoly", order=2), [40.0, -55.0], _exppoly(2)),         # a hump
    (shapes.get("dijet", npar=4, sqrt_s=13000.0), [10.0, 5.0, 0.1], _dijet(4, 13000.0)),
    (shapes.get("dijet", npar=3), [8.0, 4.0], _dijet(3, None)),
    (shapes.get("dijet", npar=2), [30.0], _dijet(2, None)),
]


def _quad(log_f, a, b, p, weight=lambda x: 1.0):
    top = max(log_f(x, p) for x in np.linspace(*WINDOW, 201))  # a common scale, no overflow
    return integrate.quad(lambda x: weight(x) * math.exp(log_f(x, p) - top), a, b,
                          epsabs=0.0, epsrel=1e-13, limit=200)[0]


@pytest.mark.parametrize("shape,pars,ref", CASES, ids=lambda c: str(c)[:30])
def test_bin_fractions_and_derivatives_match_quad(shape, pars, ref):
    log_f, dlog = ref
    lo_in = np.clip(EDGES, *WINDOW)
    z = _quad(log_f, *WINDOW, pars)
    want = np.array([_quad(log_f, a, b, pars) if b > a else 0.0
                     for a, b in itertools.pairwise(lo_in)]) / z
    frac, grad = shape.fractions_and_grad(EDGES, pars, WINDOW)
    inside = want > 0
    assert np.all(frac[~inside] == 0.0)
    assert np.max(np.abs(frac[inside] / want[inside] - 1.0)) < 1e-10
    assert np.array_equal(shape.bin_fractions(EDGES, pars, WINDOW), frac)
    for j in range(len(pars)):
        def w(x, j=j):
            return dlog(x, pars, j)
        kj = _quad(log_f, *WINDOW, pars, w) / z
        jij = np.array([_quad(log_f, a, b, pars, w) if b > a else 0.0
                        for a, b in itertools.pairwise(lo_in)]) / z
        d_want = jij - want * kj     # d/dp_j of (bin integral / window integral)
        assert np.max(np.abs(grad[j] - d_want)) < 1e-8 * np.max(np.abs(d_want))


@pytest.mark.parametrize("shape,pars,ref", CASES[:1] + CASES[4:5], ids=["exppoly2", "dijet4"])
def test_stacked_rows_equal_single_sets(shape, pars, ref):
    rows = np.array([pars, [p * 1.1 for p in pars], [p * 0.5 for p in pars]])
    stacked = [rows[:, k : k + 1] for k in range(rows.shape[1])]
    frac, grad = shape.fractions_and_grad(EDGES, stacked, WINDOW)
    assert frac.shape == (3, EDGES.size - 1) and grad.shape == (len(pars), 3, EDGES.size - 1)
    for i in range(3):
        f1, g1 = shape.fractions_and_grad(EDGES, list(rows[i]), WINDOW)
        assert np.array_equal(frac[i], f1) and np.array_equal(grad[:, i], g1)


MASSES = np.array([250.0, 300.0, 301.7, 377.0, 512.5, 640.0, 799.0, 800.0, 820.0])


@pytest.mark.parametrize("shape,pars,ref", CASES, ids=lambda c: str(c)[:30])
def test_density_and_derivatives_match_quad(shape, pars, ref):
    """The unbinned fit's density (window rule of :mod:`peaksift.shapes.quadrature`):
    f(x) / integral of f over the window (quad, as above), 1e-10 relative; its derivatives
    f(x) (d ln f/d p_j (x) - K_j), K_j the window integral of (d ln f/d p_j) f over that of
    f (quad, the shape's formula written out above), 1e-8 of the largest; 0 outside the
    window (the first and last masses)."""
    log_f, dlog = ref
    top = max(log_f(x, pars) for x in np.linspace(*WINDOW, 201))
    z = _quad(log_f, *WINDOW, pars)
    inside = (MASSES >= WINDOW[0]) & (MASSES <= WINDOW[1])
    want = np.array([math.exp(log_f(x, pars) - top) / z if ok else 0.0
                     for x, ok in zip(MASSES, inside)])
    pdf, grad = shape.pdf_and_grad(MASSES, pars, WINDOW)
    assert np.all(pdf[~inside] == 0.0) and np.all(grad[:, ~inside] == 0.0)
    assert np.max(np.abs(pdf[inside] / want[inside] - 1.0)) < 1e-10
    assert np.max(np.abs(shape.pdf(MASSES, pars, WINDOW)[inside] / want[inside] - 1.0)) < 1e-10
    for j in range(len(pars)):
        kj = _quad(log_f, *WINDOW, pars, lambda x, j=j: dlog(x, pars, j)) / z
        d_want = np.array([w * (dlog(x, pars, j) - kj) if ok else 0.0
                           for x, w, ok in zip(MASSES, want, inside)])
        assert np.max(np.abs(grad[j] - d_want)) < 1e-8 * np.max(np.abs(d_want))
