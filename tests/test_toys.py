"""The batched toy engine against per-toy iminuit fits; reproducibility; picklable batches."""

from __future__ import annotations

import pickle

import numpy as np
import pytest
from iminuit import Minuit

from peaksift import MassHistogram
from peaksift.errors import FitError
from peaksift.stats.scan_inputs import _prepare_model
from peaksift.stats.toys import (
    ToyBatch,
    fit_background,
    run_toy_batch,
    run_toys,
    scan_toys_linear,
    toy_counts,
)

WINDOW = (100.0, 500.0)


def _model(n_masses: int = 40, blind=None, background: str = "exponential",
           n_events: int = 30_000, bins: int = 400):
    rng = np.random.default_rng(21)
    x = WINDOW[0] + rng.exponential(120.0, n_events)
    h = MassHistogram(bins=bins, range=WINDOW).fill(x)
    masses = np.linspace(115.0, 485.0, n_masses)
    model, _, _ = _prepare_model(h, "gaussian", background, masses, relative_resolution=0.01,
                                 window=None, natural_width=None, blind=blind,
                                 signal_params=None, bins=None)
    return model


def _iminuit_q0(model, n: np.ndarray) -> np.ndarray:
    """Per-toy, per-mass iminuit fits of the same binned likelihood (the reference)."""
    bkg = model.background
    used = model.used

    def frac(th):
        return bkg.bin_fractions(model.edges, list(th), model.window)[used]

    k = model.theta.size

    def nll_b(*p):
        nu = np.maximum(p[0] * frac(p[1:]), 1e-300)
        return float(np.sum(nu - n * np.log(nu)))

    names = ["b"] + [f"t{i}" for i in range(k)]
    m0 = Minuit(nll_b, float(n.sum()), *model.theta, name=names)
    m0.errordef = Minuit.LIKELIHOOD
    m0.migrad()
    out = np.zeros(model.masses.size)
    for j, f in enumerate(model.fractions):
        def nll(*p, f=f):
            nu = np.maximum(p[0] * f + p[1] * frac(p[2:]), 1e-300)
            return float(np.sum(nu - n * np.log(nu)))

        m = Minuit(nll, 1.0, *m0.values, name=["s"] + names)
        m.errordef = Minuit.LIKELIHOOD
        m.limits["s"] = (0.0, None)
        m.migrad()
        out[j] = max(2 * (m0.fval - m.fval), 0.0) if m.values["s"] > 0 else 0.0
    return out


@pytest.mark.parametrize(("background", "n_events", "bins", "any_mass"), [
    ("exponential", 30_000, 400, 0.05),
    ("bernstein", 30_000, 400, 0.05),
    ("exponential", 1_500, 100, 0.1),   # a few events per bin at the high end
    ("bernstein", 1_500, 100, 0.1),
])
def test_batched_engine_matches_iminuit(background, n_events, bins, any_mass):
    """Requirement of the toy engine: on a sample of background-only toys the largest q0 of
    each scan agrees with per-toy iminuit fits within 0.05 in Z (Z = sqrt(q0), Cowan et al.
    2011 eq. 53).  Away from the maximum the linearised values agree within ``any_mass``."""
    model = _model(background=background, n_events=n_events, bins=bins)
    n = toy_counts(model.expected_background, 4, 0, 5)
    fast = scan_toys_linear(model, n)
    for i in range(n.shape[0]):
        ref = _iminuit_q0(model, n[i])
        assert abs(np.sqrt(fast[i].max()) - np.sqrt(ref.max())) < 0.05
        assert np.max(np.abs(np.sqrt(fast[i]) - np.sqrt(ref))) < any_mass


