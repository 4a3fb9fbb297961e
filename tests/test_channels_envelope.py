"""A channel's background function profiled as a discrete choice in the combined scan
(peaksift.stats.channel_envelope): the combined q0 against discrete profiling written here
(Dauncey, Kenzie, Wardle, Davies, JINST 10 (2015) P04015, eq. for the envelope
-2 ln L_env = min_f [-2 ln L_f + a N_f], penalty a = 1 per free parameter), each
assignment's product likelihood of two binned channels (Gaussian signal bin integrals from
scipy.stats.norm.cdf; an exponential and a degree-2 Bernstein polynomial, integrated in
closed form) minimised by iminuit (MIGRAD, strategy 2)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from peaksift import Resolution
from peaksift.histogram import MassHistogram
from peaksift.stats.background_choice import candidate_shapes
from peaksift.stats.channels import Channel, combine

SIGMA = 2.0
WINDOW = (110.0, 190.0)
EDGES = np.linspace(*WINDOW, 41)
MASSES = np.array([135.0, 150.0, 165.0])
CONV = (4.0, 2.0)   # L eff of each channel


def _data():
    rng = np.random.default_rng(77)
    # channel A: a falling spectrum with curvature (a mixture), a small peak at 150 GeV
    a = np.concatenate([110.0 + rng.exponential(30.0, 1500), rng.uniform(110.0, 190.0, 700),
                        rng.normal(150.0, SIGMA, 45)])
    b = 110.0 + rng.exponential(45.0, 2000)
    return [MassHistogram.from_masses(x[(x >= 110.0) & (x < 190.0)], bins=EDGES.size - 1,
                                      range=WINDOW) for x in (a, b)]


def _fsig(m):
    lo, hi = WINDOW
    fs = np.diff(stats.norm.cdf(EDGES, m, SIGMA))
    return fs / (stats.norm.cdf(hi, m, SIGMA) - stats.norm.cdf(lo, m, SIGMA))


def _exponential(p):
    e = np.exp(p[0] * (EDGES - WINDOW[0]))
    return np.diff(e) / (e[-1] - e[0])


def _bernstein2(p):
    """Degree-2 Bernstein polynomial with coefficients (1, c1^2, c2^2) on the window, its
    bin integrals from the basis' antiderivatives."""
    u = (EDGES - WINDOW[0]) / (WINDOW[1] - WINDOW[0])
    prim = -(1 - u) ** 3 / 3 + p[0] ** 2 * (u**2 - 2 * u**3 / 3) + p[1] ** 2 * u**3 / 3
    return np.diff(prim) / (prim[-1] - prim[0])


def _reference(ns, mass):
    """(q0 of the envelope, the chosen function of channel A) at ``mass`` for the counts
    ``ns`` of the two channels."""
    from iminuit import Minuit

    fs = _fsig(mass)
    two_nll = {}
    for label, shape, start in (("exppoly1", _exponential, [-0.02]),
                                ("bernstein2", _bernstein2, [0.7, 0.7])):
        npar = len(start)

        def nll(*x, shape=shape, npar=npar):
            mu, b1, b2, s2 = x[0], x[1], x[2], x[3]
            pa = x[4:4 + npar]
            out = 0.0
            for n, k, bb, g in ((ns[0], CONV[0], b1, shape(pa)),
                                (ns[1], CONV[1], b2, _exponential([s2]))):
                m = np.maximum(mu * k * fs + bb * g, 1e-300)
                out += float(np.sum(m - n * np.log(m)))
            return out

        names = ["mu", "b1", "b2", "s2"] + [f"p{j}" for j in range(npar)]
        x0 = [0.0, ns[0].sum(), ns[1].sum(), -0.02] + start
        fits = []
        for free_mu in (False, True):
            m = Minuit(nll, *x0, name=names)
            m.errordef, m.strategy = 0.5, 2
            m.fixed["mu"] = not free_mu
            m.migrad()
            m.migrad()
            assert m.valid
            fits.append(m)
        nll0 = fits[0].fval
        nll1 = fits[1].fval if fits[1].values["mu"] > 0 else nll0
        n_a = npar + 1                  # channel A's free parameters: shape and yield
        two_nll[label] = (2 * nll0 + n_a, 2 * nll1 + n_a)
    env0 = min(v[0] for v in two_nll.values())
    chosen = min(two_nll, key=lambda lab: two_nll[lab][1])
    return env0 - two_nll[chosen][1], chosen


