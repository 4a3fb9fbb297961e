"""Shapes against outside references (each named beside its check)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, special, stats

from peaksift import shapes
from peaksift.errors import FitError
from peaksift.shapes._base import _finite_difference

W = (60.0, 120.0)

# one representative parameter set per shape (values chosen to exercise every branch:
# Crystal Ball tails on both sides inside the window, a Breit-Wigner wider than a Gaussian)
CASES = {
    "gaussian": {},
    "crystalball": {},
    "breitwigner": {},
    "voigt": {},
    "exppoly": {"order": 1},
    "exponential": {},
    "bernstein": {"degree": 3},
    "powerlaw": {},
    "dijet": {"npar": 4},
    "turnon": {},
}
PARAMS = {
    "gaussian": [91.0, 2.5],
    "crystalball": [91.0, 2.0, 1.2, 3.0, 2.0, 6.0],
    "breitwigner": [91.19, 2.5],
    "voigt": [91.19, 1.5, 2.5],
    "exppoly": [-1.3],
    "exponential": [0.7],
    "bernstein": [0.5, 1.2, 0.3],
    "powerlaw": [3.5],
    "dijet": [5.0, 4.0, 0.3],
    "turnon": [70.0, 3.0, 0.05],
}
EXTRA = [("exppoly", {"order": 2}, [-1.0, 0.4]), ("exppoly", {"order": 3}, [-1.0, 0.3, -0.2]),
         ("dijet", {"npar": 2}, [8.0]), ("dijet", {"npar": 3, "sqrt_s": 500.0}, [6.0, 3.0]),
         ("bernstein", {"degree": 6}, [1.0, 0.2, 0.9, 0.0, 1.4, 0.5])]
ALL = [(n, CASES[n], PARAMS[n]) for n in CASES] + EXTRA


def _quad(f, a, b):
    pts = [p for p in (91.0, 91.19) if a < p < b]
    return integrate.quad(f, a, b, points=pts or None, limit=400, epsabs=1e-14, epsrel=1e-12)[0]


def test_available_lists_every_shape_with_kind_and_parameters():
    av = shapes.available()
    assert set(av) == set(CASES)
    assert av["gaussian"]["kind"] == "signal" and av["gaussian"]["parameters"] == ("mass", "sigma")
    assert av["bernstein"]["kind"] == "background"
    for name, info in av.items():
        s = shapes.get(name)
        assert s.name == name and s.kind == info["kind"]


def test_unknown_name_lists_valid_names():
    with pytest.raises(FitError) as e:
        shapes.get("gausian")
    msg = str(e.value)
    assert "did you mean 'gaussian'" in msg
    for n in CASES:
        assert n in msg


def test_bad_options_are_fit_errors():
    with pytest.raises(FitError, match="order must be 1, 2 or 3"):
        shapes.get("exppoly", order=5)
    with pytest.raises(FitError, match="no parameter or option 'slope'"):
        shapes.get("gaussian", slope=1.0)
    with pytest.raises(FitError, match="sqrt_s=100.0 must exceed"):
        shapes.get("dijet", sqrt_s=100.0).pdf(np.array([80.0]), [5.0, 4.0, 0.0], W)


@pytest.mark.parametrize(("name", "opts", "p"), ALL, ids=lambda v: str(v))
def test_normalised_on_window(name, opts, p):
    """Integral of the pdf over the window is 1 to 1e-6 (scipy.integrate.quad)."""
    s = shapes.get(name, **opts)
    assert abs(_quad(lambda x: float(s.pdf(np.array(x), p, W)), *W) - 1.0) < 1e-6


@pytest.mark.parametrize(("name", "opts", "p"), ALL, ids=lambda v: str(v))
def test_cdf_matches_numerical_integral(name, opts, p):
    """CDF at several points vs scipy.integrate.quad of the pdf: 1e-8 relative."""
    s = shapes.get(name, **opts)
    xs = np.array([61.0, 75.0, 88.0, 91.1, 93.0, 100.0, 119.0])
    ref = np.array([_quad(lambda t: float(s.pdf(np.array(t), p, W)), W[0], x) for x in xs])
    got = s.cdf(xs, p, W)
    np.testing.assert_allclose(got, ref, rtol=1e-8, atol=1e-14)
    assert s.cdf(np.array([W[0]]), p, W)[0] == pytest.approx(0.0, abs=1e-15)
    assert s.cdf(np.array([W[1]]), p, W)[0] == pytest.approx(1.0, abs=1e-14)
    f = s.bin_fractions(np.linspace(*W, 61), p, W)
    assert np.all(f >= 0) and f.sum() == pytest.approx(1.0, abs=1e-12)


def test_gaussian_against_scipy_norm():
    """pdf/cdf truncated to the window equal scipy.stats.norm's (to 1e-12)."""
    s = shapes.get("gaussian")
    x = np.linspace(*W, 301)
    m, sg = 91.0, 2.5
    z = stats.norm.cdf(W[1], m, sg) - stats.norm.cdf(W[0], m, sg)
    np.testing.assert_allclose(s.pdf(x, [m, sg], W), stats.norm.pdf(x, m, sg) / z, rtol=1e-12)
    np.testing.assert_allclose(s.cdf(x, [m, sg], W),
                               (stats.norm.cdf(x, m, sg) - stats.norm.cdf(W[0], m, sg)) / z,
                               rtol=1e-12, atol=1e-15)
    assert s.fwhm([m, sg]) == pytest.approx(2 * math.sqrt(2 * math.log(2)) * sg, rel=1e-14)


