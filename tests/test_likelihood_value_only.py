"""MIGRAD's value-only calls on a binned cost (:meth:`peaksift.likelihood.BinnedCost.value_only`).

Where a cost has no compiled pass (a Crystal Ball signal), ``cost(*x)`` computes the NLL
without the gradient.  Checked against the extended binned Poisson NLL written out in this
test with scipy's one-sided Crystal Ball (the high-side tail pushed beyond the window, as in
tests/test_shapes.py) and an exponential background integrated by hand; and that such a
call does not differentiate the Crystal Ball, while ``cost.grad`` at the same point still
gives the gradient of that NLL (central differences of the test's NLL).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from peaksift.likelihood import BinnedCost
from peaksift.likelihood.model import Model

M, SG = 91.0, 2.0
WINDOW = (60.0, M + 9.5 * SG)  # the core reaches 10 sigma: the high tail lies beyond


def _raw_nll(edges, n, x):
    """Saturated extended binned Poisson NLL, sum(mu - n + n ln(n / mu)) (Baker and
    Cousins, NIM 221 (1984) 437), of a Crystal Ball (scipy.stats.crystalball, Gaiser 1982)
    plus exp(b t) on t = 2 (m - centre) / width, both normalised on the window."""
    m, sg, a, nl, _, _, s, b1, b = x
    lo, hi = WINDOW
    cb = stats.crystalball(beta=a, m=nl, loc=m, scale=sg)
    fs = np.diff(cb.cdf(edges)) / (cb.cdf(hi) - cb.cdf(lo))
    t = (edges - 0.5 * (lo + hi)) * (2.0 / (hi - lo))
    fb = np.diff(np.exp(b1 * t)) / (np.exp(b1) - np.exp(-b1))
    mu = s * fs + b * fb
    with np.errstate(divide="ignore", invalid="ignore"):
        log_term = np.where(n > 0, n * np.log(n / mu), 0.0)
    return float(np.sum(mu - n + log_term))


def _cost():
    rng = np.random.default_rng(3)
    lo, hi = WINDOW
    x = np.concatenate([lo + rng.exponential(30.0, 20_000), rng.normal(M, SG, 800)])
    x = x[(x >= lo) & (x < hi)]
    edges = np.linspace(lo, hi, 101)
    n = np.histogram(x, edges)[0].astype(float)
    model = Model("crystalball", "exponential", WINDOW)
    names = model.parameter_names
    assert names == ("mass", "sigma", "alpha_low", "n_low", "alpha_high", "n_high",
                     "signal_yield", "b1", "background_yield")
    free = np.array([0, 1, 2, 3, 6, 7, 8])  # the high tail fixed beyond the window
    full = np.array([M, SG, 1.3, 2.7, 10.0, 5.0, 800.0, -1.0, n.sum() - 800.0])
    return BinnedCost(model, full, free, [], edges, n, np.ones(n.size)), edges, n, full, free


@pytest.mark.parametrize("shift", [0.0, 0.3, -0.7])
def test_value_only_is_the_raw_poisson_nll_and_asks_for_no_derivatives(shift, monkeypatch):
    """cost(*x) equals the test's NLL to 1e-9 relative (scipy's Crystal Ball CDF agrees
    with ours to ~1e-9, tests/test_shapes.py) without differentiating the Crystal Ball (the
    compiled background rows give their derivatives with the fractions); cost.grad
    then matches central differences of the test's NLL (step 1e-5 of each parameter's
    scale, 1e-4 relative to the largest component)."""
    cost, edges, n, full, free = _cost()
    v = full.copy()
    v[free] = v[free] * (1.0 + 0.01 * shift) + np.array([shift, 0.1 * shift, 0.05 * shift,
                                                          0.1 * shift, 5.0 * shift,
                                                          0.02 * shift, 20.0 * shift])
    x = v[free]
    calls = []
    signal = cost.model.blocks[0][0]
    original = signal.fractions_and_grad

    def counted(*a, **k):
        calls.append(1)
        return original(*a, **k)

    monkeypatch.setattr(signal, "fractions_and_grad", counted)
    val = cost(*x)
    assert not calls, "a value-only call differentiated the Crystal Ball"
    ref = _raw_nll(edges, n, v)
    assert val == pytest.approx(ref, rel=1e-9)
    g = cost.grad(*x)
    assert calls  # the gradient does need them
    num = np.empty(free.size)
    for j, i in enumerate(free):
        h = 1e-5 * max(abs(v[i]), 1.0)
        up, dn = v.copy(), v.copy()
        up[i] += h
        dn[i] -= h
        num[j] = (_raw_nll(edges, n, up) - _raw_nll(edges, n, dn)) / (2 * h)
    np.testing.assert_allclose(g, num, rtol=0, atol=1e-4 * np.max(np.abs(num)))
