"""peaksift.fit validated with toys and against outside references (named beside each check)."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

import peaksift
from peaksift.errors import FitError
from peaksift.fitting import Model, fit
from peaksift.histogram import MassHistogram

W = (60.0, 120.0)
MASS, SIGMA, DECAY = 91.0, 2.5, 25.0
LAMBDA_S, LAMBDA_B = 1000.0, 4000.0
N_TOYS = 1000
# 68.3 % coverage with N_TOYS toys: binomial error sqrt(0.683 * 0.317 / 1000) = 0.0147,
# so the +-0.03 tolerance is about 2 binomial errors.
COVERAGE = 0.6827  # P(|z| < 1) for a standard normal (scipy.stats.norm: 2 Phi(1) - 1)


def _toy(rng: np.random.Generator, ls: float = LAMBDA_S, lb: float = LAMBDA_B) -> np.ndarray:
    """Gaussian peak (Poisson mean ls) on an exponential falling with decay length DECAY,
    truncated to W (Poisson mean lb), by inverse-CDF sampling."""
    ns, nb = rng.poisson(ls), rng.poisson(lb)
    s = rng.normal(MASS, SIGMA, ns)  # the window spans > 12 sigma each side: no truncation
    k = 1.0 / DECAY
    b = W[0] - np.log1p(-rng.random(nb) * (1 - math.exp(-k * (W[1] - W[0])))) / k
    return np.concatenate([s, b])


def _pull_study(results, truth):
    pulls = {k: np.array([(r.values[k] - v) / r.errors[k] for r in results])
             for k, v in truth.items()}
    return pulls


def _check_pulls(pulls):
    """Mean within +-0.1, width within 10 % of 1, 68.3 % coverage within +-0.03."""
    for k, p in pulls.items():
        assert abs(p.mean()) < 0.1, (k, p.mean())
        assert abs(p.std(ddof=1) - 1.0) < 0.1, (k, p.std(ddof=1))
        assert abs(np.mean(np.abs(p) < 1.0) - COVERAGE) < 0.03, (k, np.mean(np.abs(p) < 1.0))


TRUTH = {"mass": MASS, "sigma": SIGMA, "signal_yield": LAMBDA_S}


@pytest.mark.slow
def test_toy_study_binned_unweighted():
    """1000 toys, binned extended likelihood: pulls of mass, sigma and signal yield are
    standard normal (asymptotic ML theory, e.g. Cowan et al., EPJC 71 (2011) 1554, sect. 3)
    and the intervals from the Hessian cover 68.3 % +- 3 %.  The Baker-Cousins chi-square has mean ndf
    (Baker and Cousins, NIM 221 (1984) 437: asymptotically chi-square) and p-values are
    uniform (mean 0.5)."""
    rng = np.random.default_rng(20261201)
    res = []
    for _ in range(N_TOYS):
        h = MassHistogram(bins=120, range=W)
        h.fill(_toy(rng))
        res.append(fit(h, "gaussian", "exponential", W))
    valid = [r for r in res if r.valid]
    assert len(valid) >= 0.99 * N_TOYS
    _check_pulls(_pull_study(valid, TRUTH))
    chi2 = np.array([r.gof_chi2 for r in valid])
    ndf = valid[0].gof_ndf
    assert ndf == 120 - 5
    # mean of chi2 over 1000 toys: error sqrt(2 ndf / 1000) = 0.48; allow 3 % of ndf
    assert abs(chi2.mean() - ndf) < 0.03 * ndf
    assert abs(np.mean([r.gof_p_value for r in valid]) - 0.5) < 0.03  # error 0.009


@pytest.mark.slow
def test_toy_study_binned_weighted():
    """Weighted events (w uniform in [0, 2], mean 1) in a weighted histogram: the scaled
    Poisson treatment (Bohm and Zech, NIM A 748 (2014) 1) gives standard-normal pulls and
    68.3 % +- 3 % coverage for the yields in units of expected sum of weights."""
    rng = np.random.default_rng(20261202)
    res = []
    for _ in range(N_TOYS):
        x = _toy(rng)
        h = MassHistogram(bins=120, range=W)
        h.fill(x, rng.uniform(0.0, 2.0, x.size))
        res.append(fit(h, "gaussian", "exponential", W))
    valid = [r for r in res if r.valid]
    assert all(r.weighted for r in valid)
    assert len(valid) >= 0.99 * N_TOYS
    _check_pulls(_pull_study(valid, TRUTH))


@pytest.mark.slow
def test_toy_study_unbinned_weighted_sandwich():
    """Weighted unbinned fits with the sandwich covariance (Langenbruch, EPJC 82 (2022)
    393): standard-normal pulls and 68.3 % +- 3 % coverage, while the naive inverse Hessian
    of the weighted likelihood under-covers (pull width ~ sqrt(E[w^2]/E[w]) = 1.15 for w
    uniform in [0, 2]; checked on the first 300 toys)."""
    rng = np.random.default_rng(20261203)
    res, naive = [], []
    for i in range(N_TOYS):
        x = _toy(rng)
        r = fit(x, "gaussian", "exponential", W, weights=rng.uniform(0.0, 2.0, x.size),
                binned=False)
        res.append(r)
        if i < 300 and r.valid:
            m = r.to_minuit()
            m.hesse()
            naive.append((r.values["signal_yield"] - LAMBDA_S) / m.errors["signal_yield"])
    valid = [r for r in res if r.valid]
    assert all(not r.binned and r.weighted for r in valid)
    assert "sandwich" in valid[0].weight_treatment
    assert len(valid) >= 0.99 * N_TOYS
    _check_pulls(_pull_study(valid, TRUTH))
    assert np.std(naive, ddof=1) > 1.08


def test_binned_and_unbinned_agree():
    """Same 5000 masses: the unbinned fit and a binned fit with bins much narrower than the
    peak agree within 0.1 of their errors (binning loses little information when the bin
    width << sigma: common practice)."""
    x = _toy(np.random.default_rng(5))
    ru = fit(x, "gaussian", "exponential", W, binned=False)
    h = MassHistogram(bins=600, range=W)
    h.fill(x)
    rb = fit(h, "gaussian", "exponential", W)
    assert ru.valid and rb.valid and not ru.binned and rb.binned
    for k in ("mass", "sigma", "signal_yield", "background_yield", "b1"):
        assert abs(ru.values[k] - rb.values[k]) < 0.1 * ru.errors[k], k
        assert rb.errors[k] == pytest.approx(ru.errors[k], rel=0.05), k


def test_binned_choice_is_recorded():
    rng = np.random.default_rng(6)
    small = _toy(rng, 100, 400)
    assert not fit(small, "gaussian", "exponential", W).binned
    big = np.concatenate([_toy(rng) for _ in range(5)])
    r = fit(big, "gaussian", "exponential", W)
    assert r.binned and "binned in 400 bins" in r.binned_reason
    h = MassHistogram(bins=60, range=W)
    h.fill(small)
    rh = fit(h, "gaussian", "exponential", W)
    assert rh.binned_reason == "data is a histogram"
    assert rh.to_dict()["gof"]["note"].startswith("saturated-model (Baker-Cousins)")


def test_standard_candle_recovers_pdg_z_mass():
    """Closure check against the particle package's Z mass and width
    (Particle.from_pdgid(23)): generator-level Z masses from peaksift.simulate (the demo's
    standard candle, drawn with those values) plus the dilepton continuum, fitted with a
    relativistic Breit-Wigner on an exponential, give back the mass and the width within
    3 fitted errors.  Generator and fit shape share the same line shape (PDG Review,
    "Resonances"), so this tests that the fit recovers what was put in, not the line shape
    itself (that is test_shapes.test_breitwigner_against_pdg_formula)."""
    from particle import Particle

    from peaksift import simulate

    tb = simulate.generate(60_000, truth=True)
    proc = tb["process"].to_numpy()
    m = tb["true_mass"].to_numpy()
    keep = np.isin(proc, [simulate.PROCESSES.index(p) for p in ("z_mumu", "z_ee", "dy_mumu",
                                                                  "dy_ee")])
    x = m[keep]
    window = (80.0, 102.0)
    x = x[(x > window[0]) & (x < window[1])]
    r = fit(x, "breitwigner", "exponential", window, binned=False)
    z = Particle.from_pdgid(23)
    mz, gz = z.mass / 1000.0, z.width / 1000.0
    assert r.valid
    assert abs(r.peak_mass - mz) < 3 * r.peak_mass_error, (r.peak_mass, mz, r.peak_mass_error)
    assert abs(r.peak_width - gz) < 3 * r.peak_width_error
    assert r.width_parameter == "width"


def test_fixed_parameters_and_background_only():
    """Fixing signal_yield = 0 fixes the signal shape too; q0 = 2 (nll_b - nll_sb) >= 0 and
    for a strong peak sqrt(q0) is near the counting estimate s / sqrt(b) within a factor
    2 (Cowan et al. 2011, eq. 97 asymptotics; common practice)."""
    x = _toy(np.random.default_rng(8), 300, 4000)
    h = MassHistogram(bins=120, range=W)
    h.fill(x)
    sb = fit(h, "gaussian", "exponential", W, fixed={"mass": MASS, "sigma": SIGMA})
    b = fit(h, "gaussian", "exponential", W, fixed={"signal_yield": 0.0})
    assert sb.valid and b.valid
    assert set(b.fixed) == {"mass", "sigma", "signal_yield"}
    assert b.errors["mass"] == 0.0
    q0 = 2 * (b.nll - sb.nll)
    bkg_in_peak = 4000 * (np.exp(-(MASS - 2 * SIGMA - 60) / DECAY) -
                          np.exp(-(MASS + 2 * SIGMA - 60) / DECAY)) / (1 - np.exp(-60 / DECAY))
    z_count = 0.954 * 300 / math.sqrt(bkg_in_peak)
    assert 0.5 * z_count < math.sqrt(q0) < 2 * z_count


def test_gaussian_constraint_combines_information():
    """A Gaussian constraint (mean c, width s_c) on sigma: the fitted error is close to
    (1/e_free^2 + 1/s_c^2)^-1/2 (information adds for Gaussian likelihoods: common practice)."""
    x = _toy(np.random.default_rng(9), 400, 4000)
    free = fit(x, "gaussian", "exponential", W)
    sc = free.errors["sigma"]
    con = fit(x, "gaussian", "exponential", W, constraints={"sigma": (SIGMA, sc)})
    expect = (1 / free.errors["sigma"] ** 2 + 1 / sc**2) ** -0.5
    assert con.errors["sigma"] == pytest.approx(expect, rel=0.1)
    assert con.values["sigma"] == pytest.approx(
        (free.values["sigma"] / free.errors["sigma"] ** 2 + SIGMA / sc**2) * expect**2, abs=0.2 * sc)
    # the goodness of fit says that the constrained parameter still counts as free in ndf
    assert con.gof_ndf == free.gof_ndf
    assert "1 constrained parameter counted as free in ndf" in con.to_dict()["gof"]["note"]
    assert "constrained" not in free.gof_note


def test_two_signal_components():
    """Two peaks: parameter names get the _2 suffix and both masses are found."""
    rng = np.random.default_rng(10)
    x = np.concatenate([_toy(rng, 800, 3000), rng.normal(105.0, 1.5, 400)])
    r = fit(x, ["gaussian", "gaussian"], "exponential", W,
            start={"mass": 91.0, "mass_2": 104.0, "sigma_2": 2.0})
    assert "mass_2" in r.parameters and "signal_yield_2" in r.parameters
    assert r.valid
    assert abs(r.values["mass"] - 91.0) < 3 * r.errors["mass"]
    assert abs(r.values["mass_2"] - 105.0) < 3 * r.errors["mass_2"]


def test_auto_start_finds_an_off_centre_peak():
    """No starting values given: a peak at 75 GeV (far from the window centre) is found,
    for a Gaussian peak fitted with gaussian and crystalball, and a Voigt peak (Gaussian
    smearing plus Cauchy-distributed natural width) fitted with voigt."""
    rng = np.random.default_rng(12)
    k = 1.0 / DECAY
    b = W[0] - np.log1p(-rng.random(6000) * (1 - math.exp(-k * 60))) / k
    gauss_peak = np.concatenate([b, rng.normal(75.0, 1.2, 500)])
    lorentz = 75.0 + rng.normal(0, 1.0, 1500) + 0.75 * rng.standard_cauchy(1500)
    voigt_peak = np.concatenate([b, lorentz[(lorentz > W[0]) & (lorentz < W[1])]])
    for sig, x in (("gaussian", gauss_peak), ("crystalball", gauss_peak),
                   ("voigt", voigt_peak)):
        r = fit(x, sig, "exponential", W)
        assert r.valid, (sig, r.problems)
        assert abs(r.peak_mass - 75.0) < 0.5, sig


@pytest.mark.parametrize("bkg", ["bernstein", "exppoly", "powerlaw", "dijet", "turnon"])
def test_other_backgrounds_fit(bkg):
    """Every background shape fits the exponential-plus-peak toy (for turnon, a toy whose
    background is switched on by a Gaussian-CDF trigger efficiency at 70 GeV) with a
    peak mass within 3 errors of the truth and an acceptable GoF."""
    rng = np.random.default_rng(13)
    x = _toy(rng, 800, 8000)
    if bkg == "turnon":
        from scipy.special import ndtr

        x = x[(np.abs(x - MASS) < 4 * SIGMA) | (rng.random(x.size) < ndtr((x - 70.0) / 3.0))]
    h = MassHistogram(bins=120, range=W)
    h.fill(x)
    r = fit(h, "gaussian", bkg, W)
    assert r.valid, r.problems
    assert abs(r.peak_mass - MASS) < 3 * r.peak_mass_error
    assert r.gof_p_value > 1e-4


def test_invalid_fit_is_flagged_not_reported_valid():
    """A fit whose minimum sits on a bound is invalid (signal yield bounded at 0 with a
    deficit in the data), and a degenerate model (two identical fixed peaks) is invalid
    because the covariance is singular."""
    rng = np.random.default_rng(14)
    k = 1.0 / DECAY
    x = W[0] - np.log1p(-rng.random(4000) * (1 - math.exp(-k * 60))) / k
    x = x[np.abs(x - 91) > 2]  # a hole where the peak is fixed
    r = fit(x, "gaussian", "exponential", W, fixed={"mass": 91.0, "sigma": 2.0},
            limits={"signal_yield": (0.0, 1000.0)})
    assert not r.valid and any("at a bound" in p for p in r.problems)
    assert r.to_dict()["valid"] is False
    y = _toy(rng)
    r2 = fit(y, ["gaussian", "gaussian"], "exponential", W,
             fixed={"mass": 91.0, "sigma": 2.5, "mass_2": 91.0, "sigma_2": 2.5})
    assert not r2.valid and any("positive definite" in p for p in r2.problems)


def test_fit_errors_for_bad_input():
    x = _toy(np.random.default_rng(15), 100, 400)
    with pytest.raises(FitError, match="no masses inside the fit window"):
        fit(x, "gaussian", "exponential", (300.0, 400.0))
    bad = x.copy()
    bad[7] = np.nan
    with pytest.raises(FitError, match="1 of .* masses are not finite .first at index 7"):
        fit(bad, "gaussian", "exponential", W)
    with pytest.raises(FitError, match="inconsistent bounds for 'sigma'"):
        fit(x, "gaussian", "exponential", W, limits={"sigma": (3.0, 1.0)})
    with pytest.raises(FitError, match="unknown shape 'gauss'.*valid names: gaussian"):
        fit(x, "gauss", "exponential", W)
    with pytest.raises(FitError, match="unknown parameter 'sigmaa'.*did you mean 'sigma'"):
        fit(x, "gaussian", "exponential", W, fixed={"sigmaa": 1.0})
    with pytest.raises(FitError, match="is a background shape but was given as the signal"):
        fit(x, "exponential", "exponential", W)
    with pytest.raises(FitError, match="window must be finite with hi > lo"):
        fit(x, "gaussian", "exponential", (120.0, 60.0))
    with pytest.raises(FitError, match="start value sigma=-1 is outside its bounds"):
        fit(x, "gaussian", "exponential", W, start={"sigma": -1.0})
    h = MassHistogram(bins=10, range=(0.0, 50.0))
    with pytest.raises(FitError, match="contains no complete bin"):
        fit(h, "gaussian", "exponential", W)
    h2 = MassHistogram(bins=60, range=W)
    with pytest.raises(FitError, match="holds no events"):
        fit(h2, "gaussian", "exponential", W)


def test_result_dict_repr_and_html():
    x = _toy(np.random.default_rng(16), 500, 4000)
    r = fit(x, "gaussian", "exponential", W, minos=["mass"])
    d = r.to_dict()
    json.dumps(d)  # JSON-ready
    for key in ("valid", "peak_mass", "width", "signal_yield", "background_yield"):
        assert key in d
    assert set(d["peak_mass"]) == {"value", "error"}
    assert set(d["gof"]) == {"chi2", "ndf", "p_value", "note"}
    # unbinned fit, binned only for the chi-square: flagged as approximate (Chernoff and
    # Lehmann, Ann. Math. Statist. 25 (1954) 579; from memory)
    assert not r.binned and d["gof"]["note"].startswith("approximate")
    assert "Chernoff-Lehmann" in d["gof"]["note"]
    assert r.minimizer in ("fisher-scoring", "iminuit-migrad")
    assert d["width"]["value"] == r.values["sigma"]
    lo, hi = r.minos["mass"]
    # MINOS intervals and the errors from the Hessian agree for a near-Gaussian likelihood
    # (common practice)
    assert -lo == pytest.approx(r.errors["mass"], rel=0.1)
    assert hi == pytest.approx(r.errors["mass"], rel=0.1)
    text = repr(r)
    assert text.startswith("FitResult(valid") and "signal_yield" in text and "chi2/ndf" in text
    assert "<table>" in r._repr_html_()
    assert r.to_minuit().migrad().fval == pytest.approx(r.nll, abs=1e-4)


def test_notebook_table_rounds_each_value_to_its_error():
    """FitResult._repr_html_ quotes a value to the decimals of its error rounded to two
    significant digits (common practice; the repr, the report and the figure do the same),
    not a value with six digits beside an error with three (149.942 beside 0.42)."""
    import re

    x = _toy(np.random.default_rng(16), 500, 4000)
    r = fit(x, "gaussian", "exponential", W)
    rows = re.findall(r"<tr><td>(\w+)</td><td>([^<]*)</td><td>([^<]*)</td>", r._repr_html_())
    assert [n for n, _, _ in rows] == list(r.parameters)
    for name, value, error in rows:
        e = r.errors[name]
        dec = max(0, 1 - math.floor(math.log10(e)))
        assert (value, error) == (f"{r.values[name]:.{dec}f}", f"{e:.{dec}f}"), name


def test_repr_rounds_intervals_and_p_as_the_figure_does():
    """The repr quotes a profile-likelihood interval rounded to two significant digits of its
    smaller end (common practice; it gave -1.8/+2.47 for one parameter) and the goodness of
    fit's p-value with the digits the fit figure's box shows (it gave 0.063 beside 0.0630)."""
    import re

    from matplotlib.text import Text

    x = _toy(np.random.default_rng(16), 500, 4000)
    r = fit(x, "gaussian", "exponential", W, intervals=["mass", "sigma"])
    text = repr(r)
    for name in ("mass", "sigma"):
        lo, hi = r.intervals[name]
        dec = max(0, 1 - math.floor(math.log10(min(-lo, hi))))
        assert re.search(rf"\n  {name} +=.*  interval \+{hi:.{dec}f} -{-lo:.{dec}f}\n", text)
    p = re.search(r"p = (\S+)$", text).group(1)
    box = [t.get_text() for t in r.plot().findobj(Text)]
    assert any(t.endswith(f"p = {p}") for t in box), (p, box)


def test_model_expected_broadcasts_over_toys():
    """Model.expected with stacked parameters equals one call per parameter set; its
    gradient matches central differences."""
    m = Model("gaussian", "exponential", W)
    e = np.linspace(*W, 61)
    ys = np.array([[0.0], [100.0], [250.0]])
    b1 = np.array([[-1.0], [-1.2], [-0.8]])
    v = {"mass": 91.0, "sigma": 2.5, "signal_yield": ys, "b1": b1, "background_yield": 1000.0}
    got = m.expected(e, v)
    assert got.shape == (3, 60)
    for k in range(3):
        one = m.expected(e, [91.0, 2.5, float(ys[k, 0]), float(b1[k, 0]), 1000.0])
        np.testing.assert_allclose(got[k], one, rtol=1e-12)
    np.testing.assert_allclose(got.sum(axis=-1), 1000.0 + ys[:, 0], rtol=1e-12)
    g = m.grad_expected(e, [91.0, 2.5, 100.0, -1.2, 1000.0])
    p = np.array([91.0, 2.5, 100.0, -1.2, 1000.0])
    for i in range(5):
        h = 1e-6 * max(abs(p[i]), 1)
        a, b = p.copy(), p.copy()
        a[i] += h
        b[i] -= h
        np.testing.assert_allclose(g[i], (m.expected(e, a) - m.expected(e, b)) / (2 * h),
                                   rtol=1e-5, atol=1e-7)


def test_plot_writes_png(tmp_path):
    x = _toy(np.random.default_rng(17), 600, 4000)
    h = MassHistogram(bins=60, range=W)
    h.fill(x)
    r = peaksift.fit(h, "gaussian", "exponential", W)
    assert r.valid
    out = tmp_path / "fit.png"
    fig = r.plot(out)
    assert out.stat().st_size > 10_000
    ax = fig.axes[1]
    assert ax.get_ylabel() == "pull" and "GeV" in ax.get_xlabel()
    assert "GeV" in fig.axes[0].get_ylabel()


def test_too_few_events_give_an_invalid_result_not_an_exception():
    """Three masses for five free parameters cannot be fitted (fewer data than parameters:
    common practice); the fit is returned flagged invalid with that reason, so a search on a
    small data set still reports its scan and limits."""
    r = fit(np.array([120.0, 150.0, 170.0]), "gaussian", "exponential", (100.0, 200.0))
    assert not r.valid
    assert any("3 events in the window for 5 free parameters" in p for p in r.problems)
    assert r.intervals is None and r.starts_tried == 0


def test_notebook_table_of_a_fit_without_degrees_of_freedom():
    """An unbinned fit of few events whose goodness-of-fit binning leaves no degrees of
    freedom (bins minus free parameters <= 0, the chi-square's count, Baker and Cousins
    1984): the notebook table says the goodness of fit is not defined, as the repr does,
    where it read 'GoF chi2/ndf = 0.7/0, p = n/a' (and '5.5/-1' for a Crystal Ball)."""
    import re

    rng = np.random.default_rng(4)
    x = 100.0 + rng.exponential(30.0, 120)
    x = np.concatenate([x[x < 200.0], rng.normal(160.0, 2.0, 6)])
    for signal in ("gaussian", "crystalball"):
        r = peaksift.fit(x, signal, "exponential", (100.0, 200.0), binned=False)
        assert r.gof_ndf <= 0
        page = r._repr_html_()
        assert "GoF: not defined (no degrees of freedom left, unbinned fit)" in page
        assert "not defined" in repr(r)
        assert not re.search(r"chi2/ndf = [^,]*/-?\d+, p = n/a", page)
