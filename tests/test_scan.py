"""Mass scan: profile likelihood vs iminuit, Wilks, signal injection, resolution, blinding."""

from __future__ import annotations

import json
import math
import warnings

import numpy as np
import pytest
from scipy import stats

from peaksift import MassHistogram, fit, shapes
from peaksift.errors import DataWarning, FitError
from peaksift.stats import scan
from peaksift.stats.scan_inputs import _prepare_model
from peaksift.stats.toys import profile_signal, run_toys, toy_counts

WINDOW = (100.0, 400.0)


def _spectrum(seed: int = 5, n_bkg: int = 20_000, n_sig: int = 0, mass: float = 250.0,
              sigma: float = 2.5, bins: int = 300) -> MassHistogram:
    rng = np.random.default_rng(seed)
    x = WINDOW[0] + rng.exponential(90.0, n_bkg)
    x = np.concatenate([x, rng.normal(mass, sigma, n_sig)])
    return MassHistogram(bins=bins, range=WINDOW).fill(x)


class _RawBinnedNLL:
    """Extended binned Poisson NLL written out independently of peaksift, for iminuit:
    nu_i = s F_sig,i + b F_bkg,i, NLL = sum(nu_i - n_i ln nu_i) (constant ln n_i! dropped;
    Cowan et al., Eur. Phys. J. C 71 (2011) 1554, sec. 2; Baker and Cousins, NIM 221
    (1984) 437).  The signal is a Gaussian of fixed mean and width truncated to the window,
    bin fractions from scipy.stats.norm.cdf; the background is exp(-lam (x - lo)) on the
    window, bin fractions from its elementary integral."""

    errordef = 0.5  # iminuit.Minuit.LIKELIHOOD: one sigma at Delta NLL = 1/2

    def __init__(self, edges, counts, mass, sigma):
        self.edges, self.n = np.asarray(edges, float), np.asarray(counts, float)
        c = stats.norm.cdf(self.edges, mass, sigma)
        self.f_sig = np.diff(c) / (c[-1] - c[0])

    def __call__(self, s, b, lam):
        u = np.exp(-lam * (self.edges - self.edges[0]))
        nu = s * self.f_sig + b * (-np.diff(u)) / (1.0 - u[-1])
        if np.any(nu <= 0):
            return 1e30  # outside the physical region (a negative s too deep below b)
        return float(np.sum(nu - self.n * np.log(nu)))


def _iminuit_q0(edges, counts, mass, sigma):
    """q0 = 2 [NLL(s = 0, b, lam profiled) - NLL(s, b, lam free)] for s > 0, else 0 (Cowan
    et al. 2011 eq. 12), both minimised by iminuit MIGRAD (+ HESSE for the error on s)."""
    from iminuit import Minuit

    cost = _RawBinnedNLL(edges, counts, mass, sigma)
    ntot = float(np.sum(counts))
    bkg = Minuit(cost, s=0.0, b=ntot, lam=0.01)
    bkg.fixed["s"] = True
    bkg.migrad()
    sb = Minuit(cost, s=10.0, b=bkg.values["b"], lam=bkg.values["lam"])
    sb.migrad()
    sb.hesse()
    assert bkg.valid and sb.valid
    s_hat = sb.values["s"]
    q0 = 2.0 * (bkg.fval - sb.fval) if s_hat > 0 else 0.0
    return max(q0, 0.0), s_hat, sb.errors["s"]


