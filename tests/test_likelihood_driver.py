"""The compiled minimiser of :mod:`peaksift.likelihood.driver` against outside references.

Sources: the extended binned Poisson NLL sum(mu - n ln mu) (Baker and Cousins, Nucl.
Instrum. Meth. 221 (1984) 437, eq. 11) of a truncated normal on a truncated power law (or an
exponential), written here with ``scipy.stats`` CDFs and minimised by iminuit's MIGRAD
(strategy 2, tight tolerance) with HESSE errors; the coarse scan's Gaussian fractions against
``scipy.stats.norm``.
"""

from __future__ import annotations

import numpy as np
import pytest
from iminuit import Minuit
from scipy import stats

from peaksift.likelihood import BinnedCost, Model, NearMinimum, minimize, refine
from peaksift.likelihood.driver import JOINED, compiled_fisher_scoring

LO, HI = 100.0, 600.0


def _truncated(cdf, x, lo, hi):
    a, b = cdf(lo), cdf(hi)
    return (cdf(x) - a) / (b - a)


def _scipy_nll(edges, n, background):
    """The extended binned NLL written with scipy: parameters in the Model's order."""
    def nll(p):
        mass, sigma, ns, shape, nb = p
        fs = np.diff(_truncated(lambda x: stats.norm.cdf(x, mass, sigma), edges, LO, HI))
        if background == "powerlaw":
            a = 1.0 - shape
            cb = (edges**a - LO**a) / (HI**a - LO**a)
        else:  # exp(b1 t), t in [-1, 1] across the window
            t = (edges - 0.5 * (LO + HI)) / (0.5 * (HI - LO))
            cb = (np.exp(shape * t) - np.exp(-shape)) / (np.exp(shape) - np.exp(-shape))
        mu = ns * fs + nb * np.diff(cb)
        with np.errstate(all="ignore"):
            v = float(np.sum(mu - n * np.log(mu)))
        return v if np.isfinite(v) else 1e300
    return nll


def _spectrum(background: str, seed: int, bins: int = 500):
    rng = np.random.default_rng(seed)
    if background == "powerlaw":
        u = rng.random(200_000)
        a = 1.0 - 3.5
        x = LO * (1.0 - u * (1.0 - (HI / LO) ** a)) ** (1.0 / a)
    else:
        x = LO + rng.exponential(150.0, 400_000)
        x = x[x < HI][:200_000]
    x = np.concatenate([x, rng.normal(300.0, 6.0, 1500)])
    edges = np.linspace(LO, HI, bins + 1)
    n = np.histogram(x, edges)[0].astype(float)
    return edges, n


def _cost(background, edges, n, start):
    model = Model("gaussian", background, (LO, HI))
    free = np.arange(len(model.parameter_names))
    ro = []
    for a in (edges, n, np.ones(n.size)):
        a = np.array(a, float)
        a.flags.writeable = False
        ro.append(a)
    return model, BinnedCost(model, np.asarray(start, float), free, [], *ro)


START = {"powerlaw": [305.0, 8.0, 1000.0, 3.0, 200_000.0],
         "exponential": [295.0, 5.0, 2000.0, -1.0, 200_000.0]}


#: the truth of :func:`_spectrum`: iminuit starts there (a careful fit by hand)
TRUTH = {"powerlaw": [300.0, 6.0, 1500.0, 3.5, 200_000.0],
         "exponential": [300.0, 6.0, 1500.0, -250.0 / 150.0, 200_000.0]}


def _bounds(background):
    lower = np.array([LO, 0.5, -1e5, -20.0 if background == "powerlaw" else -50.0, 0.0])
    upper = np.array([HI, 100.0, 1e6, 60.0 if background == "powerlaw" else 50.0, 1e7])
    return lower, upper


def _iminuit(nll, start, lower, upper):
    m = Minuit(lambda *p: nll(np.array(p)), *start,
               name=["mass", "sigma", "ns", "shape", "nb"])
    m.errordef = 0.5
    m.strategy = 2
    m.tol = 1e-5
    for i, k in enumerate(m.parameters):
        m.limits[k] = (lower[i], upper[i])
    m.migrad()
    m.hesse()
    assert m.valid
    return m


@pytest.mark.parametrize("background", ["powerlaw", "exponential"])
@pytest.mark.parametrize("seed", [1, 2])
def test_compiled_minimum_matches_iminuit(background, seed):
    edges, n = _spectrum(background, seed)
    lower, upper = _bounds(background)
    _, cost = _cost(background, edges, n, START[background])
    assert cost.compiled_problem() is not None  # the compiled loop is what runs here
    mo = minimize(cost, np.array(START[background]), lower, upper,
                  ["mass", "sigma", "ns", "shape", "nb"])
    assert mo.method == "fisher-scoring" and mo.converged
    nll = _scipy_nll(edges, n, background)
    m = _iminuit(nll, TRUTH[background], lower, upper)
    err = np.asarray(m.errors)
    # the same minimum: within 0.002 sigma per parameter, and NLL not above MIGRAD's
    # (the two NLLs differ by a data-only constant: compare at both minima with scipy)
    assert np.all(np.abs(mo.x - np.asarray(m.values)) < 2e-3 * err)
    assert nll(mo.x) <= m.fval + 1e-6
    # errors from the observed Hessian at the minimum vs HESSE: 0.5 %
    # (the expected information's errors, ``mo.errors``, only steer the Hessian's steps:
    # they differ from HESSE's by up to ~7 % for sigma here)
    _, _, cov, posdef = refine(cost, mo, *cost._free_bounds(lower, upper))
    assert posdef
    assert np.allclose(np.sqrt(np.diag(cov)), err, rtol=5e-3)


