"""Never fall over: a reduced stress matrix, and regressions of what the full one found.

The full matrix (every signal x every background x awkward data, 100 toys per cell) is
``scripts/stress_fits.py``; here a few toys per cell over a representative subset, with the
script's own data generator (masses drawn from the shapes by inverse CDF, spectra as
multinomial draws of the bin fractions).  Checks: no exception other than a
:class:`~peaksift.errors.PeaksiftError` from fit, scan or upper_limits; strong peaks give
valid fits at the true mass (the truth of the toys is the outside reference).
"""

from __future__ import annotations

import importlib.util
import itertools
import math
import sys
import warnings
import zlib
from pathlib import Path

import numpy as np
import pytest
from iminuit import Minuit
from scipy import integrate, special

import peaksift
from peaksift import MassHistogram, shapes
from peaksift.errors import PeaksiftError

_SCRIPT = Path(__file__).resolve().parents[1] / "scripts" / "stress_fits.py"


def _load_script():
    spec = importlib.util.spec_from_file_location("stress_fits", _SCRIPT)
    mod = importlib.util.module_from_spec(spec)
    sys.modules.setdefault("stress_fits", mod)
    spec.loader.exec_module(mod)
    return mod


S = _load_script()

#: (signal, background, case, mode, toys): every case and mode, every signal and most
#: background families, the numerically integrated shapes with a single toy
REDUCED = [
    *[("gaussian", "exponential", c, m, 2) for c, case in S.CASES.items() for m in case.modes],
    ("crystalball", "bernstein2", "n50", "unbinned", 1),
    ("breitwigner", "powerlaw", "bkg_only", "binned", 2),
    ("breitwigner", "powerlaw", "n1e7", "binned", 1),
    ("breitwigner", "powerlaw", "n50", "unbinned", 2),
    ("voigt", "exponential", "strong", "binned", 1),
    ("gaussian", "turnon", "weak", "binned", 1),
    ("gaussian", "bernstein5", "n50", "unbinned", 1),
    ("gaussian", "dijet3", "strong", "binned", 1),
    ("gaussian", "exppoly2", "half_empty", "unbinned", 1),
]


def _toys(sname, blabel, cname, mode, toys, seed=3):
    label = f"{sname}/{blabel}/{cname}/{mode}"
    sig, bkg = shapes.get(sname), S.background_shape(blabel)
    truth = S.BACKGROUNDS[blabel][2]
    case = S.CASES[cname]
    s_yield = S.signal_yield(case, sig, bkg, truth)
    for k in range(toys):
        rng = np.random.default_rng([seed, zlib.crc32(label.encode()), k])
        yield sig, bkg, S.make_data(case, mode, sig, bkg, truth, s_yield, rng)


@pytest.mark.parametrize("cell", REDUCED, ids=lambda c: "/".join(map(str, c[:4])))
def test_fit_never_raises_a_raw_exception(cell):
    """fit returns a FitResult (valid or flagged with reasons) or raises a PeaksiftError."""
    for sig, bkg, data in _toys(*cell):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            try:
                r = peaksift.fit(data, sig, bkg, S.WINDOW, binned=(cell[3] == "binned"))
            except PeaksiftError:
                continue
        assert r.valid == (not r.problems)
        assert math.isfinite(r.nll)


@pytest.mark.parametrize(("sname", "blabel"), [("gaussian", "exponential"),
                                               ("breitwigner", "bernstein2"),
                                               ("gaussian", "powerlaw")])
def test_strong_peaks_fit_valid_at_the_truth(sname, blabel):
    """A 25 sigma peak (Asimov, Cowan et al. 2011 eq. 97) must give a valid fit with the peak
    within 5 errors of the true mass in every toy (3 binned + 2 unbinned): the invalid rate
    bound is 0 here because nothing about such data is doubtful.  (Not so for a Crystal Ball:
    with ~100 events in a tail its power n is free to run to a bound, and the fit says so.)"""
    for mode, toys in (("binned", 3), ("unbinned", 2)):
        for sig, bkg, data in _toys(sname, blabel, "strong", mode, toys, seed=11):
            r = peaksift.fit(data, sig, bkg, S.WINDOW, binned=(mode == "binned"))
            assert r.valid, r.problems
            assert abs(r.peak_mass - S.PEAK) < 5 * r.peak_mass_error


