"""Upper limits with the signal-shape nuisances and the background envelope profiled.

Checks:
* every shape size 0 with one function gives the plain asymptotic limits exactly (the
  issue's requirement: with every size 0 every number equals today's);
* with a mass-scale, a resolution and a normalisation uncertainty, and with an envelope of
  two functions, the observed and the median expected CLs limits against an independent
  computation written here: iminuit profiles of a likelihood written from scratch (bin
  integrals from ``scipy.stats.norm.cdf`` and closed-form exponential / power-law integrals;
  Gaussian constraints 1/2 ((k-1)/delta)^2 and a log-normal normalisation exp(delta t) with
  1/2 t^2, common practice), the test statistic q~mu and the asymptotic CLs of Cowan,
  Cranmer, Gross, Vitells, EPJC 71 (2011) 1554, eqs. 16, 65-66, the envelope
  min_c [NLL_c + a N_c / 2] of Dauncey, Kenzie, Wardle, Davies, JINST 10 (2015) P04015;
  tolerance 0.1% relative (the module interpolates each profile on a grid; measured
  agreement 2e-4);
* systematics only widen the expected limits of one function (a profile over more
  parameters cannot raise the NLL's curvature; common practice).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from iminuit import Minuit
from scipy import optimize
from scipy import stats as st

from peaksift.likelihood import SignalNuisances
from peaksift.resolution import resolution_from
from peaksift.stats import upper_limits
from peaksift.stats.background_choice import candidate_shapes
from peaksift.stats.limits_systematics import systematic_limits

WINDOW = (100.0, 200.0)
EDGES = np.linspace(*WINDOW, 101)
SIGMA = 2.0
LUMI, EFF, D_LUMI, D_EFF = 10.0, 0.5, 0.02, 0.05
NORM = {"luminosity": LUMI, "efficiency": EFF, "luminosity_uncertainty": D_LUMI,
            "efficiency_uncertainty": D_EFF}


def _data() -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(1)
    x = np.concatenate([100 + rng.exponential(40, 20000), rng.normal(150, 2.0, 40)])
    x = x[(x > WINDOW[0]) & (x < WINDOW[1])]
    return x, np.ones_like(x)


# ------------------------------------------------------------ the independent reference
def _exponential(slope: float) -> np.ndarray:
    lo, hi = WINDOW
    c, h = 0.5 * (lo + hi), 0.5 * (hi - lo)
    if abs(slope) < 1e-9:
        return np.diff(EDGES) / (hi - lo)
    prim = np.exp(slope * (EDGES - c) / h)
    return np.diff(prim) / (prim[-1] - prim[0])


def _power(k: float) -> np.ndarray:
    prim = EDGES ** (1.0 - k) / (1.0 - k)
    return np.diff(prim) / (prim[-1] - prim[0])


FUNCS = {"exponential": (_exponential, -1.0), "power": (_power, 3.0)}


class _Reference:
    """CLs limits of one mass from iminuit profiles of the likelihood written here."""

    def __init__(self, n: np.ndarray, mass: float, d_scale: float, d_res: float,
                 funcs: dict[str, int]) -> None:
        self.n, self.mass, self.ds, self.dr = n, mass, d_scale, d_res
        self.funcs = funcs  # name -> free parameters (for the penalty, a = 1)
        self.delta = math.hypot(math.log1p(D_LUMI), math.log1p(D_EFF))
        self.conv = LUMI * EFF

    def _sig(self, km: float, kr: float) -> np.ndarray:
        cdf = st.norm.cdf(EDGES, self.mass * km, SIGMA * kr)  # not frozen: 5 ms a call
        return np.diff(cdf) / (cdf[-1] - cdf[0])

    def _nll(self, counts, func, s, b, p, km, kr, t):
        nu = s * self._sig(km, kr) + b * FUNCS[func][0](p)
        if np.any(nu <= 0) or not np.all(np.isfinite(nu)):
            return 1e30
        return float(np.sum(nu - counts * np.log(nu)) + 0.5 * ((km - 1) / self.ds) ** 2
                     + 0.5 * ((kr - 1) / self.dr) ** 2 + 0.5 * t * t)

    def _fit(self, counts, func, mu: float | None, background_only: bool = False) -> float:
        """min NLL at fixed mu (or mu free: ``None``; or s = 0)."""
        delta, conv = self.delta, self.conv
        best = np.inf
        for p0 in (FUNCS[func][1],):
            if background_only:
                m = Minuit(lambda b, p: self._nll(counts, func, 0.0, b, p, 1.0, 1.0, 0.0),
                           b=counts.sum(), p=p0)
            elif mu is None:  # free yield: t sits at 0 (degenerate with s)
                m = Minuit(lambda s, b, p, km, kr: self._nll(counts, func, s, b, p, km, kr,
                                                             0.0),
                           s=10.0, b=counts.sum(), p=p0, km=1.0, kr=1.0)
                m.limits["kr"] = (0.2, 3.0)
            else:
                m = Minuit(lambda b, p, km, kr, t: self._nll(
                    counts, func, mu * conv * math.exp(delta * t), b, p, km, kr, t),
                    b=counts.sum(), p=p0, km=1.0, kr=1.0, t=0.0)
                m.limits["kr"] = (0.2, 3.0)
            m.errordef = Minuit.LIKELIHOOD
            m.migrad()
            best = min(best, m.fval)
        return best

    def env(self, counts, mu, background_only=False) -> float:
        return min(self._fit(counts, f, mu, background_only) + 0.5 * k
                   for f, k in self.funcs.items())

    def asimov(self) -> np.ndarray:
        """Background-only expectation of the function the envelope takes without signal."""
        best, out = np.inf, None
        for f, k in self.funcs.items():
            m = Minuit(self._background_nll(f), b=self.n.sum(), p=FUNCS[f][1])
            m.errordef = Minuit.LIKELIHOOD
            m.migrad()
            if m.fval + 0.5 * k < best:
                best = m.fval + 0.5 * k
                out = m.values["b"] * FUNCS[f][0](m.values["p"])
        return out

    def _background_nll(self, f):
        return lambda b, p: self._nll(self.n, f, 0.0, b, p, 1.0, 1.0, 0.0)

    def _free_nll(self, f):
        return lambda s, b, p, km, kr: self._nll(self.n, f, s, b, p, km, kr, 0.0)

    def limits(self, cl: float = 0.95, bracket: tuple[float, float] = (0.5, 200.0)
               ) -> tuple[float, float]:
        alpha = 1 - cl
        a = self.asimov()
        a0 = self.env(a, None, background_only=True)
        # unconditional fit of the data: mu_hat from the envelope's best function
        fits = {}
        for f, k in self.funcs.items():
            m = Minuit(self._free_nll(f), s=10.0, b=self.n.sum(), p=FUNCS[f][1], km=1.0,
                       kr=1.0)
            m.limits["kr"] = (0.2, 3.0)
            m.errordef = Minuit.LIKELIHOOD
            m.migrad()
            fits[f] = (m.fval + 0.5 * k, m.values["s"] / self.conv)
        ref, mu_hat = min(fits.values())
        if mu_hat < 0:
            ref = self.env(self.n, 0.0)

        def qa(mu):
            return max(2 * (self.env(a, mu) - a0), 1e-12)

        def cls(mu):  # CCGV eqs. 65-66 with a^2 = q_mu,A
            q = 0.0 if mu_hat > mu else max(2 * (self.env(self.n, mu) - ref), 0.0)
            q_a = qa(mu)
            if q <= q_a:
                clsb, clb = st.norm.sf(math.sqrt(q)), st.norm.cdf(math.sqrt(q_a) - math.sqrt(q))
            else:
                r = 2 * math.sqrt(q_a)
                clsb, clb = st.norm.sf((q + q_a) / r), st.norm.sf((q - q_a) / r)
            return clsb / clb - alpha

        z = st.norm.ppf(1 - alpha / 2)  # the median expected limit: q_mu,A = z^2 (CLs, N=0)
        expected = optimize.brentq(lambda mu: qa(mu) - z * z, *bracket, xtol=1e-4)
        observed = optimize.brentq(cls, *bracket, xtol=1e-4)
        return observed, expected


# ------------------------------------------------------------------------------- tests
def test_every_size_zero_gives_the_plain_limits_exactly():
    """The issue: with every size 0 every number equals today's (upper_limits)."""
    data = _data()
    masses = np.linspace(120, 180, 5)
    plain = upper_limits(data, "gaussian", "exponential", masses, absolute_resolution=SIGMA,
                         window=WINDOW, bins=100, method="asymptotic", **NORM)
    syst = systematic_limits(data, "gaussian", {"exponential": "exponential"}, masses,
                             resolution=resolution_from(None, absolute=SIGMA),
                             window=WINDOW, bins=100, nuisances=SignalNuisances(), **NORM)
    assert np.array_equal(np.asarray(syst["observed"]), plain.observed)
    for key, ref in (("expected", plain.expected), ("expected_minus2", plain.expected_minus2),
                     ("expected_plus2", plain.expected_plus2)):
        assert np.array_equal(np.asarray(syst[key]), ref)