def test_scan_q0_matches_a_raw_iminuit_cost():
    """At fixed masses with a fixed Gaussian width (2.5 GeV, given as a callable sigma(m)
    in GeV), the scan's q0, signal yield and its error equal those of a binned extended
    Poisson NLL written out in this test (numpy + scipy.stats.norm.cdf, exponential
    background) and minimised by iminuit, background-only and signal+background (q0 as in
    Cowan et al. 2011 eq. 12).  Tolerances: |dq0| < 0.02 + 1e-3 q0, |ds| < 0.01 sigma_s,
    sigma_s to 1 %.  Masses include the injected peak, a deficit (q0 = 0) and the window's
    ends."""
    sigma = 2.5
    rng = np.random.default_rng(5)
    x = np.concatenate([WINDOW[0] + rng.exponential(90.0, 20_000), rng.normal(250.0, sigma, 120)])
    h = MassHistogram(bins=300, range=WINDOW).fill(x)
    counts, edges = np.histogram(x, bins=300, range=WINDOW)  # the same data, binned by numpy
    assert np.array_equal(h.weight_sum, counts)
    masses = np.array([110.0, 180.0, 215.0, 250.0, 320.0, 390.0])
    r = scan(h, "gaussian", "exponential", masses,
             resolution=lambda m: np.full_like(np.asarray(m, float), sigma), refit=False)
    np.testing.assert_allclose(r.sigma, sigma, rtol=1e-12)  # read as a width in GeV
    seen_zero = False
    for j, m in enumerate(masses):
        q0, s_hat, s_err = _iminuit_q0(edges, counts, m, sigma)
        seen_zero |= q0 == 0.0
        assert abs(r.q0[j] - q0) < 0.02 + 1e-3 * q0, (m, r.q0[j], q0)
        assert abs(r.signal_yield[j] - s_hat) < 0.01 * s_err, (m, r.signal_yield[j], s_hat)
        assert r.signal_yield_error[j] == pytest.approx(s_err, rel=0.01), m
    assert r.q0[3] > 9.0 and seen_zero  # the peak is seen, and a deficit gives q0 = 0


def test_a_window_scanned_again_matches_iminuit_each_time():
    """A scan keeps its per-window work (hypotheses, sigma, signal fractions:
    ``stats/scan_plan.py``) for the next scan of the same window.  Each of three scans of one
    window -- the first, one after the caller overwrote its masses array in place, and one
    of other counts at those masses -- gives the q0 and signal yield of the binned NLL
    written out in this test and minimised by iminuit (Cowan et al. 2011 eq. 12; the
    tolerances of test_scan_q0_matches_a_raw_iminuit_cost)."""
    sigma = 2.5
    masses = np.array([180.0, 250.0, 320.0])
    for seed, new_masses in ((5, None), (5, [150.0, 251.0, 300.0]), (8, None)):
        rng = np.random.default_rng(seed)
        x = np.concatenate([WINDOW[0] + rng.exponential(90.0, 20_000),
                            rng.normal(250.0, sigma, 120)])
        h = MassHistogram(bins=300, range=WINDOW).fill(x)
        counts, edges = np.histogram(x, bins=300, range=WINDOW)
        if new_masses is not None:
            masses[:] = new_masses  # the array the last scan was given, changed in place
        r = scan(h, "gaussian", "exponential", masses, absolute_resolution=sigma, refit=False)
        np.testing.assert_array_equal(r.masses, masses)
        for j, m in enumerate(masses):
            q0, s_hat, s_err = _iminuit_q0(edges, counts, m, sigma)
            assert abs(r.q0[j] - q0) < 0.02 + 1e-3 * q0, (seed, m, r.q0[j], q0)
            assert abs(r.signal_yield[j] - s_hat) < 0.01 * s_err, (seed, m)


def test_scan_finds_injected_peak_and_refits():
    h = _spectrum(n_sig=250)
    r = scan(h, "gaussian", "exponential", 121, relative_resolution=0.01)
    assert abs(r.best_mass - 250.0) < 5.0
    assert r.z_local[r.best_index] > 4.0
    assert r.refit is not None and r.refit.valid
    assert abs(r.refit.peak_mass - 250.0) < 3 * r.refit.peak_mass_error
    d = r.to_dict()
    for key in ("masses", "z_local", "p_local", "signal_yield"):
        assert len(d[key]) == 121
    json.dumps(d)  # JSON-ready


