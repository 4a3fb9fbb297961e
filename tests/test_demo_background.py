"""The demo's background: its expected spectrum describes the generated data, and on it the
demo's single power law fails the spurious-signal criterion the envelope is there for.

Sources: the spurious signal -- the signal fitted on a background-only template, over its
statistical error -- and its limit of 20% of the statistical error are common practice in
resonance searches with a background-function choice (the issue on systematics cites it);
the envelope is discrete profiling (Dauncey, Kenzie, Wardle, Davies, JINST 10 (2015)
P04015).  The power law's spurious signal is computed here by an independent iminuit fit.
"""

from __future__ import annotations

import json
import sys

import awkward as ak
import numpy as np
import pytest
from background_reference import assert_orders_nested, bernstein_gaussian_nll
from scipy import stats

from peaksift import events

if sys.version_info >= (3, 11):
    import tomllib
else:  # the project supports 3.10
    import tomli as tomllib

pytestmark = pytest.mark.filterwarnings("ignore::RuntimeWarning")

INJECTED = 152.0  # GeV: truth.json's invented resonance


@pytest.fixture(scope="module")
def demo(demo_dir):
    cfg = tomllib.loads((demo_dir / "search.toml").read_text())
    tmpl = json.loads((demo_dir / cfg["systematics"]["template"]).read_text())
    edges = np.asarray(tmpl["edges"], float)
    expected = np.asarray(tmpl["values"], float)
    # the demo data through the intended selection, written with awkward only (isolated
    # opposite-charge muon pairs, the leading pair per event: truth.json's selection)
    truth = json.loads((demo_dir / "truth.json").read_text())
    ev = events.read_events([str(demo_dir / f) for f in truth["files"]], "muon")
    mu = ev.muon[(ev.muon.pt > 20) & (abs(ev.muon.eta) < 2.4) & (ev.muon.isolation < 0.15)]
    a, b = ak.unzip(ak.combinations(mu, 2))
    pairs = ak.zip({"a": a, "b": b})[a.charge * b.charge < 0]
    first = ak.firsts(pairs)
    first = first[~ak.is_none(first)]
    m = ak.to_numpy((first.a + first.b).mass)
    observed = np.histogram(m, edges)[0].astype(float)
    table = np.asarray(cfg["model"]["resolution"]["table"], float)
    return {"edges": edges, "expected": expected, "observed": observed,
            "sigma": lambda x: float(np.interp(x, table[:, 0], table[:, 1])),
            "table": (table[:, 0], table[:, 1]),
            "limit": float(cfg["systematics"].get("spurious_limit", 0.2)),
            "template_path": demo_dir / cfg["systematics"]["template"],
            "families": cfg["systematics"]["background_families"]}


def test_template_is_the_expected_spectrum_of_the_data(demo):
    """Pearson's chi-square (p from scipy.stats.chi2) of the demo data against the template,
    outside +-3 resolution widths of the injected resonance: the generator's expected
    background describes its own draw (p > 0.001); the totals agree within 3 Poisson sigma."""
    c = 0.5 * (demo["edges"][1:] + demo["edges"][:-1])
    side = np.abs(c - INJECTED) > 3 * demo["sigma"](INJECTED)
    n, mu = demo["observed"][side], demo["expected"][side]
    chi2 = float(np.sum((n - mu) ** 2 / mu))
    assert stats.chi2.sf(chi2, side.sum()) > 1e-3, chi2
    assert abs(n.sum() - mu.sum()) < 3 * np.sqrt(mu.sum())
    # and the background really is the template's, not a flat one: a shape without the
    # falling continuum's slope is rejected (the test has power)
    flat = np.full(mu.size, mu.mean())
    assert stats.chi2.sf(float(np.sum((n - flat) ** 2 / flat)), side.sum()) < 1e-6


