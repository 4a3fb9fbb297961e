"""Free-fit pulls, minima and interval coverage of ``peaksift.fit`` on toys.

Every toy spectrum is also fitted by an independent binned likelihood written here: the
extended binned Poisson NLL in the saturated form (Baker and Cousins, Nucl. Instrum. Meth. 221
(1984) 437, eq. 11), bin contents from CDF differences written with ``numpy``,
``scipy.special`` and ``scipy.stats`` (not with peaksift's shapes), minimised by iminuit's
MIGRAD started at the truth, errors from HESSE, profile-likelihood intervals from MINOS.

What the study found, and what the checks therefore say
-------------------------------------------------------
* At ~5 sigma the maximum-likelihood solution is, in a few per cent of the toys, not the peak
  near the truth: a narrower or wider peak, a spike narrower than a bin, or a fluctuation
  elsewhere in the window is deeper.  peaksift looks for the lowest minimum over the window
  (and must never be worse than the fit started at the truth); the truth-started fit stays
  near the truth.  In those toys peaksift's mass pull is large, so the pull widths (standard
  deviations) are compared over the toys where both fits reach the same minimum, and, with
  300 toys, over all toys by a quantile width that a few outliers cannot dominate.
* With a free width at ~5 sigma, neither the profile-likelihood intervals nor the symmetric
  (HESSE) errors cover 68.27 %: Wilks' asymptotic chi-square(1) (Wilks, Ann. Math. Stat. 9
  (1938) 60) does not hold yet.  The same intervals agree with the independent MINOS
  intervals, and at ~10 sigma they cover 68.27 % within two binomial standard errors.

Toys are Poisson bin counts drawn around the truth, toy i seeded by (seed, i), so results do
not depend on how the toys are spread over processes.  ``scripts/study_fit_toys.py`` runs the
same study with more toys and prints the table.
"""

from __future__ import annotations

import math
import multiprocessing
import os
import time
import warnings
from collections.abc import Sequence
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pytest
from iminuit import Minuit
from scipy import integrate, special, stats

from peaksift import shapes
from peaksift.fitting import fit
from peaksift.histogram import MassHistogram

#: P(|z| < 1) for a standard normal: 2 Phi(1) - 1 (scipy.special.ndtr)
COVERAGE = float(2.0 * special.ndtr(1.0) - 1.0)
#: a peaksift minimum may be worse than the independent one by at most this in -2 ln L
DELTA_CHI2 = 0.1
#: parameters whose pulls and intervals are studied
STUDIED = ("mass", "signal_yield")


# ------------------------------------------------------------------ independent model
def exponential_cdf(x: np.ndarray, b1: float, window: tuple[float, float]) -> np.ndarray:
    """CDF on the window of a density exp(b1 t), t = (x - centre) / half-width: the
    elementary integral (exp(k (x - lo)) - 1) / (exp(k (hi - lo)) - 1), k = b1 / half-width
    (common practice), with ``numpy.expm1`` for accuracy at small k."""
    lo, hi = window
    k = b1 / (0.5 * (hi - lo))
    if abs(k * (hi - lo)) < 1e-12:
        return (x - lo) / (hi - lo)
    return np.expm1(k * (x - lo)) / np.expm1(k * (hi - lo))


def bernstein_basis_integrals(edges: np.ndarray, degree: int,
                              window: tuple[float, float]) -> np.ndarray:
    """(degree + 1, bins) integrals over each bin of the Bernstein basis polynomials
    b_{i,n}(u) = C(n, i) u^i (1 - u)^(n - i), u = (x - lo) / (hi - lo).  Since
    C(n, i) = 1 / ((n + 1) B(i + 1, n - i + 1)), b_{i,n} is the Beta(i + 1, n - i + 1) density
    divided by n + 1 (common practice): its integral is ``scipy.stats.beta.cdf`` / (n + 1)."""
    lo, hi = window
    u = (edges - lo) / (hi - lo)
    return np.array([np.diff(stats.beta.cdf(u, i + 1, degree - i + 1)) / (degree + 1)
                     for i in range(degree + 1)])


