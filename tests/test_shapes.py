"""Shapes against outside references (each named beside its check)."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy import integrate, special, stats

from peaksift import shapes
from peaksift.errors import FitError

W = (60.0, 120.0)

# Parameter points, several per registered shape, inside the bounds: a central one, narrow
# and wide peaks, peaks near a window edge, Crystal Ball tails with small and large alpha and
# n near its lower bound (1.01), background parameters where a code path changes (exppoly
# order 1 near b1 = 0 uses a series, powerlaw k = 1 a limit, dijet sqrt_s just above the
# window graded panels).
POINTS = [
    ("gaussian", {}, [91.0, 2.5]),
    ("gaussian", {}, [61.0, 1.0]),
    ("gaussian", {}, [90.0, 0.05]),
    ("gaussian", {}, [95.0, 25.0]),
    ("crystalball", {}, [91.0, 2.0, 1.2, 3.0, 2.0, 6.0]),
    ("crystalball", {}, [91.0, 2.0, 0.1, 1.02, 0.3, 1.05]),
    ("crystalball", {}, [91.0, 2.0, 5.0, 50.0, 8.0, 150.0]),
    ("crystalball", {}, [70.0, 0.5, 0.6, 1.5, 3.0, 10.0]),
    ("crystalball", {}, [91.0, 0.05, 1.2, 3.0, 2.0, 6.0]),
    ("breitwigner", {}, [91.19, 2.5]),
    ("breitwigner", {}, [91.0, 0.05]),
    ("breitwigner", {}, [100.0, 15.0]),
    ("breitwigner", {}, [62.0, 3.0]),
    ("voigt", {}, [91.19, 1.5, 2.5]),
    ("voigt", {}, [91.0, 0.3, 3.0]),
    ("voigt", {}, [91.0, 2.0, 0.05]),
    ("voigt", {}, [110.0, 1.0, 1.0]),
    ("voigt", {}, [91.0, 0.03, 0.02]),
    ("exponential", {}, [0.7]),
    ("exponential", {}, [-8.0]),
    ("exponential", {}, [5e-4]),
    ("exponential", {}, [0.0]),
    ("exppoly", {"order": 1}, [-1.3]),
    ("exppoly", {"order": 2}, [-1.0, 0.4]),
    ("exppoly", {"order": 3}, [-1.0, 0.3, -0.2]),
    ("exppoly", {"order": 3}, [2.0, -3.0, 1.5]),
    ("bernstein", {"degree": 3}, [0.5, 1.2, 0.3]),
    ("bernstein", {"degree": 6}, [1.0, 0.2, 0.9, 0.0, 1.4, 0.5]),
    ("bernstein", {"degree": 1}, [-2.0]),
    ("powerlaw", {}, [3.5]),
    ("powerlaw", {}, [1.0]),
    ("powerlaw", {}, [-2.0]),
    ("powerlaw", {}, [25.0]),
    ("powersum", {"terms": 1}, [4.0]),
    ("powersum", {"terms": 2}, [3.0, 7.0, 0.5]),
    ("powersum", {"terms": 3}, [2.0, 5.0, 0.8, 9.0, -0.4]),
    ("dijet", {"npar": 4}, [5.0, 4.0, 0.3]),
    ("dijet", {"npar": 2}, [8.0]),
    ("dijet", {"npar": 3, "sqrt_s": 500.0}, [6.0, 3.0]),
    ("dijet", {"npar": 4, "sqrt_s": 13000.0}, [12.0, 5.0, 0.1]),
    ("dijet", {"npar": 4, "sqrt_s": 120.2}, [-5.0, 4.0, 0.3]),
    ("turnon", {}, [70.0, 3.0, 0.05]),
    ("turnon", {}, [100.0, 1.5, 0.5]),
    ("turnon", {}, [31.0, 0.08, 1.6]),
    ("turnon", {}, [80.0, 0.1, 0.05]),
    ("turnon", {}, [80.0, 0.07, 0.05]),
    ("turnon", {}, [115.0, 1.0, 1.66]),
]


def _id(v):
    return str(v)


def _of(name):
    return [pt for pt in POINTS if pt[0] == name]


def _scale(s, p):
    """Width scale of a signal shape (its smallest sigma / width), None for backgrounds."""
    d = dict(zip(s.parameter_names, p))
    widths = [d[k] for k in ("sigma", "width") if k in d]
    return min(widths) if widths else None


def _junctions(s, p):
    """Masses where the Crystal Ball changes formula (core to tail): m - aL s, m + aH s."""
    if s.name != "crystalball":
        return []
    m, sg, al, _, ah, _ = p
    return [m - al * sg, m + ah * sg]


def _breaks(s, p):
    """Break points for scipy.integrate.quad: the peak and its neighbourhood, the Crystal
    Ball junctions, the turn-on threshold."""
    d = dict(zip(s.parameter_names, p))
    out = list(_junctions(s, p))
    if "mass" in d:
        w = _scale(s, p)
        out += [d["mass"] + k * w for k in (-30, -10, -3, -1, 0, 1, 3, 10, 30)]
    if "threshold" in d:
        out.append(d["threshold"])
    return sorted(out)


def _quad(f, a, b, breaks=()):
    pts = [t for t in breaks if a < t < b]
    return integrate.quad(f, a, b, points=pts or None, limit=800, epsabs=1e-15,
                          epsrel=1e-12)[0]


def test_available_lists_every_shape_with_kind_and_parameters():
    av = shapes.available()
    assert set(av) == {pt[0] for pt in POINTS}  # every shape has parameter points below
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
    for n in shapes.available():
        assert n in msg


def test_bad_options_are_fit_errors():
    with pytest.raises(FitError, match="order must be 1, 2 or 3"):
        shapes.get("exppoly", order=5)
    with pytest.raises(FitError, match="no parameter or option 'slope'"):
        shapes.get("gaussian", slope=1.0)
    with pytest.raises(FitError, match="sqrt_s=100.0 must exceed"):
        shapes.get("dijet", sqrt_s=100.0).pdf(np.array([80.0]), [5.0, 4.0, 0.0], W)


@pytest.mark.parametrize(("name", "opts", "p"), POINTS, ids=_id)
def test_normalised_and_cdf_is_integral_of_pdf(name, opts, p):
    """The pdf integrates to 1 on the window, and the CDF at several points (and in the
    peak) equals the integral of the pdf from the window start, both by
    scipy.integrate.quad (epsrel 1e-12): to 1e-9 absolute.  Bin fractions sum to 1."""
    s = shapes.get(name, **opts)
    br = _breaks(s, p)

    def f(t):
        return float(s.pdf(np.array(t), p, W))

    xs = [61.0, 75.0, 88.0, 91.1, 93.0, 100.0, 119.0] + [t for t in br if W[0] < t < W[1]]
    xs = np.unique(np.round([W[0], *xs, W[1]], 9))
    ref = np.cumsum([0.0] + [_quad(f, a, b, br) for a, b in itertools.pairwise(xs)])
    assert abs(ref[-1] - 1.0) < 1e-9
    np.testing.assert_allclose(s.cdf(xs, p, W), ref, rtol=0, atol=1e-9)
    assert s.cdf(np.array([W[0]]), p, W)[0] == pytest.approx(0.0, abs=1e-15)
    assert s.cdf(np.array([W[1]]), p, W)[0] == pytest.approx(1.0, abs=1e-14)
    fr = s.bin_fractions(np.linspace(*W, 61), p, W)
    assert np.all(fr >= 0) and fr.sum() == pytest.approx(1.0, abs=1e-12)


@pytest.mark.parametrize("p", [pt[2] for pt in _of("gaussian")], ids=_id)
def test_gaussian_against_scipy_norm(p):
    """pdf/cdf truncated to the window equal scipy.stats.norm's (to 1e-12 relative)."""
    s = shapes.get("gaussian")
    x = np.linspace(*W, 301)
    m, sg = p
    z = stats.norm.cdf(W[1], m, sg) - stats.norm.cdf(W[0], m, sg)
    np.testing.assert_allclose(s.pdf(x, [m, sg], W), stats.norm.pdf(x, m, sg) / z, rtol=1e-12,
                               atol=1e-300)
    np.testing.assert_allclose(s.cdf(x, [m, sg], W),
                               (stats.norm.cdf(x, m, sg) - stats.norm.cdf(W[0], m, sg)) / z,
                               rtol=1e-12, atol=1e-15)
    assert s.fwhm([m, sg]) == pytest.approx(2 * math.sqrt(2 * math.log(2)) * sg, rel=1e-14)


