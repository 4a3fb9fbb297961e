"""Local significance: q0, Z, p and the Asimov sensitivities against published formulae."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from peaksift import MassHistogram, shapes
from peaksift.errors import FitError
from peaksift.stats import scan
from peaksift.stats.significance import (
    binned_q0,
    counting_significance,
    p_from_q0,
    p_from_z,
    q0_from_nll,
    z_from_p,
    z_from_q0,
)


def test_counting_asimov_significance_s10_b100():
    """Cowan, Cranmer, Gross, Vitells, EPJC 71 (2011) 1554, eq. 97: Z_A(s=10, b=100) = 0.984
    (from memory; s/sqrt(b) = 1.0).  Our profile-likelihood q0 on the Asimov data set (a
    numerical maximisation, independent of the closed form) must give the same number."""
    closed = counting_significance(10.0, 100.0)
    assert closed == pytest.approx(0.984, abs=0.001)
    numeric = binned_q0([110.0], [10.0], [100.0])
    assert numeric["z"] == pytest.approx(closed, rel=1e-6)
    assert numeric["mu_hat"] == pytest.approx(1.0, rel=1e-5)


@pytest.mark.parametrize("s,b,sigma_b", [(10.0, 100.0, 20.0), (5.0, 3.0, 1.0), (50.0, 400.0, 40.0)])
def test_counting_significance_with_background_uncertainty(s, b, sigma_b):
    """Cowan, 'Discovery sensitivity for a counting experiment with background uncertainty'
    (2012 note; also Cowan et al. 2011 sec. 5): the closed form equals the profile-likelihood
    Z of the on/off problem (n ~ Pois(s+b), m ~ Pois(tau b), sigma_b^2 = b/tau) on Asimov data,
    which binned_q0 maximises numerically."""
    closed = counting_significance(s, b, sigma_b)
    numeric = binned_q0([s + b], [s], [b], background_uncertainty=sigma_b / b)
    assert numeric["z"] == pytest.approx(closed, rel=1e-5)
    # an uncertain background can only lower the sensitivity
    assert closed < counting_significance(s, b)


def test_counting_significance_limits():
    """Limits of the formulae (Cowan et al. 2011 eq. 97 and Cowan 2012 note): s << b gives
    s/sqrt(b) and s/sqrt(b + sigma_b^2); sigma_b -> 0 returns Z_A(s, b)."""
    assert counting_significance(1.0, 1e6) == pytest.approx(1e-3, rel=1e-3)
    assert counting_significance(1.0, 1e6, 1e3) == pytest.approx(1.0 / np.sqrt(2e6), rel=1e-3)
    assert counting_significance(10.0, 100.0, 1e-6) == pytest.approx(
        counting_significance(10.0, 100.0), rel=1e-6)


def test_p_and_z_conversions_against_scipy():
    """Half chi-square (Wilks 1938; Cowan et al. 2011 eq. 49): p0 = chi2.sf(q0, 1)/2, and
    Z = norm.isf(p) (scipy.stats)."""
    q = np.array([0.0, 0.5, 1.0, 4.0, 9.0, 25.0])
    assert np.allclose(p_from_q0(q), 0.5 * stats.chi2.sf(q, 1), rtol=1e-10, atol=0)
    assert np.allclose(z_from_q0(q), np.sqrt(q))
    p = np.array([0.5, 0.159, 0.0228, 2.87e-7])
    assert np.allclose(z_from_p(p), stats.norm.isf(p), rtol=1e-10)
    assert np.allclose(p_from_z([1.0, 5.0]), stats.norm.sf([1.0, 5.0]), rtol=1e-10)
    assert p_from_z(5.0) == pytest.approx(2.87e-7, rel=0.01)  # 5 sigma, from memory


def test_q0_is_one_sided():
    """q0 = 0 for a negative fitted signal (Cowan et al. 2011 eq. 12)."""
    assert q0_from_nll(10.0, 8.0, 3.0) == pytest.approx(4.0)
    assert q0_from_nll(10.0, 8.0, -3.0) == 0.0
    assert np.all(q0_from_nll([10.0, 10.0], [9.0, 10.5], [1.0, 1.0]) == [2.0, 0.0])


def test_counting_significance_rejects_bad_input():
    with pytest.raises(FitError, match="b > 0"):
        counting_significance(1.0, 0.0)


def test_scan_on_asimov_spectrum_matches_binned_formula():
    """On an Asimov spectrum (expected counts) the scan's profile-likelihood Z at the true mass
    is the median expected significance.  With the background constrained by wide sidebands it
    must approach the known-background Asimov formula summed over bins,
    Z^2 = sum_i 2[(s_i+b_i) ln(1+s_i/b_i) - s_i] (Cowan et al. 2011 eq. 97 per bin), from
    below (profiling only adds uncertainty); a few per cent is the sideband's effect."""
    edges = np.linspace(100.0, 300.0, 401)
    win = (100.0, 300.0)
    bkg = shapes.get("exponential")
    sig = shapes.get("gaussian")
    b = 50_000 * bkg.bin_fractions(edges, [-1.0], win)
    s = 300.0 * sig.bin_fractions(edges, [200.0, 2.0], win)
    h = MassHistogram(edges)
    h.weight_sum = b + s
    h.weight_sq_sum = b + s
    r = scan(h, "gaussian", "exponential", [200.0], relative_resolution=0.01, refit=False)
    z_known = np.sqrt(np.sum(2 * ((s + b) * np.log1p(s / b) - s)))
    assert r.z_local[0] <= z_known + 1e-9
    assert r.z_local[0] == pytest.approx(z_known, rel=0.03)
    assert r.signal_yield[0] == pytest.approx(300.0, rel=1e-3)
