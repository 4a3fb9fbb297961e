"""The signal model from simulated samples (peaksift.stats.signal_model), and its use in the
scan and the limits.  Every expectation comes from outside the module: the samples' own
generator truth, scipy.stats, numpy.polyfit, or an independent iminuit fit written here."""

from __future__ import annotations

import json

import numpy as np
import pytest
from iminuit import Minuit
from scipy import stats

import peaksift
from peaksift.errors import FitError
from peaksift.histogram import MassHistogram
from peaksift.stats.signal_model import SignalModel, SignalSample, fit_polynomial, signal_model

# the invented generator of these tests: Gaussian smearing sigma(m) = 0.4 + 0.01 m GeV and an
# efficiency rising linearly, both exactly polynomials of order 1
MASSES = (100.0, 125.0, 150.0, 175.0, 200.0)
N_GEN = 40_000


def _sigma(m):
    return 0.4 + 0.01 * np.asarray(m, float)


def _eff(m):
    return 0.35 + 0.0015 * (np.asarray(m, float) - 100.0)


def _sample(m: float, seed: int) -> SignalSample:
    rng = np.random.default_rng(seed)
    passed = rng.random(N_GEN) < _eff(m)
    x = rng.normal(m, _sigma(m), N_GEN)[passed]
    return SignalSample(m, x, N_GEN)


@pytest.fixture(scope="module")
def model() -> SignalModel:
    return signal_model([_sample(m, 10 + k) for k, m in enumerate(MASSES)], "gaussian",
                        order=1, efficiency_order=1)


def test_interpolation_agrees_with_an_extra_sample_between_the_points(model):
    """An extra sample at 137.5 GeV, measured directly by scipy.stats.norm.fit (maximum
    likelihood mean and width) and by its count: the interpolated sigma and efficiency agree
    within 3 combined errors (the interpolation band and the direct measurement's error:
    sigma/sqrt(2n) for a Gaussian width, sqrt(e(1-e)/N) for a count; common practice)."""
    m = 137.5
    extra = _sample(m, 99)
    _, sd = stats.norm.fit(extra.masses)
    n = extra.masses.size
    err_sd = sd / np.sqrt(2 * n)
    assert abs(model.sigma(m) - sd) < 3 * np.hypot(model.band("sigma", m), err_sd)
    e = n / N_GEN
    err_e = np.sqrt(e * (1 - e) / N_GEN)
    assert abs(model.efficiency(m) - e) < 3 * np.hypot(model.band("efficiency", m), err_e)
    # and the generator's truth within 3 bands (order-1 polynomials describe it exactly)
    assert abs(model.sigma(m) - _sigma(m)) < 3 * model.band("sigma", m)
    assert abs(model.efficiency(m) - _eff(m)) < 3 * model.band("efficiency", m)
    assert abs(model.value("mass", m) - m) < 3 * model.band("mass", m) + 1e-12
    assert model.max_closure_deviation < 3.0 and not model.doubtful


def test_efficiency_error_is_the_clopper_pearson_interval(model):
    """Clopper and Pearson, Biometrika 26 (1934) 404: at the lower end p_lo of the central
    68.27% interval P(X >= k | p_lo) = 0.1587, at the upper end P(X <= k | p_hi) = 0.1587
    (scipy.stats.binom); tolerance 1e-6 absolute on the tail probabilities."""
    lo, hi = model.efficiency_interval.T
    k = np.round(model.points["efficiency"]["value"] * N_GEN)
    tail = 0.5 * (1 - 0.682689492137086)
    assert np.allclose(stats.binom.sf(k - 1, N_GEN, lo), tail, atol=1e-6)
    assert np.allclose(stats.binom.cdf(k, N_GEN, hi), tail, atol=1e-6)
    assert np.allclose(model.points["efficiency"]["error"], 0.5 * (hi - lo), rtol=1e-12)


def test_weighted_efficiency_error_with_equal_weights_is_binomial():
    """Equal weights c: the weighted efficiency error equals sqrt(e(1-e)/N) (common practice),
    to 1e-12 relative."""
    from peaksift.stats.signal_model import _efficiency_point

    c, n, k = 0.37, 5000, 1234
    s = SignalSample(150.0, np.zeros(k), generated=c * n, weights=np.full(k, c),
                     generated_sq=c * c * n)
    eff, err, _, _ = _efficiency_point(s)
    e = k / n
    assert eff == pytest.approx(e, rel=1e-12)
    assert err == pytest.approx(np.sqrt(e * (1 - e) / n), rel=1e-12)


