"""The compiled steps of the start finding (:mod:`peaksift.likelihood.start_kernels`: width
profile, coarse scan, local maxima, narrow rows, background-only start fit) against outside
references.

Sources: the bin fractions of a normal distribution truncated to the window, from
``scipy.stats.norm.cdf`` (to 1e-12 absolute inside each width's band of 7 widths, exactly
0 outside it); the profile over the two yields of the extended binned Poisson NLL
sum(mu - n ln mu), mu = a f + b g (Baker and Cousins, Nucl. Instrum. Meth. 221 (1984) 437,
eq. 11), minimised by iminuit's MIGRAD written here (strategy 2, tight tolerance): yields
within 1e-3 of their HESSE errors, NLL within 1e-6.  The background-only start fit: a
power law x^-k truncated to the window (its CDF in closed form, written here), the
scaled-Poisson NLL sum s (mu - n ln mu) (Bohm and Zech, Nucl. Instrum. Meth. A 748 (2014) 1;
from memory) on the sideband bins, minimised by iminuit: values within 0.05 of their
HESSE errors (the start fit stops at an EDM of 1e-2, not tighter).
"""

from __future__ import annotations

import numpy as np
import pytest
from iminuit import Minuit
from scipy import stats

from peaksift.likelihood.start_kernels import (
    SCAN_BAND,
    coarse_gains,
    coarse_rows,
    coarse_scan,
    local_maxima,
    narrow_rows,
    profile_widths,
)

LO, HI = 100.0, 300.0
BAND = 7.0


def _data(seed: int):
    rng = np.random.default_rng(seed)
    edges = np.linspace(LO, HI, 201)
    x = np.concatenate([LO + rng.exponential(80.0, 40_000), rng.normal(180.0, 4.0, 600)])
    n = np.histogram(x[x < HI], edges)[0].astype(float)
    b = np.diff(np.exp(-(edges - LO) / 80.0))
    g = b / b.sum()
    return edges, n, g


def _profile_cost(f, g, n):
    def cost(a, b):
        mu = a * f + b * g
        if np.any(mu <= 0):
            return 1e300
        return float(np.sum(mu - n * np.log(mu)))
    return cost


@pytest.mark.parametrize("seed", [3, 4])
def test_profile_widths_against_scipy_and_iminuit(seed):
    edges, n, g = _data(seed)
    mass = 180.0
    widths = 4.0 * 2.0 ** (np.arange(-4, 5) / 2)
    k = widths.size
    rows, y, nll = np.empty((k, n.size)), np.empty((k, 2)), np.empty(k)
    y0, y1 = 50.0, float(n.sum())
    assert profile_widths(edges, LO, HI, n, np.ones(n.size), g, mass, widths, BAND, y0, y1,
                          rows, y, nll)
    for j, w in enumerate(widths):
        norm = stats.norm(mass, w)
        f = np.diff(norm.cdf(edges)) / (norm.cdf(HI) - norm.cdf(LO))
        c = 0.5 * (edges[1:] + edges[:-1])
        inside = (edges[1:] > mass - BAND * w) & (edges[:-1] < mass + BAND * w)
        np.testing.assert_allclose(rows[j][inside], f[inside], rtol=0, atol=1e-12)
        assert np.all(rows[j][np.abs(c - mass) > BAND * w + 2.0] == 0.0)

        m = Minuit(_profile_cost(rows[j], g, n), a=y0, b=y1)
        m.errordef = 0.5
        m.strategy, m.tol = 2, 1e-7
        m.migrad()
        m.hesse()
        assert m.valid
        # the kernel leaves the saturated term out, as cost does: the same NLL
        assert abs(nll[j] - m.fval) < 1e-6, (j, nll[j], m.fval)
        assert abs(y[j, 0] - m.values["a"]) < 1e-3 * m.errors["a"]
        assert abs(y[j, 1] - m.values["b"]) < 1e-3 * m.errors["b"]