@pytest.mark.slow
@pytest.mark.parametrize("mass,funcs", [
    (150.0, {"exppoly1": ("exponential", 2)}),
    (140.0, {"exppoly1": ("exponential", 2), "powersum1": ("power", 3)}),
])
def test_limits_with_shape_nuisances_and_envelope_match_an_independent_profile(mass, funcs):
    """Observed and median expected limits vs iminuit profiles written here (CCGV eqs. 16,
    65-66; Dauncey et al. 2015 for the envelope); 0.1% relative."""
    x, w = _data()
    nuis = SignalNuisances.make({"mass_scale": 0.01, "mass_resolution": 0.2})
    shapes = candidate_shapes(list(funcs))
    res = systematic_limits((x, w), "gaussian", shapes, np.array([mass]),
                            resolution=resolution_from(None, absolute=SIGMA), window=WINDOW,
                            bins=100, nuisances=nuis,
                            n_parameters={k: v[1] for k, v in funcs.items()}, **NORM)
    n = np.histogram(x, EDGES)[0].astype(float)
    ref = _Reference(n, mass, 0.01, 0.2, {v[0]: v[1] for v in funcs.values()})
    observed, expected = ref.limits()
    assert res["observed"][0] == pytest.approx(observed, rel=1e-3)
    assert res["expected"][0] == pytest.approx(expected, rel=1e-3)