def _spurious_power_law(expected, edges, events, mass, sigma):
    """Signal yield over its error (HESSE) of an extended binned Poisson fit of a power law
    m^-k plus a Gaussian of fixed mass and width (both normalised on the window) to the
    template scaled to ``events`` events: the Asimov data set of the template."""
    from iminuit import Minuit

    n = expected * events / expected.sum()
    lo, hi = edges[0], edges[-1]

    def pl_frac(k):
        if abs(k - 1.0) < 1e-9:
            g = np.log(edges)
        else:
            g = edges ** (1.0 - k) / (1.0 - k)
        return np.diff(g) / (g[-1] - g[0])

    z = stats.norm.cdf(edges, mass, sigma)
    g_frac = np.diff(z) / (z[-1] - z[0])

    def nll(s, nb, k):
        mu = np.maximum(nb * pl_frac(k) + s * g_frac, 1e-12)
        return float(np.sum(mu - n * np.log(mu)))

    m = Minuit(nll, s=0.0, nb=n.sum(), k=4.0)
    m.errordef = Minuit.LIKELIHOOD
    m.limits["k"] = (0.0, 20.0)
    m.migrad()
    m.hesse()
    assert m.valid, (mass, lo, hi)
    return m.values["s"] / m.errors["s"]


def test_single_power_law_fails_the_spurious_signal_criterion(demo):
    """The demo's single function (model.background = "powerlaw") on the template at the
    data's size: its largest spurious signal between 140 and 165 GeV exceeds the config's
    limit (0.2, common practice) many times over (the shoulder near 145 GeV: above 1.0),
    near the injected mass.  peaksift's spurious-signal test gives the same ratios as the
    independent fit (to 0.05)."""
    from peaksift.histogram import MassHistogram
    from peaksift.stats.background_choice import spurious_signal

    events = demo["observed"].sum()
    masses = np.arange(140.0, 165.5, 2.5)
    ours = np.array([_spurious_power_law(demo["expected"], demo["edges"], events, m,
                                         demo["sigma"](m)) for m in masses])
    j = int(np.argmax(np.abs(ours)))
    assert ours[j] > demo["limit"] and ours[j] > 1.0, (masses[j], ours[j])
    assert abs(masses[j] - INJECTED) < 10.0
    sp = spurious_signal(MassHistogram.load(demo["template_path"]), ["powersum1"], "gaussian",
                         masses, events=events, edges=demo["edges"], limit=demo["limit"],
                         resolution=demo["table"])["powersum1"]
    assert np.allclose(sp["ratio"], ours, atol=0.05), (sp["ratio"], ours)
    assert sp["flagged"]


def test_envelope_candidates_absorb_the_shoulder(demo):
    """The envelope's Bernstein candidate kept by the order test on the template at the
    data's size spuriously fits less than half the power law's signal at the injected mass,
    and the families hold a function within the limit over 130-190 GeV (bernstein6).

    Not shown (and not true on this demo): a kept candidate within the 0.2 limit over the
    whole scan -- next to the Z peak's tail (114-125 GeV) every candidate exceeds it, and
    at 1,000 events the order test cannot tell bernstein4 from bernstein6."""
    from peaksift.histogram import MassHistogram
    from peaksift.stats.background_choice import (
        choose_background,
        spurious_signal,
        template_histogram,
    )

    events = demo["observed"].sum()
    tmpl = MassHistogram.load(demo["template_path"])
    asimov = template_histogram(tmpl, demo["edges"], events)
    kept = choose_background(asimov, demo["families"]).labels
    bern = [k for k in kept if k.startswith("bernstein")]
    assert "powersum1" in kept and bern
    masses = np.arange(130.0, 190.5, 2.5)
    sp = spurious_signal(tmpl, ["powersum1", *bern, "bernstein6"], "gaussian", masses,
                         events=events, edges=demo["edges"], limit=demo["limit"],
                         resolution=demo["table"])
    at = int(np.argmin(np.abs(masses - INJECTED)))
    assert abs(sp[bern[0]]["ratio"][at]) < 0.5 * abs(sp["powersum1"]["ratio"][at])
    assert np.max(np.abs(sp["bernstein6"]["ratio"])) < demo["limit"]


