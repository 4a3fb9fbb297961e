"""The start finder's fused compiled steps (:mod:`peaksift.likelihood.first_look` on
:mod:`peaksift.likelihood.start_fused`) against outside references.

Sources: a power law x^-k truncated to the window (its bin fractions in closed form,
written here) and a normal peak truncated to the window (``scipy.stats.norm.cdf``); the
extended binned Poisson NLL sum(mu - n ln mu) (Baker and Cousins, Nucl. Instrum. Meth. 221
(1984) 437, eq. 11) minimised by iminuit's MIGRAD written here (strategy 2, tolerance
1e-7).  Tolerances: a background-only start fit within 0.15 of its HESSE errors (the start
fit stops at an EDM below 1e-2: up to sqrt(2 EDM) ~ 0.14 errors from the minimum); its expected counts to 1e-9 relative (closed form at its own
values); the coarse scan's gain at its best mass within 1e-3 of iminuit's profile over
both yields (its steps stop at a gain < 1e-6 per step); the start's width the lowest of
the profile over both yields at the candidate widths (iminuit; a candidate within 1e-6 of
the lowest counts too); the profiled yields of the width path at the start's own width
within 1e-3 of their HESSE errors.
"""

from __future__ import annotations

import numpy as np
import pytest
from iminuit import Minuit
from scipy import stats

from peaksift.likelihood import Model
from peaksift.likelihood.first_look import fused_starts
from peaksift.likelihood.start_widths import WIDTH_FACTORS, _Minimum, _path

LO, HI, K_TRUE, MASS, SIGMA = 100.0, 600.0, 3.5, 300.0, 6.0


def _read_only(*arrays):
    for a in arrays:
        a.flags.writeable = False
    return arrays


def _setup(seed):
    rng = np.random.default_rng(seed)
    u = rng.random(60_000)
    a = 1.0 - K_TRUE
    x = LO * (1.0 - u * (1.0 - (HI / LO) ** a)) ** (1.0 / a)
    x = np.concatenate([x, rng.normal(MASS, SIGMA, 900)])
    fe = np.linspace(LO, HI, 401)
    fn = np.histogram(x, fe)[0].astype(float)
    edges, n = fe[::4].copy(), fn.reshape(-1, 4).sum(axis=1)
    _read_only(fe, fn, edges, n)
    fsc, scale = _read_only(np.ones(fn.size), np.ones(n.size))
    model = Model("gaussian", "powerlaw", (LO, HI))
    names = list(model.parameter_names)
    lower = np.array([p.lower for p in model.parameters], float)
    upper = np.array([p.upper for p in model.parameters], float)
    total = float(n.sum())
    lower[names.index("background_yield")], upper[names.index("background_yield")] = 0.0, 5 * total
    lower[names.index("signal_yield")], upper[names.index("signal_yield")] = -total, 5 * total
    base = np.array([p.start for p in model.parameters], float)
    base[names.index("power")] = 2.0
    base[names.index("sigma")] = 10.0
    base[names.index("mass")] = 350.0
    base[names.index("background_yield")] = total
    base[names.index("signal_yield")] = 0.0
    fused = fused_starts(model, edges, n, scale, np.zeros(len(names), bool), {},
                         (fe, fn, fsc))
    assert fused is not None
    return model, names, edges, n, (fe, fn, fsc), lower, upper, base, total, fused


def _power_fractions(edges, k):
    lx = np.log(edges)
    q = np.exp((1.0 - k) * (lx - lx[0]))
    return np.diff(q) / (q[-1] - q[0])


def _gauss_fractions(edges, m, w):
    norm = stats.norm(m, w)
    return np.diff(norm.cdf(edges)) / (norm.cdf(HI) - norm.cdf(LO))


def _minuit(cost, **start):
    m = Minuit(cost, **start)
    m.errordef = 0.5
    m.strategy, m.tol = 2, 1e-7
    return m


def _background_fit(edges, n, mask):
    def nll(kp, y):
        mu = y * _power_fractions(edges, kp)[mask]
        return float(np.sum(mu - n[mask] * np.log(mu)))

    m = _minuit(nll, kp=2.0, y=float(n[mask].sum()))
    m.limits["y"] = (1.0, None)
    m.limits["kp"] = (1.1, 20.0)
    m.migrad()
    m.hesse()
    assert m.valid
    return m