@pytest.mark.parametrize("background", ["exponential", "bernstein"])
def test_background_fit_of_stacked_toys_matches_iminuit(background):
    """Each toy's stacked background-only fit (step 1 of the engine, exact) against a per-toy
    iminuit MIGRAD fit of the same binned Poisson likelihood (the reference): parameters to
    1e-4 relative (or 1e-4 of the parameter error near zero) and NLL to 1e-6, on 5 toys."""
    model = _model(background=background)
    n = toy_counts(model.expected_background, 8, 0, 5)
    theta, b, nll = fit_background(model, n)
    k = model.theta.size
    names = ["bb"] + [f"t{j}" for j in range(k)]
    for i in range(n.shape[0]):
        c = n[i]

        def cost(*p, c=c):
            g = model.background.bin_fractions(model.edges, list(p[1:]), model.window)
            nu = np.maximum(p[0] * np.asarray(g)[model.used], 1e-300)
            return float(np.sum(nu - c * np.log(nu)))

        m = Minuit(cost, float(c.sum()), *model.theta, name=names)
        m.errordef = Minuit.LIKELIHOOD
        m.tol = 1e-6
        for j, par in enumerate(names[1:]):
            m.limits[par] = (model.lower[j], model.upper[j])
        m.migrad()
        m.migrad()
        assert m.valid
        assert nll[i] == pytest.approx(m.fval, abs=1e-6)
        ours = np.r_[b[i], theta[i]]
        for j, par in enumerate(names):
            assert ours[j] == pytest.approx(m.values[par],
                                            rel=1e-4, abs=1e-4 * m.errors[par]), par


def test_toys_reproducible_whatever_the_split():
    """A toy's pseudo-data depend only on (seed, toy index): batch size and process pool
    do not change them (bit for bit), nor the scans (to rounding: matrix products over
    different numbers of toys may sum in a different order)."""
    model = _model(n_masses=20)
    n1 = toy_counts(model.expected_background, 11, 0, 60)
    n2 = np.vstack([toy_counts(model.expected_background, 11, i, 6) for i in range(0, 60, 6)])
    assert np.array_equal(n1, n2)
    a = run_toys(model, 60, seed=11, batch=60, progress=False)
    b = run_toys(model, 60, seed=11, batch=7, progress=False)
    c = run_toys(model, 60, seed=11, batch=25, workers=2, progress=False)
    assert np.allclose(a, b, rtol=1e-9, atol=1e-9) and np.allclose(a, c, rtol=1e-9, atol=1e-9)
    d = run_toys(model, 60, seed=12, batch=60, progress=False)
    assert not np.array_equal(a, d)


def test_toys_on_the_execution_engines_match_serial():
    """Toy batches handed to ``execution.map_tasks`` (the search's engines) give the same
    scans as the serial loop with the same batching, and the executor sees every batch
    in order (reference: the serial computation; per-toy seeding, common practice)."""
    import functools

    from peaksift.execution import map_tasks

    model = _model(n_masses=12)
    serial = run_toys(model, 30, seed=5, batch=8, progress=False)
    seen = []

    def recording(func, specs):
        seen.extend((s.first, s.count) for s in specs)
        return map_tasks(func, specs, engine="serial")

    rec = run_toys(model, 30, seed=5, batch=8, progress=False, executor=recording)
    assert seen == [(0, 8), (8, 8), (16, 8), (24, 6)]
    assert np.array_equal(rec, serial)
    pool = run_toys(model, 30, seed=5, batch=8, progress=False,
                    executor=functools.partial(map_tasks, engine="processes", workers=2))
    assert pool.shape == (30, model.masses.size)
    # worker processes run single-threaded BLAS: products may round differently
    assert np.allclose(pool, serial, rtol=1e-9, atol=1e-9)
    with pytest.raises(FitError, match="returned 1 results for 4 toy batches"):
        run_toys(model, 30, seed=5, batch=8, progress=False,
                 executor=lambda func, specs: [func(specs[0])])


