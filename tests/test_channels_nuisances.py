"""Luminosity and efficiency uncertainties in the combined likelihood (peaksift.stats.joint
``norms``, peaksift.stats.channels): checked against the product likelihood of two binned
channels written here, with log-normal normalisation factors exp(ln(1+d) nu) and unit
Gaussian constraints nu^2/2 (Cowan, Cranmer, Gross, Vitells, EPJC 71 (2011) 1554, sec. 2:
nuisance parameters with auxiliary measurements at 0), minimised by
scipy.optimize.minimize (L-BFGS-B with the gradient written out)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize, stats

from peaksift import Resolution
from peaksift.histogram import MassHistogram
from peaksift.stats.channels import Channel, combine, signal_norms
from peaksift.stats.joint import profile_joint

SIGMA = 2.0
WINDOW = (110.0, 190.0)
EDGES = np.linspace(*WINDOW, 41)
D_LUMI, D_EFF = 0.10, (0.15, 0.30)
CONV = (4.0, 2.0)   # L eff: events per fb of each channel


def _hist(seed: int, slope: float, n_bkg: int, n_sig: int) -> MassHistogram:
    rng = np.random.default_rng(seed)
    b = 110.0 + rng.exponential(-1.0 / slope, n_bkg)
    x = np.concatenate([b[b < 190.0], rng.normal(150.0, SIGMA, n_sig)])
    return MassHistogram.from_masses(x, bins=EDGES.size - 1, range=WINDOW)


def _channels(shared: bool = True):
    hs = (_hist(11, -0.02, 3000, 60), _hist(12, -0.03, 2000, 20))
    names = ("mumu", "ee")
    return [Channel(n, h, "exponential", c / 0.5, signal="gaussian",
                    resolution=Resolution.absolute(SIGMA), efficiency=0.5,
                    luminosity_uncertainty=D_LUMI, efficiency_uncertainty=de,
                    luminosity_group="run" if shared else n)
            for n, h, c, de in zip(names, hs, CONV, D_EFF)], hs


def _reference(hs, shared: bool):
    """The profiled NLL at fixed mu written out (up to a constant): channel c expects
    mu k_c exp(aL nuL_c + ae_c nue_c) f_i + b_c g_i(slope_c) in bin i, with f the Gaussian
    bin integrals (scipy.stats.norm.cdf) and g the exponential's, normalised on the window.
    The NLL comes with its gradient written out (checked against finite differences in the
    test) and is minimised by L-BFGS-B in variables of order one (yields in units of the
    channel's count, slopes in units of 0.01): converged to 1e-11 in the NLL, as a long
    Nelder-Mead polish of the same likelihood confirmed."""
    lo, hi = WINDOW
    fs = np.diff(stats.norm.cdf(EDGES, 150.0, SIGMA))
    fs /= stats.norm.cdf(hi, 150.0, SIGMA) - stats.norm.cdf(lo, 150.0, SIGMA)
    ns = [np.asarray(h.weight_sum) for h in hs]
    al, ae = np.log1p(D_LUMI), np.log1p(np.asarray(D_EFF))
    u = EDGES - lo

    def g(slope):
        """The exponential's normalised bin integrals and their derivative in the slope."""
        c = np.exp(slope * u)
        dc = u * c
        den, dden = c[-1] - c[0], dc[-1] - dc[0]
        return np.diff(c) / den, np.diff(dc) / den - np.diff(c) * dden / den**2

    def nll(x, mu):
        """(NLL, gradient) at x = (b1, slope1, b2, slope2, nue_1, nue_2, nuL_1[, nuL_2])."""
        b1, s1, b2, s2, e1, e2, l1 = x[:7]
        l2 = l1 if shared else x[7]
        out = 0.5 * (e1**2 + e2**2 + l1**2 + (0.0 if shared else l2**2))
        grad = np.array([0.0, 0.0, 0.0, 0.0, e1, e2, l1] + ([] if shared else [l2]))
        for c, (n, k, bb, sl, ee, ll, a_e) in enumerate(
                ((ns[0], CONV[0], b1, s1, e1, l1, ae[0]),
                 (ns[1], CONV[1], b2, s2, e2, l2, ae[1]))):
            gg, dg = g(sl)
            sig = mu * k * np.exp(al * ll + a_e * ee) * fs
            m = np.maximum(sig + bb * gg, 1e-300)
            out += float(np.sum(m - n * np.log(m)))
            w = 1.0 - n / m
            grad[2 * c] += w @ gg
            grad[2 * c + 1] += bb * (w @ dg)
            grad[4 + c] += a_e * (w @ sig)
            grad[6 if (shared or c == 0) else 7] += al * (w @ sig)
        return out, grad

    scale = np.array([ns[0].sum(), 0.01, ns[1].sum(), 0.01] + [1.0] * (3 if shared else 4))

    def scaled(z, mu):
        f, grad = nll(z * scale, mu)
        return f, grad * scale

    def profiled(mu):
        x0 = [ns[0].sum(), -0.02, ns[1].sum(), -0.03, 0.0, 0.0, 0.0] + ([] if shared
                                                                        else [0.0])
        r = optimize.minimize(scaled, np.asarray(x0) / scale, args=(mu,), jac=True,
                              method="L-BFGS-B",
                              options={"ftol": 1e-15, "gtol": 1e-10, "maxiter": 5000})
        assert np.max(np.abs(r.jac)) < 1e-4, r   # at the minimum (not stopped early)
        return r.fun, r.x * scale

    profiled.nll = nll
    return profiled


@pytest.mark.parametrize("shared", [True, False])
def test_profiled_nll_with_luminosity_and_efficiency_nuisances(shared):
    """q_mu = 2 [NLL(mu) - NLL(0)] at mu = 5 and 12 fb with the luminosity shared by both
    channels (one nuisance) or not (one each), against the hand-written likelihood above
    minimised by scipy.optimize.minimize; 2e-3 absolute on q, 0.02 on the nuisances."""
    chans, hs = _channels(shared)
    c = combine(chans, np.array([150.0]), refit=False)
    models = list(c.prepared)
    a, names = signal_norms(chans)
    assert a.shape == ((2, 3) if shared else (2, 4)), names
    ref = _reference(hs, shared)
    x = np.array([3000.0, -0.021, 2000.0, -0.031, 0.1, -0.2, 0.3] + ([] if shared else [0.1]))
    num = optimize.approx_fprime(x, lambda y: ref.nll(y, 5.0)[0], 1e-7 * np.maximum(1, abs(x)))
    grad = ref.nll(x, 5.0)[1]   # the gradient the reference uses, against finite differences
    assert np.all(np.abs(num - grad) <= 1e-3 * (np.abs(grad) + 1e-3)), (num, grad)
    f0, _ = ref(0.0)
    for mu in (5.0, 12.0):
        r = profile_joint(models, [m.counts for m in models], [m.fractions for m in models],
                          [np.array([k]) for k in CONV], mu_fixed=np.array([mu]), norms=a,
                          steps=200)
        r0 = profile_joint(models, [m.counts for m in models], [m.fractions for m in models],
                           [np.array([k]) for k in CONV], mu_fixed=np.array([0.0]), norms=a,
                           steps=200)
        fm, x = ref(mu)
        assert 2 * (r["nll"][0] - r0["nll"][0]) == pytest.approx(2 * (fm - f0), abs=2e-3)
        got = dict(zip(names, r["nu"][0]))
        # the reference's order: efficiencies of mumu, ee, then the luminosity nuisance(s)
        assert got["efficiency_mumu"] == pytest.approx(x[4], abs=0.02)
        assert got["efficiency_ee"] == pytest.approx(x[5], abs=0.02)
        lumi = [v for k, v in got.items() if k.startswith("luminosity")]
        assert lumi == pytest.approx(list(x[6:]), abs=0.02)


def test_nuisances_change_the_nll_the_way_the_uncertainty_says():
    """Without uncertainties the norms are absent and the joint fit is unchanged (same
    numbers); with them, the profiled NLL at a signal the data disfavour is lower (the
    normalisation can give way), never higher (common practice: profiling a constrained
    parameter can only lower the minimum)."""
    chans, _ = _channels(True)
    plain = [Channel(ch.name, ch.data, ch.background, ch.luminosity, signal=ch.signal,
                     resolution=ch.resolution, efficiency=ch.efficiency) for ch in chans]
    a0, names0 = signal_norms(plain)
    assert a0 is None and names0 == ()
    c = combine(chans, np.array([150.0]), refit=False)
    models = list(c.prepared)
    a, _ = signal_norms(chans)
    args = ([m.counts for m in models], [m.fractions for m in models],
            [np.array([k]) for k in CONV])
    with_n = profile_joint(models, *args, mu_fixed=np.array([30.0]), norms=a)
    without = profile_joint(models, *args, mu_fixed=np.array([30.0]))
    assert with_n["nll"][0] < without["nll"][0] - 0.1
    assert np.all(with_n["nu"][0] < 0)     # a too-large signal: every factor pulled down


def test_mass_scale_factor_of_one_channel_in_the_combined_scan():
    """Channel mumu carries a 1% mass-scale nuisance (Gaussian constraint ((k - 1)/0.01)^2/2,
    common practice; Cowan et al. 2011 sec. 2), its peak generated at 151 GeV; the combined
    q0 at the 150 GeV hypothesis and the fitted factor k against the product likelihood
    written here (the mumu signal's Gaussian bin integrals centred at 150 k,
    scipy.stats.norm.cdf; exponential backgrounds) minimised by iminuit (MIGRAD, strategy 2):
    2e-3 absolute on q0, 1e-3 on k (0.1 of its constraint)."""
    from iminuit import Minuit

    rng = np.random.default_rng(21)
    bkg = 110.0 + rng.exponential(50.0, 3000)
    x = np.concatenate([bkg[bkg < 190.0], rng.normal(151.0, SIGMA, 70)])
    h1 = MassHistogram.from_masses(x, bins=EDGES.size - 1, range=WINDOW)
    h2 = _hist(12, -0.03, 2000, 20)
    chans = [Channel("mumu", h1, "exponential", 8.0, signal="gaussian",
                     resolution=Resolution.absolute(SIGMA), efficiency=0.5,
                     shape_nuisances={"mass_scale": 0.01}),
             Channel("ee", h2, "exponential", 4.0, signal="gaussian",
                     resolution=Resolution.absolute(SIGMA), efficiency=0.5)]
    c = combine(chans, np.array([150.0]), refit=False)
    assert "mass_scale_mumu" in c.nuisances
    lo, hi = WINDOW
    ns = [np.asarray(h.weight_sum) for h in (h1, h2)]

    def fsig(m):
        fs = np.diff(stats.norm.cdf(EDGES, m, SIGMA))
        return fs / (stats.norm.cdf(hi, m, SIGMA) - stats.norm.cdf(lo, m, SIGMA))

    def g(slope):
        e = np.exp(slope * (EDGES - lo))
        return np.diff(e) / (e[-1] - e[0])

    def nll(mu, k, b1, s1, b2, s2):
        out = 0.5 * ((k - 1.0) / 0.01) ** 2
        for n, conv, f, bb, sl in ((ns[0], 4.0, fsig(150.0 * k), b1, s1),
                                   (ns[1], 2.0, fsig(150.0), b2, s2)):
            m = np.maximum(mu * conv * f + bb * g(sl), 1e-300)
            out += float(np.sum(m - n * np.log(m)))
        return out

    start = {"mu": 10.0, "k": 1.0, "b1": ns[0].sum(), "s1": -0.02, "b2": ns[1].sum(),
             "s2": -0.03}
    m1 = Minuit(nll, **start)
    m1.errordef, m1.strategy = 0.5, 2
    m1.migrad()
    m0 = Minuit(nll, **{**start, "mu": 0.0})
    m0.errordef, m0.strategy = 0.5, 2
    m0.fixed["mu"] = m0.fixed["k"] = True
    m0.values["k"] = 1.0
    m0.migrad()
    assert m1.valid and m0.valid
    assert c.q0[0] == pytest.approx(2 * (m0.fval - m1.fval), abs=2e-3)
    j = c.nuisances.index("mass_scale_mumu")
    assert 1.0 + c.nuisance_values[0, j] == pytest.approx(m1.values["k"], abs=1e-3)
    assert c.nuisances_at_best()["mass_scale_mumu"]["shift_at_best"] \
        == pytest.approx(m1.values["k"] - 1.0, abs=1e-3)


def test_shape_factors_can_only_widen_the_expected_combined_limits():
    """On the background-only Asimov data the mass-scale and resolution factors sit at 1
    at sigma x B = 0 and give the conditional fit at any other sigma x B more freedom, so
    q_mu,A can only fall and every expected limit (and band edge) can only rise (Cowan et
    al. 2011, eqs. 28-32: q_mu,A = -2 ln lambda_A(mu)); checked at three masses, to 1e-6
    relative, and the widening is real (> 0.1% somewhere)."""
    from peaksift.stats.channel_limits import combined_limits

    h2 = _hist(12, -0.03, 2000, 20)
    h1 = _hist(11, -0.02, 3000, 60)
    out = []
    for sn in ({"mass_scale": 0.01, "mass_resolution": 0.1}, None):
        chans = [Channel("mumu", h1, "exponential", 8.0, signal="gaussian",
                         resolution=Resolution.absolute(SIGMA), efficiency=0.5,
                         shape_nuisances=sn),
                 Channel("ee", h2, "exponential", 4.0, signal="gaussian",
                         resolution=Resolution.absolute(SIGMA), efficiency=0.5)]
        out.append(combined_limits(chans, np.array([140.0, 150.0, 160.0]),
                                   method="asymptotic").bands)
    assert np.all(out[0] >= out[1] * (1 - 1e-6))
    assert np.any(out[0] > out[1] * 1.001)