def test_negative_yield_allowed_but_q0_one_sided():
    """A deficit gives a negative fitted yield and q0 = 0 (Cowan et al. 2011 eq. 12)."""
    h = _spectrum(seed=9)
    r = scan(h, "gaussian", "exponential", 61, relative_resolution=0.01, refit=False)
    neg = r.signal_yield < 0
    assert neg.any()
    assert np.all(r.q0[neg] == 0.0) and np.all(r.p_local[neg] == 0.5)


@pytest.mark.slow
def test_wilks_half_chi_square_at_fixed_mass():
    """Wilks (1938) / Cowan et al. 2011 eq. 49: under the background-only hypothesis q0 at a
    fixed mass is a half chi-square with one dof, P(q0 > 1) = 0.1587, P(q0 > 4) = 0.02275
    (scipy.stats.chi2.sf(q, 1)/2).  20,000 toys: binomial errors 0.0026 and 0.0011; we allow
    3 of them."""
    h = _spectrum(n_bkg=40_000)
    model, _, _ = _prepare_model(h, "gaussian", "exponential", [250.0], relative_resolution=0.01,
                                 window=None, natural_width=None, blind=None,
                                 signal_params=None, bins=None)
    q = run_toys(model, 20_000, seed=1, progress=False)[:, 0]
    n = q.size
    for level, ref in ((1.0, 0.158655), (4.0, 0.0227501)):
        frac = np.mean(q > level)
        err = np.sqrt(ref * (1 - ref) / n)
        assert abs(frac - ref) < 3 * err, (level, frac, ref, err)


def test_signal_injection_pulls():
    """Injected signals are recovered without bias: pulls (s_hat - s)/sigma_s have mean 0 and
    width 1 (common practice), 400 toys: mean within 0.15, width within 10%."""
    h = _spectrum(n_bkg=20_000)
    model, _, _ = _prepare_model(h, "gaussian", "exponential", [250.0], relative_resolution=0.01,
                                 window=None, natural_width=None, blind=None,
                                 signal_params=None, bins=None)
    s_true = 150.0
    expected = model.expected_background + s_true * model.fractions[0]
    n = toy_counts(expected, 77, 0, 400)
    f = np.broadcast_to(model.fractions[0], n.shape)
    r = profile_signal(model, n, f, theta_start=np.repeat(model.theta[None], 400, axis=0),
                       b_start=np.full(400, model.bkg_yield))
    assert r["converged"].all()
    pulls = (r["s"] - s_true) / r["s_error"]
    assert abs(pulls.mean()) < 0.15
    assert abs(pulls.std(ddof=1) - 1.0) < 0.1


def test_voigt_needs_natural_width_and_gaussian_refuses_one():
    h = _spectrum()
    with pytest.raises(FitError, match="needs natural_width"):
        scan(h, "voigt", "exponential", 11, relative_resolution=0.01)
    with pytest.raises(FitError, match="has no natural width"):
        scan(h, "gaussian", "exponential", 11, relative_resolution=0.01, natural_width=1.0)
    r = scan(h, "voigt", "exponential", 11, relative_resolution=0.01, natural_width=1.0,
             refit=False)
    assert np.all(np.isfinite(r.q0))


def test_scan_bad_input_messages():
    h = _spectrum()
    with pytest.raises(FitError, match="outside the window"):
        scan(h, "gaussian", "exponential", [50.0], relative_resolution=0.01)
    with pytest.raises(FitError, match="background shape"):
        scan(h, "gaussian", "gaussian", [200.0], relative_resolution=0.01)
    with pytest.raises(FitError, match="unknown shape"):
        scan(h, "gausian", "exponential", [200.0], relative_resolution=0.01)
    # a lone float could mean "the mass 200 GeV" or "200 points": refused, never guessed
    # (2.5 used to become 2 points)
    for lone in (200.0, 2.5, "200", np.float64(200.0), True):
        with pytest.raises(FitError, match="neither a number of points nor a list"):
            scan(h, "gaussian", "exponential", lone, relative_resolution=0.01)
    assert scan(h, "gaussian", "exponential", np.int64(11), relative_resolution=0.01,
                refit=False).masses.size == 11