def crystalball_density(z: float, a_lo: float, n_lo: float, a_hi: float, n_hi: float) -> float:
    """Unnormalised double-sided Crystal Ball (f(0) = 1) from its definition: Gaussian core,
    power-law tail (q / (q - alpha + |z|))^n exp(-alpha^2 / 2), q = n / alpha, beyond
    -alpha_low and +alpha_high (Oreglia, SLAC-R-236 (1980); Gaiser, SLAC-R-255 (1982);
    from memory)."""
    if z < -a_lo:
        q = n_lo / a_lo
        return math.exp(-0.5 * a_lo**2) * (q / (q - a_lo - z)) ** n_lo
    if z > a_hi:
        q = n_hi / a_hi
        return math.exp(-0.5 * a_hi**2) * (q / (q - a_hi + z)) ** n_hi
    return math.exp(-0.5 * z * z)


def crystalball_primitive(z: np.ndarray, a_lo: float, n_lo: float, a_hi: float,
                          n_hi: float) -> np.ndarray:
    """int_{-inf}^{z} of :func:`crystalball_density`: the tails integrate to
    exp(-alpha^2/2) q^n (q - alpha + |z|)^(1 - n) / (n - 1), the core to
    sqrt(2 pi) (Phi(z) - Phi(-alpha_low)) (``scipy.special.ndtr``)."""
    q_lo, q_hi = n_lo / a_lo, n_hi / a_hi
    e_lo, e_hi = math.exp(-0.5 * a_lo**2), math.exp(-0.5 * a_hi**2)
    left_total = e_lo * q_lo / (n_lo - 1.0)
    zl = np.minimum(z, -a_lo)
    left = e_lo * q_lo**n_lo * (q_lo - a_lo - zl) ** (1.0 - n_lo) / (n_lo - 1.0)
    core = math.sqrt(2.0 * math.pi) * (special.ndtr(np.clip(z, -a_lo, a_hi)) - special.ndtr(-a_lo))
    zh = np.maximum(z, a_hi)
    right = e_hi * q_hi**n_hi * (q_hi ** (1.0 - n_hi) - (q_hi - a_hi + zh) ** (1.0 - n_hi)) / (
        n_hi - 1.0)
    return np.where(z < -a_lo, left, left_total + core + right)


def crystalball_primitive_scipy(z: np.ndarray, a_lo: float, n_lo: float, a_hi: float,
                                n_hi: float) -> np.ndarray:
    """The same primitive from ``scipy.stats.crystalball`` (one-sided, tail on the left),
    piecewise: up to alpha_high the shape is the one-sided one with (beta, m) =
    (alpha_low, n_low); beyond, the right tail at z is the one-sided (alpha_high, n_high) shape
    at -z.  Each is divided by its pdf(0) to undo scipy's normalisation."""
    left, right = stats.crystalball(beta=a_lo, m=n_lo), stats.crystalball(beta=a_hi, m=n_hi)
    core = left.cdf(np.minimum(z, a_hi)) / left.pdf(0.0)
    tail = (right.cdf(-a_hi) - right.cdf(-np.maximum(z, a_hi))) / right.pdf(0.0)
    return core + np.where(z > a_hi, tail, 0.0)