def test_crystalball_one_sided_limit_matches_scipy():
    """With the high-side tail pushed beyond the window, ours is
    scipy.stats.crystalball(beta=alpha_low, m=n_low, loc=mass, scale=sigma)
    truncated to the window (to 1e-10)."""
    s = shapes.get("crystalball")
    m, sg, a, n = 91.0, 2.0, 1.3, 2.7
    p = [m, sg, a, n, 10.0, 5.0]  # core reaches 10 sigma = 111 GeV; window ends at 110
    w = (60.0, 110.0)
    ref = stats.crystalball(beta=a, m=n, loc=m, scale=sg)
    z = ref.cdf(w[1]) - ref.cdf(w[0])
    x = np.linspace(*w, 401)
    np.testing.assert_allclose(s.pdf(x, p, w), ref.pdf(x) / z, rtol=1e-10)
    np.testing.assert_allclose(s.cdf(x, p, w), (ref.cdf(x) - ref.cdf(w[0])) / z,
                               rtol=1e-9, atol=1e-14)


def test_crystalball_is_mirror_symmetric():
    """Swapping the tails and reflecting x about the mass gives the same density
    (follows from the definition, Gaiser 1982)."""
    s = shapes.get("crystalball")
    w = (71.0, 111.0)  # symmetric about 91
    x = np.linspace(72, 110, 77)
    a = s.pdf(x, [91.0, 2.0, 1.1, 3.0, 2.2, 7.0], w)
    b = s.pdf(182.0 - x, [91.0, 2.0, 2.2, 7.0, 1.1, 3.0], w)
    np.testing.assert_allclose(a, b, rtol=1e-12)


def test_crystalball_fwhm_is_gaussian_when_tails_start_beyond_half_maximum():
    """Tails starting beyond z = sqrt(2 ln 2) leave the Gaussian FWHM (common practice)."""
    s = shapes.get("crystalball")
    assert s.fwhm([91.0, 2.0, 1.5, 3.0, 2.0, 5.0]) == pytest.approx(
        2 * math.sqrt(2 * math.log(2)) * 2.0, rel=1e-9)