def test_shape_nuisances_widen_the_expected_limits():
    """Profiling more parameters can only flatten the Asimov profile (common practice)."""
    data = _data()
    masses = np.linspace(120, 180, 4)
    kw = dict(resolution=resolution_from(None, absolute=SIGMA), window=WINDOW, bins=100,
              **NORM)
    bkg = {"exponential": "exponential"}
    without = systematic_limits(data, "gaussian", bkg, masses, **kw)
    with_ = systematic_limits(data, "gaussian", bkg, masses, nuisances=SignalNuisances.make(
        {"mass_scale": 0.01, "mass_resolution": 0.2}), **kw)
    assert np.all(np.asarray(with_["expected"]) >= np.asarray(without["expected"]) * 0.999)
    assert np.all(np.asarray(with_["expected_plus2"])
                  >= np.asarray(without["expected_plus2"]) * 0.999)


def test_blinded_limits_with_systematics_give_expected_only_inside():
    """While blinded: no observed limit inside the blinded range (the data there are not
    seen), the expected bands everywhere and ordered (Cowan et al. 2011, sec. 4.3: median
    inside its +-2 sigma band), observed limits outside."""
    x, w = _data()
    masses = np.array([120.0, 150.0, 180.0])
    nuis = SignalNuisances.make({"mass_scale": 0.01, "mass_resolution": 0.2})
    res = systematic_limits((x, w), "gaussian", {"exppoly1": candidate_shapes(["exppoly1"])[
        "exppoly1"]}, masses, resolution=resolution_from(None, absolute=SIGMA), window=WINDOW,
        bins=100, nuisances=nuis, blind=(145.0, 155.0), **NORM)
    assert res["observed"][1] is None and res["blinded"] == [False, True, False]
    for i in range(3):
        assert 0 < res["expected_minus2"][i] < res["expected"][i] < res["expected_plus2"][i]
    assert res["observed"][0] > 0 and res["observed"][2] > 0


@pytest.mark.parametrize("n", [4, 5, 17, 30])
def test_profile_spline_is_the_not_a_knot_cubic_spline(n):
    """The curves' spline (written out, without scipy.interpolate) against
    ``scipy.interpolate.CubicSpline`` (not-a-knot ends, its default): coefficients and
    values between the knots to 1e-12 relative, on even and uneven knots."""
    from scipy.interpolate import CubicSpline

    from peaksift.stats.limits_systematics import _spline_coefficients

    rng = np.random.default_rng(n)
    for x in (np.linspace(0.0, 1.0, n), np.cumsum(rng.uniform(0.5, 1.5, n))):
        y = rng.normal(size=(n, 3)) + 40.0 * (x[:, None] - x.mean()) ** 2
        ref = CubicSpline(x, y)
        c = _spline_coefficients(x, y)
        assert c.shape == ref.c.shape
        np.testing.assert_allclose(c, ref.c, rtol=1e-12, atol=1e-12 * np.abs(ref.c).max())
        t = np.linspace(x[0], x[-1], 97)
        i = np.clip(np.searchsorted(x, t) - 1, 0, n - 2)
        d = (t - x[i])[:, None]
        k = np.arange(3)[None, :]
        mine = ((c[0][i[:, None], k] * d + c[1][i[:, None], k]) * d
                + c[2][i[:, None], k]) * d + c[3][i[:, None], k]
        np.testing.assert_allclose(mine, ref(t), rtol=1e-12, atol=1e-12 * np.abs(y).max())
