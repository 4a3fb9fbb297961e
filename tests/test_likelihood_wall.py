"""The minimiser at the wall mu >= 0: a negative peak over an empty bin.

A spectrum with one bin emptied lets a narrow negative Gaussian dig until that bin's
expectation is 0: the minimum sits on the edge of the model (a Poisson mean cannot be
negative), not at a zero gradient.  Fisher scoring must converge there itself (no MIGRAD
fallback, which needed 400-1,700 calls at such points), in the compiled loop and in the
Python loop.  A Bernstein background started far off is a known gap (xfail, strict).

Reference, written here: the extended binned Poisson NLL sum(mu - n ln mu) (Baker and
Cousins, Nucl. Instrum. Meth. 221 (1984) 437, eq. 11) with the Gaussian's bin integrals
from ``scipy.stats.norm`` truncated to the window and the backgrounds' from closed forms
(exponential CDF; Bernstein basis integrals as ``scipy.stats.beta.cdf`` / (n + 1), common
practice), minimised by ``scipy.optimize.minimize`` (SLSQP) with every expectation
constrained >= 0.  Tolerance: peaksift's minimum no higher than SLSQP's by 1e-6 in NLL, and
the empty bin's expectation within 1e-4 events of 0.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize, stats

from peaksift import shapes
from peaksift.likelihood import BinnedCost, Model, minimize

LO, HI = 100.0, 300.0
EDGES = np.linspace(LO, HI, 201)
MASS, SIGMA = 250.5, 0.3   # the Gaussian held on the emptied bin [250, 251]
EMPTY = 150


def _counts(background: str) -> np.ndarray:
    rng = np.random.default_rng(11)
    if background == "exponential":
        x = LO + rng.exponential(50.0, 20_000)
    else:
        x = LO + (HI - LO) * rng.beta(1.0, 2.0, 20_000)
    n = np.histogram(x[x < HI][:5000], EDGES)[0].astype(float)
    n[EMPTY] = 0.0
    return n


def _fractions(background: str, theta: float) -> np.ndarray:
    if background == "exponential":  # exp(b1 t), t in [-1, 1] across the window
        k = theta / (0.5 * (HI - LO))
        c = np.expm1(k * (EDGES - LO)) / np.expm1(k * (HI - LO))
        return np.diff(c)
    u = (EDGES - LO) / (HI - LO)  # Bernstein degree 1: beta_0 = 1, beta_1 = c1^2
    basis = [np.diff(stats.beta.cdf(u, i + 1, 2 - i)) / 2.0 for i in range(2)]
    f = basis[0] + theta**2 * basis[1]
    return f / f.sum()


def _gauss() -> np.ndarray:
    c = stats.norm.cdf(EDGES, MASS, SIGMA)
    return np.diff(c) / (c[-1] - c[0])


def _mu(background: str, p: np.ndarray) -> np.ndarray:
    s, theta, b = p
    return s * _gauss() + b * _fractions(background, theta)


def _nll(background: str, n: np.ndarray, p: np.ndarray) -> float:
    mu = _mu(background, p)
    if np.any(mu < 0):
        return np.inf
    with np.errstate(divide="ignore", invalid="ignore"):
        return float(np.sum(mu) - np.sum(np.where(n > 0, n * np.log(mu), 0.0)))


@pytest.mark.parametrize("background,theta0,loop", [
    ("exponential", -1.0, "compiled"),
    ("exponential", -1.0, "python"),
    pytest.param("bernstein", 1.0, "python", marks=pytest.mark.xfail(
        strict=True, reason="known gap: from this far start the path reaches the wall with "
        "the wrong background shape (c1 = 0.99 instead of 0) and cannot slide along it; "
        "MIGRAD, going on from there, stays (NLL ~950 above SLSQP's minimum)")),
])
def test_converges_on_the_wall(background, theta0, loop, monkeypatch):
    if loop == "python":  # the numpy reference path: Fisher scoring's Python loop
        monkeypatch.setenv("PEAKSIFT_NUMPY_COST", "1")
    n = _counts(background)
    bkg = shapes.get("bernstein", degree=1) if background == "bernstein" else background
    model = Model("gaussian", bkg, (LO, HI))
    full = np.array([MASS, SIGMA, 0.0, theta0, n.sum()])
    ro = []
    for a in (EDGES, n, np.ones(n.size)):
        a = np.array(a, float)
        a.flags.writeable = False
        ro.append(a)
    cost = BinnedCost(model, full, np.array([2, 3, 4]), [], *ro)
    lower = np.array([-5000.0, -60.0, 0.0])
    upper = np.array([5000.0, 60.0, 1e5])
    mo = minimize(cost, full[2:], lower, upper, ["signal_yield", "theta", "background_yield"])
    assert mo.method == "fisher-scoring" and mo.converged

    cons = {"type": "ineq", "fun": lambda p: _mu(background, p)}
    ref = optimize.minimize(lambda p: _nll(background, n, p), full[2:], method="SLSQP",
                            constraints=[cons], options={"ftol": 1e-13, "maxiter": 500})
    assert ref.success
    ours = _nll(background, n, mo.x)
    assert ours <= _nll(background, n, ref.x) + 1e-6
    # the minimum is on the wall: the emptied bin's expectation is 0 there
    assert abs(_mu(background, ref.x)[EMPTY]) < 1e-4
    assert 0.0 <= _mu(background, mo.x)[EMPTY] < 1e-4


def test_unbinned_density_stays_positive_at_a_negative_peak():
    """Unbinned, the same wall: a negative Breit-Wigner yield may not make the density
    negative at its peak (checked only at the events, a narrow negative peak between them
    lowered the NLL without bound and the yield ran to its bound).  Reference: the fitted
    density at the peak, s f_BW(m) + b f_exp(m), written with ``scipy.stats.cauchy`` and
    ``scipy.stats.expon`` truncated to the window; tolerance: >= -1e-9 of the background's."""
    from peaksift import fit

    rng = np.random.default_rng(3)
    x = LO + rng.exponential(50.0, 20_000)
    x = x[x < HI][:5000]
    r = fit(x, "breitwigner", "exponential", (LO, HI), binned=False)
    v = r.values
    m, w = v["mass"], v["width"]
    cau = stats.cauchy(m, 0.5 * w)
    f_s = cau.pdf(m) / (cau.cdf(HI) - cau.cdf(LO))
    k = -v["b1"] / (0.5 * (HI - LO))  # exp(b1 t), t in [-1, 1] across the window
    ex = stats.expon(LO, 1.0 / k) if k > 0 else None
    f_b = ex.pdf(m) / (ex.cdf(HI) - ex.cdf(LO)) if ex is not None else 1.0 / (HI - LO)
    lo_bound = r.bounds["signal_yield"][0]
    assert v["signal_yield"] > lo_bound + 1.0
    b = v["background_yield"]
    assert v["signal_yield"] * f_s + b * f_b >= -1e-9 * b * f_b