def test_profile_widths_refuses_a_peak_outside_the_window():
    edges, n, g = _data(5)
    widths = np.array([1.0])
    out = (np.empty((1, n.size)), np.empty((1, 2)), np.empty(1))
    # 1,000 widths above the window: no probability in it (the row cannot be made)
    assert not profile_widths(edges, LO, HI, n, np.ones(n.size), g, HI + 1000.0, widths,
                              BAND, 1.0, float(n.sum()), *out)


def test_coarse_scan_against_scipy_and_iminuit():
    """Every trial mass's profile (yields from a common start) against iminuit on the
    Gaussian rows of scipy's CDF: NLL within 1e-6, yields within 1e-3 of their errors."""
    edges, n, g = _data(6)
    grid = np.linspace(120.0, 280.0, 9)
    sigma = 5.0
    x = np.empty((grid.size, 2))
    x[:, 0], x[:, 1] = 10.0, float(n.sum())
    nll = np.empty(grid.size)
    assert coarse_scan(edges, LO, HI, grid, sigma, n, np.ones(n.size), g, x, nll)
    for m, mass in enumerate(grid):
        norm = stats.norm(mass, sigma)
        f = np.diff(norm.cdf(edges)) / (norm.cdf(HI) - norm.cdf(LO))
        mi = Minuit(_profile_cost(f, g, n), a=10.0, b=float(n.sum()))
        mi.errordef = 0.5
        mi.strategy, mi.tol = 2, 1e-7
        mi.migrad()
        mi.hesse()
        assert abs(nll[m] - mi.fval) < 1e-6, (mass, nll[m], mi.fval)
        assert abs(x[m, 0] - mi.values["a"]) < 1e-3 * mi.errors["a"]


def test_coarse_gains_against_scipy_and_iminuit():
    """The whole coarse scan after its rows: the background counts normalised, every trial
    mass's two yields profiled by iminuit (as above) on scipy's Gaussian rows, the gain
    q = 2 (nll0 - nll) with nll0 the background alone at its total, and the local maxima by
    their definition (positive, not below a neighbour, the largest first; the dips with a
    negative yield): the same masses, gains within 4e-6 (twice the NLL tolerance)."""
    edges, n, g = _data(6)
    n[149:154] = np.round(0.4 * n[149:154])  # a dip at 248-254
    bexp = 40_000.0 * g
    grid = np.linspace(110.0, 290.0, 37)
    sigma = 4.0
    f = np.empty((grid.size, n.size))
    for m, mass in enumerate(grid):
        norm = stats.norm(mass, sigma)
        f[m] = np.diff(norm.cdf(edges)) / (norm.cdf(HI) - norm.cdf(LO))
    index, gain = np.empty(5, np.int64), np.empty(5)
    k1, k2 = coarse_gains(n, np.ones(n.size), f, bexp, 25, True, index, gain)
    btot = float(bexp.sum())
    nll0 = float(np.sum(bexp - n * np.log(bexp)))
    q_pos, q_neg = [], []
    for m in range(grid.size):
        mi = Minuit(_profile_cost(f[m], bexp / btot, n), a=0.1 * np.sqrt(btot), b=btot)
        mi.errordef = 0.5
        mi.strategy, mi.tol = 2, 1e-7
        mi.migrad()
        q = 2.0 * (nll0 - mi.fval)
        q_pos.append(q if mi.values["a"] > 0 else 0.0)
        q_neg.append(q if mi.values["a"] < 0 else 0.0)

    def maxima(q, most):
        peaks = [i for i in range(len(q)) if q[i] > 0
                 and q[i] >= (q[i - 1] if i else -np.inf)
                 and q[i] >= (q[i + 1] if i + 1 < len(q) else -np.inf)]
        return sorted(peaks, key=lambda i: -q[i])[:most]

    want_pos, want_neg = maxima(q_pos, 3), maxima(q_neg, 2)
    assert index[:k1].tolist() == want_pos
    assert index[3:3 + k2].tolist() == want_neg
    assert grid[want_pos[0]] == pytest.approx(180.0, abs=5.0)  # the peak of _data
    assert k2 and grid[want_neg[0]] == pytest.approx(251.0, abs=5.0)  # and the dip
    got = gain[:k1].tolist() + gain[3:3 + k2].tolist()
    want = [q_pos[i] for i in want_pos] + [q_neg[i] for i in want_neg]
    assert np.allclose(got, want, rtol=0.0, atol=4e-6), (got, want)