def test_blinding_hides_and_ignores_the_window(tmp_path):
    """Bins in the blinded range are out of the likelihood: changing the data there changes
    nothing; observed values inside are NaN / None; expected values are still given."""
    h = _spectrum(n_sig=250)
    blind = (235.0, 265.0)
    kw = {"relative_resolution": 0.01, "blind": blind, "expected_signal": 100.0}
    r1 = scan(h, "gaussian", "exponential", 61, **kw)
    h2 = h.copy()
    inside = (h2.edges[:-1] < blind[1]) & (h2.edges[1:] > blind[0])
    h2.weight_sum[inside] *= 3.0
    h2.weight_sq_sum[inside] *= 3.0
    r2 = scan(h2, "gaussian", "exponential", 61, **kw)
    assert r1.blinded.any()
    assert np.all(np.isnan(r1.q0[r1.blinded])) and np.all(np.isnan(r1.p_local[r1.blinded]))
    assert np.allclose(r1.q0[~r1.blinded], r2.q0[~r2.blinded], rtol=1e-8, atol=1e-10)
    assert r1.refit is None
    d = r1.to_dict()
    assert all(d["z_local"][i] is None for i in np.flatnonzero(r1.blinded))
    assert np.all(np.isfinite(r1.z_expected)) and np.all(r1.z_expected[r1.blinded] > 0)
    assert r1.best_mass < blind[0] or r1.best_mass > blind[1]
    path = tmp_path / "scan_blind.png"
    r1.plot(path)
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_plot_writes_png(tmp_path):
    h = _spectrum(n_sig=200)
    r = scan(h, "gaussian", "exponential", 61, relative_resolution=0.01, refit=False)
    g = r.global_significance(toys=50, seed=3)
    path = tmp_path / "scan.png"
    fig = r.plot(path, global_result=g)
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    ax = fig.axes[0]
    assert ax.get_yscale() == "log" and "GeV" in ax.get_xlabel()


def test_legend_leaves_a_deep_excess_at_low_mass_alone():
    """A 7 sigma excess near the low end of the scan reaches the lower left corner where the
    legend stood, and the legend's text ran over the curve: the legend now moves where no
    line of the figure passes through its box (each drawn line's segments sampled finely,
    measured on the renderer against the legend's box)."""
    h = _spectrum(n_sig=700, mass=150.0)
    r = scan(h, "gaussian", "exponential", 61, relative_resolution=0.01, refit=False)
    assert r.best_mass == pytest.approx(150.0, abs=10.0) and r.best["z_local"] > 5.0
    fig = r.plot()
    ax = fig.axes[0]
    fig.canvas.draw()
    box = ax.get_legend().get_window_extent(fig.canvas.get_renderer())
    for line in ax.get_lines():
        x, y = (np.asarray(v, float) for v in line.get_data())
        if x.size < 2 or line.get_linestyle() == ":":  # (the sigma levels run across)
            continue
        t = np.linspace(0.0, 1.0, 50)[:, None]
        pts = ax.transData.transform(np.c_[x, y])
        pts = pts[np.isfinite(pts).all(axis=1)]
        seg = (pts[:-1][None] * (1 - t[..., None]) + pts[1:][None] * t[..., None]).reshape(-1, 2)
        inside = ((seg[:, 0] > box.x0) & (seg[:, 0] < box.x1) & (seg[:, 1] > box.y0)
                  & (seg[:, 1] < box.y1))
        assert not inside.any(), line.get_label()


def test_unbinned_masses_are_histogrammed():
    rng = np.random.default_rng(2)
    x = np.concatenate([WINDOW[0] + rng.exponential(90.0, 5000), rng.normal(250, 2.5, 80)])
    r = scan(x, shapes.get("gaussian"), "exponential", 31, relative_resolution=0.01,
             window=WINDOW, refit=False)
    assert abs(r.best_mass - 250.0) < 8.0
    # bins of a quarter of the smallest sigma (0.01 x 115 GeV, the lowest default grid mass
    # 100 + 5% of 300 GeV): ceil(300 / 0.2875) = 1044 bins on the window
    assert r.model.edges.size - 1 == 1044


