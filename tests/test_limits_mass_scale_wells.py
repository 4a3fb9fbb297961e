"""Limits with a mass-scale nuisance far wider than a narrow peak: the global profile.

A peak of width 0.5 GeV at 150 GeV with a 5% mass scale (one standard deviation moves it
by 7.5 GeV, fifteen widths): the NLL as a function of the mass-scale factor has a well at
every upward fluctuation within reach, and the profile likelihood is the lowest of them
(Cowan, Cranmer, Gross, Vitells, EPJC 71 (2011) 1554, eq. 7).  The reference here is
written from scratch: bin integrals from ``scipy.special.ndtr``, the closed-form
exponential's, a Gaussian constraint 1/2 ((k-1)/delta)^2 per factor (common practice),
and the mass-scale factor profiled by a grid of 501 values over +-5 standard deviations,
each with the other parameters minimised by iminuit (warm starts along the grid), the
lowest polished by iminuit with the factor free; q~mu of CCGV eq. 16 and the asymptotic
CLs of CCGV eqs. 65-66 (Read, J. Phys. G 28 (2002) 2693), the median expected limit
from q_mu,A = Phi^-1(1 - alpha/2)^2 (CCGV eq. 89 with CLs).

The check: the reference's CLs - 0.05 (and q_mu,A - z^2) changes sign between 0.995 and
1.005 times peaksift's observed (and expected) limit, i.e. the limits agree to 5e-3
relative (measured: 1.2e-5 here; 4e-4 at most over 24 spectra with 1-10% mass scales,
scripts/study_mass_scale_wells.py, docs/decisions/mass-scale-scan.md).  Fits started at
the centre of the mass scale alone find the nearest well and, on the Asimov data, stop
short of it: their limits (45.33 observed, 34.32 expected events) are 0.647 and 0.989 of
the reference's (70.10, 34.70).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from iminuit import Minuit
from scipy import special

from peaksift.likelihood import SignalNuisances
from peaksift.resolution import resolution_from
from peaksift.stats.background_choice import candidate_shapes
from peaksift.stats.limits_systematics import systematic_limits
from peaksift.stats.scale_scan import needs_scan

WINDOW = (100.0, 200.0)
EDGES = np.linspace(*WINDOW, 201)
MASS, SIGMA = 150.0, 0.5
D_RES = 0.2
CL = 0.95
TOL = 5e-3


def _data(seed: int, signal: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    x = np.concatenate([100.0 + rng.exponential(40.0, 20000),
                        rng.normal(MASS, SIGMA, signal)])
    x = x[(x > WINDOW[0]) & (x < WINDOW[1])]
    return x, np.ones_like(x)


# ------------------------------------------------------------ the independent reference
def _exponential(slope: float) -> np.ndarray:
    """Bin fractions of exp(slope (x - c) / h) in the window (c, h its centre, half width)."""
    lo, hi = WINDOW
    c, h = 0.5 * (lo + hi), 0.5 * (hi - lo)
    if abs(slope) < 1e-9:
        return np.diff(EDGES) / (hi - lo)
    prim = np.exp(slope * (EDGES - c) / h)
    return np.diff(prim) / (prim[-1] - prim[0])


def _gauss(m: float, s: float) -> np.ndarray:
    """Bin fractions of a Gaussian normalised in the window, from the tail the window lies
    in (no cancellation when the peak is near or beyond an edge)."""
    z = (EDGES - m) / s
    prim = special.ndtr(z) if m > 0.5 * sum(WINDOW) else -special.ndtr(-z)
    norm = prim[-1] - prim[0]
    return np.diff(prim) / norm if norm > 0 else np.zeros(EDGES.size - 1)


class _GridReference:
    def __init__(self, d_scale: float) -> None:
        self.ds = d_scale
        self.thetas = np.linspace(-5.0, 5.0, 501)

    def nll(self, counts, s, b, p, km, kr) -> float:
        nu = s * _gauss(MASS * km, SIGMA * kr) + b * _exponential(p)
        if np.any(nu <= 0) or not np.all(np.isfinite(nu)):
            return 1e30
        return float(np.sum(nu - counts * np.log(nu)) + 0.5 * ((km - 1) / self.ds) ** 2
                     + 0.5 * ((kr - 1) / D_RES) ** 2)

    def _minuit(self, f, **start) -> Minuit:
        m = Minuit(f, **start)
        if "kr" in start:
            m.limits["kr"] = (1e-3, 1 + 6 * D_RES)
        if "km" in start:
            m.limits["km"] = (1 - 6 * self.ds, 1 + 6 * self.ds)
        m.errordef = Minuit.LIKELIHOOD
        return m

    def _at(self, counts, s: float | None, km: float):
        """The NLL at a fixed mass-scale factor (and yield, unless ``s`` is None)."""
        if s is None:
            return lambda s, b, p, kr: self.nll(counts, s, b, p, km, kr)
        return lambda b, p, kr: self.nll(counts, s, b, p, km, kr)

    def profile(self, counts, s: float | None) -> tuple[float, float]:
        """(min NLL, s at it) over everything at the yield ``s`` (``None``: s free too)."""
        free = s is None
        best = (np.inf, {})
        i0 = int(np.argmin(np.abs(self.thetas)))
        for order in (range(i0, self.thetas.size), range(i0 - 1, -1, -1)):
            st = {"b": counts.sum(), "p": -1.0, "kr": 1.0} | ({"s": 10.0} if free else {})
            for i in order:
                km = 1 + self.ds * self.thetas[i]
                m = self._minuit(self._at(counts, s, km), **st)
                m.strategy = 0
                m.migrad()
                st = dict(m.values.to_dict())
                if m.fval < best[0]:
                    best = (m.fval, {**st, "km": km})
        # polish the lowest grid point with the factor free
        if free:
            m = self._minuit(lambda s, b, p, kr, km: self.nll(counts, s, b, p, km, kr),
                             **best[1])
        else:
            m = self._minuit(lambda b, p, kr, km: self.nll(counts, s, b, p, km, kr),
                             **best[1])
        m.migrad()
        if m.fval < best[0]:
            return m.fval, (m.values["s"] if free else s)
        return best[0], best[1].get("s", s)

    def background(self, counts) -> tuple[float, np.ndarray]:
        m = self._minuit(lambda b, p: self.nll(counts, 0.0, b, p, 1.0, 1.0),
                         b=counts.sum(), p=-1.0)
        m.migrad()
        return m.fval, m.values["b"] * _exponential(m.values["p"])


def _cls(q: float, q_a: float) -> float:
    """CCGV eqs. 65-66: CLs = CLs+b / CLb with the asymptotic distributions of q~mu."""
    q = max(q, 0.0)
    if q <= q_a:
        clsb = special.ndtr(-math.sqrt(q))
        clb = special.ndtr(math.sqrt(q_a) - math.sqrt(q))
    else:
        r = 2 * math.sqrt(q_a)
        clsb, clb = special.ndtr(-(q + q_a) / r), special.ndtr(-(q - q_a) / r)
    return clsb / clb


# ------------------------------------------------------------------------------- test
@pytest.mark.parametrize("seed,signal,d_scale", [
    (1, 0, 0.05),
    # 40 signal events at the nominal mass, 3%: the centre-started unconditional fit
    # missed the lowest well, and the observed limit was 1.33 times the reference's
    pytest.param(2, 40, 0.03, marks=pytest.mark.slow),
])
def test_limits_with_a_wide_mass_scale_on_a_narrow_peak_take_the_lowest_well(
        seed, signal, d_scale):
    """Observed and median expected limits against the grid-profiled reference (CCGV
    eqs. 7, 16, 65-66, 89; Read 2002): 5e-3 relative; and the result says so."""
    x, w = _data(seed, signal)
    nuis = SignalNuisances.make({"mass_scale": d_scale, "mass_resolution": D_RES})
    res = systematic_limits((x, w), "gaussian", candidate_shapes(["exppoly1"]),
                            np.array([MASS]), resolution=resolution_from(None, absolute=SIGMA),
                            window=WINDOW, bins=EDGES.size - 1, nuisances=nuis,
                            method="asymptotic")
    observed, expected = res["observed"][0], res["expected"][0]

    n = np.histogram(x, EDGES)[0].astype(float)
    ref = _GridReference(d_scale)
    _, asimov = ref.background(n)
    nll_a0 = ref.background(asimov)[0]
    nll_hat, mu_hat = ref.profile(n, None)
    nll_ref = nll_hat if mu_hat >= 0 else ref.background(n)[0]   # CCGV eq. 16

    def q_a(mu):
        return 2.0 * (ref.profile(asimov, mu)[0] - nll_a0)

    def cls(mu):
        q = 0.0 if mu_hat > mu else 2.0 * (ref.profile(n, mu)[0] - nll_ref)
        return _cls(q, q_a(mu))

    z2 = special.ndtri(1 - (1 - CL) / 2) ** 2
    assert q_a(expected * (1 - TOL)) < z2 < q_a(expected * (1 + TOL))
    assert cls(observed * (1 - TOL)) > 1 - CL > cls(observed * (1 + TOL))
    assert any("several minima" in note for note in res["notes"])
    # asymptotic with the scale beyond the width: the expected band is said to be doubtful
    # (the decision note's toy study: toys' median 1.4-2.0 times the asymptotic one)
    assert any("(Asimov data set)" in note for note in res["notes"])


def test_no_band_note_where_the_mass_scale_stays_inside_the_width():
    """3 x 0.001 x 150 GeV = 0.45 GeV < the 0.5 GeV width: nothing scanned, and the
    asymptotic band carries no note (the rule of ``needs_scan``, written out below)."""
    x, w = _data(1, 0)
    nuis = SignalNuisances.make({"mass_scale": 0.001, "mass_resolution": D_RES})
    res = systematic_limits((x, w), "gaussian", candidate_shapes(["exppoly1"]),
                            np.array([MASS]), resolution=resolution_from(None, absolute=SIGMA),
                            window=WINDOW, bins=EDGES.size - 1, nuisances=nuis,
                            method="asymptotic")
    assert 3 * 0.001 * MASS < SIGMA
    assert not any("(Asimov data set)" in note for note in res["notes"])


def test_the_scan_runs_where_the_mass_scale_reaches_beyond_the_width():
    """The scan's condition, 3 delta m > the peak's width (the module's rule, written out
    here), on the Gaussian's sigma: 3 x 0.01 x 150 = 4.5 GeV against 0.5, 4.4 and 5 GeV."""
    nuis = SignalNuisances.make({"mass_scale": 0.01, "mass_resolution": 0.1})
    base = [np.array([[150.0], [150.0], [150.0]]), np.array([[0.5], [4.4], [5.0]])]

    class _Shape:
        parameter_names = ("mass", "sigma")

    assert needs_scan(_Shape(), base, nuis, 3).tolist() == [True, True, False]
    no_scale = SignalNuisances.make({"mass_resolution": 0.1})
    assert not needs_scan(_Shape(), base, no_scale, 3).any()