def test_voigt_against_scipy_voigt_profile():
    """pdf = scipy.special.voigt_profile(x - m, sigma, width/2) / (its integral on the
    window by scipy.integrate.quad), to 1e-8."""
    s = shapes.get("voigt")
    m, sg, g = 91.19, 1.5, 2.5
    z = _quad(lambda t: special.voigt_profile(t - m, sg, g / 2), *W)
    x = np.linspace(*W, 201)
    np.testing.assert_allclose(s.pdf(x, [m, sg, g], W), special.voigt_profile(x - m, sg, g / 2) / z,
                               rtol=1e-8)


def test_voigt_fwhm_against_olivero_longbothum():
    """Numerical FWHM vs the published approximation of Olivero and Longbothum, J. Quant.
    Spectrosc. Radiat. Transfer 17 (1977) 233: f_V ~ 0.5346 f_L + sqrt(0.2166 f_L^2 + f_G^2),
    f_L = Gamma (Lorentzian FWHM), f_G = 2 sqrt(2 ln 2) sigma; about 0.02 % accurate (from
    memory, so tolerance 0.1 %).  Also the half-maximum points of
    scipy.special.voigt_profile found by root finding (1e-6), and the Gaussian / Lorentzian
    limits."""
    from scipy.optimize import brentq

    s = shapes.get("voigt")
    for sg, g in [(1.5, 2.5), (0.5, 3.0), (2.0, 0.5), (1.0, 1.0)]:
        f_l = g
        f_g = 2.0 * math.sqrt(2.0 * math.log(2.0)) * sg
        olivero = 0.5346 * f_l + math.sqrt(0.2166 * f_l**2 + f_g**2)
        got = s.fwhm([91.0, sg, g])
        assert got == pytest.approx(olivero, rel=1e-3), (sg, g, got, olivero)
        half = 0.5 * special.voigt_profile(0.0, sg, g / 2)
        hwhm = brentq(lambda t, sg=sg, g=g, half=half: special.voigt_profile(t, sg, g / 2) - half,
                      0.0, 10 * olivero, xtol=1e-14, rtol=1e-14)
        assert got == pytest.approx(2 * hwhm, rel=1e-6)
    assert s.fwhm([91.0, 1.0, 1e-7]) == pytest.approx(2 * math.sqrt(2 * math.log(2)), rel=1e-5)
    assert s.fwhm([91.0, 1e-7, 2.0]) == pytest.approx(2.0, rel=1e-5)


def test_breitwigner_against_pdg_formula():
    """Relativistic Breit-Wigner, PDG Review "Resonances": density proportional to
    1/((m^2 - M^2)^2 + M^2 Gamma^2); normalised by scipy.integrate.quad.  FWHM from
    solving for half maximum (numerical root) equals the closed form."""
    s = shapes.get("breitwigner")
    mm, g = 91.1876, 2.4952  # Z mass and width (GeV), from memory; any values would do
    f = lambda m: 1.0 / ((m * m - mm * mm) ** 2 + (mm * g) ** 2)
    z = _quad(f, *W)
    x = np.linspace(*W, 201)
    np.testing.assert_allclose(s.pdf(x, [mm, g], W), f(x) / z, rtol=1e-10)
    half = 0.5 * f(mm)
    from scipy.optimize import brentq

    lo = brentq(lambda m: f(m) - half, mm - 5 * g, mm)
    hi = brentq(lambda m: f(m) - half, mm, mm + 5 * g)
    assert s.fwhm([mm, g]) == pytest.approx(hi - lo, rel=1e-10)


def test_breitwigner_narrow_width_cdf():
    """Analytic CDF holds for a width 1e-4 of the mass (quad with the peak as a break point)."""
    s = shapes.get("breitwigner")
    p = [91.0, 0.01]
    ref = _quad(lambda t: float(s.pdf(np.array(t), p, W)), W[0], 91.003)
    assert s.cdf(np.array([91.003]), p, W)[0] == pytest.approx(ref, rel=1e-8)