def test_toy_batch_is_picklable_pure_function():
    model = _model(n_masses=10, blind=(280.0, 320.0))
    spec = ToyBatch(model, seed=3, first=5, count=4)
    again = pickle.loads(pickle.dumps(spec))
    assert np.array_equal(run_toy_batch(spec), run_toy_batch(again))
    assert run_toy_batch(spec).shape == (4, model.masses.size)


def test_toy_counts_are_poisson():
    """Toy bins are Poisson with the expected mean (scipy.stats.poisson): in a 100-count and
    a 5-count bin the sample mean and variance of 4000 toys match poisson.mean/var within 4
    standard errors of the sampling, SE(mean) = sqrt(var/n) and SE(variance) =
    sqrt((mu4 - var^2)/n) with the Poisson fourth central moment mu4 = lam (1 + 3 lam)
    (common practice; scipy.stats.poisson.stats gives the kurtosis 1/lam)."""
    from scipy import stats

    expected = np.array([100.0, 5.0])
    ntoy = 4000
    n = toy_counts(expected, 1, 0, ntoy)
    assert np.all(n == np.round(n)) and np.all(n >= 0)
    for j, lam in enumerate(expected):
        mean, var, _, kurt = stats.poisson.stats(lam, moments="mvsk")
        mu4 = (float(kurt) + 3.0) * float(var) ** 2
        assert mu4 == pytest.approx(lam * (1 + 3 * lam), rel=1e-12)
        se_mean = np.sqrt(var / ntoy)
        se_var = np.sqrt((mu4 - var**2) / ntoy)
        assert abs(n[:, j].mean() - mean) < 4 * se_mean, j
        assert abs(n[:, j].var(ddof=1) - var) < 4 * se_var, j


def test_run_toys_rejects_no_toys():
    with pytest.raises(FitError, match="positive number"):
        run_toys(_model(n_masses=5), 0)


def test_sparse_toys_emit_no_floating_point_warnings():
    """Sparse spectrum (about 100 events over 400 bins, steep exponential): the fits try
    steps where background fractions underflow; no RuntimeWarning may reach the user, every
    toy q0 is finite (a failed toy would be NaN, counted as ``n_failed_toys``), and q0 >= 0
    (one-sided, Cowan et al. 2011 eq. 12)."""
    import warnings

    rng = np.random.default_rng(1)
    x = WINDOW[0] + rng.exponential(10.0, 100)
    h = MassHistogram(bins=400, range=WINDOW).fill(x[x < WINDOW[1]])
    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)
        model, _, _ = _prepare_model(h, "gaussian", "exponential", np.linspace(110, 490, 100),
                                     relative_resolution=0.01, window=None, natural_width=None,
                                     blind=None, signal_params=None, bins=None)
        q = run_toys(model, 300, seed=2, progress=False)
    assert np.all(np.isfinite(q)) and np.all(q >= 0)


def test_toys_of_a_nearly_empty_spectrum_never_fail():
    """Four events in the window (a small data set): many background-only toys hold no event
    at all.  Such a toy has no excess anywhere, so q0 = 0 at every mass (one-sided q0,
    Cowan et al. 2011 eq. 12); no toy may fail (NaN) or stop the batch (this used to raise a
    raw LinAlgError from the singular background information of an empty toy)."""
    x = np.array([130.0, 180.0, 260.0, 420.0])
    h = MassHistogram(bins=90, range=WINDOW).fill(x)
    model, _, _ = _prepare_model(h, "gaussian", "exponential", np.linspace(110, 490, 30),
                                 relative_resolution=0.01, window=None, natural_width=None,
                                 blind=None, signal_params=None, bins=None)
    counts = toy_counts(model.expected_background, 3, 0, 500)
    q = run_toys(model, 500, seed=3, progress=False)
    assert np.all(np.isfinite(q)) and np.all(q >= 0)
    empty = counts.sum(axis=1) == 0
    assert empty.sum() >= 3  # Poisson(4 events): P(0) = exp(-4) = 1.8 %, ~9 of 500 toys
    assert np.all(q[empty] == 0.0)
