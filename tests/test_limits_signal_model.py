"""Upper limits with systematics when the signal comes from simulated samples
(``signal_model=``): the interpolated shape, resolution and efficiency, and the
interpolation's own uncertainty on the efficiency.

Checks:
* with every size 0 and no luminosity, the limits with systematics equal the plain limits
  with the same signal model exactly (the issue: every size 0 gives today's numbers);
* with the mass-scale and resolution factors, a luminosity, its uncertainty, an efficiency
  uncertainty and the interpolation uncertainty, the observed and median expected CLs
  limits against the independent iminuit profile of ``tests/test_limits_systematics.py``
  (a binned likelihood written from scratch; Cowan, Cranmer, Gross, Vitells, EPJC 71 (2011)
  1554, eqs. 16, 65-66), given the model's peak position m + shift(m), its sigma(m) and
  its efficiency eff(m), and the efficiency uncertainty sqrt(d^2 + (band/eff)^2)
  (independent relative uncertainties added in quadrature, common practice); 0.1%;
* the interpolated efficiency is the samples' generator truth within 3 of its bands, so
  the limits on sigma x B are the right ones (the generator is the outside reference).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats as st

from peaksift.likelihood import SignalNuisances
from peaksift.stats import upper_limits
from peaksift.stats.limits_systematics import systematic_limits
from peaksift.stats.signal_model import SignalModel, SignalSample, signal_model

SAMPLE_MASSES = (100.0, 125.0, 150.0, 175.0, 200.0)
N_GEN = 5_000
WINDOW = (100.0, 200.0)


def _sigma(m):
    return 0.4 + 0.01 * np.asarray(m, float)     # the invented generator's resolution


def _eff(m):
    return 0.35 + 0.0015 * (np.asarray(m, float) - 100.0)


@pytest.fixture(scope="module")
def model() -> SignalModel:
    samples = []
    for k, m in enumerate(SAMPLE_MASSES):
        rng = np.random.default_rng(40 + k)
        passed = rng.random(N_GEN) < _eff(m)
        samples.append(SignalSample(m, rng.normal(m, _sigma(m), N_GEN)[passed], N_GEN))
    return signal_model(samples, "gaussian", order=1, efficiency_order=1)


def _data():
    rng = np.random.default_rng(1)
    x = np.concatenate([100 + rng.exponential(40, 20000), rng.normal(150, 2.0, 40)])
    x = x[(x > WINDOW[0]) & (x < WINDOW[1])]
    return x, np.ones_like(x)


def test_every_size_zero_gives_the_plain_signal_model_limits_exactly(model):
    data = _data()
    masses = np.array([120.0, 150.0, 180.0])
    plain = upper_limits(data, None, "exponential", masses, signal_model=model,
                         window=WINDOW, bins=100, method="asymptotic")
    syst = systematic_limits(data, None, {"exponential": "exponential"}, masses,
                             signal_model=model, window=WINDOW, bins=100,
                             method="asymptotic")
    for key in ("observed", "expected", "expected_minus2", "expected_plus2"):
        assert np.array_equal(np.asarray(syst[key]), getattr(plain, key)), key


def test_interpolated_efficiency_is_the_generator_truth(model):
    m = np.array([112.5, 140.0, 187.5])   # between the samples
    assert np.all(np.abs(model.efficiency(m) - _eff(m)) < 3 * model.band("efficiency", m))


@pytest.mark.slow
def test_limits_with_the_signal_model_match_an_independent_profile(model):
    import test_limits_systematics as ref_mod

    x, w = _data()
    mass, lumi, d_lumi, d_eff = 140.0, 10.0, 0.02, 0.05
    nuis = SignalNuisances.make({"mass_scale": 0.01, "mass_resolution": 0.2})
    res = systematic_limits((x, w), None, {"exppoly1": "exponential"}, np.array([mass]),
                            signal_model=model, window=WINDOW, bins=100, nuisances=nuis,
                            luminosity=lumi, luminosity_uncertainty=d_lumi,
                            efficiency_uncertainty=d_eff, method="asymptotic")
    interp = float(model.band("efficiency", mass) / model.efficiency(mass))
    assert any("interpolation" in p for p in res["profiled"])
    n = np.histogram(x, ref_mod.EDGES)[0].astype(float)
    ref = ref_mod._Reference(n, mass, 0.01, 0.2, {"exponential": 2})
    peak, sig = float(model.value("mass", mass)), float(model.sigma(mass))

    def shape(km, kr):
        cdf = st.norm.cdf(ref_mod.EDGES, peak * km, sig * kr)  # not frozen: 5 ms a call
        return np.diff(cdf) / (cdf[-1] - cdf[0])

    ref._sig = shape
    ref.conv = lumi * float(model.efficiency(mass))
    ref.delta = math.hypot(math.log1p(d_lumi), math.log1p(math.hypot(d_eff, interp)))
    # a bracket of a factor 2 around peaksift's limits (brentq fails if a root is outside)
    both = (res["observed"][0], res["expected"][0])
    observed, expected = ref.limits(bracket=(0.5 * min(both), 2.0 * max(both)))
    assert res["observed"][0] == pytest.approx(observed, rel=1e-3)
    assert res["expected"][0] == pytest.approx(expected, rel=1e-3)