@dataclass
class Case:
    """One toy configuration: shapes, window, binning, truth and the fixed parameters."""

    label: str
    signal: str
    background: str
    degree: int
    window: tuple[float, float]
    bins: int
    truth: dict[str, float]
    fixed: dict[str, float] = field(default_factory=dict)

    def __post_init__(self) -> None:
        self.edges = np.linspace(*self.window, self.bins + 1)
        self.centers = 0.5 * (self.edges[1:] + self.edges[:-1])
        self.free = [k for k in self.truth if k not in self.fixed]
        if self.background == "bernstein":
            self.basis = bernstein_basis_integrals(self.edges, self.degree, self.window)
        if self.signal == "crystalball":
            f = self.fixed
            self.tails = (f["alpha_low"], f["n_low"], f["alpha_high"], f["n_high"])

    def peaksift_shapes(self) -> tuple[Any, Any]:
        bkg = (shapes.get("bernstein", degree=self.degree) if self.background == "bernstein"
               else self.background)
        return self.signal, bkg

    def signal_fractions(self, p: dict[str, float]) -> np.ndarray:
        z = (self.edges - p["mass"]) / p["sigma"]
        c = (special.ndtr(z) if self.signal == "gaussian"
             else crystalball_primitive(z, *self.tails))
        return np.diff(c) / (c[-1] - c[0])

    def background_fractions(self, p: dict[str, float]) -> np.ndarray:
        if self.background == "exponential":
            return np.diff(exponential_cdf(self.edges, p["b1"], self.window))
        # Bernstein coefficients beta_0 = 1, beta_i = c_i^2 (peaksift's parametrisation)
        beta = np.array([1.0] + [p[f"c{i}"] ** 2 for i in range(1, self.degree + 1)])
        per_bin = beta @ self.basis
        return per_bin / per_bin.sum()

    def expected(self, p: dict[str, float]) -> np.ndarray:
        return (p["signal_yield"] * self.signal_fractions(p)
                + p["background_yield"] * self.background_fractions(p))

    def with_yield(self, signal_yield: float, label: str) -> Case:
        return Case(label, self.signal, self.background, self.degree, self.window, self.bins,
                    {**self.truth, "signal_yield": signal_yield}, dict(self.fixed))


def nll(n: np.ndarray, mu: np.ndarray) -> float:
    """Extended binned Poisson NLL in the saturated form sum(mu - n + n ln(n / mu))
    (Baker and Cousins 1984, eq. 11): differences are likelihood ratios, and 2 nll at the
    minimum is the goodness-of-fit chi-square."""
    if not np.all(np.isfinite(mu)) or np.any(mu <= 0):
        return 1e30
    t = np.where(n > 0, n * np.log(np.where(n > 0, n, 1.0) / mu), 0.0)
    return float(np.sum(mu - n + t))


def independent_fit(case: Case, n: np.ndarray, minos: bool = True) -> Minuit:
    """MIGRAD on :func:`nll` from the truth (a second MIGRAD if the first is not valid),
    HESSE, and MINOS for the studied parameters."""
    names = case.free
    p = {**case.truth, **case.fixed}

    def cost(*x: float) -> float:
        p.update(zip(names, x))
        return nll(n, case.expected(p))

    m = Minuit(cost, *[case.truth[k] for k in names], name=names)
    m.errordef = Minuit.LIKELIHOOD
    m.limits["mass"] = case.window
    m.limits["sigma"] = (0.01, 0.5 * (case.window[1] - case.window[0]))
    m.limits["background_yield"] = (0.0, None)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        m.migrad()
        if not m.valid:
            m.migrad()
        m.hesse()
        if minos and m.valid:
            try:
                m.minos(*STUDIED)
            except RuntimeError:
                pass
    return m


def asimov_significance(case: Case) -> float:
    """sqrt(q0) on the Asimov spectrum (Cowan, Cranmer, Gross, Vitells, EPJC 71 (2011)
    1554, sect. 5): the median discovery significance, mass and width at the truth,
    background profiled."""
    mu0 = case.expected({**case.truth, **case.fixed})
    names = [k for k in case.free if k not in ("mass", "sigma", "signal_yield")]
    p = {**case.truth, **case.fixed, "signal_yield": 0.0}

    def cost(*x: float) -> float:
        p.update(zip(names, x))
        return nll(mu0, case.expected(p))

    m = Minuit(cost, *[case.truth[k] for k in names], name=names)
    m.errordef = Minuit.LIKELIHOOD
    m.migrad()
    return math.sqrt(2.0 * m.fval)


