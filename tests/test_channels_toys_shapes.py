"""The combination's toys profile the channels' shape factors (mass scale, resolution) as
the observed combined scan does: a toy's q0 at its highest point against the product
likelihood of two binned channels written here (Gaussian signal bin integrals from
scipy.stats.norm.cdf, exponential backgrounds, the factor's Gaussian constraint
((k - c)/delta)^2/2: Cowan, Cranmer, Gross, Vitells, EPJC 71 (2011) 1554, sec. 2, with the
auxiliary measurement c = 1, or drawn per toy in the unconditional ensemble) minimised by
iminuit (MIGRAD, strategy 2); with every size 0 the toys are exactly the plain ones."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from peaksift import Resolution
from peaksift.histogram import MassHistogram
from peaksift.stats.channel_toys import combined_toy_scans
from peaksift.stats.channels import Channel, combine
from peaksift.stats.toys import toy_counts

SIGMA = 2.0
WINDOW = (110.0, 190.0)
EDGES = np.linspace(*WINDOW, 41)
DELTA = 0.01      # the mumu channel's mass-scale uncertainty
MASSES = np.linspace(130.0, 170.0, 9)
SEED = 5


def _hist(seed, scale, n_bkg):
    rng = np.random.default_rng(seed)
    x = 110.0 + rng.exponential(scale, n_bkg)
    return MassHistogram.from_masses(x[x < 190.0], bins=EDGES.size - 1, range=WINDOW)


def _channels(size, ensemble="fixed"):
    h1, h2 = _hist(31, 50.0, 3000), _hist(32, 35.0, 2000)
    return [Channel("mumu", h1, "exponential", 8.0, signal="gaussian",
                    resolution=Resolution.absolute(SIGMA), efficiency=0.5,
                    shape_nuisances={"mass_scale": size}, toy_constraints=ensemble),
            Channel("ee", h2, "exponential", 4.0, signal="gaussian",
                    resolution=Resolution.absolute(SIGMA), efficiency=0.5)]


def _reference_q0(counts, mass, center):
    """2 [NLL(mu = 0, k = c) - NLL(mu, k free)] of the product likelihood (module doc)."""
    from iminuit import Minuit

    lo, hi = WINDOW

    def fsig(m):
        fs = np.diff(stats.norm.cdf(EDGES, m, SIGMA))
        return fs / (stats.norm.cdf(hi, m, SIGMA) - stats.norm.cdf(lo, m, SIGMA))

    def g(slope):
        e = np.exp(slope * (EDGES - lo))
        return np.diff(e) / (e[-1] - e[0])

    def nll(mu, k, b1, s1, b2, s2):
        out = 0.5 * ((k - center) / DELTA) ** 2
        for n, conv, f, bb, sl in ((counts[0], 4.0, fsig(mass * k), b1, s1),
                                   (counts[1], 2.0, fsig(mass), b2, s2)):
            m = np.maximum(mu * conv * f + bb * g(sl), 1e-300)
            out += float(np.sum(m - n * np.log(m)))
        return out

    start = {"mu": 5.0, "k": center, "b1": counts[0].sum(), "s1": -0.02,
             "b2": counts[1].sum(), "s2": -0.03}
    fits = []
    for free_mu in (True, False):
        m = Minuit(nll, **(start if free_mu else {**start, "mu": 0.0}))
        m.errordef, m.strategy = 0.5, 2
        m.limits["k"] = (1.0 - 10 * DELTA, 1.0 + 10 * DELTA)
        if not free_mu:
            m.fixed["mu"] = m.fixed["k"] = True
        m.migrad()
        assert m.valid
        fits.append(m)
    mu_hat = fits[0].values["mu"]
    return 2.0 * (fits[1].fval - fits[0].fval) if mu_hat > 0 else 0.0


@pytest.mark.parametrize("ensemble", ["fixed", "sampled"])
def test_toy_q0_at_its_highest_point_profiles_the_mass_scale(ensemble):
    c = combine(_channels(DELTA, ensemble), MASSES, refit=False)
    models = list(c.prepared)
    conv = [np.asarray(k) for k in c.conversion.values()]
    n_toys = 4
    plain = combined_toy_scans(models, conv, n_toys, seed=SEED)
    scans = combined_toy_scans(models, conv, n_toys, seed=SEED, shapes=c.shapes,
                               ensembles=c.toy_constraints)
    checked = 0
    for i in range(n_toys):
        j = int(np.nanargmax(scans[i]))
        if scans[i, j] <= 0.5:
            continue
        # the toy's counts: channel c's stream SeedSequence(seed, spawn_key=(c, i))
        counts = [toy_counts(m.expected_background, np.random.SeedSequence(SEED,
                                                                            spawn_key=(ch,)),
                             i, 1)[0] for ch, m in enumerate(models)]
        center = 1.0
        if ensemble == "sampled":  # the toy's draw of the auxiliary measurement
            rng = np.random.default_rng(np.random.SeedSequence(SEED, spawn_key=(0, i, 1)))
            center = 1.0 + DELTA * rng.standard_normal(1)[0]
        # tolerance: the toys' fits stop at steps below 0.03 errors (q0 within ~1e-3)
        assert scans[i, j] == pytest.approx(_reference_q0(counts, MASSES[j], center),
                                            abs=5e-3)
        checked += 1
    assert checked >= 2
    if ensemble == "fixed":  # a free factor can only raise a toy's q0 (to rounding)
        assert np.all(np.nan_to_num(scans) >= np.nan_to_num(plain) - 1e-6)
        assert np.any(scans > plain + 1e-3)


def test_zero_sizes_give_exactly_the_plain_toys():
    """With every size 0 the combination has no shape factors and its toys (and their
    global significance) are bit for bit those of the channels without the keys."""
    zero = combine(_channels(0.0), MASSES, refit=False)
    plain_ch = [Channel(**{**ch.__dict__, "shape_nuisances": None})
                for ch in _channels(0.0)]
    plain = combine(plain_ch, MASSES, refit=False)
    assert all(sp is None for sp in zero.shapes)
    assert np.array_equal(zero.q0, plain.q0)
    a = zero.global_significance("toys", toys=30, seed=SEED)
    b = plain.global_significance("toys", toys=30, seed=SEED)
    assert a == b


def test_toys_on_worker_processes_equal_the_serial_ones():
    """Combined toys on the execution engine's worker processes: every toy has its own seed
    stream, so the scans are those of the serial run, bit for bit; the combined limits hand
    their toy masses (each seeded by its mass) to the same executor."""
    import functools

    from peaksift.execution import map_tasks
    from peaksift.stats import channel_limits

    chans = _channels(DELTA)
    c = combine(chans, MASSES, refit=False)
    pool = functools.partial(map_tasks, engine="processes", workers=2)
    models = list(c.prepared)
    conv = [np.asarray(k) for k in c.conversion.values()]
    serial = combined_toy_scans(models, conv, 30, seed=SEED, shapes=c.shapes)
    parallel = combined_toy_scans(models, conv, 30, seed=SEED, shapes=c.shapes,
                                  executor=pool)
    assert np.array_equal(serial, parallel, equal_nan=True)
    seen = []

    def recording(func, tasks):
        seen.append((func, [t[5] for t in tasks if isinstance(t, tuple)]))
        return [func(t) for t in tasks]

    kw = {"method": "toys", "toys": 8, "seed": SEED, "toy_masses": [140.0, 160.0]}
    channel_limits.combined_limits(_channels(0.0), np.array([140.0, 160.0]), executor=recording,
                                   **kw)
    joint = [seeds for func, seeds in seen if func is channel_limits.run_joint_toy_limit]
    assert joint == [[SEED, SEED + 1]]   # one task per toy mass, seeded by its index