@pytest.mark.parametrize("weighted", [False, True])
def test_scan_of_masses_equals_scan_of_their_histogram(weighted):
    """An array of masses and the histogram of the same masses give identical scans.  The
    histogram is made by numpy.histogram (the outside reference for the edge rule: its last
    bin is closed), and by MassHistogram.from_masses; masses sit exactly on the window's
    edges, on inner bin edges and outside the window."""
    rng = np.random.default_rng(21)
    edges = np.linspace(*WINDOW, 301)
    x = np.concatenate([WINDOW[0] + rng.exponential(90.0, 20_000), rng.normal(250, 2.5, 120),
                        np.full(50, WINDOW[1]), np.full(7, WINDOW[0]), edges[100:110],
                        [WINDOW[1] + 1e-9, WINDOW[0] - 1e-9]])
    w = rng.uniform(0.5, 1.5, x.size) if weighted else None
    data = (x, w) if weighted else x
    kw = {"relative_resolution": 0.01, "window": WINDOW, "refit": False}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataWarning)  # the weighted-spectrum note
        r_arr = scan(data, "gaussian", "exponential", 31, bins=300, **kw)
        h_np = MassHistogram(edges)
        h_np.weight_sum = np.histogram(x, bins=edges, weights=w)[0].astype(float)
        w2 = None if w is None else w * w
        h_np.weight_sq_sum = np.histogram(x, bins=edges, weights=w2)[0].astype(float)
        r_np = scan(h_np, "gaussian", "exponential", 31, **kw)
        r_h = scan(MassHistogram.from_masses(x, w, edges=edges), "gaussian", "exponential", 31,
                   **kw)
    # the array goes through the histogram: the same numbers to the last bit
    for key in ("q0", "signal_yield", "signal_yield_error", "background_yield"):
        np.testing.assert_array_equal(getattr(r_h, key), getattr(r_arr, key))
    # numpy's bins: the same counts exactly (the 50 masses at the window's top are in the last
    # bin); weighted sums are added in another order, so the effective counts agree to
    # rounding (1e-10) and q0 (a difference of two NLLs of ~1e5) to 1e-8 absolute
    if weighted:
        np.testing.assert_allclose(r_arr.model.counts, r_np.model.counts, rtol=1e-10)
        np.testing.assert_allclose(r_arr.q0, r_np.q0, rtol=1e-9, atol=1e-8)
    else:
        np.testing.assert_array_equal(r_arr.model.counts, r_np.model.counts)
        np.testing.assert_array_equal(r_arr.q0, r_np.q0)


def test_fit_of_histogram_and_of_masses_count_the_same_events():
    """The issue's case: 50 masses exactly at the window's top edge.  The binned fit of the
    masses and the fit of their MassHistogram count the same events, the number
    numpy.histogram puts in bins on the window (its last bin is closed)."""
    rng = np.random.default_rng(3)
    x = np.concatenate([WINDOW[0] + rng.exponential(90.0, 20_000), np.full(50, WINDOW[1])])
    edges = np.linspace(*WINDOW, 301)
    want = int(np.histogram(x, bins=edges)[0].sum())
    h = MassHistogram.from_masses(x, edges=edges)
    a = fit(h, "gaussian", "exponential", WINDOW, fixed={"mass": 250.0, "sigma": 2.5})
    b = fit(x, "gaussian", "exponential", WINDOW, binned=True, bins=300,
            fixed={"mass": 250.0, "sigma": 2.5})
    assert a.n_events == b.n_events == want


