"""The free fit finds the lowest minimum on background-only spectra.

On a spectrum without a signal the best "peak" of a free Gaussian is wherever the data allow
the lowest NLL: an upward fluctuation, a deficit (a negative signal yield, which the fit's
bounds allow), a spike narrower than a bin on one high bin, or a wide bump that bends the
background.  ``peaksift.fit`` must return that lowest minimum (flagged invalid when it sits at
a bound, but the lowest: a valid flag is never a reason to keep a worse minimum).

Reference, written here: the extended binned Poisson NLL in the saturated form
sum(mu - n + n ln(n / mu)) (Baker and Cousins, Nucl. Instrum. Meth. 221 (1984) 437, eq. 11),
defined where every bin's expectation is positive (a Poisson mean cannot be negative: a
negative yield may only dig as deep as the background under it) and infinite elsewhere; the
Gaussian's bin integrals from ``scipy.special.ndtr`` truncated to the window; the backgrounds'
bin integrals from their closed-form CDFs (exponential, power law, dijet with one exponent)
or ``scipy.stats.beta.cdf`` (Bernstein basis, see :func:`bernstein_basis_integrals`).  It is
minimised by iminuit's MIGRAD from many starts: at each of 8 widths from the fit's width
floor to half the window (masses at bin centres, spaced by at most half a width), the
signal and background yields are profiled with the background's shape from a
background-only fit; MIGRAD (all parameters free) starts at the best grid point with a
positive and the best with a negative signal yield for every width (those within
``GRID_MARGIN`` of the best grid point), and at peaksift's own minimum; the lowest minimum
wins.  Same parameter space as the fit: the bounds are the
result's ``bounds``.

Tolerance: no toy may have peaksift's minimum above the independent one by more than
Delta(-2 ln L) = 0.1 (issue 11's tolerance).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from iminuit import Minuit
from scipy import special, stats

import peaksift
from peaksift import shapes
from peaksift.histogram import MassHistogram

WINDOW = (100.0, 300.0)
BINS = 200
EDGES = np.linspace(*WINDOW, BINS + 1)
CENTRES = 0.5 * (EDGES[1:] + EDGES[:-1])
EVENTS = 5000.0
SQRT_S = 1000.0  # the dijet family's sqrt(s)
#: a peaksift minimum may lie above the independent one by at most this in -2 ln L
DELTA_CHI2 = 0.1
#: grid starts whose profiled NLL (background shape held) is within this of the best
#: grid point's are minimised by MIGRAD (an NLL difference, so 10 in -2 ln L)
GRID_MARGIN = 5.0
#: toys per background
TOYS = 12

#: background label -> (peaksift shape, truth of the toys, generic MIGRAD start)
BACKGROUNDS = {
    "exponential": ("exponential", {"b1": -2.0}, {"b1": -1.0}),
    "powerlaw": ("powerlaw", {"power": 4.0}, {"power": 3.0}),
    "bernstein2": (shapes.get("bernstein", degree=2), {"c1": 0.7, "c2": 0.3},
                   {"c1": 1.0, "c2": 1.0}),
    "dijet2": (shapes.get("dijet", npar=2, sqrt_s=SQRT_S), {"p1": 15.0}, {"p1": 5.0}),
}


# ------------------------------------------------------------------ independent model
def _ratio_cdf(a: float, lx: np.ndarray, l_hi: float) -> np.ndarray:
    """(exp(a lx) - 1) / (exp(a l_hi) - 1), i.e. the CDF of exp(a l) on l in [0, l_hi], with
    ``numpy.expm1`` for small a and scaled for large |a| (elementary integral)."""
    if abs(a * l_hi) < 1e-9:
        return lx / l_hi
    if a * l_hi > 30.0:  # exp(a (lx - l_hi)) terms, exact to double precision here
        return np.exp(a * (lx - l_hi)) * -np.expm1(-a * lx) / -np.expm1(-a * l_hi)
    return np.expm1(a * lx) / np.expm1(a * l_hi)


def bernstein_basis_integrals(degree: int) -> np.ndarray:
    """(degree + 1, bins) integrals of the Bernstein basis b_{i,n}(u) = C(n,i) u^i (1-u)^(n-i),
    u = (x - lo) / (hi - lo), over each bin: b_{i,n} is the Beta(i + 1, n - i + 1) density
    divided by n + 1 (common practice), so its integral is ``scipy.stats.beta.cdf`` / (n + 1)."""
    u = (EDGES - WINDOW[0]) / (WINDOW[1] - WINDOW[0])
    return np.array([np.diff(stats.beta.cdf(u, i + 1, degree - i + 1)) / (degree + 1)
                     for i in range(degree + 1)])


_BERNSTEIN2 = bernstein_basis_integrals(2)


def background_fractions(label: str, p: dict[str, float]) -> np.ndarray:
    """Bin fractions of the background on the window, from closed-form CDFs:

    * exponential exp(b1 t), t = (x - centre) / half-width: CDF (e^{k(x-lo)} - 1) /
      (e^{k(hi-lo)} - 1), k = b1 / half-width;
    * power law x^-k: CDF ((x/lo)^{1-k} - 1) / ((hi/lo)^{1-k} - 1);
    * Bernstein, beta_0 = 1 and beta_i = c_i^2 (peaksift's parametrisation, the same family);
    * dijet with one exponent (1 - x)^p1, x = m / sqrt(s): CDF from the primitive
      -(1 - x)^{p1+1} / (p1 + 1), written as a function of ln((1 - x_lo) / (1 - x))."""
    lo, hi = WINDOW
    if label == "exponential":
        k = p["b1"] / (0.5 * (hi - lo))
        c = _ratio_cdf(k, EDGES - lo, hi - lo)
    elif label == "powerlaw":
        c = _ratio_cdf(1.0 - p["power"], np.log(EDGES / lo), math.log(hi / lo))
    elif label == "bernstein2":
        beta = np.array([1.0, p["c1"] ** 2, p["c2"] ** 2])
        f = beta @ _BERNSTEIN2
        return f / f.sum()
    elif label == "dijet2":
        # (1-x)^(p1+1) = (1-x_lo)^(p1+1) exp(-(p1+1) L), L = ln((1-x_lo)/(1-x)) >= 0
        big_l = np.log((1.0 - lo / SQRT_S) / (1.0 - EDGES / SQRT_S))
        c = -np.expm1(-(p["p1"] + 1.0) * big_l) / -np.expm1(-(p["p1"] + 1.0) * big_l[-1]) \
            if abs(p["p1"] + 1.0) > 1e-9 else big_l / big_l[-1]
    else:
        raise KeyError(label)
    return np.diff(c)


def gaussian_fractions(mass: np.ndarray, sigma: np.ndarray) -> np.ndarray:
    """Bin fractions (..., bins) of a Gaussian truncated to the window (``scipy.special.ndtr``);
    ``mass`` and ``sigma`` broadcast over leading axes."""
    mass, sigma = np.asarray(mass, float)[..., None], np.asarray(sigma, float)[..., None]
    c = special.ndtr((EDGES - mass) / sigma)
    return np.diff(c, axis=-1) / (c[..., -1:] - c[..., :1])


def nll(n: np.ndarray, mu: np.ndarray, floor: bool = False) -> float:
    """sum(mu - n + n ln(n / mu)) (Baker and Cousins 1984, eq. 11); 1e30 (outside the model)
    unless every mu > 0.  ``floor``: mu floored at 1e-300 instead, peaksift's own convention
    (an empty prediction in a filled bin costs ~700 per event), which makes a negative
    expectation in an empty bin cost nothing: used only to evaluate peaksift's point."""
    if floor:
        mu = np.maximum(mu, 1e-300)
    if not np.all(mu > 0):  # also NaN
        return 1e30
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(n > 0, n * np.log(np.where(n > 0, n, 1.0) / mu), 0.0)
    val = float(np.sum(mu - n + t))
    return val if math.isfinite(val) else 1e30


def expected(label: str, p: dict[str, float]) -> np.ndarray:
    return (p["signal_yield"] * gaussian_fractions(p["mass"], p["sigma"])
            + p["background_yield"] * background_fractions(label, p))


def nll_at(label: str, n: np.ndarray, p: dict[str, float], floor: bool = False) -> float:
    return nll(n, expected(label, p), floor)


def _migrad(label: str, n: np.ndarray, start: dict[str, float],
            bounds: dict[str, tuple[float, float]], fixed: tuple[str, ...] = ()) -> Minuit:
    names = list(start)

    def cost(*x: float) -> float:
        return nll_at(label, n, dict(zip(names, x)))

    m = Minuit(cost, *start.values(), name=names)
    m.errordef = Minuit.LIKELIHOOD
    for k in names:
        lo, hi = bounds[k]
        m.limits[k] = (lo if math.isfinite(lo) else None, hi if math.isfinite(hi) else None)
    for k in fixed:
        m.fixed[k] = True
    with warnings.catch_warnings(), np.errstate(all="ignore"):
        warnings.simplefilter("ignore")
        m.migrad()
    return m


def profiled_yields(n: np.ndarray, f: np.ndarray, g: np.ndarray, total: float) -> tuple:
    """(NLL, signal yield) at every row of signal fractions ``f`` (cells, bins) on a fixed
    background shape ``g``, the two yields profiled by Fisher scoring (Newton's method with
    the expected information sum f_a f_b / mu; steps halved to keep mu > 0)."""
    cells = f.shape[0]
    s, b = np.zeros(cells), np.full(cells, total)
    with np.errstate(all="ignore"):
        for _ in range(25):
            mu = s[:, None] * f + b[:, None] * g
            r = 1.0 - n / mu
            w = 1.0 / mu
            gs, gb = (f * r).sum(1), (g * r).sum(1)
            hss, hsb, hbb = (f * f * w).sum(1), (f * g * w).sum(1), (g * g * w).sum(1)
            det = hss * hbb - hsb * hsb
            ds, db = -(hbb * gs - hsb * gb) / det, -(hss * gb - hsb * gs) / det
            ds, db = np.nan_to_num(ds), np.nan_to_num(db)
            t = np.ones(cells)
            for _ in range(40):
                bad = ((s + t * ds)[:, None] * f + (b + t * db)[:, None] * g <= 0).any(1)
                if not bad.any():
                    break
                t[bad] *= 0.5
            s, b = s + t * ds, b + t * db
        mu = s[:, None] * f + b[:, None] * g
        val = np.where((mu > 0).all(1), (mu - n * np.log(mu)).sum(1), np.inf)
    return val, s


def independent_minimum(label: str, n: np.ndarray, bounds: dict[str, tuple[float, float]],
                        ours: dict[str, float]) -> tuple[float, dict[str, float]]:
    """The lowest minimum of MIGRAD from the grid's starts (see the module's docstring) and
    from ``ours`` (peaksift's minimum): (NLL, parameters)."""
    bkg_start = BACKGROUNDS[label][2]
    total = float(n.sum())
    bonly = _migrad(label, n, {"mass": 200.0, "sigma": 10.0, "signal_yield": 0.0,
                               **bkg_start, "background_yield": total}, bounds,
                    fixed=("mass", "sigma", "signal_yield"))
    pb = dict(zip(bonly.parameters, bonly.values))
    g = background_fractions(label, pb)
    s_lo, s_hi = bounds["sigma"]
    grid = []  # (profiled NLL, start)
    for width in np.geomspace(s_lo, s_hi, 8):
        step = max(1, round(0.5 * width / (EDGES[1] - EDGES[0])))
        masses = CENTRES[::step]
        val, s = profiled_yields(n, gaussian_fractions(masses, width), g, total)
        for sign in (1.0, -1.0):
            ok = np.isfinite(val) & (sign * s > 0)
            if ok.any():
                i = int(np.flatnonzero(ok)[np.argmin(val[ok])])
                grid.append((float(val[i]), {**pb, "mass": float(masses[i]),
                                             "sigma": float(width), "signal_yield": float(s[i]),
                                             "background_yield": max(total - float(s[i]), 1.0)}))
    # MIGRAD from every grid start within GRID_MARGIN of the best one (the refit of the
    # background shape gains a few units at most), and from peaksift's minimum
    top = min(v for v, _ in grid)
    starts = [dict(ours)] + [st for v, st in grid if v <= top + GRID_MARGIN]
    best = (math.inf, {})
    for st in starts:
        st = {k: float(np.clip(v, *bounds[k])) for k, v in st.items()}
        m = _migrad(label, n, st, bounds)
        if m.fval < best[0]:
            best = (float(m.fval), dict(zip(m.parameters, m.values)))
    return best


# ------------------------------------------------------------------ toys
def toy(label: str, seed: int) -> np.ndarray:
    """Poisson bin counts around EVENTS background-only events (numpy's generator)."""
    rng = np.random.default_rng([11, seed, sum(map(ord, label))])
    return rng.poisson(EVENTS * background_fractions(label, BACKGROUNDS[label][1])).astype(float)


def check_toy(label: str, seed: int) -> dict:
    """peaksift's fit of one toy against the independent minimum."""
    n = toy(label, seed)
    h = MassHistogram(EDGES)
    h.weight_sum, h.weight_sq_sum = n.copy(), n.copy()
    r = peaksift.fit(h, "gaussian", BACKGROUNDS[label][0], WINDOW, binned=True)
    ours = {k: float(r.values[k]) for k in r.parameters}
    bounds = {k: tuple(map(float, r.bounds[k])) for k in r.parameters}
    # peaksift's NLL at its own point, in its own convention (see nll)
    f_ours = nll_at(label, n, ours, floor=True)
    f_ind, p_ind = independent_minimum(label, n, bounds, ours)
    return {"label": label, "seed": seed, "delta_chi2": 2.0 * (f_ours - f_ind), "ours": ours,
            "negative_mu": bool(np.any(expected(label, ours) <= 0)),
            "independent": p_ind, "valid": r.valid, "problems": r.problems}


@pytest.mark.parametrize("label", ["exponential", "powerlaw", "bernstein2"])
def test_background_only_minimum_is_the_lowest(label):
    """12 background-only toys per background (5,000 events, 200 bins): peaksift's minimum is
    never above the independent multi-start minimum by more than Delta(-2 ln L) = 0.1
    (Baker and Cousins 1984 NLL written here; iminuit MIGRAD)."""
    worse = [c for c in (check_toy(label, seed) for seed in range(TOYS))
             if c["delta_chi2"] > DELTA_CHI2]
    assert not worse, "\n".join(
        f"toy {c['seed']}: peaksift above the independent minimum by "
        f"{c['delta_chi2']:.2f} in -2 ln L; peaksift mass {c['ours']['mass']:.2f} sigma "
        f"{c['ours']['sigma']:.3g} yield {c['ours']['signal_yield']:.1f} (valid "
        f"{c['valid']}); independent mass {c['independent']['mass']:.2f} sigma "
        f"{c['independent']['sigma']:.3g} yield {c['independent']['signal_yield']:.1f}"
        for c in worse)
