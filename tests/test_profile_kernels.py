"""The stacked signal profile (``toy_model.profile_signal``) on a power-law background,
compiled (``stats/profile_kernels.py``) and numpy paths alike, against iminuit fits of a
binned Poisson NLL written out in this test."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from peaksift import MassHistogram
from peaksift.stats import scan
from peaksift.stats.scan_inputs import _prepare_model
from peaksift.stats.toys import profile_signal

WINDOW = (100.0, 400.0)
SIGMA = 2.5


def _masses(seed: int = 11) -> np.ndarray:
    """x^-3 on the window by inverse CDF, plus 150 events of a Gaussian at 250 GeV."""
    rng = np.random.default_rng(seed)
    lo, hi = WINDOW
    u = rng.random(30_000)
    x = (lo**-2 - u * (lo**-2 - hi**-2)) ** -0.5
    return np.concatenate([x, rng.normal(250.0, SIGMA, 150)])


class _RawPowerLawNLL:
    """Extended binned Poisson NLL, independent of peaksift: nu_i = s F_sig,i + b F_bkg,i
    over the used bins, NLL = sum(nu_i - n_i ln nu_i) (Cowan et al., Eur. Phys. J. C 71
    (2011) 1554, sec. 2).  The signal is a Gaussian of fixed mean and width truncated to the
    window (scipy.stats.norm.cdf); the background x^-k on the window, bin fractions from
    its elementary integral (x^(1-k) - lo^(1-k)) / (hi^(1-k) - lo^(1-k))."""

    errordef = 0.5

    def __init__(self, edges, counts, used, mass):
        self.edges, self.n, self.used = np.asarray(edges, float), np.asarray(counts, float), used
        c = stats.norm.cdf(self.edges, mass, SIGMA)
        self.f_sig = (np.diff(c) / (c[-1] - c[0]))[used]

    def __call__(self, s, b, k):
        p = self.edges ** (1.0 - k)
        nu = s * self.f_sig + b * (np.diff(p) / (p[-1] - p[0]))[self.used]
        if np.any(nu <= 0):
            return 1e30
        return float(np.sum(nu - self.n[self.used] * np.log(nu)))


def _iminuit(cost, ntot, s_fixed=None):
    """(background-only NLL, s+b NLL, s_hat, sigma_s[, NLL at s_fixed]) by MIGRAD (+HESSE)."""
    from iminuit import Minuit

    bkg = Minuit(cost, s=0.0, b=ntot, k=3.0)
    bkg.fixed["s"] = True
    bkg.migrad()
    sb = Minuit(cost, s=10.0, b=bkg.values["b"], k=bkg.values["k"])
    sb.migrad()
    sb.hesse()
    assert bkg.valid and sb.valid
    out = [bkg.fval, sb.fval, sb.values["s"], sb.errors["s"]]
    if s_fixed is not None:
        fx = Minuit(cost, s=s_fixed, b=sb.values["b"], k=sb.values["k"])
        fx.fixed["s"] = True
        fx.migrad()
        assert fx.valid
        out.append(fx.fval)
    return out


@pytest.mark.parametrize("numpy_path", [False, True])
@pytest.mark.parametrize("blind", [None, (300.0, 320.0)])
def test_power_law_profile_matches_iminuit(monkeypatch, numpy_path, blind):
    """q0, the signal yield and its error at masses across the window (the injected peak,
    a deficit, the ends), blinded or not, and the profile NLL at a fixed signal, against
    iminuit on the raw cost above (the scan's compiled call is ``profile_calls.scan_rows``,
    the stacked calls ``profile_rows``).  Tolerances as in test_scan: |dq0| < 0.02 + 1e-3 q0,
    |ds| < 0.01 sigma_s, sigma_s to 1 %, the fixed-signal Delta NLL to 0.01 + 1e-3."""
    if numpy_path:
        monkeypatch.setenv("PEAKSIFT_NUMPY_COST", "1")
    x = _masses()
    h = MassHistogram(bins=300, range=WINDOW).fill(x)
    counts, edges = np.histogram(x, bins=300, range=WINDOW)
    masses = np.array([110.0, 180.0, 250.0, 270.0, 390.0])
    res = lambda m: np.full_like(np.asarray(m, float), SIGMA)
    r = scan(h, "gaussian", "powerlaw", masses, resolution=res, refit=False, blind=blind)
    model, _, _ = _prepare_model(h, "gaussian", "powerlaw", masses, resolution=res,
                                 window=None, natural_width=None, blind=blind,
                                 signal_params=None, bins=None)
    used = model.used
    seen_zero = False
    s_fix = np.empty(masses.size)
    ref_fixed = np.empty(masses.size)
    ref_free = np.empty(masses.size)
    for j, m in enumerate(masses):
        cost = _RawPowerLawNLL(edges, counts, used, m)
        b0, f_sb, s_hat, s_err, *_ = _iminuit(cost, float(counts[used].sum()))
        s_fix[j] = s_hat + 2.0 * s_err
        *_, f_fix = _iminuit(cost, float(counts[used].sum()), s_fixed=s_fix[j])
        ref_free[j], ref_fixed[j] = f_sb, f_fix
        q0 = max(2.0 * (b0 - f_sb), 0.0) if s_hat > 0 else 0.0
        seen_zero |= q0 == 0.0
        assert abs(r.q0[j] - q0) < 0.02 + 1e-3 * q0, (m, r.q0[j], q0)
        assert abs(r.signal_yield[j] - s_hat) < 0.01 * s_err, (m, r.signal_yield[j], s_hat)
        assert r.signal_yield_error[j] == pytest.approx(s_err, rel=0.01), m
    assert r.q0[2] > 9.0 and seen_zero
    start = {"theta_start": np.repeat(model.theta[None, :], masses.size, axis=0),
             "b_start": np.full(masses.size, model.bkg_yield)}
    free = profile_signal(model, model.counts, model.fractions, **start)
    fixed = profile_signal(model, model.counts, model.fractions, s_fixed=s_fix, **start)
    assert fixed["converged"].all() and free["converged"].all()
    d_ours = fixed["nll"] - free["nll"]
    d_ref = ref_fixed - ref_free
    np.testing.assert_allclose(d_ours, d_ref, rtol=1e-3, atol=0.01)
    np.testing.assert_allclose(d_ref, 2.0, rtol=0.2)  # two errors away: Delta NLL ~ 2


def test_borrowed_array_reads_and_writes_the_same_elements():
    """profile_kernels.borrowed (an array without its reference count, the Newton loop's
    arguments to its helpers) against numpy itself (outside reference: numpy's indexing of
    the same strided view): a helper summing and writing through the borrowed array of a
    non-contiguous 2-d view sees numpy's elements (exact) and writes where numpy does;
    the original keeps its reference count."""
    import sys

    from numba import njit

    from peaksift.stats.profile_kernels import borrowed

    @njit
    def helper(a, out):
        t = 0.0
        for i in range(a.shape[0]):
            for j in range(a.shape[1]):
                t += a[i, j] * (i + 1) + j
                a[i, j] = -a[i, j]
        out[0] = t

    @njit
    def outer(a, out):
        helper(borrowed(a), borrowed(out))

    base = np.arange(60.0).reshape(6, 10) ** 1.5
    view = base[1::2, ::3]
    expected = float(sum(view[i, j] * (i + 1) + j for i in range(view.shape[0])
                         for j in range(view.shape[1])))
    flipped = -view.copy()
    out = np.zeros(1)
    refs = sys.getrefcount(base)
    outer(view, out)
    assert out[0] == expected
    np.testing.assert_array_equal(view, flipped)
    assert sys.getrefcount(base) == refs