# ------------------------------------------------------------------ the configurations
_GAUSS = Case("Gaussian on exponential, 5 sigma", "gaussian", "exponential", 1, (100.0, 160.0),
              100, {"mass": 130.0, "sigma": 2.0, "signal_yield": 115.0, "b1": -1.0,
                    "background_yield": 4000.0})
#: Crystal Ball tails fixed (as from simulation: common practice); mass, sigma, yields and the
#: Bernstein coefficients free
_CB = Case("Crystal Ball on Bernstein(3), 5 sigma", "crystalball", "bernstein", 3,
           (100.0, 160.0), 100,
           {"mass": 125.0, "sigma": 2.0, "signal_yield": 157.0, "c1": math.sqrt(0.6),
            "c2": math.sqrt(0.4), "c3": math.sqrt(0.3), "background_yield": 4000.0},
           {"alpha_low": 1.5, "n_low": 3.0, "alpha_high": 2.0, "n_high": 5.0})
CASES = {"gauss_exp": _GAUSS, "cb_bern": _CB,
         "gauss_exp_10sigma": _GAUSS.with_yield(240.0, "Gaussian on exponential, 10 sigma")}
#: (significance range of the Asimov data set) per configuration
ASIMOV_Z = {"gauss_exp": (4.5, 5.5), "cb_bern": (4.5, 5.5), "gauss_exp_10sigma": (9.0, 11.0)}


# ------------------------------------------------------------------ one toy, a study
def one_toy(case: Case, seed: Sequence[int], independent: bool = True) -> dict[str, Any]:
    """Draw one toy, fit it with peaksift (profile intervals of the studied parameters) and,
    if asked, with the independent fit; return the numbers the checks need."""
    rng = np.random.default_rng(list(seed))
    n = rng.poisson(case.expected({**case.truth, **case.fixed})).astype(float)
    h = MassHistogram(case.edges)
    h.fill(np.repeat(case.centers, n.astype(int)))
    sig, bkg = case.peaksift_shapes()
    t0 = time.process_time()
    r = fit(h, sig, bkg, case.window, fixed=case.fixed, intervals=list(STUDIED))
    t1 = time.process_time()
    m = independent_fit(case, n) if independent else None
    t2 = time.process_time()
    iv = dict(r.intervals or {})
    out: dict[str, Any] = {
        "ps_valid": r.valid, "ps_nll": r.nll, "ps_nll_here": nll(n, case.expected(dict(r.values))),
        "ps_time": t1 - t0, "ind_valid": m is not None and m.valid,
        "ind_nll": m.fval if m is not None else math.nan, "ind_time": t2 - t1,
    }
    for k in STUDIED:
        out[f"ps_{k}"], out[f"ps_{k}_err"] = r.values[k], r.errors[k]
        out[f"ps_{k}_lo"], out[f"ps_{k}_hi"] = iv.get(k, (math.nan, math.nan))
        me = m.merrors[k] if m is not None and k in m.merrors else None
        out[f"ind_{k}"] = m.values[k] if m is not None else math.nan
        out[f"ind_{k}_err"] = m.errors[k] if m is not None else math.nan
        out[f"ind_{k}_lo"] = me.lower if me is not None and me.is_valid else math.nan
        out[f"ind_{k}_hi"] = me.upper if me is not None and me.is_valid else math.nan
    return out


def _run_one(args: tuple[str, int, int, bool]) -> dict[str, Any]:
    key, seed, i, independent = args
    return one_toy(CASES[key], (seed, i), independent)