def _yields_profile(n, f, b):
    """min over (a, c) of sum(mu - n ln mu), mu = a f + c b (iminuit)."""
    def nll(a, c):
        mu = a * f + c * b
        if np.any(mu <= 0):
            return 1e300
        return float(np.sum(mu - n * np.log(mu)))

    m = _minuit(nll, a=0.1 * np.sqrt(b.sum()), c=1.0)
    m.migrad()
    m.hesse()
    return m


@pytest.mark.parametrize("seed", [1, 2])
def test_first_look_against_iminuit(seed):
    _, names, edges, n, _, lower, upper, base, _, fused = _setup(seed)
    grid = np.arange(LO + 2.5, HI, 5.0)
    grid.flags.writeable = False
    got = fused.first_look(base, lower, upper, grid, True)
    assert got is not None
    vb, bexp, (peaks, _) = got
    m = _background_fit(edges, n, np.ones(n.size, bool))
    ip, iby = names.index("power"), names.index("background_yield")
    assert abs(vb[ip] - m.values["kp"]) < 0.15 * m.errors["kp"]
    assert abs(vb[iby] - m.values["y"]) < 0.15 * m.errors["y"]
    assert vb[names.index("signal_yield")] == 0.0
    np.testing.assert_allclose(bexp, vb[iby] * _power_fractions(edges, vb[ip]), rtol=1e-9)
    # the best candidate: the peak, its gain the yields' profile against the background
    i, q = peaks[0]
    assert abs(grid[i] - MASS) <= 10.0
    prof = _yields_profile(n, _gauss_fractions(edges, grid[i], base[names.index("sigma")]),
                           bexp)
    nll0 = float(np.sum(bexp - n * np.log(bexp)))
    assert abs(q - 2.0 * (nll0 - prof.fval)) < 1e-3


@pytest.mark.parametrize("seed", [1, 2])
def test_first_start_against_iminuit(seed):
    _, names, edges, n, _, lower, upper, base, total, fused = _setup(seed)
    grid = np.arange(LO + 2.5, HI, 5.0)
    grid.flags.writeable = False
    vb, _, _ = fused.first_look(base, lower, upper, grid, True)
    c = 0.5 * (edges[1:] + edges[:-1])
    mass = 302.5
    found, s = fused.first_start(base, vb, lower, upper, c, mass, total, 0.0, ())
    assert s is not None and found is not None
    # the background from the sidebands beyond 3 start widths
    mask = np.abs(c - mass) > 3.0 * base[names.index("sigma")]
    m = _background_fit(edges, n, mask)
    ip = names.index("power")
    assert abs(s[ip] - m.values["kp"]) < 0.15 * m.errors["kp"]
    # the width: the lowest profile (both yields) among the candidate widths
    b = m.values["y"] * _power_fractions(edges, m.values["kp"])
    half_bin = 0.5 * (HI - LO) / (edges.size - 1)
    widths = [w for w in base[names.index("sigma")] * WIDTH_FACTORS
              if w >= max(lower[names.index("sigma")], half_bin)]
    fvals = [_yields_profile(n, _gauss_fractions(edges, mass, w), b).fval for w in widths]
    chosen = s[names.index("sigma")]
    assert chosen in widths
    assert fvals[widths.index(chosen)] <= min(fvals) + 1e-6
    # the yield: the excess over the sidebands' background between them
    y = float(np.sum(n[~mask] - b[~mask]))
    assert s[names.index("signal_yield")] == pytest.approx(y, rel=0.02)
    assert s[names.index("mass")] == mass


def test_width_path_at_own_width_against_iminuit():
    model, names, _, _, (fe, fn, fsc), lower, upper, base, total, _ = _setup(3)
    v = base.copy()
    v[names.index("mass")], v[names.index("sigma")] = MASS, SIGMA
    v[names.index("signal_yield")], v[names.index("power")] = 900.0, K_TRUE
    v[names.index("background_yield")] = total - 900.0
    is_fixed = np.zeros(len(names), bool)
    path = _path(model.blocks[0][0], fe, fn, fsc, _Minimum(model, v, is_fixed), MASS, SIGMA,
                 900.0, lower[1], upper[1], LO, HI, model.window)
    assert path is not None
    _, own, rows, _, btot = path
    b = v[names.index("background_yield")] * _power_fractions(fe, K_TRUE)
    assert btot == pytest.approx(b.sum(), rel=1e-9)
    prof = _yields_profile(fn, _gauss_fractions(fe, MASS, SIGMA), b / b.sum())
    assert rows[own][0] == MASS
    assert abs(rows[own][1] - prof.values["a"]) < 1e-3 * prof.errors["a"]
    assert abs(rows[own][2] - prof.values["c"]) < 1e-3 * prof.errors["c"]