def test_coarse_rows_against_scipy():
    """The coarse scan's rows (kept per binning by the fit) against scipy's normal CDF
    truncated to the window: within 1e-12 absolute inside each mass's band of SCAN_BAND
    widths, exactly 0 beyond it; edges outside the window are clipped to it."""
    edges = np.concatenate([[LO - 20.0], np.linspace(LO, HI, 101), [HI + 20.0]])
    grid = np.linspace(105.0, 295.0, 12)
    sigma = 3.5
    frac = np.full((grid.size, edges.size - 1), np.nan)
    assert coarse_rows(edges, LO, HI, grid, sigma, frac)
    e = np.clip(edges, LO, HI)
    c = 0.5 * (e[1:] + e[:-1])
    for m, mass in enumerate(grid):
        norm = stats.norm(mass, sigma)
        f = np.diff(norm.cdf(e)) / (norm.cdf(HI) - norm.cdf(LO))
        inside = (e[1:] > mass - SCAN_BAND * sigma) & (e[:-1] < mass + SCAN_BAND * sigma)
        np.testing.assert_allclose(frac[m][inside], f[inside], rtol=0, atol=1e-12)
        assert np.all(frac[m][np.abs(c - mass) > SCAN_BAND * sigma + 4.0] == 0.0)
    assert not coarse_rows(edges, LO, HI, np.array([HI + 1000.0]), 1.0,
                           np.empty((1, edges.size - 1)))


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("sign", [1.0, -1.0])
def test_local_maxima_against_their_definition(seed, sign):
    """The definition written out here: gain q = 2 (nll0 - nll), 0 where the yield has the
    wrong sign or the NLL is not finite; a maximum is positive and not below either
    neighbour; the largest first, ties in index order; at most ``most``."""
    rng = np.random.default_rng(seed)
    m = 40
    nll = np.round(rng.normal(0.0, 2.0, m), 1)  # rounded: ties occur
    nll[rng.integers(0, m, 3)] = np.inf
    signal = rng.normal(0.0, 1.0, m)
    nll0 = 0.5
    q = [2.0 * (nll0 - v) if sign * a > 0 and np.isfinite(v) else 0.0
         for a, v in zip(signal, nll)]
    peaks = [i for i in range(m) if q[i] > 0 and q[i] >= (q[i - 1] if i else -np.inf)
             and q[i] >= (q[i + 1] if i + 1 < m else -np.inf)]
    expected = sorted(peaks, key=lambda i: -q[i])[:3]
    index, gain = np.empty(3, np.int64), np.empty(3)
    k = local_maxima(signal, nll, nll0, 3, sign, index, gain)
    assert index[:k].tolist() == expected
    assert gain[:k].tolist() == [q[i] for i in expected]


