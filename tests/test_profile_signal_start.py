"""The signal profile's start where the background-only fit lies far below the counts under
the signal (``toy_model.signal_start``, ``profile_kernels._signal_start``): an exponential
background fitted to a steeply falling power law, compiled and numpy paths alike, against
iminuit fits of a binned Poisson NLL written out in this test."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from peaksift import MassHistogram
from peaksift.stats.scan_inputs import _prepare_model
from peaksift.stats.toys import profile_signal

WINDOW = (100.0, 1000.0)
SIGMA = 10.0
MASSES = np.array([300.0, 600.0, 800.0, 950.0])


def _masses(seed: int = 5) -> np.ndarray:
    """x^-4 on the window by inverse CDF (scipy.stats.pareto, b = 3, truncated), no peak."""
    rng = np.random.default_rng(seed)
    lo, hi = WINDOW
    u = rng.random(50_000) * stats.pareto.cdf(hi / lo, 3.0)
    return lo * stats.pareto.ppf(u, 3.0)


class _RawExponentialNLL:
    """Extended binned Poisson NLL, independent of peaksift: nu_i = s F_sig,i + b F_bkg,i,
    NLL = sum(nu_i - n_i ln nu_i) (Cowan et al., Eur. Phys. J. C 71 (2011) 1554, sec. 2);
    the signal a Gaussian truncated to the window (scipy.stats.norm.cdf), the background
    exp(c x) on the window, bin fractions from its elementary integral."""

    errordef = 0.5

    def __init__(self, edges, counts, mass):
        self.edges, self.n = np.asarray(edges, float), np.asarray(counts, float)
        c = stats.norm.cdf(self.edges, mass, SIGMA)
        self.f_sig = np.diff(c) / (c[-1] - c[0])

    def __call__(self, s, b, c):
        e = np.exp(c * (self.edges - self.edges[0]))
        nu = s * self.f_sig + b * np.diff(e) / (e[-1] - e[0])
        if np.any(nu <= 0):
            return 1e30
        return float(np.sum(nu - self.n * np.log(nu)))


def _iminuit(cost, ntot, c0, s0, tight=False):
    """(background-only NLL, s+b NLL, s_hat, sigma_s) by MIGRAD and HESSE, the signal
    started at ``s0`` (the counts above the background-only fit under the peak);
    ``tight``: strategy 2, tolerance 1e-6 (its default stops ~0.01 sigma_s short where
    s, b and the slope are strongly correlated)."""
    from iminuit import Minuit

    bkg = Minuit(cost, s=0.0, b=ntot, c=c0)
    bkg.fixed["s"] = True
    bkg.migrad()
    sb = Minuit(cost, s=s0, b=bkg.values["b"], c=bkg.values["c"])
    if tight:
        sb.strategy, sb.tol = 2, 1e-6
    sb.migrad()
    sb.hesse()
    assert bkg.valid and sb.valid
    return bkg.fval, sb.fval, sb.values["s"], sb.errors["s"], bkg.values["c"]


@pytest.mark.parametrize("numpy_path", [False, True])
def test_far_below_the_counts_converges_in_few_steps(monkeypatch, numpy_path):
    """Every row converges within 8 iterations (without the moved start, the three whose
    background lies 40-5,000 times below the counts needed 11-18: the Newton step only
    doubles s there), at the minimum of iminuit's fit of the raw cost: NLL difference to the
    background-only fit (q0 / 2) within 0.01 + 1e-4 of it, s within 0.01 sigma_s, sigma_s
    within 1 %."""
    if numpy_path:
        monkeypatch.setenv("PEAKSIFT_NUMPY_COST", "1")
    x = _masses()
    h = MassHistogram(bins=90, range=WINDOW).fill(x)
    counts, edges = np.histogram(x, bins=90, range=WINDOW)
    res = lambda m: np.full_like(np.asarray(m, float), SIGMA)
    model, _, _ = _prepare_model(h, "gaussian", "exponential", MASSES, resolution=res,
                                 window=None, natural_width=None, blind=None,
                                 signal_params=None, bins=None)
    out = profile_signal(model, model.counts, model.fractions, steps=8)
    assert out["converged"].all()
    b_exp = model.bkg_yield * model.background.bin_fractions(edges, model.theta, WINDOW)
    c0 = 2.0 * float(model.theta[0]) / (WINDOW[1] - WINDOW[0])   # b1 = c h: a start only
    far = 0
    for j, m in enumerate(MASSES):
        cost = _RawExponentialNLL(edges, counts, m)
        near = np.abs(0.5 * (edges[1:] + edges[:-1]) - m) < 2.0 * SIGMA
        far += counts[near].sum() > 100.0 * b_exp[near].sum()
        s0 = float(counts[near].sum() - b_exp[near].sum())
        f_b, f_sb, s_hat, s_err, _ = _iminuit(cost, float(counts.sum()), c0, s0)
        dn = model.nll_background - out["nll"][j]
        assert abs(dn - (f_b - f_sb)) < 0.01 + 1e-4 * (f_b - f_sb), (m, dn, f_b - f_sb)
        assert abs(out["s"][j] - s_hat) < 0.01 * s_err, (m, out["s"][j], s_hat)
        assert out["s_error"][j] == pytest.approx(s_err, rel=0.01), m
    assert far >= 2   # (the case the start is for: at least two rows far below)


def test_badly_fitted_background_converges_in_fine_bins():
    """An exponential fitted to 500,000 x^-4 events on 100-1450 GeV (its background-only
    fit ~1e-6 events a bin at the top, where tens are counted), 1,000 bins: every row
    converged (while the slope's derivative was a difference of the CDF's derivatives,
    20 of 100 such rows ran to the step limit on its rounding noise), and at three
    masses s and sigma_s as iminuit's MIGRAD (strategy 2, tolerance 1e-6) and HESSE on
    the raw cost (s within 0.01 sigma_s, sigma_s within 1 %)."""
    lo, hi = 100.0, 1450.0
    rng = np.random.default_rng(7)
    u = rng.random(500_000)
    x = lo * (1.0 - u * (1.0 - (hi / lo) ** -3.0)) ** (-1.0 / 3.0)
    h = MassHistogram(bins=1000, range=(lo, hi)).fill(x)
    counts, edges = np.histogram(x, bins=1000, range=(lo, hi))
    masses = np.linspace(800.0, 1400.0, 13)
    res = lambda m: 0.01 * np.asarray(m, float)
    model, _, _ = _prepare_model(h, "gaussian", "exponential", masses, resolution=res,
                                 window=None, natural_width=None, blind=None,
                                 signal_params=None, bins=None)
    for numpy_path in (False, True):
        with pytest.MonkeyPatch.context() as mp:
            if numpy_path:
                mp.setenv("PEAKSIFT_NUMPY_COST", "1")
            out = profile_signal(model, model.counts, model.fractions, steps=100)
        assert out["converged"].all(), numpy_path
    b_exp = model.bkg_yield * model.background.bin_fractions(edges, model.theta, (lo, hi))
    c0 = 2.0 * float(model.theta[0]) / (hi - lo)
    for j in (0, 6, 12):
        m = masses[j]
        cost = _RawExponentialNLL(edges, counts, m)
        cost.f_sig = np.diff(stats.norm.cdf(edges, m, 0.01 * m))
        cost.f_sig /= stats.norm.cdf(hi, m, 0.01 * m) - stats.norm.cdf(lo, m, 0.01 * m)
        near = np.abs(0.5 * (edges[1:] + edges[:-1]) - m) < 0.02 * m
        s0 = float(counts[near].sum() - b_exp[near].sum())
        _, _, s_hat, s_err, _ = _iminuit(cost, float(counts.sum()), c0, s0, tight=True)
        assert abs(out["s"][j] - s_hat) < 0.01 * s_err, (m, out["s"][j], s_hat)
        assert out["s_error"][j] == pytest.approx(s_err, rel=0.01), m