def test_polynomial_fit_matches_numpy_polyfit():
    """Weighted least squares against numpy.polyfit(w=1/err, cov='unscaled'): coefficients
    and covariance to 1e-9 relative (chi2/ndf < 1 here, so no scale factor)."""
    x = np.array([-1.0, -0.5, 0.0, 0.5, 1.0])
    y = np.array([1.0, 1.3, 1.45, 1.75, 2.02])
    e = np.array([0.1, 0.2, 0.1, 0.15, 0.1])
    c, cov, chi2, ndf = fit_polynomial(x, y, e, 1)
    ref, rcov = np.polyfit(x, y, 1, w=1 / e, cov="unscaled")
    assert chi2 / ndf < 1
    assert np.allclose(c[::-1], ref, rtol=1e-9)
    assert np.allclose(cov[::-1, ::-1], rcov, rtol=1e-9)


def test_closure_flags_a_polynomial_that_misses_a_point():
    """Points on y = x^2 with errors 0.01 described by a straight line: leaving the middle
    point out, the line through the other four (y = 0.625, numpy.polyfit by hand) misses it
    by 0.625, far beyond 3 errors; the model says so."""
    x = np.array([-1.0, -0.5, 0.0, 0.5, 1.0])
    from peaksift.stats.signal_model import _leave_one_out

    keep = x != 0
    line = np.polyfit(x[keep], x[keep] ** 2, 1)
    assert np.polyval(line, 0.0) == pytest.approx(0.625)
    c = _leave_one_out(x, x**2, np.full(5, 0.01), 1)
    assert c["max_deviation"] > 3.0


def test_round_trip_through_json_gives_the_same_model(model, tmp_path):
    d = json.loads(json.dumps(model.to_dict()))
    again = SignalModel.from_dict(d)
    assert again == model
    m = np.linspace(100, 200, 7)
    assert np.array_equal(again.sigma(m), model.sigma(m))
    assert np.array_equal(again.efficiency(m), model.efficiency(m))
    paths = again.save_figures(tmp_path)
    assert all(p.stat().st_size > 10_000 for p in paths)
    from matplotlib.figure import Figure

    assert isinstance(again.plot(), Figure) and isinstance(again.plot(which="shapes"), Figure)
    with pytest.raises(FitError, match="not a saved signal model"):
        SignalModel.from_dict({"shape": "gaussian"})


def test_refuses_masses_outside_the_samples_and_too_few_samples(model):
    with pytest.raises(FitError, match="outside the signal model's samples"):
        model.sigma(90.0)
    with pytest.raises(FitError, match="at least 4 samples"):
        signal_model([_sample(m, 1) for m in MASSES[:3]], "gaussian", order=2)
    with pytest.raises(FitError, match="no parameter 'tail'"):
        signal_model([_sample(m, 1) for m in MASSES], "gaussian", fixed={"tail": 1.0})


def test_default_crystal_ball_on_scipy_samples():
    """One-sided Crystal Ball samples (scipy.stats.crystalball, beta=1.4, m=3, width
    0.012 m): the double-sided shape with its upper tail held far out recovers beta as
    alpha_low and the width within 3 bands at 137.5 GeV."""
    samples = []
    for k, m in enumerate(MASSES):
        rng = np.random.default_rng(50 + k)
        x = m + 0.012 * m * stats.crystalball.rvs(1.4, 3.0, size=20_000, random_state=rng)
        samples.append(SignalSample(m, x, 40_000))
    sm = signal_model(samples, fixed={"alpha_high": 5.0, "n_high": 5.0})
    assert sm.shape == "crystalball"
    m = 137.5
    assert abs(sm.sigma(m) - 0.012 * m) < 3 * sm.band("sigma", m)
    assert abs(sm.value("alpha_low", m) - 1.4) < 3 * sm.band("alpha_low", m)
    assert abs(sm.efficiency(m) - 0.5) < 3 * sm.band("efficiency", m)


# --------------------------------------------------------------- use in scan and limits
def _spectrum(seed: int = 3) -> np.ndarray:
    rng = np.random.default_rng(seed)
    bkg = 110 + rng.exponential(40.0, 60_000)
    bkg = bkg[bkg < 190]
    sig = rng.normal(152.0, _sigma(152.0), 300)
    return np.concatenate([bkg, sig])


