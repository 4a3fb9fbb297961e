"""The background fitted on the sidebands of a blinded spectrum (``search.sideband``).

Checked against an independent fit written here: the extended binned Poisson likelihood
of a power law (x^-k, normalised on the window by its closed-form integral) over the
sideband bins only, minimised with iminuit MIGRAD and HESSE (errordef 0.5).  The
goodness of fit is the Baker-Cousins chi-square (Baker and Cousins, Nucl. Instrum. Meth.
221 (1984) 437, eq. 11) written out here; the extrapolation under the blinded window is
the fitted normalisation times the power law's integral there, its error the linear
propagation of iminuit's covariance.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from iminuit import Minuit
from scipy import stats

from peaksift import MassHistogram
from peaksift.search.sideband import SidebandFit, sideband_fit

WINDOW = (110.0, 200.0)
BLIND = (145.0, 160.0)


def _power_integral(a, b, k):
    """int_a^b x^-k dx in closed form (k != 1)."""
    return (b ** (1.0 - k) - a ** (1.0 - k)) / (1.0 - k)


@pytest.fixture(scope="module")
def spectrum():
    """~1,500 masses from x^-4.5 on the window (inverse-CDF sampling, fixed seed)."""
    rng = np.random.default_rng(20261202)
    k, (a, b) = 4.5, WINDOW
    u = rng.uniform(size=1500)
    x = (a ** (1 - k) + u * (b ** (1 - k) - a ** (1 - k))) ** (1.0 / (1 - k))
    return MassHistogram(bins=90, range=WINDOW).fill(x)


def _independent_fit(h):
    edges = np.asarray(h.edges, float)
    n = np.asarray(h.values(), float)
    side = (edges[1:] <= BLIND[0]) | (edges[:-1] >= BLIND[1])  # bins clear of the window
    a, b = WINDOW

    def mu(B, k):
        return B * _power_integral(edges[:-1], edges[1:], k) / _power_integral(a, b, k)

    def nll(B, k):
        m = mu(B, k)[side]
        return float(np.sum(m - n[side] * np.log(m)))

    nll.errordef = Minuit.LIKELIHOOD
    m = Minuit(nll, B=float(n[side].sum()) * 1.2, k=3.0)
    m.limits["B"] = (1.0, None)
    m.tol = 1e-6  # EDM goal ~1e-9: the minimum to ~1e-4 of an error, so the check below can be tight
    m.migrad()
    m.hesse()
    assert m.valid
    B, k = m.values["B"], m.values["k"]
    mm, nn = mu(B, k)[side], n[side]
    with np.errstate(divide="ignore", invalid="ignore"):
        chi2 = 2.0 * np.sum(mm - nn + np.where(nn > 0, nn * np.log(nn / mm), 0.0))
    inside = ~side

    def blinded(B_, k_):
        return float(mu(B_, k_)[inside].sum())

    eps = 1e-6
    grad = np.array([(blinded(B + eps * B, k) - blinded(B - eps * B, k)) / (2 * eps * B),
                     (blinded(B, k + eps) - blinded(B, k - eps)) / (2 * eps)])
    cov = np.array(m.covariance)
    return {"B": B, "k": k, "B_err": m.errors["B"], "k_err": m.errors["k"], "chi2": chi2,
            "ndf": int(side.sum()) - 2, "blinded": blinded(B, k),
            "blinded_err": float(np.sqrt(grad @ cov @ grad)), "used": int(side.sum())}


def test_sideband_fit_equals_an_independent_iminuit_fit(spectrum):
    from peaksift.search.common import _blinded_copy

    h = _blinded_copy(spectrum, BLIND)  # as a blinded search sees it: the window emptied
    sb = sideband_fit(h, "gaussian", "powerlaw", WINDOW, BLIND)
    ref = _independent_fit(spectrum)  # from the full histogram: the bins inside unused
    assert sb.valid, sb.problems
    assert int((~sb.blinded).sum()) == ref["used"]
    # minima: well inside 1e-3 of an error (two minimisers, tolerance 1e-7 in EDM)
    assert abs(sb.values["power"] - ref["k"]) < 1e-3 * ref["k_err"]
    assert abs(sb.background_yield.value - ref["B"]) < 1e-3 * ref["B_err"]
    # errors from the Hessian: within 1% of HESSE's (different step schemes)
    assert sb.errors["power"] == pytest.approx(ref["k_err"], rel=0.01)
    assert sb.background_yield.error == pytest.approx(ref["B_err"], rel=0.01)
    # goodness of fit on the sidebands: Baker-Cousins chi-square, ndf = bins - 2
    assert sb.gof_chi2 == pytest.approx(ref["chi2"], rel=1e-5)
    assert sb.gof_ndf == ref["ndf"]
    assert sb.gof_p_value == pytest.approx(stats.chi2.sf(ref["chi2"], ref["ndf"]), rel=1e-4)
    # the extrapolation under the blinded window and its propagated error
    assert sb.blinded_yield.value == pytest.approx(ref["blinded"], rel=1e-5)
    assert sb.blinded_yield.error == pytest.approx(ref["blinded_err"], rel=0.02)
    # nothing of the blinded bins is kept: the observed counts there are NaN
    assert np.all(np.isnan(sb.observed[sb.blinded]))
    assert np.all(np.isnan(sb.pulls[sb.blinded]))


def test_sideband_fit_round_trips_through_json_under_its_attribute_names(spectrum):
    from peaksift.search.common import _blinded_copy

    sb = sideband_fit(_blinded_copy(spectrum, BLIND), "gaussian", "powerlaw", WINDOW, BLIND)
    d = json.loads(json.dumps(sb.to_dict()))
    assert all(hasattr(sb, k) for k in d if k != "kind")
    assert SidebandFit.from_dict(d) == sb


def test_blinded_report_shows_the_sideband_goodness_of_fit(spectrum):
    """While blinded the report's Result table gives the sideband fit's goodness of fit,
    labelled as such, with the numbers of results.json's ``background_fit``; the chi-square
    also equals the Baker-Cousins chi-square of the independent fit above (within 1e-3 of
    it, the report printing four significant digits)."""
    import re

    from peaksift.report import render_markdown
    from peaksift.search.common import _blinded_copy

    sb = sideband_fit(_blinded_copy(spectrum, BLIND), "gaussian", "powerlaw", WINDOW, BLIND)
    bf = json.loads(json.dumps(sb.to_dict()))  # as results.json holds it
    none = {"value": None, "error": None}
    r = {"best": {"mass": 130.0, "z_local": 0.5, "p_local": 0.3},
         "fit": {"valid": False, "peak_mass": none, "width": none, "signal_yield": none,
                 "background_yield": none, "gof": {"chi2": None, "ndf": None, "p_value": None}},
         "background_fit": bf,
         "blinding": {"enabled": True, "window": list(BLIND), "active": True,
                      "hidden_range": list(BLIND)}}
    md = render_markdown(r, {})
    row = re.search(r"\| Goodness of fit \(background fit on the sidebands only\) \| "
                    r"χ² = ([0-9.]+) for (\d+) degrees of freedom \(p = ([0-9.e-]+)\) \|", md)
    assert row, md[:3000]
    assert float(row[1]) == pytest.approx(bf["gof_chi2"], rel=5e-4)
    assert int(row[2]) == bf["gof_ndf"]
    assert float(row[3]) == pytest.approx(bf["gof_p_value"], rel=5e-3)
    ref = _independent_fit(spectrum)
    assert float(row[1]) == pytest.approx(ref["chi2"], rel=1e-3) and int(row[2]) == ref["ndf"]
    assert "| Goodness of fit (free fit) | n/a |" not in md