def test_bernstein_never_negative():
    """Any coefficients give a non-negative density (squares of the parameters)."""
    s = shapes.get("bernstein", degree=5)
    rng = np.random.default_rng(3)
    x = np.linspace(*W, 500)
    for _ in range(50):
        p = list(rng.normal(0, 2, 5))
        assert np.all(s.pdf(x, p, W) >= 0)


@pytest.mark.parametrize(("name", "opts", "p"), ALL, ids=lambda v: str(v))
def test_gradients_match_central_differences(name, opts, p):
    """grad_bin_fractions and grad_pdf (analytic where provided) vs central differences."""
    s = shapes.get(name, **opts)
    e = np.linspace(*W, 41)
    g = s.grad_bin_fractions(e, p, W)
    h = 1e-6
    for i in range(len(p)):
        q1, q2 = list(p), list(p)
        step = h * max(abs(p[i]), 1.0)
        q1[i] += step
        q2[i] -= step
        fd = (s.bin_fractions(e, q1, W) - s.bin_fractions(e, q2, W)) / (2 * step)
        np.testing.assert_allclose(g[i], fd, rtol=1e-4, atol=1e-8)
    x = np.linspace(61, 119, 30)
    gp = s.grad_pdf(x, p, W)
    fdp = _finite_difference(lambda q: s.pdf(x, q, W), p, s.parameters)
    np.testing.assert_allclose(gp, fdp, rtol=1e-4, atol=1e-8)
    f2, g2 = s.pdf_and_grad(x, p, W)
    np.testing.assert_allclose(f2, s.pdf(x, p, W), rtol=1e-12)
    np.testing.assert_allclose(g2, gp, rtol=1e-6, atol=1e-12)


@pytest.mark.parametrize(("name", "opts", "p"), ALL, ids=lambda v: str(v))
def test_broadcast_parameter_arrays(name, opts, p):
    """Parameters of shape (k, 1) against edges (n,) give (k, n-1), equal to a loop."""
    s = shapes.get(name, **opts)
    e = np.linspace(*W, 31)
    scale = np.array([[1.0], [1.03], [0.97]])
    pa = [np.asarray(v) * scale if i == 0 else v for i, v in enumerate(p)]
    got = s.bin_fractions(e, pa, W)
    assert got.shape == (3, 30)
    for k in range(3):
        q = [float(pa[0][k, 0])] + list(p[1:])
        np.testing.assert_allclose(got[k], s.bin_fractions(e, q, W), rtol=1e-12, atol=1e-15)
    gg = s.grad_bin_fractions(e, pa, W)
    assert gg.shape == (len(p), 3, 30)


def test_turnon_rises_then_falls():
    """Shape property (common practice for trigger-threshold spectra): rising below the
    threshold, falling well above it."""
    s = shapes.get("turnon")
    x = np.linspace(61, 119, 59)
    f = s.pdf(x, [75.0, 3.0, 0.05], W)
    k = int(np.argmax(f))
    assert 70 < x[k] < 90
    assert np.all(np.diff(f[:k - 3]) > 0) and np.all(np.diff(f[k + 3:]) < 0)


# ------------------------------------------------------------------ background shapes
# Each background shape against a closed form written out here (or a scipy distribution),
# pdf to 1e-10 relative (1e-14 /GeV absolute), CDF vs scipy.integrate.quad of the reference
# density to 1e-8 relative (1e-14 absolute).
XS = np.linspace(W[0], W[1], 121)


def _check_against(s, p, ref_pdf, window=W, ref_cdf=None, breaks=()):
    """peaksift pdf == ref_pdf normalised on the window (quad); peaksift cdf == ref_cdf or
    quad of the normalised reference."""
    lo, hi = window
    x = np.linspace(lo, hi, 121)
    pts = [b for b in breaks if lo < b < hi] or None
    z = integrate.quad(ref_pdf, lo, hi, points=pts, limit=400, epsabs=0, epsrel=1e-13)[0]
    np.testing.assert_allclose(s.pdf(x, p, window), ref_pdf(x) / z, rtol=1e-10, atol=1e-14)
    xc = x[1::12]
    if ref_cdf is None:
        ref = np.array([integrate.quad(ref_pdf, lo, t, points=[b for b in breaks if lo < b < t]
                                       or None, limit=400, epsabs=0, epsrel=1e-13)[0]
                        for t in xc]) / z
    else:
        ref = ref_cdf(xc)
    np.testing.assert_allclose(s.cdf(xc, p, window), ref, rtol=1e-8, atol=1e-14)