def test_scan_with_the_model_matches_an_independent_iminuit_fit(model):
    """q0 at 152 GeV from the scan with signal_model= against a binned Poisson likelihood
    written here (Gaussian bin integrals from scipy.stats.norm.cdf with the model's peak
    position and sigma, exponential background), minimised by iminuit; 1e-3 absolute."""
    x = _spectrum()
    h = MassHistogram.from_masses(x, bins=160, range=(110, 190))
    res = peaksift.scan(h, None, "exponential", np.array([140.0, 152.0, 165.0]),
                        signal_model=model, refit=False)
    e = np.asarray(h.edges)
    n = np.asarray(h.weight_sum)
    m = 152.0
    peak, sig = model.value("mass", m), model.sigma(m)
    fs = np.diff(stats.norm.cdf(e, peak, sig))
    fs = fs / (stats.norm.cdf(190, peak, sig) - stats.norm.cdf(110, peak, sig))

    def fb(slope):
        cdf = np.exp(slope * (e - 110))
        return np.diff(cdf) / (cdf[-1] - cdf[0])

    def nll(s, b, slope):
        mu = np.maximum(s * fs + b * fb(slope), 1e-300)
        return float(np.sum(mu - n * np.log(mu)))

    m1 = Minuit(nll, s=100.0, b=n.sum(), slope=-0.02)
    m1.errordef = 0.5
    m1.migrad()
    m0 = Minuit(nll, s=0.0, b=n.sum(), slope=-0.02)
    m0.errordef = 0.5
    m0.fixed["s"] = True
    m0.migrad()
    q0 = 2 * (m0.fval - m1.fval)
    assert res.q0[1] == pytest.approx(q0, abs=1e-3)
    assert res.sigma[1] == pytest.approx(sig, rel=1e-12)


def test_limits_in_cross_section_use_the_interpolated_efficiency(model):
    """sigma x B limits = event limits / (L eff(m)) with eff(m) the model's efficiency
    (s = sigma B L eff, common practice); 1e-5 relative; and the signal model and an
    efficiency together are refused."""
    x = _spectrum()
    h = MassHistogram.from_masses(x, bins=160, range=(110, 190))
    ms = np.array([130.0, 160.0])
    ev = peaksift.upper_limits(h, None, "exponential", ms, signal_model=model,
                               method="asymptotic")
    xs = peaksift.upper_limits(h, None, "exponential", ms, signal_model=model,
                               method="asymptotic", luminosity=20.0)
    conv = 20.0 * _eff(ms)
    assert np.allclose(xs.expected * conv, ev.expected, rtol=2e-2)  # eff(m) vs truth
    conv = 20.0 * model.efficiency(ms)
    assert np.allclose(xs.expected * conv, ev.expected, rtol=1e-5)
    assert np.allclose(xs.observed * conv, ev.observed, rtol=1e-5)
    with pytest.raises(FitError, match="not both"):
        peaksift.upper_limits(h, None, "exponential", ms, signal_model=model,
                              luminosity=20.0, efficiency=0.5)
    with pytest.raises(FitError, match="not both"):
        peaksift.scan(h, None, "exponential", ms, signal_model=model,
                      relative_resolution=0.01)


def test_raise_order_follows_a_curved_resolution_and_a_saturating_efficiency():
    """Samples precise enough to resolve curvature: sigma(m) = 0.5 + 1.5e-4 m^2 GeV and an
    efficiency saturating as 0.62 (1 - exp(-(m - 40)/50)) (invented generator truth).  The
    order-1 resolution and order-2 efficiency miss them (the leave-one-out closure flags
    it); with ``raise_order`` each order rises until its chi2 p-value (scipy.stats.chi2.sf)
    is at least 0.05, the closure passes, and the model agrees with the truth at masses
    between the samples within 3 of its band (the statistical errors are honest: the
    per-sample Gaussian fit's error against sigma / sqrt(2N), common practice)."""
    def sig(m):
        return 0.5 + 1.5e-4 * np.asarray(m, float) ** 2

    def eff(m):
        return 0.62 * (1.0 - np.exp(-(np.asarray(m, float) - 40.0) / 50.0))

    n_gen = 200_000
    samples = []
    for k, m in enumerate(MASSES):
        rng = np.random.default_rng(900 + k)
        x = rng.normal(m, sig(m), n_gen)[rng.random(n_gen) < eff(m)]
        samples.append(SignalSample(m, x, n_gen))
    low = signal_model(samples, "gaussian", order=1, efficiency_order=2)
    assert low.max_closure_deviation > 3.0 and low.doubtful
    up = signal_model(samples, "gaussian", order=1, efficiency_order=2, raise_order=True)
    orders = {k: p["order"] for k, p in up.polynomials.items()}
    assert orders["sigma"] == 2 and orders["efficiency"] == 3, orders
    for k, p in up.polynomials.items():  # the rule: described, or the highest order (3)
        assert p["order"] == 3 or stats.chi2.sf(p["chi2"], p["ndf"]) >= 0.05, k
    assert up.max_closure_deviation < 3.0 and not up.doubtful
    n_sel = np.array([np.size(s.masses) for s in samples])
    np.testing.assert_allclose(up.points["sigma"]["error"], sig(MASSES) / np.sqrt(2 * n_sel),
                               rtol=0.1)
    between = np.array([112.5, 137.5, 162.5, 187.5])
    for name, truth in (("sigma", sig), ("efficiency", eff)):
        val, band = np.asarray(up.value(name, between)), np.asarray(up.band(name, between))
        assert np.all(np.abs(val - truth(between)) < 3 * band), name