def test_compiled_loop_stops_at_a_known_minimum():
    edges, n = _spectrum("powerlaw", 4)
    lower, upper = _bounds("powerlaw")
    _, cost = _cost("powerlaw", edges, n, START["powerlaw"])
    names = list("abcde")
    best = minimize(cost, np.array(START["powerlaw"]), lower, upper, names)
    near = NearMinimum(best.x, best.fval, np.diag(1.0 / best.errors**2), 0.05, 0.02)
    # a start 0.05 sigma off the minimum has joined it at once
    mo = minimize(cost, best.x + 0.05 * best.errors, lower, upper, names, stop=near)
    assert mo.joined and abs(mo.fval - best.fval) < 0.05
    # a start elsewhere (sigma 3x) goes its own way until it comes within 0.02 sigma^2
    out = compiled_fisher_scoring(cost, np.r_[best.x[0], 3 * best.x[1], best.x[2:]], lower,
                                  upper, 60, 1e-7, near)
    assert out is not None
    status, x, f, _, _ = out
    assert status == JOINED
    d = (x - best.x) / best.errors
    assert f <= best.fval + 0.05 and d @ d < 0.02


@pytest.mark.parametrize("background", ["powerlaw", "exponential"])
def test_numpy_reference_path_agrees(background, monkeypatch):
    """The numpy reference path (PEAKSIFT_NUMPY_COST=1: numpy cost, Python loop) reaches
    the same point to rounding: both are checked against iminuit above."""
    edges, n = _spectrum(background, 6)
    lower, upper = _bounds(background)
    _, cost = _cost(background, edges, n, START[background])
    fast = minimize(cost, np.array(START[background]), lower, upper, list("abcde"))
    monkeypatch.setenv("PEAKSIFT_NUMPY_COST", "1")
    _, cost2 = _cost(background, edges, n, START[background])
    ref = minimize(cost2, np.array(START[background]), lower, upper, list("abcde"))
    assert ref.converged and fast.converged
    assert np.all(np.abs(fast.x - ref.x) < 1e-6 * fast.errors)
    assert abs(fast.fval - ref.fval) < 1e-8


def test_gaussian_width_rows_match_scipy():
    """The width profile's compiled rows (one mass, many widths, each on its band of edges)
    vs the truncated normal of scipy: within the band to 1e-12 of the largest fraction, 0
    outside it (beyond 7 widths the normal holds < 3e-12 of its mass)."""
    from peaksift.shapes.compiled import gaussian_width_rows

    lo, hi, m = 100.0, 400.0, 180.0
    edges = np.linspace(lo, hi, 301)
    widths = 4.0 * 2.0 ** (np.arange(-6, 7) / 2)
    i0 = np.maximum(np.searchsorted(edges, m - 7 * widths) - 1, 0).astype(np.int64)
    i1 = np.minimum(np.searchsorted(edges, m + 7 * widths) + 1, edges.size - 1).astype(
        np.int64)
    out = np.full((widths.size, edges.size - 1), np.nan)
    assert gaussian_width_rows(edges, m, widths, i0, i1, lo, hi, out)
    for w, a, b, row in zip(widths, i0, i1, out):
        pa, pb = stats.norm.cdf([lo, hi], m, w)
        ref = np.diff(stats.norm.cdf(edges, m, w)) / (pb - pa)
        assert np.max(np.abs(row[a:b] - ref[a:b])) < 1e-12 * ref.max()
        assert np.all(row[:a] == 0.0) and np.all(row[b:] == 0.0)
        assert ref[:a].sum() + ref[b:].sum() < 3e-12


@pytest.mark.parametrize(("sigma", "window"), [(6.0, (LO, HI)), (3.0, (110.0, 200.0))])
def test_gaussian_rows_match_scipy(sigma, window):
    """The coarse scan's compiled Gaussian bin fractions vs the truncated normal of scipy
    (upper tails where the window lies above the peak), to 1e-12 of the largest fraction."""
    from peaksift.shapes.compiled import gaussian_rows

    lo, hi = window
    edges = np.linspace(lo, hi, 98)
    masses = np.array([lo - 20.0, lo + 1.0, 0.5 * (lo + hi), hi - 0.3, hi + 5.0])
    out = np.empty((masses.size, edges.size - 1))
    assert gaussian_rows(edges, masses, sigma, lo, hi, out)
    for m, row in zip(masses, out):
        a, b = stats.norm.sf([lo, hi], m, sigma)
        ref = -np.diff(stats.norm.sf(edges, m, sigma)) / (a - b)
        assert np.max(np.abs(row - ref)) < 1e-12 * max(ref.max(), 1e-300) + 1e-300
