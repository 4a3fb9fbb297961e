"""A sigma tied to the resolution at the FITTED mass (peaksift.likelihood.Tie / TiedCost).

Reference: a binned extended Poisson likelihood written here in which sigma = f(mass) is
computed inside the cost (Gaussian bin integrals from ``scipy.stats.norm.cdf`` truncated to
the window, peaksift's exponential exp(b1 t), t = (x - 150)/50, from its closed-form CDF),
minimised by iminuit (MIGRAD, errors from HESSE).  Two resolution functions: linear
(2 % of the mass) and curved (sigma = 0.4 + 1e-4 m^2 GeV, so the chain rule's second
derivative matters in the Hessian).  The peak's mass is started 4 GeV off so that a tie at
the starting mass would be visibly wrong.
"""

from __future__ import annotations

import numpy as np
import pytest
from iminuit import Minuit
from scipy import stats

import peaksift
from peaksift.histogram import MassHistogram
from peaksift.likelihood import Tie

WINDOW = (100.0, 200.0)
EDGES = np.linspace(*WINDOW, 201)

RESOLUTIONS = {
    "linear": (lambda m: 0.02 * m, lambda m: 0.02, lambda m: 0.0),
    "curved": (lambda m: 0.4 + 1e-4 * m * m, lambda m: 2e-4 * m, lambda m: 2e-4),
}


def _exp_fractions(b1: float) -> np.ndarray:
    c = np.exp(b1 * ((EDGES - 150.0) / 50.0 - 1.0))
    return np.diff(c) / (c[-1] - c[0])


def _gauss_fractions(m: float, s: float) -> np.ndarray:
    c = stats.norm.cdf((EDGES - m) / s)
    return np.diff(c) / (c[-1] - c[0])


def _histogram(res) -> tuple[MassHistogram, np.ndarray]:
    rng = np.random.default_rng(11)
    b = 100.0 + rng.exponential(60.0, 40000)
    x = np.concatenate([b[b < 200.0], rng.normal(152.0, res(152.0), 900)])
    n = np.histogram(x, EDGES)[0].astype(float)
    h = MassHistogram(EDGES)
    h.weight_sum, h.weight_sq_sum = n.copy(), n.copy()
    return h, n


def _reference(n: np.ndarray, res) -> Minuit:
    def nll(mass, s, b1, b):
        mu = s * _gauss_fractions(mass, res(mass)) + b * _exp_fractions(b1)
        if not np.all(mu > 0):
            return 1e30
        return float(np.sum(mu - n * np.log(mu)))

    m = Minuit(nll, mass=148.0, s=600.0, b1=-1.0, b=n.sum() - 600.0)
    m.errordef = 0.5
    m.limits["mass"] = (120.0, 180.0)
    m.limits["b1"] = (-60.0, 60.0)
    m.strategy = 2
    m.tol = 1e-6  # EDM goal 2e-9: converged far below the tolerances used here
    m.migrad()
    m.hesse()
    return m


@pytest.mark.parametrize("kind", list(RESOLUTIONS))
def test_tied_fit_equals_an_independent_fit_with_sigma_inside_the_cost(kind):
    """Mass, yield and background within 1e-3 of iminuit's errors; the mass error within
    1 % of HESSE's; sigma equals f(fitted mass) to rounding (1e-12 relative)."""
    res, slope, curv = RESOLUTIONS[kind]
    h, n = _histogram(res)
    ref = _reference(n, res)
    assert ref.valid
    tie = Tie("sigma", "mass", res, slope, curv, description="resolution(mass)")
    r = peaksift.fit(h, "gaussian", "exponential", WINDOW, binned=True,
                     start={"mass": 148.0}, tied={"sigma": tie})
    assert r.valid, r.problems
    v, e = r.values, r.errors
    assert v["sigma"] == pytest.approx(res(v["mass"]), rel=1e-12)
    for ours, theirs in (("mass", "mass"), ("signal_yield", "s"), ("b1", "b1"),
                         ("background_yield", "b")):
        assert v[ours] == pytest.approx(ref.values[theirs], abs=1e-3 * ref.errors[theirs])
    assert e["mass"] == pytest.approx(ref.errors["mass"], rel=0.01)
    assert e["signal_yield"] == pytest.approx(ref.errors["s"], rel=0.01)
    # the tied sigma's error is the mass error times dsigma/dm (linear propagation)
    assert e["sigma"] == pytest.approx(abs(slope(v["mass"])) * e["mass"], rel=1e-9)
    assert any("recomputed from the fitted mass" in t for t in r.notes)