def test_weighted_spectrum_uses_effective_counts():
    """Scaled Poisson for weighted bins (common practice): with every weight equal to 2 the
    effective counts are the raw counts, so Z is unchanged and the yield doubles."""
    h = _spectrum(n_sig=150)
    hw = h.copy()
    hw.weight_sum = 2.0 * h.weight_sum
    hw.weight_sq_sum = 4.0 * h.weight_sq_sum
    r = scan(h, "gaussian", "exponential", 31, relative_resolution=0.01, refit=False)
    with pytest.warns(DataWarning, match="effective counts"):
        rw = scan(hw, "gaussian", "exponential", 31, relative_resolution=0.01, refit=False)
    assert np.allclose(rw.z_local, r.z_local, atol=1e-9)
    # to the fits' convergence tolerance (the minimiser works in weighted units here)
    assert np.all(np.abs(rw.signal_yield - 2.0 * r.signal_yield)
                  < 1e-5 * 2.0 * r.signal_yield_error)
    assert rw.weight_scale == pytest.approx(0.5)


def test_weighted_scan_matches_weighted_fits_with_mass_dependent_weights():
    """Weights that vary with mass (0.4 at 100 GeV to 2.4 at 400 GeV, times a uniform
    0.5-1.5 spread): the scan's q0 at the best mass equals 2 (NLL_b - NLL_s+b) of two
    peaksift.fit weighted binned fits (mass and width fixed; scaled Poisson per bin, Bohm and
    Zech, NIM A 748 (2014) 1; q0 as in Cowan et al. 2011 eq. 12), to 1e-6 relative, and the
    yield and its error agree to 1e-4 relative.  (One global k = sum w / sum w^2 for all bins
    gave q0 = 70.5 here instead of 51.5.)"""
    rng = np.random.default_rng(12)
    x = np.concatenate([WINDOW[0] + rng.exponential(90.0, 20_000), rng.normal(250, 2.5, 150)])
    x = x[x < WINDOW[1]]
    w = (0.4 + (x - 100.0) / 150.0) * rng.uniform(0.5, 1.5, x.size)
    h = MassHistogram(bins=300, range=WINDOW).fill(x, weight=w)
    with pytest.warns(DataWarning, match="per bin"):
        r = scan(h, "gaussian", "exponential", 61, relative_resolution=0.01, refit=False)
    m = r.best_mass
    assert abs(m - 250.0) < 5.0
    sb = fit(h, "gaussian", "exponential", WINDOW, fixed={"mass": m, "sigma": 0.01 * m},
             start={"signal_yield": 10.0})
    b = fit(h, "gaussian", "exponential", WINDOW,
            fixed={"signal_yield": 0.0, "mass": m, "sigma": 0.01 * m})
    i = r.best_index
    assert r.q0[i] == pytest.approx(2 * (b.nll - sb.nll), rel=1e-6)
    assert r.signal_yield[i] == pytest.approx(sb.values["signal_yield"], rel=1e-4)
    assert r.signal_yield_error[i] == pytest.approx(sb.errors["signal_yield"], rel=1e-4)


def _dijet(m, p1, p2):
    """(1 - x)^p1 / x^p2, x = m / sqrt(s), sqrt(s) = 13 TeV (Phys. Rev. D 79 (2009) 112002,
    three-parameter form; the normalisation p0 is the yield)."""
    x = m / 13000.0
    return (1.0 - x) ** p1 / x**p2


def _turnon(m, threshold, resolution, slope):
    """scipy.stats.norm.cdf((m - threshold) / resolution) exp(-slope m) (times a constant)."""
    return stats.norm.cdf((m - threshold) / resolution) * np.exp(-slope * (m - 250.0))