def test_order_test_fits_reach_the_minimum_an_independent_minimiser_finds(demo):
    """The order test's fits of the demo data in the search window (110-200 GeV, its 1 GeV
    bins): no candidate's NLL lies above the lowest that scipy.optimize.minimize (L-BFGS-B,
    from the default start and from the fitted point) finds for the same binned Poisson
    NLL with the yield profiled, sum(nu - n ln nu) with nu = b g and b = sum n / sum g, by
    more than 1e-6; and a higher order of a family never fits worse than the lower one it
    contains (by more than 1e-8).  The second failed before the fits recomputed their
    curvature: the power sum of two terms stopped at its step limit 1.4e-7 above one term."""
    from scipy import optimize

    from peaksift.histogram import MassHistogram
    from peaksift.stats.background_choice import candidate_shapes, choose_background

    keep = (demo["edges"][:-1] >= 110.0) & (demo["edges"][1:] <= 200.0)
    edges = demo["edges"][np.concatenate([keep, [False]]) | np.concatenate([[False], keep])]
    h = MassHistogram(edges)
    h.weight_sum = demo["observed"][keep].copy()
    h.weight_sq_sum = demo["observed"][keep].copy()
    n = h.weight_sum
    choice = choose_background(h, demo["families"])
    shapes_ = candidate_shapes([c.label for c in choice.candidates])
    window = (float(edges[0]), float(edges[-1]))

    for cand in choice.candidates:
        shape = shapes_[cand.label]

        def nll(theta, shape=shape):
            g = np.asarray(shape.bin_fractions(edges, list(theta), window), float)
            if not np.all(g > 0):
                return 1e30
            nu = n.sum() / g.sum() * g
            return float(np.sum(nu - n * np.log(nu)))

        pars = shape.parameters_for(window)
        bounds = [(p.lower if np.isfinite(p.lower) else None,
                   p.upper if np.isfinite(p.upper) else None) for p in pars]
        fitted = np.array(list(cand.parameters.values()))
        default = np.array([p.start if np.isfinite(p.start) else 0.0 for p in pars])
        best = min(optimize.minimize(nll, x0, method="L-BFGS-B", bounds=bounds,
                                     options={"ftol": 1e-15, "gtol": 1e-10,
                                              "maxiter": 20000}).fun
                   for x0 in (fitted, default))
        assert cand.nll <= best + 1e-6, (cand.label, cand.nll, best)
    assert_orders_nested(choice, 1e-8)


def _spurious_bernstein(expected, edges, events, mass, sigma, degree):
    """Signal yield over its error (HESSE) of an extended binned Poisson fit of a Bernstein
    polynomial sum_k beta_k C(n,k) x^k (1-x)^(n-k) (beta_0 = 1, the others >= 0, x the
    mass scaled to the window, integrated over each bin by 8-point Gauss-Legendre and
    normalised on the window) plus a Gaussian of fixed mass and width to the template
    scaled to ``events`` events."""
    from iminuit import Minuit

    n = expected * events / expected.sum()
    nll, names = bernstein_gaussian_nll(n, edges, degree, mass, sigma)
    m = Minuit(nll, 0.0, n.sum(), *np.full(degree, 0.5), name=names)
    m.errordef = Minuit.LIKELIHOOD
    for nm in names[2:]:
        m.limits[nm] = (0.0, None)
    m.migrad(ncall=100000)
    m.migrad(ncall=100000)
    m.hesse()
    assert m.valid, mass
    return m.values["s"] / m.errors["s"]


def test_nested_bernstein_template_fits_give_an_independent_fits_spurious_signal(demo):
    """The spurious signal of bernstein4 (fitted after bernstein2 and bernstein3 of the same
    template; its template fit is the scan's multi-start one): its ratio s / sigma_stat
    at the masses of its largest value, of the injected resonance and between agrees with
    an independent iminuit fit of the same model to 0.01 (they differ by < 0.002)."""
    from peaksift.histogram import MassHistogram
    from peaksift.stats.background_choice import spurious_signal

    events = demo["observed"].sum()
    masses = np.array([120.0, 135.0, 152.5, 170.0])
    ours = np.array([_spurious_bernstein(demo["expected"], demo["edges"], events, m,
                                         demo["sigma"](m), 4) for m in masses])
    sp = spurious_signal(MassHistogram.load(demo["template_path"]),
                         ["bernstein2", "bernstein3", "bernstein4"], "gaussian", masses,
                         events=events, edges=demo["edges"], limit=demo["limit"],
                         resolution=demo["table"])["bernstein4"]
    assert np.allclose(sp["ratio"], ours, atol=0.01), (sp["ratio"], ours)