@pytest.mark.parametrize(("m", "sg", "a", "n"), [(91.0, 2.0, 1.3, 2.7), (91.0, 2.0, 0.1, 1.02),
                                                 (91.0, 2.0, 5.0, 50.0), (80.0, 0.5, 0.6, 1.5)])
def test_crystalball_one_sided_limit_matches_scipy(m, sg, a, n):
    """With the high-side tail pushed beyond the window, ours is
    scipy.stats.crystalball(beta=alpha_low, m=n_low, loc=mass, scale=sigma) truncated to
    the window: pdf to 1e-10, cdf to 1e-9 relative (small and large alpha, n near its
    lower bound 1.01)."""
    s = shapes.get("crystalball")
    w = (60.0, m + 9.5 * sg)  # the core reaches 10 sigma, beyond the window's end
    p = [m, sg, a, n, 10.0, 5.0]
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


@pytest.mark.parametrize("p", [pt[2] for pt in _of("voigt")], ids=_id)
def test_voigt_against_scipy_voigt_profile(p):
    """pdf = scipy.special.voigt_profile(x - m, sigma, width/2) / (its integral on the
    window by scipy.integrate.quad), to 1e-8 relative."""
    s = shapes.get("voigt")
    m, sg, g = p
    z = _quad(lambda t: special.voigt_profile(t - m, sg, g / 2), *W, _breaks(s, p))
    x = np.linspace(*W, 201)
    np.testing.assert_allclose(s.pdf(x, p, W), special.voigt_profile(x - m, sg, g / 2) / z,
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


@pytest.mark.parametrize("p", [pt[2] for pt in _of("breitwigner")], ids=_id)
def test_breitwigner_against_pdg_formula(p):
    """Relativistic Breit-Wigner, PDG Review "Resonances": density proportional to
    1/((m^2 - M^2)^2 + M^2 Gamma^2); normalised by scipy.integrate.quad: pdf to 1e-10
    relative.  FWHM from solving for half maximum (numerical root) equals the closed form."""
    from scipy.optimize import brentq

    s = shapes.get("breitwigner")
    mm, g = p

    def f(m):
        return 1.0 / ((m * m - mm * mm) ** 2 + (mm * g) ** 2)

    z = _quad(f, *W, _breaks(s, p))
    x = np.linspace(*W, 201)
    np.testing.assert_allclose(s.pdf(x, p, W), f(x) / z, rtol=1e-10)
    half = 0.5 * f(mm)
    lo = brentq(lambda m: f(m) - half, mm - 5 * g, mm, xtol=1e-14)
    hi = brentq(lambda m: f(m) - half, mm, mm + 5 * g, xtol=1e-14)
    assert s.fwhm(p) == pytest.approx(hi - lo, rel=1e-10)


def test_breitwigner_narrow_width_cdf():
    """Analytic CDF holds for a width 1e-4 of the mass (quad with the peak as a break point)."""
    s = shapes.get("breitwigner")
    p = [91.0, 0.01]
    ref = _quad(lambda t: float(s.pdf(np.array(t), p, W)), W[0], 91.003, [91.0])
    assert s.cdf(np.array([91.003]), p, W)[0] == pytest.approx(ref, rel=1e-8)


def test_bernstein_never_negative():
    """Any coefficients give a non-negative density (squares of the parameters)."""
    s = shapes.get("bernstein", degree=5)
    rng = np.random.default_rng(3)
    x = np.linspace(*W, 500)
    for _ in range(50):
        p = list(rng.normal(0, 2, 5))
        assert np.all(s.pdf(x, p, W) >= 0)


# ------------------------------------------------------------------------- gradients
# Every registered shape's derivatives -- grad_pdf, grad_bin_fractions, fractions_and_grad,
# pdf_and_grad and the broadcast-parameter path -- against a reference that shares nothing
# with the code's gradient routines:
#
# * analytic derivatives written out below (gaussian, exponential, powerlaw, bernstein):
#   an unnormalised density g, any antiderivative G and their parameter derivatives, put
#   together by the quotient rule (pdf = g / Z, cdf = (G(x) - G(lo)) / Z, Z = G(hi) - G(lo));
# * otherwise, and where an analytic form is singular (exponential b1 = 0, powerlaw k = 1),
#   a Richardson-extrapolated central difference of the shape's own pdf / bin_fractions
#   values (Richardson 1911; the "Richardson table" of e.g. Press et al., Numerical Recipes,
#   3rd ed. (2007), sec. 5.7; from memory): central differences D(h), D(h/2), D(h/4) with
#   h = 2 % of the parameter's natural scale, eliminated to R1 = (4 D(h/2) - D(h)) / 3 (both
#   step pairs) and R2 = (16 R1' - R1) / 15 (error O(h^6)).  The table's own convergence,
#   err = |R2 - R1'|, estimates the reference's error and must itself be below 1e-7 of the
#   largest derivative (or the rounding floor below), so the reference cannot be loose.
#   pdf and bin_fractions themselves are checked against scipy and quad above.
#
# Tolerance, per parameter i: |code - reference| <= 1e-6 max|reference| + 10 err + floor,
# floor = 1e-10 max|values| / h_i, the rounding noise any difference quotient of the
# values over the parameter's natural scale carries (it matters only where a derivative is
# nearly zero, e.g. a Crystal Ball tail that starts far out).
# The Crystal Ball's second derivative jumps where core and tail meet, which spoils the
# finite-difference table there: masses and bin edges within 0.05 max(1, |z|) (z in sigma)
# of a junction are left out of its pdf and bin checks (the window ends never are).

def _analytic(name, p):
    """(g, dg, G, dG) of the shape, elementary calculus; None where the form is singular."""
    lo, hi = W
    if name == "gaussian":
        m, sg = p

        def g(x):
            return stats.norm.pdf(x, m, sg)

        return (g, lambda x: [g(x) * (x - m) / sg**2, g(x) * (((x - m) / sg) ** 2 - 1.0) / sg],
                lambda x: stats.norm.cdf(x, m, sg),
                lambda x: [-g(x), -g(x) * (x - m) / sg])
    if name in ("exponential", "exppoly") and len(p) == 1:
        b, c, h = p[0], 0.5 * (lo + hi), 0.5 * (hi - lo)
        if b == 0.0:
            return None

        def e(x):
            return np.exp(b * (x - c) / h)

        # G = h e^{bt} / b, dG/db = h e^{bt} (t/b - 1/b^2), t = (x - c)/h
        return (e, lambda x: [(x - c) / h * e(x)], lambda x: h * e(x) / b,
                lambda x: [h * e(x) * ((x - c) / h / b - 1.0 / b**2)])
    if name == "powerlaw":
        k = p[0]
        if k == 1.0:
            return None

        def y(x):
            return np.asarray(x) / lo

        # g = y^-k, G = lo y^(1-k)/(1-k), dG/dk = lo y^(1-k) (1/(1-k)^2 - ln y/(1-k))
        return (lambda x: y(x) ** -k, lambda x: [-np.log(y(x)) * y(x) ** -k],
                lambda x: lo * y(x) ** (1 - k) / (1 - k),
                lambda x: [lo * y(x) ** (1 - k) * (1 / (1 - k) ** 2 - np.log(y(x)) / (1 - k))])
    if name == "bernstein":
        n = len(p)
        beta = [1.0] + [c * c for c in p]

        def u(x):
            return (np.asarray(x) - lo) / (hi - lo)

        # basis b_{i,n}(u) = scipy.stats.binom.pmf(i, n, u); its integral from 0 to u is
        # sum_{j>i} b_{j,n+1}(u) / (n+1) = binom.sf(i, n+1, u) / (n+1) (standard identity)
        def basis(x):
            return [stats.binom.pmf(i, n, u(x)) for i in range(n + 1)]

        def ibasis(x):
            return [(hi - lo) * stats.binom.sf(i, n + 1, u(x)) / (n + 1) for i in range(n + 1)]

        return (lambda x: sum(bi * v for bi, v in zip(beta, basis(x))),
                lambda x: [2 * p[i - 1] * basis(x)[i] for i in range(1, n + 1)],
                lambda x: sum(bi * v for bi, v in zip(beta, ibasis(x))),
                lambda x: [2 * p[i - 1] * ibasis(x)[i] for i in range(1, n + 1)])
    return None


def _steps(s, p):
    """Richardson base steps: 2 % of each parameter's natural scale."""
    d = dict(zip(s.parameter_names, p))
    out = []
    for k, v in d.items():
        if k == "mass":
            h = 0.02 * _scale(s, p)
        elif k in ("sigma", "width", "resolution", "slope"):
            h = 0.02 * v
        elif k == "threshold":
            h = 0.02 * d["resolution"]
        elif k.startswith("alpha"):
            h = 0.02 * min(v, 1.0)
        elif k.startswith("n_"):
            h = 0.02 * (v - 1.0)  # the tail integral goes as 1/(n - 1)
        else:  # exponents and coefficients of order one on the window
            h = 0.01
        out.append(h)
    # strictly inside the bounds: shrink the step near one
    out = [min(h, 0.99 * (v - par.lower), 0.99 * (par.upper - v))
           for par, v, h in zip(s.parameters_for(W), p, out)]
    assert all(h > 0 for h in out), (s.name, p, out)
    return out


def _richardson(func, p, i, h):
    """Richardson-extrapolated central difference of func in parameter i: (R2, |R2 - R1'|)."""
    d = []
    for k in range(3):
        hk = h / 2**k
        up, dn = list(p), list(p)
        up[i] += hk
        dn[i] -= hk
        d.append((func(up) - func(dn)) / (2 * hk))
    r1, r1b = (4 * d[1] - d[0]) / 3, (4 * d[2] - d[1]) / 3
    r2 = (16 * r1b - r1) / 15
    return r2, np.abs(r2 - r1b)


def _grid(s, p):
    """Masses for pdf checks and bin edges: a regular grid plus points in the peak, minus
    points near a Crystal Ball junction."""
    w = _scale(s, p)
    d = dict(zip(s.parameter_names, p))
    x = np.linspace(60.5, 119.5, 60)
    e = np.linspace(*W, 61)
    if w is not None:
        x = np.concatenate([x, d["mass"] + w * np.array([-3.0, -1.0, -0.3, 0.2, 0.7, 2.5])])
        e = np.concatenate([e, d["mass"] + w * np.array([-2.0, -0.5, 0.3, 1.5])])
    x = np.unique(x[(x > W[0] + 0.2) & (x < W[1] - 0.2)])
    e = np.unique(np.clip(e, *W))
    for j in _junctions(s, p):
        zj = (j - d["mass"]) / d["sigma"]

        def far(v, zj=zj):
            z = (v - d["mass"]) / d["sigma"]
            return np.abs(z - zj) > 0.05 * np.maximum(1.0, np.abs(z))

        x = x[far(x)]
        e = e[far(e) | (e == W[0]) | (e == W[1])]
    return x, e


def _reference(s, p, x, e):
    """Reference derivatives at masses x (None: none) and bin edges e, as a dict:
    ``dpdf``, ``dfrac`` (parameter on axis 0), their table errors ``err_pdf``, ``err_frac``
    (zero for analytic references), and for analytic ones also ``pdf`` and ``frac``."""
    x = np.empty(0) if x is None else x
    an = _analytic(s.name, p)
    if an is not None:
        g, dg, gg, dgg = an
        ends = np.array(W)
        z = np.diff(gg(ends))[0]
        dz = np.array([np.diff(v)[0] for v in dgg(ends)])[:, None]
        pdf = g(x) / z
        dpdf = np.array(dg(x)).reshape(len(p), x.size) / z - pdf * dz / z
        c = (gg(e) - gg(ends)[0]) / z
        dc = (np.array(dgg(e)) - np.array(dgg(ends))[:, :1]) / z - c * dz / z
        return {"pdf": pdf, "dpdf": dpdf, "err_pdf": np.zeros_like(dpdf),
                "frac": np.diff(c), "dfrac": np.diff(dc, axis=1),
                "err_frac": np.zeros((len(p), e.size - 1))}
    out = {}
    funcs = {"frac": lambda q: s.bin_fractions(e, q, W)}
    if x.size:
        funcs["pdf"] = lambda q: s.pdf(x, q, W)
    for key, func in funcs.items():
        r = [_richardson(func, p, i, h) for i, h in enumerate(_steps(s, p))]
        ref, err = np.array([v[0] for v in r]), np.array([v[1] for v in r])
        # the reference converged (else the check would be loose): table error below 1e-7
        # of the largest derivative or below the rounding floor
        big = np.abs(ref).max(axis=1)
        assert np.all(err.max(axis=1) <= 1e-7 * big + _floors(s, p, func(p))), (
            s.name, p, key, err.max(axis=1), big)
        out["d" + key], out["err_" + key] = ref, err
    return out


def _check(got, ref, err, floor, what):
    got = np.asarray(got)
    assert got.shape == ref.shape, (what, got.shape, ref.shape)
    for i in range(ref.shape[0]):
        tol = 1e-6 * np.abs(ref[i]).max() + 10 * err[i] + floor[i]
        dev = np.abs(got[i] - ref[i])
        assert np.all(dev <= tol), (what, i, dev.max(), np.abs(ref[i]).max())


def _floors(s, p, values):
    """Rounding floor of a derivative: 1e-10 of the values' scale per Richardson step."""
    return 1e-10 * np.abs(values).max() / np.array(_steps(s, p))


@pytest.mark.parametrize(("name", "opts", "p"), POINTS, ids=_id)
def test_gradients_against_outside_reference(name, opts, p):
    """grad_pdf, grad_bin_fractions, fractions_and_grad and pdf_and_grad vs analytic
    derivatives or a Richardson table (see the section comment for sources and tolerance)."""
    s = shapes.get(name, **opts)
    x, e = _grid(s, p)
    ref = _reference(s, p, x, e)
    f2, g2 = s.fractions_and_grad(e, p, W)
    np.testing.assert_allclose(f2, s.bin_fractions(e, p, W), rtol=1e-12, atol=1e-15)
    v, gv = s.pdf_and_grad(x, p, W)
    np.testing.assert_allclose(v, s.pdf(x, p, W), rtol=1e-12, atol=1e-300)
    fl_p, fl_f = _floors(s, p, v), _floors(s, p, f2)
    _check(s.grad_pdf(x, p, W), ref["dpdf"], ref["err_pdf"], fl_p, "grad_pdf")
    _check(gv, ref["dpdf"], ref["err_pdf"], fl_p, "pdf_and_grad")
    _check(s.grad_bin_fractions(e, p, W), ref["dfrac"], ref["err_frac"], fl_f,
           "grad_bin_fractions")
    _check(g2, ref["dfrac"], ref["err_frac"], fl_f, "fractions_and_grad")
    if "pdf" in ref:  # an analytic reference also gives the values (1e-10 relative)
        np.testing.assert_allclose(v, ref["pdf"], rtol=1e-10, atol=1e-300)
        np.testing.assert_allclose(f2, ref["frac"], rtol=1e-10, atol=1e-15)


@pytest.mark.parametrize(("name", "opts", "p"), POINTS, ids=_id)
def test_gradients_with_parameter_arrays(name, opts, p):
    """The broadcast path (parameters of shape (2, 1) against edges (n,)) gives each row's
    reference gradient (tolerance as above); the second row has its first parameter moved
    by five Richardson steps."""
    s = shapes.get(name, **opts)
    p2 = list(p)
    p2[0] += 5 * _steps(s, p)[0]
    e = np.intersect1d(_grid(s, p)[1], _grid(s, p2)[1])
    pa = [np.array([[a], [b]]) for a, b in zip(p, p2)]
    got = s.grad_bin_fractions(e, pa, W)
    assert got.shape == (len(p), 2, e.size - 1)
    for row, q in enumerate((p, p2)):
        ref = _reference(s, q, None, e)
        floor = _floors(s, q, s.bin_fractions(e, q, W))
        _check(got[:, row], ref["dfrac"], ref["err_frac"], floor, f"row {row}")


@pytest.mark.parametrize(("name", "opts", "p"), POINTS, ids=_id)
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


@pytest.mark.parametrize(("name", "opts", "p"), POINTS, ids=_id)
def test_gradients_of_free_parameters_only(name, opts, p):
    """``need=`` (the fit's free parameters): the wanted rows match the reference
    derivatives (analytic or Richardson, tolerance as above); the others may be given
    (every shipped shape has analytic or compiled derivatives), and then they are checked
    too."""
    s = shapes.get(name, **opts)
    x, e = _grid(s, p)
    ref = _reference(s, p, x, e)
    need = [i % 2 == 0 for i in range(len(p))]
    f2, g2 = s.fractions_and_grad(e, p, W, need)
    v, gv = s.pdf_and_grad(x, p, W, need)
    fl_p, fl_f = _floors(s, p, v), _floors(s, p, f2)
    for i, wanted in enumerate(need):
        if wanted:
            _check(g2[i:i + 1], ref["dfrac"][i:i + 1], ref["err_frac"][i:i + 1],
                   fl_f[i:i + 1], "fractions_and_grad")
            _check(gv[i:i + 1], ref["dpdf"][i:i + 1], ref["err_pdf"][i:i + 1],
                   fl_p[i:i + 1], "pdf_and_grad")
        elif np.any(g2[i]):  # analytic gradients may give every row: then the right one
            _check(g2[i:i + 1], ref["dfrac"][i:i + 1], ref["err_frac"][i:i + 1],
                   fl_f[i:i + 1], "fractions_and_grad (not asked for)")


def test_narrow_gaussian_in_a_wide_window_against_scipy():
    """A peak 0.05 GeV wide among 6,000 bins of the window: bin fractions and their
    derivatives against scipy.stats.norm (fractions 1e-10 relative / 1e-300 absolute;
    derivatives 1e-8 of the largest), exactly zero more than 40 sigma from the peak."""
    e = np.linspace(*W, 6001)
    m, sg = 90.0123, 0.05
    fr, g = shapes.get("gaussian").fractions_and_grad(e, [m, sg], W)
    z, zl, zh = (e - m) / sg, (W[0] - m) / sg, (W[1] - m) / sg
    norm = stats.norm.cdf(zh) - stats.norm.cdf(zl)
    c = (stats.norm.cdf(z) - stats.norm.cdf(zl)) / norm
    np.testing.assert_allclose(fr, np.diff(c), rtol=1e-10, atol=1e-300)
    # d/dm of the truncated CDF; the window's edges are > 500 sigma away, their terms vanish
    dm = -np.diff(stats.norm.pdf(z) / sg) / norm
    ds = -np.diff(stats.norm.pdf(z) * z / sg) / norm
    np.testing.assert_allclose(g[0], dm, rtol=0, atol=1e-8 * np.abs(dm).max())
    np.testing.assert_allclose(g[1], ds, rtol=0, atol=1e-8 * np.abs(ds).max())
    far = (e[1:] < m - 40 * sg) | (e[:-1] > m + 40 * sg)
    assert far.sum() > 5500 and not np.any(fr[far]) and not np.any(g[:, far])