def test_combined_scan_profiles_a_channels_background_function():
    hists = _data()
    cands = candidate_shapes(["exppoly1", "bernstein2"])
    chans = [Channel("a", hists[0], "exponential", CONV[0] / 0.5, signal="gaussian",
                     resolution=Resolution.absolute(SIGMA), efficiency=0.5,
                     background_candidates=cands),
             Channel("b", hists[1], "exponential", CONV[1] / 0.5, signal="gaussian",
                     resolution=Resolution.absolute(SIGMA), efficiency=0.5)]
    c = combine(chans, MASSES, refit=False)
    labels = ["exppoly1", "bernstein2"]
    assert c.envelope["a"]["labels"] == labels and c.envelope["a"]["n_parameters"] == [2, 3]
    assert "b" not in c.envelope  # no candidates: no choice
    plain = combine([Channel(**{**chans[0].__dict__, "background_candidates": None}),
                     chans[1]], MASSES, refit=False)
    for j, m in enumerate(MASSES):
        q_ref, chosen = _reference([np.asarray(h.weight_sum) for h in hists], m)
        # tolerance: the joint fits stop at steps below 0.03 errors (q0 within ~1e-4)
        assert c.q0[j] == pytest.approx(q_ref, abs=2e-3), m
        assert labels[c.envelope["a"]["chosen"][j]] == chosen
    # the choice matters here: a background with curvature is not an exponential
    assert np.any(np.abs(c.q0 - plain.q0) > 0.05)
    assert c.to_dict()["envelope"] == c.envelope
    # one layout with a single search's envelope: the same keys for the same facts
    from peaksift.stats.envelope import envelope_scan

    single = envelope_scan(hists[0], cands, "gaussian", MASSES,
                           absolute_resolution=SIGMA).to_dict()
    assert {k: single[k] for k in c.envelope["a"]} == {
        **c.envelope["a"], "chosen": single["chosen"], "null_choice": single["null_choice"]}
    # a file of the earlier layout (functions; choices by label; a channel without
    # candidates listed with none) reads back the same
    from peaksift.stats.channels import Combination

    d = c.to_dict()
    e = d["envelope"]["a"]
    old = {"a": {"functions": labels, "penalty": e["penalty"], "n_parameters": [2, 3],
                 "null_choice": labels[e["null_choice"]],
                 "chosen": [None if i is None else labels[i] for i in e["chosen"]]},
           "b": {"functions": [], "penalty": 1.0, "n_parameters": [0], "null_choice": None,
                 "chosen": [None] * len(MASSES)}}
    assert Combination.from_dict({**d, "envelope": old}).envelope == c.envelope


def test_combined_toys_profile_the_background_function_too():
    """The global significance's toys: channel a generated from the background-only fit of
    the function its envelope takes at mu = 0 (toy i of channel c from SeedSequence(seed,
    spawn_key=(c, i))), each toy's q0 at its highest point against the same discrete
    profiling written here (iminuit fits of both assignments); the global significance
    runs on them."""
    from peaksift.stats.channel_envelope import envelope_toy_scans
    from peaksift.stats.toys import toy_counts

    hists = _data()
    cands = candidate_shapes(["exppoly1", "bernstein2"])
    chans = [Channel("a", hists[0], "exponential", CONV[0] / 0.5, signal="gaussian",
                     resolution=Resolution.absolute(SIGMA), efficiency=0.5,
                     background_candidates=cands),
             Channel("b", hists[1], "exponential", CONV[1] / 0.5, signal="gaussian",
                     resolution=Resolution.absolute(SIGMA), efficiency=0.5)]
    c = combine(chans, MASSES, refit=False)
    conv = [np.asarray(k) for k in c.conversion.values()]
    scans = envelope_toy_scans(c.envelope_models, conv, 3, seed=9)
    cand_models, _, _, null = c.envelope_models
    checked = 0
    for i in range(3):
        j = int(np.nanargmax(scans[i]))
        if scans[i, j] <= 0.2:
            continue
        ns = [toy_counts(cand_models[ch][null[ch]].expected_background,
                         np.random.SeedSequence(9, spawn_key=(ch,)), i, 1)[0]
              for ch in range(2)]
        q_ref, _ = _reference(ns, MASSES[j])
        assert scans[i, j] == pytest.approx(q_ref, abs=2e-3)
        checked += 1
    assert checked >= 1
    g = c.global_significance("toys", toys=20, seed=9)
    assert g["n_toys"] == 20 and 0.0 <= g["p_global"] <= 1.0


def test_pvalue_figure_draws_a_channels_envelope_scan_when_given():
    """The combined p-value figure draws a channel's own background-envelope scan in place
    of its single-function scan: the line's p-values are the envelope scan's local
    significances as one-sided normal tail probabilities (scipy.stats.norm.sf), the other
    channel keeps its scan."""
    from peaksift.stats.envelope import envelope_scan

    hists = _data()
    cands = candidate_shapes(["exppoly1", "bernstein2"])
    chans = [Channel("a", hists[0], "exponential", CONV[0] / 0.5, signal="gaussian",
                     resolution=Resolution.absolute(SIGMA), efficiency=0.5,
                     background_candidates=cands),
             Channel("b", hists[1], "exponential", CONV[1] / 0.5, signal="gaussian",
                     resolution=Resolution.absolute(SIGMA), efficiency=0.5)]
    c = combine(chans, MASSES, refit=False)
    env = envelope_scan(hists[0], cands, "gaussian", MASSES, absolute_resolution=SIGMA)
    fig = c.plot(channel_scans={"a": (env.masses, stats.norm.sf(env.z_local))})
    lines = {ln.get_label(): ln for ln in fig.axes[0].get_lines()}
    assert set(lines) >= {"a (background envelope)", "b", "combined"}
    assert np.allclose(lines["a (background envelope)"].get_ydata(),
                       np.maximum(stats.norm.sf(env.z_local), 1e-300), rtol=1e-12)
    assert np.allclose(lines["b"].get_ydata(), c.channels["b"].p_local, rtol=1e-12)