def run_study(key: str, n_toys: int, seed: int, workers: int = 2,
              independent: bool = True) -> dict[str, np.ndarray]:
    """``n_toys`` toys of ``CASES[key]``, toy i seeded by (seed, i); columns as arrays."""
    jobs = [(key, seed, i, independent) for i in range(n_toys)]
    if workers > 1:
        with ProcessPoolExecutor(workers, mp_context=multiprocessing.get_context("fork")) as pool:
            rows = list(pool.map(_run_one, jobs, chunksize=max(1, n_toys // (8 * workers))))
    else:
        rows = [_run_one(j) for j in jobs]
    return {k: np.array([r[k] for r in rows]) for k in rows[0]}


def quantile_width(p: np.ndarray) -> float:
    """Half the 15.87-84.13 % quantile range: sigma for a normal distribution
    (``scipy.special.ndtr``), and not dominated by a few outliers."""
    a, b = np.quantile(p, [special.ndtr(-1.0), special.ndtr(1.0)])
    return float(0.5 * (b - a))


def summarize(case: Case, t: dict[str, np.ndarray]) -> dict[str, float]:
    """The numbers of the report table for one study (independent-fit columns NaN when the
    study ran without it)."""
    d2 = 2.0 * (t["ps_nll_here"] - t["ind_nll"])
    same = np.abs(d2) <= DELTA_CHI2
    out: dict[str, float] = {
        "toys": float(d2.size), "ps_valid": float(np.mean(t["ps_valid"])),
        "ind_valid": float(np.mean(t["ind_valid"])),
        "worst_d2nll": float(np.nanmax(d2)) if np.isfinite(d2).any() else math.nan,
        "ps_deeper": float(np.sum(d2 < -DELTA_CHI2)), "same_minimum": float(same.sum()),
        "nll_form_diff": float(np.max(np.abs(t["ps_nll"] - t["ps_nll_here"]))),
        "ps_ms": 1e3 * float(np.mean(t["ps_time"])), "ind_ms": 1e3 * float(np.mean(t["ind_time"])),
    }
    for k in STUDIED:
        truth = case.truth[k]
        ps = (t[f"ps_{k}"] - truth) / t[f"ps_{k}_err"]
        ind = (t[f"ind_{k}"] - truth) / t[f"ind_{k}_err"]
        fin = np.isfinite(ps)
        both = fin & np.isfinite(ind) & same
        out[f"{k}_ps_sd"] = float(np.std(ps[fin], ddof=1))
        out[f"{k}_ind_sd"] = float(np.std(ind[np.isfinite(ind)], ddof=1)) if np.isfinite(
            ind).sum() > 1 else math.nan
        out[f"{k}_ps_sd_same"] = float(np.std(ps[both], ddof=1)) if both.sum() > 1 else math.nan
        out[f"{k}_ind_sd_same"] = float(np.std(ind[both], ddof=1)) if both.sum() > 1 else math.nan
        out[f"{k}_ps_qw"] = quantile_width(ps[fin])
        out[f"{k}_ind_qw"] = quantile_width(ind[np.isfinite(ind)]) if np.isfinite(
            ind).any() else math.nan
        lo, hi = t[f"ps_{k}"] + t[f"ps_{k}_lo"], t[f"ps_{k}"] + t[f"ps_{k}_hi"]
        has = np.isfinite(lo) & np.isfinite(hi)
        out[f"{k}_with_interval"] = float(has.mean())
        out[f"{k}_profile_cov"] = float(np.mean((lo[has] <= truth) & (truth <= hi[has])))
        out[f"{k}_hesse_cov"] = float(np.mean(np.abs(ps[fin]) < 1.0))
        # peaksift's interval ends against the independent MINOS ends, in units of the
        # independent HESSE error, over toys where both fits reach one minimum (|Delta(-2 ln
        # L)| < 1e-3: two distinct minima can lie within 0.1) and both intervals were made
        cmp = ((np.abs(d2) < 1e-3) & has & np.isfinite(t[f"ind_{k}_lo"]) & np.isfinite(t[f"ind_{k}_hi"])
               & np.isfinite(t[f"ind_{k}_err"]))
        dev = np.maximum(np.abs(lo - t[f"ind_{k}"] - t[f"ind_{k}_lo"]),
                         np.abs(hi - t[f"ind_{k}"] - t[f"ind_{k}_hi"])) / t[f"ind_{k}_err"]
        out[f"{k}_interval_compared"] = float(cmp.sum())
        out[f"{k}_interval_dev"] = float(np.max(dev[cmp])) if cmp.any() else math.nan
    return out


def binomial_error(p: float, n: float) -> float:
    """sqrt(p (1 - p) / n): the standard error of a fraction of n trials (common practice)."""
    return math.sqrt(p * (1.0 - p) / n)


# ------------------------------------------------------------------ the tests
def test_reference_cdfs():
    """The reference CDFs written above against outside references: the Crystal Ball
    primitive against ``scipy.stats.crystalball`` assembled piecewise and against
    ``scipy.integrate.quad`` of the density written from its definition; Bernstein basis
    integrals and the exponential CDF against ``quad``.  Tolerance 1e-9 of the total."""
    pars = (1.5, 3.0, 2.0, 5.0)
    zs = np.array([-40.0, -4.0, -1.5, -0.3, 1.0, 2.0, 2.5, 9.0, 40.0])
    total = float(crystalball_primitive(np.array(1e12), *pars))
    ours = crystalball_primitive(zs, *pars)
    np.testing.assert_allclose(ours, crystalball_primitive_scipy(zs, *pars), atol=1e-9 * total)
    for a, b, fa, fb in zip(zs[:-1], zs[1:], ours[:-1], ours[1:]):
        ref = integrate.quad(crystalball_density, a, b, args=pars, points=[-1.5, 2.0],
                             limit=200, epsabs=1e-13, epsrel=1e-12)[0]
        assert abs((fb - fa) - ref) < 1e-9 * total, (a, b)
    window, edges = (100.0, 160.0), np.array([100.0, 113.0, 140.0, 160.0])
    basis = bernstein_basis_integrals(edges, 3, window)
    for i in range(4):
        for j in range(3):
            ref = integrate.quad(lambda x, i=i: math.comb(3, i) * ((x - 100) / 60) ** i
                                 * (1 - (x - 100) / 60) ** (3 - i) / 60, edges[j], edges[j + 1])[0]
            assert basis[i, j] == pytest.approx(ref, abs=1e-10)
    def dens(x):
        return math.exp(-(x - 130.0) / 30.0)
    ref = integrate.quad(dens, 100, 140)[0] / integrate.quad(dens, 100, 160)[0]
    assert exponential_cdf(edges, -1.0, window)[2] == pytest.approx(ref, rel=1e-10)


@pytest.mark.parametrize("key", sorted(CASES))
def test_configuration_significance(key):
    """The Asimov median significance (Cowan et al. 2011, sect. 5) of each configuration is
    in its stated range, so "5 sigma" and "10 sigma" toys are what they say."""
    lo, hi = ASIMOV_Z[key]
    assert lo < asimov_significance(CASES[key]) < hi


#: (seed, toys, with the independent fit) per configuration.  A Crystal Ball fit with its
#: profile intervals costs ~3 s of CPU (the shape's gradient is by finite differences over all
#: six parameters, fixed tails included), so the test runs 24 of those toys and the script 300.
PLAN = {"gauss_exp": (20261211, 300, True), "cb_bern": (20261212, 24, True),
        "gauss_exp_10sigma": (20261213, 300, False)}


@pytest.fixture(scope="module")
def studies() -> dict[str, dict[str, float]]:
    workers = min(2, os.cpu_count() or 1)
    return {key: summarize(CASES[key], run_study(key, n, seed, workers, independent))
            for key, (seed, n, independent) in PLAN.items()}


@pytest.mark.slow
@pytest.mark.parametrize("key", ["gauss_exp", "cb_bern"])
def test_minima_and_pull_widths_match_independent_fit(studies, key):
    """Against the independent fit (module docstring):
    * peaksift's ``nll`` is the saturated Poisson NLL (Baker and Cousins 1984, eq. 11) at its
      values, to 1e-6;
    * no toy whose peaksift minimum is worse than the independent one by
      Delta(-2 ln L) > 0.1 (both from :func:`nll`);
    * mass pull width (standard deviation) within 10 % of the independent fit's over the toys
      where both reach the same minimum (80 % of them at least: peaksift also starts at
      dips, and in 4 of the 24 Crystal Ball toys on a Bernstein background a negative yield
      -- a wide one bending the background, or a narrower peak -- lies 0.8-2.2 in NLL below
      the fit started at the truth), and with 300 toys the quantile width over all toys
      within 10 %;
    * where both reach the same minimum, peaksift's profile-likelihood interval ends agree with
      the independent MINOS ends to 2 % of the HESSE error."""
    s = studies[key]
    n = s["toys"]
    assert s["nll_form_diff"] < 1e-6, s
    assert s["worst_d2nll"] <= DELTA_CHI2, s
    assert s["same_minimum"] >= 0.8 * n, s
    # every other toy is a deeper minimum by the test's own NLL, none unaccounted for (a NaN)
    assert s["same_minimum"] + s["ps_deeper"] == n, s
    assert abs(s["mass_ps_sd_same"] / s["mass_ind_sd_same"] - 1.0) < 0.10, s
    if n >= 300:  # the quantile width of a few dozen toys is too noisy for 10 %
        assert abs(s["mass_ps_qw"] / s["mass_ind_qw"] - 1.0) < 0.10, s
    for k in STUDIED:
        assert s[f"{k}_interval_compared"] >= 0.8 * n, (k, s)  # as same_minimum
        assert s[f"{k}_interval_dev"] < 0.02, (k, s)


@pytest.mark.slow
def test_profile_intervals_cover_at_ten_sigma(studies):
    """At ~10 sigma the profile-likelihood intervals of mass and signal yield cover 68.27 %
    (2 Phi(1) - 1) within two binomial standard errors (sqrt(p (1 - p) / N) = 0.027 for 300
    toys), as Wilks' theorem says asymptotically; an interval is made in 99 % of the toys at
    least.  (With 1000 toys the script resolves a small remaining shortfall, ~65.5 %.)"""
    s = studies["gauss_exp_10sigma"]
    for k in STUDIED:
        assert s[f"{k}_with_interval"] >= 0.98, (k, s)
        tol = 2.0 * binomial_error(COVERAGE, s["toys"])
        assert abs(s[f"{k}_profile_cov"] - COVERAGE) < tol, (k, s)


@pytest.mark.slow
def test_intervals_under_cover_at_five_sigma_with_free_width(studies):
    """At ~5 sigma with a free width (300 toys) an interval is made in 98 % of the toys at
    least (none where the deepest minimum is a spike narrower than a bin: that fit is flagged
    invalid; none where MINOS does not validate a side: that end is left out, not quoted --
    2 toys of 300 for the mass), but neither the profile-likelihood intervals nor the symmetric HESSE errors
    reach 68.27 %: both lie more than one binomial standard error below it for mass and
    yield, and the profile intervals do not cover better than HESSE by two standard errors.
    (Measured and reported: the asymptotic regime of the 10 sigma test is not reached.)"""
    s = studies["gauss_exp"]
    se = binomial_error(COVERAGE, s["toys"])
    for k in STUDIED:
        assert s[f"{k}_with_interval"] >= 0.98, (k, s)
        assert s[f"{k}_profile_cov"] < COVERAGE - se, (k, s)
        assert s[f"{k}_hesse_cov"] < COVERAGE - se, (k, s)
        assert s[f"{k}_profile_cov"] - s[f"{k}_hesse_cov"] < 2.0 * se, (k, s)
