"""The compiled fast path of the binned cost against outside references.

Sources: the truncated normal, power-law and exponential CDFs from ``scipy.stats`` written
here; derivatives by Richardson-extrapolated central differences of those CDFs (step
independent); the extended binned Poisson NLL sum(mu - n ln mu) (Baker and Cousins, Nucl.
Instrum. Meth. 221 (1984) 437, eq. 11) and its gradient and Fisher information written out
with numpy here; the coarse scan's profile against scipy.optimize per trial mass.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize, stats

from peaksift.likelihood import BinnedCost, Model
from peaksift.likelihood.kernels import edge_kernel
from peaksift.likelihood.starts import peak_candidates
from peaksift.shapes import get


def _richardson(func, x0, h):
    """Step-independent derivative: Richardson extrapolation of central differences."""
    d1 = (func(x0 + h) - func(x0 - h)) / (2 * h)
    d2 = (func(x0 + h / 2) - func(x0 - h / 2)) / h
    return (4 * d2 - d1) / 3


def _gauss_cdf(x, m, s, lo, hi):
    if m < lo:  # window above the peak: upper tails, no cancellation
        a, b = stats.norm.sf([lo, hi], m, s)
        return (a - stats.norm.sf(x, m, s)) / (a - b)
    a, b = stats.norm.cdf([lo, hi], m, s)
    return (stats.norm.cdf(x, m, s) - a) / (b - a)


def _power_cdf(x, k, lo, hi):
    a = 1.0 - k
    return (x**a - lo**a) / (hi**a - lo**a)


def _exp_cdf(x, b, lo, hi):
    t = (x - 0.5 * (lo + hi)) / (0.5 * (hi - lo))
    return (np.exp(b * t) - np.exp(-b)) / (np.exp(b) - np.exp(-b))


@pytest.mark.parametrize(("name", "params", "window", "ref"), [
    ("gaussian", [150.0, 4.0], (100.0, 300.0), _gauss_cdf),  # far tail (> 12 sigma) cut
    ("gaussian", [90.0, 3.0], (110.0, 200.0), _gauss_cdf),  # window above the peak
    ("gaussian", [90.0, 1.5], (110.0, 200.0), _gauss_cdf),  # 13 sigma above: no tail cut
    ("powerlaw", [4.0], (100.0, 1450.0), _power_cdf),
    ("powerlaw", [-1.5], (20.0, 60.0), _power_cdf),
    ("exponential", [-2.0], (100.0, 300.0), _exp_cdf),
    ("exponential", [0.7], (100.0, 300.0), _exp_cdf),
])
def test_edge_kernels_match_scipy(name, params, window, ref):
    edges = np.linspace(window[0], window[1], 301)
    kern = edge_kernel(get(name), edges, window)
    out = np.zeros((kern.rows, edges.size))
    assert kern(list(params), out)
    lo, hi = window
    # the rows' differences are what the cost uses: taken from the window's first edge
    # they are the CDF and its derivatives (the exponential's rows hold CDF - 1 for b < 0)
    out -= out[:, :1]
    # CDF: scipy's truncated CDF, to 1e-12 absolute (a CDF is at most 1)
    np.testing.assert_allclose(out[0], ref(edges, *params, lo, hi), rtol=0, atol=1e-12)
    for j, p in enumerate(params):
        def cdf_of(v, j=j):
            q = list(params)
            q[j] = v
            return ref(edges, *q, lo, hi)
        h = 1e-3 * max(abs(p), 1.0)
        want = _richardson(cdf_of, p, h)
        # derivative: step-independent reference, 1e-7 of the largest derivative
        np.testing.assert_allclose(out[1 + j], want, rtol=0,
                                   atol=1e-7 * max(np.abs(want).max(), 1e-12))


@pytest.mark.parametrize(("signal", "background", "truth", "window"), [
    ("gaussian", "powerlaw", [400.0, 8.0, 1500.0, 4.0, 5e4], (100.0, 1450.0)),
    ("gaussian", "exponential", [150.0, 3.0, 800.0, -2.0, 2e4], (100.0, 300.0)),
])
@pytest.mark.parametrize("masked", [False, True])
def test_fused_cost_matches_poisson_written_here(signal, background, truth, window, masked):
    rng = np.random.default_rng(3)
    edges = np.linspace(window[0], window[1], 401)
    model = Model(signal, background, window)
    v = np.array(truth, float)
    sig_ref = _gauss_cdf(edges, v[0], v[1], *window)
    if background == "powerlaw":
        bkg_ref = _power_cdf(edges, v[3], *window)
    else:
        bkg_ref = _exp_cdf(edges, v[3], *window)
    mu_true = v[2] * np.diff(sig_ref) + v[4] * np.diff(bkg_ref)
    n = rng.poisson(mu_true).astype(float)
    mask = np.ones(n.size, bool)
    if masked:
        mask[150:190] = False
    at = v * np.array([1.001, 1.02, 0.97, 1.01, 1.003])
    cost = BinnedCost(model, at, np.arange(5), [], edges, n, np.ones(n.size),
                      mask if masked else None)
    assert cost._fused is not None  # the compiled path is what is tested
    val, grad, info = cost.value_grad_info(at)

    # reference: the expectation from scipy's CDFs and the Poisson NLL written out here
    def expected(p):
        s = _gauss_cdf(edges, p[0], p[1], *window)
        b = (_power_cdf if background == "powerlaw" else _exp_cdf)(edges, p[3], *window)
        return (p[2] * np.diff(s) + p[4] * np.diff(b))[mask]

    nm = n[mask]
    sat = np.sum(np.where(nm > 0, nm * np.log(np.where(nm > 0, nm, 1.0)), 0.0) - nm)

    def nll(p):
        mu = expected(p)
        return float(np.sum(mu - nm * np.log(mu)) + sat)

    jac = np.array([_richardson(lambda t, j=j: expected(np.where(np.arange(5) == j, t, at)),
                                at[j], 1e-4 * max(abs(at[j]), 1.0)) for j in range(5)])
    mu = expected(at)
    # NLL to 1e-9 relative; gradient and Fisher information (sum dmu dmu^T / mu) to 1e-6
    # of their scale (the reference Jacobian is a Richardson derivative)
    assert val == pytest.approx(nll(at), rel=1e-9, abs=1e-7)
    want_g = jac @ (1.0 - nm / mu)
    np.testing.assert_allclose(grad, want_g, rtol=1e-6, atol=1e-6 * np.abs(want_g).max())
    want_i = (jac / mu) @ jac.T
    np.testing.assert_allclose(info, want_i, rtol=1e-6, atol=0)


def test_coarse_scan_profile_matches_scipy():
    """Each trial mass's profiled (signal yield, background normalisation) against
    scipy.optimize.minimize (L-BFGS-B) of the NLL written here; the local maxima of
    2 dNLL found in the same places."""
    rng = np.random.default_rng(11)
    edges = np.linspace(100.0, 300.0, 81)
    c = 0.5 * (edges[1:] + edges[:-1])
    bkg = np.exp(-(c - 100.0) / 60.0)
    bkg /= bkg.sum()
    peak = np.diff(_gauss_cdf(edges, 170.0, 4.0, 100.0, 300.0))
    n = rng.poisson(20000 * bkg + 300 * peak).astype(float)
    masses = np.arange(105.0, 300.0, 5.0)
    f = np.array([np.diff(_gauss_cdf(edges, m, 4.0, 100.0, 300.0)) for m in masses])
    got = peak_candidates(n, np.ones(n.size), f, 20000 * bkg, most=3)
    q = []
    # 2 dNLL against the background expectation handed in (not refitted)
    nll0 = np.sum(20000 * bkg - n * np.log(20000 * bkg))
    for fm in f:
        def nll(p, fm=fm):
            mu = p[0] * fm + p[1] * bkg
            return float(np.sum(mu - n * np.log(mu))) if np.all(mu > 0) else 1e300
        r = optimize.minimize(nll, [10.0, n.sum()], method="Nelder-Mead",
                              options={"xatol": 1e-6, "fatol": 1e-9, "maxiter": 4000})
        q.append(2 * (nll0 - r.fun) if r.x[0] > 0 else 0.0)
    q = np.array(q)
    best = int(np.argmax(q))
    # the best trial mass is the same; its 2 dNLL to 1e-3 (a coarse scan's precision)
    assert got[0][0] == best
    assert got[0][1] == pytest.approx(q[best], abs=1e-3)
    assert abs(masses[best] - 170.0) <= 5.0


@pytest.mark.parametrize(("name", "rows", "window", "ref"), [
    ("powerlaw", [4.0, 2.2, 7.5, -1.0], (100.0, 1450.0), _power_cdf),
    ("exponential", [-2.0, 0.5, -12.0], (100.0, 300.0), _exp_cdf),
])
@pytest.mark.parametrize("nbins", [50, 10_000])
def test_stacked_rows_match_closed_form(name, rows, window, ref, nbins):
    """Stacked parameters (one per mass hypothesis or toy), the scan's and the toys' path:
    fractions against the closed-form CDF differences written here, to 1e-12 relative
    (the fractions are computed without cancellation: differences of CDF values fail this
    by orders of magnitude in the tails of 10,000 narrow bins), and derivatives against Richardson-extrapolated differences."""
    edges = np.linspace(window[0], window[1], nbins + 1)
    shape = get(name)
    p = np.array(rows)[:, None]
    frac, grad = shape.fractions_and_grad(edges, [p], window)
    np.testing.assert_allclose(shape.bin_fractions(edges, [p], window), frac, rtol=0, atol=0)
    lo, hi = window
    for b, k in enumerate(rows):
        # the reference in long double (where the platform has it), as differences of the
        # unnormalised primitive x^(1-k) or e^(b t), which do not cancel the way CDF values
        # near 1 do
        x = edges.astype(np.longdouble)
        if name == "powerlaw":
            a = 1 - np.longdouble(k)
            prim = x**a
        else:
            prim = np.exp(np.longdouble(k) * (x - np.longdouble(0.5 * (lo + hi)))
                          / np.longdouble(0.5 * (hi - lo)))
        want = (np.diff(prim) / (prim[-1] - prim[0])).astype(float)
        np.testing.assert_allclose(frac[b], want, rtol=1e-12)
        d = _richardson(lambda v: np.diff(ref(edges, v, lo, hi)), k, 1e-3 * max(abs(k), 1.0))
        np.testing.assert_allclose(grad[0, b], d, rtol=0, atol=1e-7 * np.abs(d).max())


def test_small_terms_nll_is_the_same_number():
    """binned_nll(small_terms=True) against sum(mu - n ln mu) written here (Baker and
    Cousins 1984, eq. 11 without the saturated constant), to 1e-12 relative."""
    from peaksift.likelihood.poisson import binned_nll

    rng = np.random.default_rng(5)
    mu = rng.uniform(0.5, 50.0, (3, 400))
    n = rng.poisson(mu).astype(float)
    want = np.sum(mu - np.where(n > 0, n * np.log(mu), 0.0), axis=-1)
    got = binned_nll(n, mu, saturated=False, small_terms=True)
    np.testing.assert_allclose(got, want, rtol=1e-12)
    sat = np.sum(np.where(n > 0, n * np.log(np.where(n > 0, n, 1.0)), 0.0) - n, axis=-1)
    np.testing.assert_allclose(binned_nll(n, mu, small_terms=True), want + sat, rtol=1e-9,
                               atol=1e-9)


def test_small_solve_matches_lapack():
    """The compiled solve of the minimiser's Newton steps against numpy.linalg.solve
    (LAPACK), to 1e-10 relative, on ill-scaled symmetric positive definite systems; a
    singular system is reported as such."""
    from peaksift.likelihood.kernels import solve_small

    rng = np.random.default_rng(8)
    for n in (1, 2, 5, 9):
        a = rng.normal(size=(n, n))
        scale = 10.0 ** rng.uniform(-6, 6, n)
        a = (a @ a.T + n * np.eye(n)) * np.outer(scale, scale)
        g = rng.normal(size=n) * scale
        out = np.empty(n)
        assert solve_small(a, g, out)
        np.testing.assert_allclose(out, -np.linalg.solve(a, g), rtol=1e-10)
    assert not solve_small(np.zeros((3, 3)), np.ones(3), np.empty(3))


def test_solve_small_in_work_buffers_matches_numpy():
    """solve_small_into (the profile kernel's Newton steps, work buffers given) against
    numpy.linalg.solve (outside reference: LAPACK's gesv) to 1e-10 relative on scaled SPD
    systems, the same buffers reused for every system; a singular system is refused."""
    from peaksift.likelihood.kernels import solve_small_into

    rng = np.random.default_rng(9)
    for n in (1, 3, 6):
        m, d = np.empty((n, n + 1)), np.empty(n)
        for _ in range(5):
            a = rng.normal(size=(n, n))
            scale = 10.0 ** rng.uniform(-6, 6, n)
            a = (a @ a.T + n * np.eye(n)) * np.outer(scale, scale)
            g = rng.normal(size=n) * scale
            out = np.empty(n)
            assert solve_small_into(a, g, out, m, d)
            np.testing.assert_allclose(out, -np.linalg.solve(a, g), rtol=1e-10)
        assert not solve_small_into(np.zeros((n, n)), np.ones(n), np.empty(n), m, d)


def test_vectorising_exp_and_log_match_numpy():
    """shapes.compiled_math.vexp / vlog (the fit's edge kernels and Poisson pass) against
    numpy's exp and log (outside reference: the C library's / numpy's own), within 2 ulp
    relative on normal results, and the special values (0, subnormals, inf, NaN) equal."""
    from numba import njit

    from peaksift.shapes.compiled_math import vexp, vlog

    @njit(error_model="numpy")
    def run(x, out_e, y, out_l):
        for i in range(x.size):
            out_e[i] = vexp(x[i])
        for i in range(y.size):
            out_l[i] = vlog(y[i])

    rng = np.random.default_rng(11)
    specials = [np.nan, np.inf, -np.inf, 0.0, -745.2, -745.1, -744.0, -720.0, 709.7, 709.8]
    x = np.concatenate([rng.uniform(-760, 720, 50_000), rng.uniform(-2, 2, 50_000), specials])
    y = np.concatenate([np.exp(rng.uniform(-744, 709, 50_000)), rng.uniform(0.5, 2, 50_000),
                        [0.0, -1.0, np.nan, np.inf, 5e-324, 1e-310, 1.0, 2.0]])
    out_e, out_l = np.empty_like(x), np.empty_like(y)
    run(x, out_e, y, out_l)
    with np.errstate(all="ignore"):
        ref_e, ref_l = np.exp(x), np.log(y)
    normal = np.isfinite(ref_e) & (ref_e > 2.3e-308)
    assert np.max(np.abs(out_e[normal] / ref_e[normal] - 1.0)) < 2 * 2.3e-16
    sub = ~normal
    np.testing.assert_array_equal(np.isnan(out_e[sub]), np.isnan(ref_e[sub]))
    tiny = np.isfinite(ref_e) & ~normal  # 0 and subnormals: within 2 units of the last place
    assert np.max(np.abs(out_e[tiny] - ref_e[tiny])) <= 1e-323
    np.testing.assert_array_equal(out_e[np.isinf(ref_e)], ref_e[np.isinf(ref_e)])
    fin = np.isfinite(ref_l) & (ref_l != 0)
    assert np.max(np.abs(out_l[fin] / ref_l[fin] - 1.0)) < 2 * 2.3e-16
    np.testing.assert_array_equal(out_l[~fin], ref_l[~fin])


def test_narrow_yield_profile_matches_scipy():
    """likelihood.kernels.profile_one_yield (the narrow candidates' profile) against
    scipy.optimize.minimize_scalar of the Poisson NLL sum(mu - n ln mu), mu = b + y f,
    written here (Baker and Cousins 1984, eq. 11): yield to 1e-6 of its error and the gain
    2 dNLL to 1e-6 absolute; rows whose steps stop at the 1 % floor are left out."""
    from peaksift.likelihood.kernels import profile_one_yield

    rng = np.random.default_rng(5)
    rows, k = 40, 7
    b = rng.uniform(5.0, 200.0, (rows, k))
    f = np.exp(-0.5 * np.linspace(-2, 2, k) ** 2)[None, :] * rng.uniform(0.2, 1.0, (rows, 1))
    truth = rng.uniform(-2.0, 60.0, rows)
    n = rng.poisson(b + truth[:, None] * f).astype(float)
    s = np.ones_like(b)
    y, gain = np.empty(rows), np.empty(rows)
    profile_one_yield(n, b, s, f, 12, y, gain)
    checked = 0
    for r in range(rows):
        def nll(v, r=r):
            mu = b[r] + v * f[r]
            return np.inf if np.any(mu <= 0) else float(np.sum(mu - n[r] * np.log(mu)))
        lo = -0.99 * np.min(b[r] / f[r])
        res = optimize.minimize_scalar(nll, bounds=(lo, 1e3), method="bounded",
                                       options={"xatol": 1e-10})
        if np.any(b[r] + res.x * f[r] < 0.011 * b[r]):
            continue
        err = 1.0 / np.sqrt(np.sum(f[r] ** 2 / (b[r] + res.x * f[r])))
        assert abs(y[r] - res.x) < 1e-6 * err
        assert abs(gain[r] - 2.0 * (nll(0.0) - res.fun)) < 1e-6
        checked += 1
    assert checked > 30


def test_poisson_pass_scaled_and_negative_expectation():
    """The compiled pass's NLL, gradient and information with scaled-Poisson factors ``s``
    (Bohm and Zech, Nucl. Instrum. Meth. A 748 (2014) 1: sum s mu - n~ ln mu) against the
    sums written here with numpy and math.fsum (NLL to 1e-12 relative, gradient and
    information to 1e-10 of their scale), on contiguous and on picked bins; and a
    negative expectation in any used bin (outside the Poisson model) gives an infinite
    NLL wherever the bin lies."""
    import math

    from peaksift.likelihood.kernels import poisson_pass

    rng = np.random.default_rng(8)
    nb = 1350
    rows = np.cumsum(rng.uniform(0.0, 1.0, (2, nb + 1)), axis=1)  # two CDF-like rows
    drows = rng.normal(0.0, 1.0, (1, nb + 1))  # one shape derivative row of component 0
    cdf = np.vstack([rows[0], drows[0], rows[1]])
    yields = np.array([40.0, 3.0])
    value_row, yield_free = np.array([0, 2]), np.array([0, 2])
    drow, dcomp, dfree = np.array([1]), np.array([0]), np.array([1])
    for bins in (np.arange(nb), np.sort(rng.choice(nb, 700, replace=False))):
        d0, d1 = np.diff(rows[0])[bins], np.diff(rows[1])[bins]
        mu_ref = yields[0] * d0 + yields[1] * d1
        n = rng.poisson(mu_ref).astype(float)
        s = rng.uniform(0.5, 2.0, bins.size)
        jac = np.vstack([d0, yields[0] * np.diff(drows[0])[bins], d1])
        for unit in (True, False):
            sj = np.ones(bins.size) if unit else s
            mu, jb, g, info = np.empty(bins.size), np.empty((3, bins.size)), np.empty(3), \
                np.empty((3, 3))
            val = poisson_pass(cdf, value_row, yields, yield_free, drow, dcomp, dfree, bins,
                               n, s, unit, 1e-300, True, mu, jb, g, info)
            want = math.fsum(sj * mu_ref - n * np.log(mu_ref))
            assert val == pytest.approx(want, rel=1e-12)
            np.testing.assert_allclose(mu, mu_ref, rtol=1e-13)
            want_g = jac @ (sj - n / mu_ref)
            np.testing.assert_allclose(g, want_g, rtol=0, atol=1e-10 * np.abs(want_g).max())
            want_i = (jac * (sj / mu_ref)) @ jac.T
            np.testing.assert_allclose(info, want_i, rtol=1e-10)
        for where in (0, bins.size // 2, bins.size - 1):  # one bin below zero
            i = bins[where]
            step = np.where(np.arange(nb + 1) > i, 1.0, 0.0)  # all of a peak in bin i
            bad = np.vstack([step, np.zeros(nb + 1), rows[1]])
            deficit = np.array([-(yields[1] * (rows[1][i + 1] - rows[1][i]) + 1.0), 3.0])
            mu, jb, g, info = np.empty(bins.size), np.empty((3, bins.size)), np.empty(3), \
                np.empty((3, 3))
            val = poisson_pass(bad, value_row, deficit, yield_free, drow, dcomp, dfree, bins,
                               n, s, False, 1e-300, True, mu, jb, g, info)
            assert val == math.inf
            deficit[0] += 1.5  # 0.5 above zero there: a finite NLL again
            assert math.isfinite(poisson_pass(bad, value_row, deficit, yield_free, drow, dcomp,
                                              dfree, bins, n, s, False, 1e-300, True, mu, jb,
                                              g, info))