def test_a_resolution_ties_sigma_as_its_tie_does():
    """``tied={"sigma": Resolution}``: the linear resolution (2 % of the mass) given as a
    peaksift.Resolution fits as the independent fit with sigma = 0.02 m inside the cost
    (values within 1e-3 of its errors), the repr calls sigma tied, not fixed."""
    res = RESOLUTIONS["linear"][0]
    h, n = _histogram(res)
    ref = _reference(n, res)
    r = peaksift.fit(h, "gaussian", "exponential", WINDOW, binned=True, start={"mass": 148.0},
                     tied={"sigma": peaksift.Resolution.relative(0.02)})
    assert r.valid, r.problems
    assert r.values["sigma"] == pytest.approx(0.02 * r.values["mass"], rel=1e-12)
    assert r.values["mass"] == pytest.approx(ref.values["mass"], abs=1e-3 * ref.errors["mass"])
    assert r.values["signal_yield"] == pytest.approx(ref.values["s"], abs=1e-3 * ref.errors["s"])
    assert "(tied)" in repr(r) and "(fixed)" not in repr(r)


def test_a_tie_at_the_start_mass_would_differ():
    """Guard that the case can tell the two apart: sigma held at f(148) instead of f(m_fit)
    moves the fitted mass by more than 0.01 of its error from the reference."""
    res, _, _ = RESOLUTIONS["curved"]
    h, n = _histogram(res)
    ref = _reference(n, res)
    r = peaksift.fit(h, "gaussian", "exponential", WINDOW, binned=True,
                     start={"mass": 148.0}, fixed={"sigma": res(148.0)})
    assert abs(r.values["mass"] - ref.values["mass"]) > 0.01 * ref.errors["mass"]


def test_a_tie_needs_a_tie_object_and_known_names():
    h, _ = _histogram(RESOLUTIONS["linear"][0])
    with pytest.raises(peaksift.FitError, match="Tie"):
        peaksift.fit(h, "gaussian", "exponential", WINDOW, tied={"sigma": 3.0})
    bad = Tie("sigma", "centre", lambda m: 1.0, lambda m: 0.0)
    with pytest.raises(peaksift.FitError, match="unknown parameter 'centre'"):
        peaksift.fit(h, "gaussian", "exponential", WINDOW, tied={"sigma": bad})


def test_unbinned_tied_fit_equals_an_independent_fit():
    """The same tie in an unbinned fit: extended unbinned NLL written here (Gaussian pdf
    from scipy.stats.norm truncated to the window, peaksift's exponential density), sigma =
    0.02 m inside the cost; mass and yield within 1e-3 of iminuit's errors, the mass error
    within 1 % of HESSE's."""
    rng = np.random.default_rng(5)
    b = 100.0 + rng.exponential(60.0, 8000)
    x = np.concatenate([b[b < 200.0], rng.normal(152.0, 0.02 * 152.0, 500)])

    def nll(mass, s, b1, nb):
        sg = 0.02 * mass
        g = stats.norm.pdf(x, mass, sg) / (stats.norm.cdf(200.0, mass, sg)
                                           - stats.norm.cdf(100.0, mass, sg))
        t = (x - 150.0) / 50.0
        e = np.exp(b1 * (t - 1.0)) * b1 / 50.0 / (1.0 - np.exp(-2.0 * b1))
        dens = s * g + nb * e
        if not np.all(dens > 0):
            return 1e30
        return float(s + nb - np.sum(np.log(dens)))

    ref = Minuit(nll, mass=150.0, s=400.0, b1=-1.0, nb=x.size - 400.0)
    ref.errordef = 0.5
    ref.limits["mass"] = (120.0, 180.0)
    ref.limits["b1"] = (-60.0, -1e-3)
    ref.strategy = 2
    ref.tol = 1e-6
    ref.migrad()
    ref.hesse()
    assert ref.valid
    tie = Tie("sigma", "mass", lambda m: 0.02 * m, lambda m: 0.02)
    r = peaksift.fit(x, "gaussian", "exponential", WINDOW, binned=False,
                     start={"mass": 148.0}, tied={"sigma": tie})
    assert r.valid, r.problems
    for ours, theirs in (("mass", "mass"), ("signal_yield", "s"), ("b1", "b1")):
        assert r.values[ours] == pytest.approx(ref.values[theirs],
                                               abs=1e-3 * ref.errors[theirs])
    assert r.errors["mass"] == pytest.approx(ref.errors["mass"], rel=0.01)
    assert r.values["sigma"] == pytest.approx(0.02 * r.values["mass"], rel=1e-12)
    # the iminuit object of the tied fit minimises the same tied cost (MIGRAD stays put)
    m = r.to_minuit()
    m.migrad()
    assert m.values["mass"] == pytest.approx(r.values["mass"], abs=1e-3 * r.errors["mass"])
