"""Signal-shape nuisance parameters (mass scale, resolution) profiled in the scan and its toys.

Checks:
* every size 0 gives the scan without nuisances exactly (the issue's requirement);
* with sizes, q0, the signal yield and the fitted factors at several masses against an
  independent hand-written iminuit fit of the same likelihood (bin integrals from
  ``scipy.stats.norm.cdf`` and the closed-form exponential integral; Gaussian constraints
  1/2 ((k-1)/delta)^2, common practice); tolerance 2e-3 in q0;
* the constraint terms against ``scipy.stats.norm`` / ``scipy.stats.lognorm`` log-densities;
* a toy's highest q0 with the nuisances, against the same independent fit of that toy.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from iminuit import Minuit
from scipy import stats as st

from peaksift.likelihood import SignalNuisances
from peaksift.stats import scan
from peaksift.stats.shape_profile import run_nuisance_toy_batch
from peaksift.stats.toys import ToyBatch, toy_counts

WINDOW = (100.0, 200.0)
EDGES = np.linspace(*WINDOW, 101)
SIGMA = 2.0


def _data(seed: int = 1) -> np.ndarray:
    rng = np.random.default_rng(seed)
    x = np.concatenate([100 + rng.exponential(40, 20000), rng.normal(150, 2.0, 150)])
    return x[(x > WINDOW[0]) & (x < WINDOW[1])]


def _counts(x: np.ndarray) -> np.ndarray:
    return np.histogram(x, EDGES)[0].astype(float)


def _independent_q0(n: np.ndarray, mass: float, d_scale: float, d_res: float) -> dict:
    """q0 by iminuit on a likelihood written here from scratch."""
    lo, hi = WINDOW
    c, h = 0.5 * (lo + hi), 0.5 * (hi - lo)

    def bkg(slope):
        if abs(slope) < 1e-9:
            return np.diff(EDGES) / (hi - lo)
        prim = np.exp(slope * (EDGES - c) / h)
        return np.diff(prim) / (prim[-1] - prim[0])

    def sig(km, kr):
        cdf = st.norm.cdf(EDGES, mass * km, SIGMA * kr)  # not frozen: 5 ms a call
        return np.diff(cdf) / (cdf[-1] - cdf[0])

    def nll(s, km, kr, b, slope):
        nu = s * sig(km, kr) + b * bkg(slope)
        if np.any(nu <= 0):
            return 1e30
        val = float(np.sum(nu - n * np.log(nu)))
        val += 0.5 * ((km - 1) / d_scale) ** 2 + 0.5 * ((kr - 1) / d_res) ** 2
        return val

    def nll0(b, slope):
        nu = b * bkg(slope)
        return float(np.sum(nu - n * np.log(nu)))

    m0 = Minuit(nll0, b=n.sum(), slope=-1.0)
    m0.errordef = 0.5
    m0.migrad()
    m1 = Minuit(nll, s=10.0, km=1.0, kr=1.0, b=n.sum(), slope=m0.values["slope"])
    m1.errordef = 0.5
    m1.limits["km"] = (1 - 6 * d_scale, 1 + 6 * d_scale)
    m1.limits["kr"] = (1 - 6 * d_res, 1 + 6 * d_res)
    m1.strategy = 2
    m1.migrad()
    best = m1.fval
    for s0 in (50.0, 150.0):  # a second start guards against a local minimum
        m2 = Minuit(nll, s=s0, km=1.0, kr=1.0, b=n.sum() - s0, slope=m0.values["slope"])
        m2.errordef = 0.5
        m2.limits["km"] = m1.limits["km"]
        m2.limits["kr"] = m1.limits["kr"]
        m2.migrad()
        if m2.fval < best:
            m1, best = m2, m2.fval
    s = m1.values["s"]
    q0 = 2 * (m0.fval - m1.fval) if s > 0 else 0.0
    return {"q0": max(q0, 0.0), "s": s, "km": m1.values["km"], "kr": m1.values["kr"]}


def test_zero_sizes_give_the_plain_scan_exactly():
    x = _data()
    kw = {"absolute_resolution": SIGMA, "window": WINDOW, "bins": 100, "refit": False}
    plain = scan(x, "gaussian", "exponential", np.linspace(110, 190, 41), **kw)
    zero = scan(x, "gaussian", "exponential", np.linspace(110, 190, 41),
                nuisances=SignalNuisances(), **kw)
    zero2 = scan(x, "gaussian", "exponential", np.linspace(110, 190, 41),
                 nuisances={"mass_scale": 0.0, "mass_resolution": 0.0, "luminosity": 0.0}, **kw)
    for z in (zero, zero2):
        assert z == plain
        assert np.array_equal(z.q0, plain.q0, equal_nan=True)
        assert z.to_dict() == plain.to_dict()
    a = plain.toy_scans(30, seed=3)
    b = zero2.toy_scans(30, seed=3)
    assert np.array_equal(a, b, equal_nan=True)


@pytest.mark.parametrize("mass", [146.0, 151.0, 170.0])
def test_profiled_q0_matches_an_independent_iminuit_fit(mass):
    x = _data()
    d_scale, d_res = 0.01, 0.2
    r = scan(x, "gaussian", "exponential", np.array([mass]), absolute_resolution=SIGMA,
             window=WINDOW, bins=100, refit=False,
             nuisances={"mass_scale": d_scale, "mass_resolution": d_res})
    ref = _independent_q0(_counts(x), mass, d_scale, d_res)
    assert r.q0[0] == pytest.approx(ref["q0"], abs=2e-3)
    if ref["q0"] > 1:
        assert r.signal_yield[0] == pytest.approx(ref["s"], rel=2e-3, abs=0.05)
        assert r.nuisance_factors["mass_scale"][0] == pytest.approx(ref["km"], abs=1e-4)
        assert r.nuisance_factors["mass_resolution"][0] == pytest.approx(ref["kr"], abs=2e-3)


def test_constraint_terms_match_scipy_log_densities():
    """Gaussian: -ln N(k; c, delta) up to its constant (scipy.stats.norm.logpdf); log-normal:
    -ln of the normal density of ln k, i.e. scipy.stats.lognorm(s=ln(1+delta), scale=c)
    .logpdf(k) + ln k up to the constant."""
    nu = SignalNuisances.make({"mass_scale": 0.02, "mass_resolution": 0.15},
                              {"mass_resolution": "lognormal"})
    names = ("mass_scale", "mass_resolution")
    k = np.array([[0.97, 0.8], [1.01, 1.3], [1.0, 1.0]])
    c = np.array([[1.0, 1.0], [1.02, 1.1], [0.99, 0.9]])
    val, grad, hess = nu.constraint_terms(names, k, c)
    g = -st.norm(c[:, 0], 0.02).logpdf(k[:, 0]) + st.norm(0, 0.02).logpdf(0)
    s = math.log1p(0.15)
    ln = (-st.lognorm(s, scale=c[:, 1]).logpdf(k[:, 1]) - np.log(k[:, 1])
          + st.norm(0, s).logpdf(0))
    np.testing.assert_allclose(val, g + ln, rtol=1e-10, atol=1e-12)
    eps = 1e-6  # derivatives against central differences of the value
    for j in range(2):
        up, dn = k.copy(), k.copy()
        up[:, j] += eps
        dn[:, j] -= eps
        vu, gu, _ = nu.constraint_terms(names, up, c)
        vd, gd, _ = nu.constraint_terms(names, dn, c)
        np.testing.assert_allclose(grad[:, j], (vu - vd) / (2 * eps), rtol=1e-6, atol=1e-6)
        np.testing.assert_allclose(hess[:, j], (gu[:, j] - gd[:, j]) / (2 * eps), rtol=1e-5,
                                   atol=1e-5)


def test_sampled_centres_follow_the_constraints():
    """Unconditional-ensemble centres: mean and spread of the draws (20000; tolerance 4
    standard errors) against the constraint widths."""
    nu = SignalNuisances.make({"mass_scale": 0.01, "mass_resolution": 0.1},
                              {"mass_resolution": "lognormal"})
    c = nu.sample_centers(("mass_scale", "mass_resolution"), np.random.default_rng(5), 20000)
    assert c[:, 0].mean() == pytest.approx(1.0, abs=4 * 0.01 / math.sqrt(20000))
    assert c[:, 0].std() == pytest.approx(0.01, rel=0.02)
    assert np.log(c[:, 1]).std() == pytest.approx(math.log1p(0.1), rel=0.02)


def test_toy_maximum_with_nuisances_matches_an_independent_fit():
    x = _data()
    masses = np.linspace(110, 190, 41)
    r = scan(x, "gaussian", "exponential", masses, absolute_resolution=SIGMA, window=WINDOW,
             bins=100, refit=False, nuisances={"mass_scale": 0.01, "mass_resolution": 0.2})
    model = r.model
    spec = ToyBatch(model, 11, 0, 4)
    q = run_nuisance_toy_batch(spec)
    n = toy_counts(model.expected_background, 11, 0, 4)
    for t in range(4):
        j = int(np.nanargmax(q[t]))
        ref = _independent_q0(n[t], float(model.masses[j]), 0.01, 0.2)
        assert q[t, j] == pytest.approx(ref["q0"], abs=5e-3)


def test_sampled_constraint_centres_in_toys_are_reproducible():
    """Unconditional ensemble: each toy draws its constraint centres from its own stream, so
    a toy's q0 does not depend on the batching (1e-9); the maxima stay within 0.5 in Z of the
    conditional ensemble's for the same counts (the centres move q0 by a fraction of a
    constraint width)."""
    x = _data()
    masses = np.linspace(110, 190, 41)
    kw = {"absolute_resolution": SIGMA, "window": WINDOW, "bins": 100, "refit": False,
          "nuisances": {"mass_scale": 0.01, "mass_resolution": 0.2}}
    fixed = scan(x, "gaussian", "exponential", masses, **kw)
    sampled = scan(x, "gaussian", "exponential", masses, nuisance_toys="sampled", **kw)
    a = sampled.model
    whole = run_nuisance_toy_batch(ToyBatch(a, 5, 0, 6))
    split = np.vstack([run_nuisance_toy_batch(ToyBatch(a, 5, 0, 3)),
                       run_nuisance_toy_batch(ToyBatch(a, 5, 3, 3))])
    # the same toys whatever the batching (to rounding: batched matrix products)
    np.testing.assert_allclose(whole, split, rtol=1e-9, atol=1e-9)
    cond = run_nuisance_toy_batch(ToyBatch(fixed.model, 5, 0, 6))
    assert np.all(np.abs(np.sqrt(whole.max(axis=1)) - np.sqrt(cond.max(axis=1))) < 0.5)


def test_fitted_mass_error_with_the_mass_scale_matches_an_independent_fit():
    """The free fit's mass with the mass scale profiled (SignalNuisances.mass_interval)
    against an iminuit fit of the binned likelihood written here with the peak at M k and
    the constraint 1/2 ((k - 1)/delta)^2 as an explicit term (MINOS on M); tolerance 3%
    (the module takes the fit's own mass profile as two half-parabolas).  Also against the
    first-order quadrature sqrt(e^2 + (m delta)^2) (error propagation of m/k, common
    practice), 3%."""
    from peaksift import fit

    delta = 0.004
    x = _data()
    n = _counts(x)
    fr = fit((n, EDGES), "gaussian", "exponential", WINDOW, start={"mass": 150.0},
             intervals=["mass"])
    lo_e, hi_e = fr.intervals["mass"]
    got = SignalNuisances.make({"mass_scale": delta}).mass_interval(fr.peak_mass, -lo_e,
                                                                    hi_e)
    lo, hi = WINDOW
    c, h = 0.5 * (lo + hi), 0.5 * (hi - lo)

    def nll(big_m, k, s, sigma, b, slope):
        cdf = st.norm.cdf(EDGES, big_m * k, sigma)  # not frozen: 5 ms a call
        prim = np.exp(slope * (EDGES - c) / h)
        nu = s * np.diff(cdf) / (cdf[-1] - cdf[0]) + b * np.diff(prim) / (prim[-1] - prim[0])
        if np.any(nu <= 0):
            return 1e30
        return float(np.sum(nu - n * np.log(nu)) + 0.5 * ((k - 1.0) / delta) ** 2)

    m = Minuit(nll, big_m=150.0, k=1.0, s=150.0, sigma=2.0, b=n.sum(), slope=-1.0)
    m.errordef = Minuit.LIKELIHOOD
    m.limits["sigma"] = (0.5, 6.0)
    m.migrad()
    m.minos("big_m")
    ref = (-m.merrors["big_m"].lower, m.merrors["big_m"].upper)
    assert m.values["big_m"] == pytest.approx(fr.peak_mass, abs=0.01 * ref[1])
    assert got[0] == pytest.approx(ref[0], rel=0.03)
    assert got[1] == pytest.approx(ref[1], rel=0.03)
    quad = math.hypot(fr.peak_mass_error, fr.peak_mass * delta)
    assert 0.5 * (got[0] + got[1]) == pytest.approx(quad, rel=0.03)
    assert min(got) > max(-lo_e, hi_e)  # it grew: the scale adds to the statistical error