@pytest.mark.parametrize(("npar", "sqrt_s", "p"), [
    (4, None, [5.0, 4.0, 0.3]), (3, 500.0, [6.0, 3.0]), (2, None, [8.0]),
    (4, 13000.0, [12.0, 5.0, 0.1]), (4, 120.2, [-5.0, 4.0, 0.3])])
def test_dijet_against_published_form(npar, sqrt_s, p):
    """f(m) = p0 (1-x)^p1 / x^(p2 + p3 ln x), x = m/sqrt_s (Phys. Rev. D 79 (2009) 112002;
    p2 = p3 = 0 for fewer parameters), normalised with scipy.integrate.quad; sqrt_s
    defaults to twice the window's upper edge (peaksift's documented choice).  The last set
    (sqrt_s just above the window) needs panels graded towards sqrt_s."""
    s = shapes.get("dijet", npar=npar, **({} if sqrt_s is None else {"sqrt_s": sqrt_s}))
    rs = 2 * W[1] if sqrt_s is None else sqrt_s
    p1, p2, p3 = (list(p) + [0.0, 0.0])[:3]

    def ref(m):
        x = np.asarray(m) / rs
        return 1.0 * (1 - x) ** p1 / x ** (p2 + p3 * np.log(x))

    _check_against(s, p, ref)


@pytest.mark.parametrize("b1", [-1.3, -8.0, 0.7])
def test_exponential_against_scipy_truncexpon(b1):
    """exp(b1 t), t = (m - c)/h, is an exponential of slope b1/h per GeV truncated to the
    window: scipy.stats.truncexpon(b=(hi-lo)/scale, loc=lo, scale=h/|b1|), reflected
    about the window (m -> lo + hi - m) for a rising slope; CDF also vs scipy.integrate.quad."""
    lo, hi = W
    h = 0.5 * (hi - lo)
    scale = h / abs(b1)
    ref = stats.truncexpon(b=(hi - lo) / scale, loc=lo, scale=scale)
    y = XS if b1 < 0 else lo + hi - XS
    ref_pdf = ref.pdf(y)
    ref_cdf = ref.cdf(y) if b1 < 0 else ref.sf(y)
    for s in (shapes.get("exponential"), shapes.get("exppoly", order=1)):
        np.testing.assert_allclose(s.pdf(XS, [b1], W), ref_pdf, rtol=1e-10)
        np.testing.assert_allclose(s.cdf(XS, [b1], W), ref_cdf, rtol=1e-9, atol=1e-14)
        _check_against(s, [b1], lambda m: np.exp(b1 * (np.asarray(m) - lo) / h))


@pytest.mark.parametrize(("order", "p"), [(2, [-1.0, 0.4]), (3, [-1.0, 0.3, -0.2]),
                                          (3, [2.0, -3.0, 1.5])])
def test_exppoly_against_closed_form(order, p):
    """exp(b1 t + b2 t^2 + b3 t^3), t = (m - c)/h in [-1, 1] (the definition, written out),
    normalised with scipy.integrate.quad."""
    s = shapes.get("exppoly", order=order)
    c, h = 0.5 * (W[0] + W[1]), 0.5 * (W[1] - W[0])
    b = list(p) + [0.0] * (3 - len(p))

    def ref(m):
        t = (np.asarray(m) - c) / h
        return np.exp(b[0] * t + b[1] * t**2 + b[2] * t**3)

    _check_against(s, p, ref)


