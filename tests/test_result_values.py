"""Results are values: equal when their numbers are equal, not changeable in place, and
back from their JSON form (DESIGN.md, "Core objects")."""

from __future__ import annotations

import json

import numpy as np
import pytest

import peaksift
from peaksift.fitting import FitResult


@pytest.fixture(scope="module")
def spectrum():
    rng = np.random.default_rng(4)
    x = np.concatenate([100 + rng.exponential(50.0, 4000), rng.normal(140.0, 2.0, 150)])
    return x[(x > 100) & (x < 200)]


def test_fit_result_is_a_value(spectrum):
    a = peaksift.fit(spectrum, "gaussian", "exponential", (100, 200))
    b = peaksift.fit(spectrum, "gaussian", "exponential", (100, 200))
    assert a == b
    assert a != peaksift.fit(spectrum[:-1], "gaussian", "exponential", (100, 200))
    with pytest.raises(TypeError):
        a.values["mass"] = 0.0
    with pytest.raises(ValueError):
        a.covariance[0, 0] = 0.0
    back = FitResult.from_dict(json.loads(json.dumps(a.to_dict())))
    assert back.to_dict() == a.to_dict()
    assert back.values == a.values and back.valid == a.valid
    with pytest.raises(peaksift.FitError):
        back.to_minuit()


def test_scan_result_is_a_value(spectrum):
    h = peaksift.MassHistogram(bins=50, range=(100, 200)).fill(spectrum)
    masses = np.linspace(110, 190, 9)
    res = lambda m: np.full_like(np.asarray(m, float), 2.0)  # sigma in GeV
    a = peaksift.scan(h, "gaussian", "exponential", masses, resolution=res, refit=False)
    b = peaksift.scan(h, "gaussian", "exponential", masses, resolution=res, refit=False)
    assert a == b
    with pytest.raises(ValueError):
        a.q0[0] = 1.0


def test_a_kept_scan_result_is_a_value(spectrum):
    """A scan whose preparation is kept (a Resolution, not a function) is answered from
    the compiled table the second time: the same value, its arrays read-only, its model's
    the caller's to change; Z = sqrt(q0) and p = 1 - Phi(Z) (Cowan, Cranmer, Gross,
    Vitells, EPJC 71 (2011) 1554, eqs. 52-53; Phi from scipy.stats.norm) to 1e-12."""
    from scipy import stats

    h = peaksift.MassHistogram(bins=50, range=(100, 200)).fill(spectrum)
    masses = np.linspace(110, 190, 9)
    res = peaksift.Resolution.absolute(2.0)
    a = peaksift.scan(h, "gaussian", "exponential", masses, resolution=res, refit=False)
    b = peaksift.scan(h, "gaussian", "exponential", masses, resolution=res, refit=False)
    assert a == b
    for name in ("masses", "sigma", "q0", "z_local", "p_local", "signal_yield",
                 "signal_yield_error", "background_yield", "converged", "blinded"):
        with pytest.raises(ValueError):
            getattr(b, name)[0] = 1
    b.model.counts[0] = 0.0   # the model is the caller's: writable, and not a's
    assert a.model.counts[0] != 0.0
    np.testing.assert_allclose(b.z_local, np.sqrt(b.q0), rtol=1e-12, atol=0)
    np.testing.assert_allclose(b.p_local, stats.norm.sf(b.z_local), rtol=1e-12, atol=1e-300)
    assert b.best_index == int(np.argmax(b.q0)) and b.q0.max() > 25.0
