"""The double-sided Crystal Ball's analytic derivatives (mass, sigma, both tails' alpha and n)
against a step-independent reference written here.

Reference: the Crystal Ball density written out below from its definition (Oreglia 1980,
Gaiser 1982; Gaussian core, power-law tails joined with a continuous value and slope at
z = -alpha_low and z = alpha_high), normalised on the window and integrated over each bin by
``scipy.integrate.quad``; its derivatives by central differences extrapolated twice
(Richardson: D(h), D(h/2), D(h/4) -> error O(h^6)).  The extrapolation is checked to be
step independent (two base steps agree) before the shape is compared with it.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy import integrate

from peaksift import shapes

WINDOW = (100.0, 200.0)
EDGES = np.linspace(100.0, 200.0, 26)
POINTS = np.array([101.0, 128.0, 141.5, 150.0, 156.0, 159.0, 187.0])  # both tails, core
#: mass, sigma, alpha_low, n_low, alpha_high, n_high; tails cut at 145.2 and 157.2 GeV
TRUTH = [150.0, 4.0, 1.2, 3.0, 1.8, 6.0]
#: base steps of the differences (about 1% of each parameter's scale)
STEPS = [0.04, 0.04, 0.01, 0.03, 0.01, 0.06]


def cb_density(x: float, p: list[float]) -> float:
    """Unnormalised Crystal Ball from its definition (independent of peaksift)."""
    m, s, al, nl, ah, nh = p
    z = (x - m) / s
    if z < -al:
        a_ = (nl / al) ** nl * math.exp(-0.5 * al * al)
        b_ = nl / al - al
        return a_ * (b_ - z) ** (-nl)
    if z > ah:
        a_ = (nh / ah) ** nh * math.exp(-0.5 * ah * ah)
        b_ = nh / ah - ah
        return a_ * (b_ + z) ** (-nh)
    return math.exp(-0.5 * z * z)


def _integral(a: float, b: float, p: list[float]) -> float:
    joins = [v for v in (p[0] - p[2] * p[1], p[0], p[0] + p[4] * p[1]) if a < v < b]
    return integrate.quad(cb_density, a, b, args=(p,), points=joins or None,
                          epsabs=0.0, epsrel=1e-13, limit=200)[0]


def ref_fractions(p: list[float]) -> np.ndarray:
    total = _integral(*WINDOW, p)
    return np.array([_integral(a, b, p) for a, b in itertools.pairwise(EDGES)]) / total


def ref_pdf(p: list[float]) -> np.ndarray:
    return np.array([cb_density(x, p) for x in POINTS]) / _integral(*WINDOW, p)


def richardson(func, i: int, h: float) -> np.ndarray:
    """d func / d p_i at TRUTH: central differences at h, h/2, h/4, extrapolated twice."""
    def central(step):
        up, dn = list(TRUTH), list(TRUTH)
        up[i] += step
        dn[i] -= step
        return (func(up) - func(dn)) / (2.0 * step)

    d1, d2, d3 = central(h), central(h / 2), central(h / 4)
    r1, r2 = (4 * d2 - d1) / 3, (4 * d3 - d2) / 3
    return (16 * r2 - r1) / 15


@pytest.fixture(scope="module")
def reference():
    out = {}
    for i, h in enumerate(STEPS):
        f1, f2 = richardson(ref_fractions, i, h), richardson(ref_fractions, i, 2 * h)
        p1 = richardson(ref_pdf, i, h)
        # step independence: the extrapolations from h and 2h agree far below the tolerance
        assert np.max(np.abs(f1 - f2)) < 1e-9 * np.max(np.abs(f1)) + 1e-12, i
        out[i] = (f1, p1)
    return out


def test_bin_fraction_gradient_matches_the_richardson_reference(reference):
    """All six derivatives of the bin fractions within 1e-8 of the largest (relative)."""
    cb = shapes.get("crystalball")
    _, grad = cb.fractions_and_grad(EDGES, TRUTH, WINDOW)
    for i in range(6):
        ref = reference[i][0]
        assert np.max(np.abs(grad[i] - ref)) < 1e-8 * np.max(np.abs(ref)), i


def test_pdf_gradient_matches_the_richardson_reference(reference):
    """Derivatives of the normalised density at points in both tails and the core, 1e-8."""
    cb = shapes.get("crystalball")
    grad = cb.grad_pdf(POINTS, TRUTH, WINDOW)
    _, grad2 = cb.pdf_and_grad(POINTS, TRUTH, WINDOW)
    for i in range(6):
        ref = reference[i][1]
        assert np.max(np.abs(grad[i] - ref)) < 1e-8 * np.max(np.abs(ref)), i
        assert np.max(np.abs(grad2[i] - ref)) < 1e-8 * np.max(np.abs(ref)), i


def test_stacked_parameters_give_the_same_gradient(reference):
    """Parameters as (B, 1) arrays (the scans' and toys' stacked hypotheses): each row's
    derivatives equal the reference at that row's parameters (row 0 at TRUTH, 1e-8)."""
    cb = shapes.get("crystalball")
    p = [np.array([[v], [v * 1.01]]) for v in TRUTH]
    _, grad = cb.fractions_and_grad(EDGES, p, WINDOW)
    for i in range(6):
        ref = reference[i][0]
        assert np.max(np.abs(grad[i][0] - ref)) < 1e-8 * np.max(np.abs(ref)), i
    assert np.all(np.isfinite(grad))


@pytest.mark.parametrize("p", [TRUTH, [150.0, 4.0, 0.3, 1.3, 4.0, 150.0],
                               [120.0, 9.0, 2.5, 40.0, 0.08, 1.05]])
def test_one_parameter_set_values_match_the_quadrature(p):
    """The one-parameter-set path (compiled, the free fit's) gives the bin fractions and the
    normalised density of the definition above integrated by ``scipy.integrate.quad``
    (1e-10 of the largest; the window's probability is computed once on each side), for
    the reference truth, a heavy low tail with a steep high one, and a peak near the
    window's edge with a nearly flat (n -> 1) high tail."""
    cb = shapes.get("crystalball")
    total = _integral(*WINDOW, p)
    ref = np.array([_integral(a, b, p) for a, b in itertools.pairwise(EDGES)]) / total
    frac, _ = cb.fractions_and_grad(EDGES, p, WINDOW)
    np.testing.assert_allclose(frac, ref, rtol=0, atol=1e-10 * ref.max())
    pdf, _ = cb.pdf_and_grad(POINTS, p, WINDOW)
    pref = np.array([cb_density(x, p) for x in POINTS]) / total
    np.testing.assert_allclose(pdf, pref, rtol=1e-10)