@pytest.mark.parametrize("power", [3.5, 1.0, 0.0, -2.0, 25.0])
def test_powerlaw_against_pareto_and_closed_form(power):
    """m^-k on [lo, hi]: closed-form normalisation (m^(1-k) - lo^(1-k)) / (hi^(1-k) -
    lo^(1-k)), ln(m/lo)/ln(hi/lo) for k = 1 (elementary calculus); for k > 1 also
    scipy.stats.pareto(b=k-1, scale=lo) truncated at hi."""
    s = shapes.get("powerlaw")
    lo, hi = W
    k = power
    if k == 1.0:
        cdf = np.log(XS / lo) / np.log(hi / lo)
        pdf = 1.0 / (XS * np.log(hi / lo))
    else:
        a = 1.0 - k
        cdf = (XS**a - lo**a) / (hi**a - lo**a)
        pdf = a * XS ** (-k) / (hi**a - lo**a)
    np.testing.assert_allclose(s.pdf(XS, [k], W), pdf, rtol=1e-10)
    np.testing.assert_allclose(s.cdf(XS, [k], W), cdf, rtol=1e-9, atol=1e-14)
    if k > 1:
        par = stats.pareto(b=k - 1.0, scale=lo)
        zt = par.cdf(hi)
        np.testing.assert_allclose(s.pdf(XS, [k], W), par.pdf(XS) / zt, rtol=1e-10)
        np.testing.assert_allclose(s.cdf(XS, [k], W), par.cdf(XS) / zt, rtol=1e-9, atol=1e-14)
    _check_against(s, [k], lambda m: np.asarray(m, float) ** (-k))


@pytest.mark.parametrize("p", [[0.5, 1.2, 0.3], [1.0, 0.2, 0.9, 0.0, 1.4, 0.5], [-2.0],
                               [0.0, 0.0, 0.0, 3.0]])
def test_bernstein_against_scipy_bpoly(p):
    """sum_i beta_i b_{i,n}(u), u = (m - lo)/(hi - lo), with beta = (1, c1^2, ..., cn^2)
    (peaksift's parametrisation, see Bernstein's docstring) is
    scipy.interpolate.BPoly(beta, [lo, hi]); normalised by BPoly.integrate, CDF from
    BPoly.antiderivative, and the CDF also vs scipy.integrate.quad."""
    from scipy.interpolate import BPoly

    s = shapes.get("bernstein", degree=len(p))
    beta = np.array([1.0] + [c * c for c in p])
    bp = BPoly(beta[:, None], [W[0], W[1]])
    z = bp.integrate(*W)
    prim = bp.antiderivative()
    np.testing.assert_allclose(s.pdf(XS, p, W), bp(XS) / z, rtol=1e-10, atol=1e-15)
    np.testing.assert_allclose(s.cdf(XS, p, W), (prim(XS) - prim(W[0])) / z, rtol=1e-9,
                               atol=1e-14)
    _check_against(s, p, bp)


@pytest.mark.parametrize("p", [[70.0, 3.0, 0.05], [100.0, 1.5, 0.5], [62.0, 8.0, 0.02],
                               [80.0, 4.0, 1.5], [45.0, 5.0, 0.1], [30.0, 0.06, 1.6],
                               [115.0, 1.0, 1.66], [90.0, 0.5, 1.66]])
def test_turnon_against_norm_cdf_times_exponential(p):
    """scipy.stats.norm.cdf((m - threshold)/resolution) * exp(-slope m) (the definition,
    written out), normalised with scipy.integrate.quad.  The last three sets (inside the
    default bounds: a turn-on far below the window or a steep fall) once lost the whole
    normalisation to cancellation."""
    s = shapes.get("turnon")
    t, r, k = p

    def ref(m):
        return stats.norm.cdf((np.asarray(m) - t) / r) * np.exp(-k * (np.asarray(m) - W[0]))

    _check_against(s, p, ref, breaks=(t,))