@pytest.mark.parametrize(("sname", "blabel", "cname"), [("gaussian", "exponential", "bkg_only"),
                                                        ("gaussian", "exponential", "strong"),
                                                        ("crystalball", "powerlaw", "strong"),
                                                        ("voigt", "exponential", "bkg_only")])
def test_scan_and_limits_never_raise_a_raw_exception(sname, blabel, cname):
    """scan and upper_limits on the same awkward toys return or raise a PeaksiftError; on a
    strong peak the scan's best mass lies within 3 resolutions of the truth."""
    for sig, bkg, data in _toys(sname, blabel, cname, "binned", 1, seed=5):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            assert S.scan_and_limits(data, sig, bkg) == []
            if cname == "strong":
                truth = S.SIGNALS[sname]
                res = S.resolution_arg(truth["sigma"] / S.PEAK)
                kw = {k: v for k, v in truth.items() if k not in ("mass", "sigma")}
                r = peaksift.scan(data, sig, bkg, np.linspace(115.0, 285.0, 69), resolution=res,
                                  window=S.WINDOW, signal_params=kw or None, refit=False)
                assert abs(r.best_mass - S.PEAK) < 3 * truth["sigma"]


# ---------------------------------------------------------------- speed paths kept honest
def test_power_law_fast_path_against_quadrature():
    """The power law's one-parameter-set path: bin fractions against scipy.integrate.quad of
    x^-k (rel. 1e-9), and d/dk against a Richardson-extrapolated central difference of the
    quadrature fractions (abs. 1e-6 of the largest derivative), for steep, shallow, rising
    and nearly flat (k -> 1) spectra and a wide window where x^-k spans 60 decades."""
    pl = shapes.get("powerlaw")
    for window, k in (((100.0, 1450.0), 4.0), ((60.0, 120.0), 0.5), ((1.0, 1e4), 1.0005),
                      ((100.0, 1450.0), -3.0), ((1.0, 1e4), 15.0)):
        e = np.geomspace(*window, 31)

        def quad_fractions(kk, e=e, window=window):
            def f(x):
                return (x / window[0]) ** -kk
            parts = np.array([integrate.quad(f, a, b, epsabs=0, epsrel=1e-13)[0]
                              for a, b in itertools.pairwise(e)])
            return parts / parts.sum()  # the bins tile the window

        frac, grad = pl.fractions_and_grad(e, [k], window)
        ref = quad_fractions(k)
        np.testing.assert_allclose(frac, ref, rtol=1e-9, atol=1e-14)
        h = 1e-3
        d1 = (quad_fractions(k + h) - quad_fractions(k - h)) / (2 * h)
        d2 = (quad_fractions(k + h / 2) - quad_fractions(k - h / 2)) / h
        richardson = (4 * d2 - d1) / 3
        np.testing.assert_allclose(grad[0], richardson, rtol=0,
                                   atol=1e-6 * np.abs(richardson).max())


def _hand_binned_nll(n, edges, window):
    """Saturated extended binned Poisson NLL (Baker and Cousins 1984, eq. 11) of a truncated
    Gaussian on exp(b1 t), t = window-scaled mass, written out with scipy.special."""
    lo, hi = window
    c, hw = 0.5 * (lo + hi), 0.5 * (hi - lo)
    t = (edges - c) / hw

    def nll(mass, sigma, ns, b1, nb):
        z = (edges - mass) / sigma
        cs = special.ndtr(z)
        fs = np.diff(cs) / (cs[-1] - cs[0])
        eb = np.exp(b1 * (t - 1.0))  # shifted: finite for steep slopes
        fb = np.diff(eb) / (eb[-1] - eb[0])
        mu = np.maximum(ns * fs + nb * fb, 1e-300)
        return float(np.sum(mu - n + special.xlogy(n, n) - special.xlogy(n, mu)))
    return nll