# limits: the families' parameter bounds in peaksift (dijet p1, p2; turnon on a 100-400 GeV
# window), so that both minimisations search the same domain
@pytest.mark.parametrize(("background", "density", "starts", "limits"), [
    (shapes.get("dijet", npar=3, sqrt_s=13000.0), _dijet,
     [(5.0, 4.0), (144.0, 0.0), (50.0, 2.0), (100.0, 1.0)], [(-50.0, 200.0), (-50.0, 50.0)]),
    (shapes.get("turnon"), _turnon,
     [(145.0, 15.0, 0.01), (60.0, 10.0, 0.011), (0.0, 30.0, 0.011), (100.0, 5.0, 0.02)],
     [(-50.0, 400.0), (0.3, 300.0), (1e-8, 0.33)]),
], ids=["dijet", "turnon"])
def test_difficult_background_start_is_recovered(background, density, starts, limits):
    """From poor default starts (a dijet or turn-on family on a plain falling spectrum) the
    scan's background-only fit reaches the minimum of a raw binned extended Poisson NLL,
    sum(nu - n ln nu), written out in this test (the family's formula, integrated over each
    bin with 8-point Gauss-Legendre, numpy.polynomial.legendre.leggauss) and minimised by
    iminuit MIGRAD from several starts (the best is kept): the scan's NLL (the same raw
    form) may exceed it by at most 1e-4 and lie below it by at most 0.01 (MIGRAD's own
    convergence)."""
    from iminuit import Minuit

    h = _spectrum()
    r = scan(h, "gaussian", background, 11, resolution=lambda m: 0.01 * np.asarray(m, float),
             refit=False)
    n, a, b = h.weight_sum, h.edges[:-1], h.edges[1:]
    gx, gw = np.polynomial.legendre.leggauss(8)
    nodes = 0.5 * (a + b)[:, None] + 0.5 * (b - a)[:, None] * gx

    def cost(yield_, *p):
        per_bin = density(nodes, *p) @ gw * (0.5 * (b - a))
        nu = yield_ * per_bin / per_bin.sum()
        return float(np.sum(nu - n * np.log(nu))) if np.all(nu > 0) else 1e30

    best = math.inf
    for start in starts:
        names = ["yield"] + [f"p{i}" for i in range(1, len(start) + 1)]
        m = Minuit(cost, float(n.sum()), *start, name=names)
        m.errordef = Minuit.LIKELIHOOD
        for i, lim in enumerate(limits, start=1):
            m.limits[i] = lim
        m.migrad()
        if m.valid:
            best = min(best, m.fval)
    assert math.isfinite(best)
    ours = r.model.nll_background
    assert best - 0.01 <= ours <= best + 1e-4, (ours, best)


def test_repr_of_a_p_value_past_the_floats_underflow():
    """A local excess so large that its p-value underflows (Z ~ 124 here): the repr and the
    notebook table quote its exponent, 10^x with x = log10 of the normal tail at Z
    (scipy.stats.norm.logsf / ln 10, written here; 0.05 absolute, the one decimal shown),
    as the report does; they read '< 2.2e-308' and 'p = 0'."""
    import re

    rng = np.random.default_rng(6)
    b = 100.0 + rng.exponential(30.0, 3000)
    x = np.concatenate([b[b < 200.0], rng.normal(150.0, 1.5, 4000)])
    s = scan(x, "gaussian", "exponential", np.linspace(120.0, 180.0, 7),
             window=(100.0, 200.0), absolute_resolution=1.5)
    z = s.best["z_local"]
    assert s.best["p_local"] == 0.0 or s.best["p_local"] < 2.3e-308
    want = stats.norm.logsf(z) / math.log(10.0)
    for text in (repr(s), s._repr_html_()):
        got = float(re.search(r"p(?:_local)? = 10\^(-[\d.]+)", text).group(1))
        assert abs(got - want) <= 0.05 + 1e-9
        assert "p = 0)" not in text and "2.2e-308" not in text


def test_repr_counts_its_masses_in_words():
    """The repr says how many hypotheses were scanned, '1 mass' / '7 masses' (the count of
    the masses given here; it read '1 masses')."""
    rng = np.random.default_rng(3)
    x = 100.0 + rng.exponential(30.0, 2000)
    x = x[x < 200.0]
    for masses, words in (([150.0], "(1 mass 150-150 GeV"),
                          (np.linspace(120.0, 180.0, 7), "(7 masses 120-180 GeV")):
        s = scan(x, "gaussian", "exponential", masses, window=(100.0, 200.0),
                 absolute_resolution=2.0)
        assert words in repr(s), repr(s)
