"""The free fit's setup kept by the histogram's content (``peaksift.fitting.setup``) and the
result's parts computed at their first access: a histogram changed in place after a fit is
fitted as it now is, and a result keeps the data it was fitted on.

Reference: the extended binned Poisson likelihood in its saturated form (Baker and Cousins,
Nucl. Instrum. Meth. 221 (1984) 437, eq. 11) of a truncated Gaussian on a truncated
exponential, written here with ``scipy.stats`` and minimised with iminuit's MIGRAD (tol
1e-6, so its minimum is within ~1e-8 of the exact one in NLL).
"""

from __future__ import annotations

import numpy as np
import pytest
from iminuit import Minuit
from scipy import special, stats

from peaksift import shapes
from peaksift.fitting import fit
from peaksift.histogram import MassHistogram

WINDOW = (100.0, 200.0)


def _spectrum(seed: int) -> MassHistogram:
    rng = np.random.default_rng(seed)
    x = 100.0 + rng.exponential(40.0, 8000)
    x = np.concatenate([x[x < 200.0], rng.normal(150.0, 3.0, 300)])
    return MassHistogram.from_masses(x, bins=100, range=WINDOW)


def _reference(counts: np.ndarray, edges: np.ndarray, mass: float) -> tuple[dict, float]:
    """iminuit's minimum of the saturated binned NLL, started at a peak at ``mass``."""
    lo, hi = WINDOW

    def nll(s, b, m, sg, tau):
        sig = stats.norm.cdf(edges, m, sg)
        sig = np.diff(sig) / (stats.norm.cdf(hi, m, sg) - stats.norm.cdf(lo, m, sg))
        bkg = np.diff(stats.expon.cdf(edges - lo, scale=tau)) / stats.expon.cdf(hi - lo,
                                                                                 scale=tau)
        mu = s * sig + b * bkg
        return float(np.sum(mu - counts + special.xlogy(counts, counts / mu)))

    total = float(counts.sum())
    m = Minuit(nll, s=300.0, b=total - 300.0, m=mass, sg=3.0, tau=40.0)
    m.errordef = 0.5
    m.tol = 1e-6
    m.limits["s"] = (0.0, None)
    m.limits["b"] = (0.0, None)
    m.limits["sg"] = (0.5, 20.0)
    m.limits["tau"] = (1.0, 1000.0)
    m.limits["m"] = (lo, hi)
    m.migrad()
    assert m.valid
    return ({"mass": m.values["m"], "sigma": m.values["sg"], "signal_yield": m.values["s"],
             "background_yield": m.values["b"]}, float(m.fval))


def _agrees(res, ref: dict, ref_nll: float) -> None:
    # the same minimum: NLL within 1e-5, values within 1e-2 of their errors
    assert res.valid
    assert abs(res.nll - ref_nll) < 1e-5
    for k, v in ref.items():
        assert abs(res.values[k] - v) < 1e-2 * res.errors[k], k


def test_a_histogram_changed_in_place_is_fitted_as_it_now_is():
    h = _spectrum(11)
    first = fit(h, "gaussian", "exponential", WINDOW)
    _agrees(first, *_reference(h.values().copy(), h.edges, 150.0))
    again = fit(h, "gaussian", "exponential", WINDOW)  # the kept setup: the same minimum
    _agrees(again, *_reference(h.values().copy(), h.edges, 150.0))
    # a stronger peak elsewhere, filled into the same histogram object
    h.fill(np.random.default_rng(12).normal(125.0, 2.5, 900))
    changed = fit(h, "gaussian", "exponential", WINDOW)
    ref, ref_nll = _reference(h.values().copy(), h.edges, 125.0)
    assert abs(ref["mass"] - 125.0) < 1.0  # the reference is at the new, stronger peak
    _agrees(changed, ref, ref_nll)


@pytest.mark.parametrize("signal", ["gaussian", shapes.get("gaussian")])
def test_a_result_keeps_the_bins_it_was_fitted_on(signal):
    # a shape by name: the kept setup's path; a Shape: the setup made for this fit alone
    h = _spectrum(13)
    before = h.values().copy()
    res = fit(h, signal, "exponential", WINDOW)
    h.fill(np.random.default_rng(14).uniform(100.0, 200.0, 5000))  # after the fit
    # the figure's bins are made at their first access, from the fitted data
    assert np.array_equal(res.observed, before)
    assert not np.array_equal(res.observed, h.values())
    # twice the saturated NLL is the chi-square of those bins (Baker and Cousins, eq. 11)
    mu = res.expected
    chi2 = 2.0 * float(np.sum(mu - before + special.xlogy(before, before / mu)))
    assert abs(res.gof_chi2 - chi2) < 1e-9 * chi2
    # nothing the result hands out changes it
    for a in (res.observed, res.expected, res.covariance, res.pulls):
        assert not a.flags.writeable