def test_far_weaker_candidates_skipped_without_losing_the_minimum():
    """A 25 sigma peak and a 3 sigma bump: the fit minimises only the strong candidate (the
    weak one trails by far more than the margin; the strong one from its start width only:
    the profile over the width at its minimum has no other minimum, so no other width is
    tried) and still reaches the minimum of an independent iminuit fit of a hand-written
    cost started at the truth (NLL within 1e-4, mass within 0.01 of its error)."""
    rng = np.random.default_rng(8)
    window = (100.0, 300.0)
    x = np.concatenate([100.0 + rng.exponential(60.0, 40_000), rng.normal(170.0, 3.0, 1500),
                        rng.normal(250.0, 3.0, 90)])
    h = MassHistogram(bins=200, range=window).fill(x)
    r = peaksift.fit(h, "gaussian", "exponential", window)
    assert r.valid and r.starts_tried == 1
    cost = _hand_binned_nll(h.weight_sum, np.asarray(h.edges), window)
    ntot = float(h.weight_sum.sum())
    m = Minuit(cost, mass=170.0, sigma=3.0, ns=1500.0, b1=-100.0 / 60.0, nb=ntot - 1500.0)
    m.errordef = Minuit.LIKELIHOOD
    m.limits["sigma"] = (0.1, 50.0)
    m.tol, m.strategy = 1e-5, 2  # converged tightly: the reference minimum
    m.migrad()
    assert m.valid
    assert r.nll == pytest.approx(m.fval, abs=1e-4)
    assert r.values["mass"] == pytest.approx(m.values["mass"], abs=0.01 * r.errors["mass"])


# --------------------------------------------- regressions: raw exceptions the matrix found
_RNG = np.random.default_rng(1)
_X = np.concatenate([100 + _RNG.exponential(60, 3000), _RNG.normal(170, 3, 300)])
_W = (100.0, 300.0)
_H = MassHistogram(bins=100, range=_W).fill(_X)

#: arguments that used to escape as TypeError/ValueError/RuntimeError/ZeroDivisionError (or
#: gave a silently wrong fit) and must be a FitError naming the mistake
BAD_ARGUMENTS = {
    "start not a number": ({"start": {"mass": "abc"}}, "must be a number"),
    "fixed None": ({"fixed": {"mass": None}}, "must be a number"),
    "fixed not a mapping": ({"fixed": [("mass", 170.0)]}, "must be a mapping"),
    "limits not a pair": ({"limits": {"mass": 5}}, "needs a pair"),
    "limits not numbers": ({"limits": {"mass": ("a", "b")}}, "must be a number"),
    "bins zero": ({"data": _X, "binned": True, "bins": 0}, "positive whole number"),
    "bins negative": ({"data": _X, "binned": True, "bins": -5}, "positive whole number"),
    "bins fractional": ({"data": _X, "binned": True, "bins": 10.5}, "positive whole number"),
    "bins text": ({"data": _X, "binned": True, "bins": "abc"}, "positive whole number"),
    "edges unsorted": ({"data": _X, "binned": True, "bins": [300, 100, 200]}, "increasing"),
    "edges 2-d": ({"data": _X, "binned": True, "bins": [[100, 200], [200, 300]]}, "1-d"),
    "edges beyond the window": ({"data": _X, "binned": True, "bins": [0, 50, 1000]},
                                "spanning exactly the window"),
    # what cannot be read as data is refused with the list of what fit accepts
    "masses as text": ({"data": ["a", "b"]}, "cannot read list as data; fit accepts"),
    "masses complex": ({"data": _X.astype(complex)}, "1-d array of masses in GeV"),
    "masses None": ({"data": None}, "cannot read NoneType as data"),
    "no signal shape": ({"signal": []}, "no signal shape"),
    "retries text": ({"retries": "a"}, "retries"),
    "retries negative": ({"retries": -1}, "retries"),
    "fixed sigma zero": ({"fixed": {"sigma": 0.0}}, "domain"),
    "fixed sigma negative": ({"fixed": {"sigma": -1.0}}, "domain"),
    "fixed slope beyond its domain": ({"fixed": {"b1": 1e5}}, "domain"),
    "fixed background yield negative": ({"fixed": {"background_yield": -5.0}}, "negative"),
    "peak fixed far outside": ({"fixed": {"mass": 1e6}}, "no probability in the window"),
    "negative histogram bin": ({"data": "negative-bin"}, "negative sum of weights"),
}