@pytest.mark.parametrize("seed", range(4))
def test_narrow_rows_against_poisson_deviances(seed):
    """Bins whose 7-bin neighbourhood holds a Poisson deviance 2 s (b - n + n ln(n/b))
    (Baker and Cousins 1984, eq. 11 per bin; ``scipy.special.xlogy`` for n ln n/b) above a
    threshold, outside the excluded mass intervals: the rule written out here."""
    from scipy.special import xlogy

    rng = np.random.default_rng(seed)
    nb, k = 300, 3
    e = np.linspace(0.0, 300.0, nb + 1)
    b = rng.uniform(0.2, 20.0, nb)
    n = rng.poisson(b).astype(float)
    n[rng.integers(0, nb, 5)] += 25.0  # a few spikes
    s = rng.uniform(0.5, 1.5, nb)
    dev = 2.0 * s * (b - n + xlogy(n, n / b))
    least = float(np.quantile(dev, 0.9))
    exclude = np.array([[40.0, 60.0], [200.5, 230.0]])
    expected = [j for j in range(nb)
                if 0 < dev[max(j - k, 0):j + k + 1].sum()
                and dev[max(j - k, 0):j + k + 1].sum() >= least * (1 + 1e-12)
                and all(e[j + 1] <= lo or e[j] >= hi for lo, hi in exclude)]
    rows = np.empty(nb, np.int64)
    m = narrow_rows(e, n, b, s, k, least, exclude, rows)
    got = rows[:m].tolist()
    # equal but for a bin whose sum lies within rounding (1e-12) of the threshold
    near = {j for j in range(nb) if abs(dev[max(j - k, 0):j + k + 1].sum() - least)
            <= 1e-12 * least}
    assert set(got) - near == set(expected) - near
    assert got == sorted(got)


@pytest.mark.parametrize("weighted", [False, True])
def test_background_fit_against_iminuit(weighted, monkeypatch):
    """The compiled background-only start fit (through ``background_start``, which uses it
    for a power law) on the sidebands of a peak, against iminuit on the same bins."""
    from peaksift.likelihood import Model, start_background
    from peaksift.likelihood.start_background import background_start

    def general_path(*args, **kwargs):
        raise AssertionError("the compiled background fit did not answer")
    monkeypatch.setattr(start_background, "minimize", general_path)

    rng = np.random.default_rng(11)
    lo, hi, k_true = 100.0, 600.0, 3.5
    u = rng.random(60_000)
    a = 1.0 - k_true
    x = lo * (1.0 - u * (1.0 - (hi / lo) ** a)) ** (1.0 / a)
    x = np.concatenate([x, rng.normal(300.0, 6.0, 800)])
    edges = np.linspace(lo, hi, 101)
    w = rng.uniform(0.5, 1.5, x.size) if weighted else np.ones(x.size)
    n = np.histogram(x, edges, weights=w)[0]
    n2 = np.histogram(x, edges, weights=w * w)[0]
    scale = n / n2 if weighted else np.ones(n.size)
    for arr in (edges, n, scale):
        arr.flags.writeable = False
    model = Model("gaussian", "powerlaw", (lo, hi))
    names = list(model.parameter_names)
    lower = np.array([p.lower for p in model.parameters])
    upper = np.array([p.upper for p in model.parameters])
    lower[names.index("background_yield")], upper[names.index("background_yield")] = 0.0, 1e7
    start = np.array([p.start for p in model.parameters], float)
    start[names.index("power")] = 2.0
    c = 0.5 * (edges[1:] + edges[:-1])
    mask = np.abs(c - 300.0) > 30.0
    out = background_start(model, edges, n, scale, mask, start, np.zeros(len(names), bool),
                           lower, upper)

    lx = np.log(edges)

    def frac(kp):  # truncated power law's bin fractions, closed form
        q = np.exp((1.0 - kp) * (lx - lx[0]))
        return np.diff(q) / (q[-1] - q[0])

    def nll(kp, y):
        mu = y * frac(kp)[mask]
        return float(np.sum(scale[mask] * (mu - n[mask] * np.log(mu))))

    m = Minuit(nll, kp=2.0, y=float(n[mask].sum()))
    m.errordef = 0.5
    m.limits["y"] = (1.0, None)
    m.strategy, m.tol = 2, 1e-7
    m.migrad()
    m.hesse()
    assert m.valid
    assert abs(out[names.index("power")] - m.values["kp"]) < 0.05 * m.errors["kp"]
    assert abs(out[names.index("background_yield")] - m.values["y"]) < 0.05 * m.errors["y"]
    assert out[names.index("signal_yield")] == 0.0