@pytest.mark.parametrize("npar", [1, 5, 8, 11])
@pytest.mark.parametrize("unit", [True, False])
def test_information_without_empty_bins_off_the_wall(npar, unit):
    """The compiled minimiser's information near the wall (``likelihood.wall_info``): the
    Fisher information minus the terms ``s_j / mu_j jac_j jac_j^T`` of the empty bins whose
    expectation is still >= 1e-8 (the Poisson information of a bin, Baker and Cousins 1984,
    written here with numpy), to 1e-12 of the information's scale; the expectation and the
    Jacobian copied as they are."""
    from peaksift.likelihood.poisson import WALL_MU
    from peaksift.likelihood.wall_info import wall_info

    rng = np.random.default_rng(npar + 20 * unit)
    nb = 700
    n = rng.poisson(rng.uniform(0.0, 3.0, nb)).astype(float)
    mu = rng.uniform(0.5, 5.0, nb)
    low = rng.random(nb) < 0.3  # some empty bins at the wall (below WALL_MU)
    mu[low] = rng.uniform(0.0, 0.9e-8, low.sum())
    s = rng.uniform(0.5, 2.0, nb)
    jac = rng.normal(0.0, 1.0, (npar, nb))
    info = (jac * ((1.0 if unit else s) / np.maximum(mu, 1.0))) @ jac.T  # any matrix
    prob = (*(np.zeros(1),) * 12, n, s, unit, np.zeros(1), np.zeros(1), mu, jac)
    empty = np.flatnonzero(n == 0).astype(np.int64)
    b, mu_x, jac_x = np.empty((npar, npar)), np.empty(nb), np.empty((npar, nb))
    wall_info(prob, info, b, mu_x, jac_x, empty, np.empty(empty.size, np.int64),
              np.empty(empty.size))
    sel = (n == 0) & (mu >= WALL_MU)
    assert 0 < sel.sum() < (n == 0).sum()  # both kinds of empty bin are there
    sw = (1.0 if unit else s) / mu
    want = info - (jac[:, sel] * sw[sel]) @ jac[:, sel].T
    np.testing.assert_allclose(b, want, rtol=0, atol=1e-12 * np.abs(info).max())
    np.testing.assert_array_equal(mu_x, mu)
    np.testing.assert_array_equal(jac_x, jac)


def test_step_length_to_the_wall():
    """``likelihood.wall_info.to_wall``: 1 when no bin's linearised expectation
    ``mu + jac^T step`` reaches 0 within the step, else WALL_FRACTION of the way to the first
    bin that does (written here with numpy), to 1e-12 relative."""
    from peaksift.likelihood.poisson import WALL_FRACTION
    from peaksift.likelihood.wall_info import to_wall

    rng = np.random.default_rng(12)
    for scale in (1e-3, 1.0, 30.0):
        mu = rng.uniform(0.1, 5.0, 900)
        jac = rng.normal(0.0, 1.0, (5, 900))
        step = rng.normal(0.0, scale, 5)
        d = jac.T @ step
        r = np.min(mu[d < 0] / -d[d < 0])
        want = 1.0 if r >= 1.0 else WALL_FRACTION * r
        assert to_wall(mu, jac, step, np.empty(900)) == pytest.approx(want, rel=1e-12)