@pytest.mark.parametrize("case", list(BAD_ARGUMENTS), ids=list(BAD_ARGUMENTS))
def test_user_mistakes_are_fit_errors(case):
    kw, match = BAD_ARGUMENTS[case]
    kw = dict(kw)
    data = kw.pop("data", _H)
    if isinstance(data, str):
        data = MassHistogram(bins=100, range=_W).fill(_X)
        data.weight_sum = data.weight_sum.copy()
        data.weight_sum[5] = -20.0
    sig = kw.pop("signal", "gaussian")
    with pytest.raises(peaksift.errors.FitError, match=match):
        peaksift.fit(data, sig, "exponential", _W, **kw)


def test_every_parameter_fixed_evaluates_the_likelihood():
    """With nothing free the fit used to die in iminuit (RuntimeError); it now returns the
    likelihood at the given values: the saturated binned NLL (Baker and Cousins 1984,
    eq. 11) written out here with scipy.special, to 1e-9; unbinned: finite."""
    vals = {"mass": 170.0, "sigma": 3.0, "signal_yield": 300.0, "b1": -100.0 / 60.0,
            "background_yield": 3000.0}
    r = peaksift.fit(_H, "gaussian", "exponential", _W, fixed=vals)
    assert r.valid and r.parameters == tuple(vals) and r.fixed == tuple(vals)
    ref = _hand_binned_nll(_H.weight_sum, np.asarray(_H.edges), _W)(
        vals["mass"], vals["sigma"], vals["signal_yield"], vals["b1"],
        vals["background_yield"])
    assert r.nll == pytest.approx(ref, abs=1e-9 * abs(ref))
    ru = peaksift.fit(_X, "gaussian", "exponential", _W, fixed=vals, binned=False)
    assert math.isfinite(ru.nll) and ru.valid


def test_observed_hessian_steps_stay_inside_the_bounds():
    """A peak at the window's edge with a huge error estimate on its mass: the difference
    step used to leave the window, the Gaussian then had no probability in it and the
    Hessian raised ZeroDivisionError (the fit reported 'covariance not positive definite').
    Now every step stays inside the bounds and the Hessian is finite and symmetric."""
    from peaksift.likelihood import BinnedCost, Model

    m = Model("gaussian", "exponential", _W)
    edges = np.linspace(*_W, 201)
    n = np.random.default_rng(1).poisson(50, 200).astype(float)
    x = np.array([299.5, 0.02, 1.0, -1.0, n.sum()])
    cost = BinnedCost(m, x, np.arange(5), [], edges, n, np.ones(200))
    h = cost.observed_hessian(x, np.array([10.0, 1e-3, 1.0, 1e-3, 1.0]))
    assert np.all(np.isfinite(h)) and np.allclose(h, h.T)


def test_gaussian_tail_in_a_window_above_the_peak():
    """A Z-like peak (91.19 GeV, sigma 1 and 2.5) seen only through its upper tail in a
    110-200 GeV window: Phi(z) rounds to 1 there, so the window's probability used to be
    1 - 1 = 0 (ZeroDivisionError in the fit's fast path, NaN elsewhere).  Bin fractions
    against a log-space reference from scipy.special.log_ndtr (rel. 1e-9, abs. 1e-15 of the
    total: CDF differences carry absolute, not relative, precision), in all three code
    paths; the density (rel. 1e-9)."""
    from scipy.special import log_ndtr

    g = shapes.get("gaussian")
    window = (110.0, 200.0)
    e = np.linspace(*window, 91)
    for mass, sigma in ((91.19, 1.0), (91.19, 2.5)):
        la = log_ndtr(-(e - mass) / sigma)  # log upper-tail probability at each edge
        ref = np.exp(la[:-1] + np.log1p(-np.exp(la[1:] - la[:-1]))
                     - la[0] - np.log1p(-np.exp(la[-1] - la[0])))
        for got in (g.fractions_and_grad(e, [mass, sigma], window)[0],
                    g.bin_fractions(e, [mass, sigma], window),
                    g.bin_fractions(e, [np.array([[mass]]), sigma], window)[0]):
            np.testing.assert_allclose(got, ref, rtol=1e-9, atol=1e-15)
        x = np.array([111.0, 115.0])
        pdf = g.pdf_and_grad(x, [mass, sigma], window)[0]
        lp = (-0.5 * ((x - mass) / sigma) ** 2 - 0.5 * np.log(2 * np.pi) - np.log(sigma)
              - la[0] - np.log1p(-np.exp(la[-1] - la[0])))
        np.testing.assert_allclose(pdf, np.exp(lp), rtol=1e-9)
