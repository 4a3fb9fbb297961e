"""A scan's prepared model kept by its inputs (``stats/scan_prepared.py``): scans of one
window again, after the caller changed the histogram or a result in place, against iminuit
fits of a binned Poisson NLL written out in test_scan.py."""

from __future__ import annotations

import numpy as np
import pytest
from test_scan import WINDOW, _iminuit_q0

from peaksift import MassHistogram
from peaksift.stats import scan

SIGMA = 2.5
MASSES = np.array([180.0, 250.0, 320.0])


def _check(r, counts, edges, what):
    """q0 and the signal yield of each hypothesis equal iminuit's (Cowan et al. 2011 eq.
    12), to test_scan's tolerances: |dq0| < 0.02 + 1e-3 q0, |ds| < 0.01 sigma_s."""
    for j, m in enumerate(MASSES):
        q0, s_hat, s_err = _iminuit_q0(edges, counts, m, SIGMA)
        assert abs(r.q0[j] - q0) < 0.02 + 1e-3 * q0, (what, m, r.q0[j], q0)
        assert abs(r.signal_yield[j] - s_hat) < 0.01 * s_err, (what, m)


def test_a_kept_preparation_follows_the_histogram_and_is_not_shared():
    """Scanned twice (the second from the kept preparation), then after the caller wrote
    into the first result's model and into the histogram's own bins: each scan gives
    iminuit's q0 and yield for the counts the histogram holds then; the results' arrays
    are their own (writing into one scan's model leaves the next scan's as it was)."""
    rng = np.random.default_rng(21)
    x = np.concatenate([WINDOW[0] + rng.exponential(90.0, 20_000),
                        rng.normal(250.0, SIGMA, 120)])
    h = MassHistogram(bins=300, range=WINDOW).fill(x)
    counts, edges = np.histogram(x, bins=300, range=WINDOW)
    first = scan(h, "gaussian", "exponential", MASSES, absolute_resolution=SIGMA, refit=False)
    _check(first, counts, edges, "first")
    theta = first.model.theta.copy()
    first.model.counts[:] = 0.0      # the caller's writes into a result's model
    first.model.theta[:] = 1.0
    again = scan(h, "gaussian", "exponential", MASSES, absolute_resolution=SIGMA,
                 refit=False)
    _check(again, counts, edges, "again")
    np.testing.assert_array_equal(again.model.counts, counts)
    np.testing.assert_array_equal(again.model.theta, theta)
    assert again.model.counts is not first.model.counts
    # a frozen value: the kept scan's arrays read-only like the first's
    for name in ("masses", "sigma", "q0", "z_local", "p_local", "signal_yield", "blinded"):
        assert not getattr(again, name).flags.writeable, name
    # 40 more events in the bins of 248-252 GeV, written into the histogram's own array
    sel = (edges[:-1] >= 248.0) & (edges[1:] <= 252.0)
    h.values()[sel] += 10.0
    h.variances()[sel] += 10.0
    counts = counts + np.where(sel, 10, 0)
    changed = scan(h, "gaussian", "exponential", MASSES, absolute_resolution=SIGMA,
                   refit=False)
    _check(changed, counts, edges, "changed")
    assert changed.q0[1] > again.q0[1] + 1.0


def test_a_kept_scan_with_a_failed_row_gives_its_significances(monkeypatch):
    """A compiled fit whose NLL comes back NaN at one hypothesis (the table's ``plain``
    off: numpy's rules decide q0 there): the second scan of the same inputs, from the kept
    entry, gives every other hypothesis Z = sqrt(q0) (Cowan et al. 2011 eq. 52) and
    p = 1 - Phi(Z) (scipy.stats.norm.sf; rel. 1e-12), with q0 iminuit's (as above), and
    NaN at the failed one -- as the first scan, not a raw exception."""
    from scipy import stats

    from peaksift.stats.toy_model import _compiled

    calls = _compiled()
    real = calls.scan_table

    def one_failed(*args):
        out = list(real(*args))
        s, nll = out[1].copy(), out[4].copy()
        s[1], nll[1] = 1.0 + abs(s[1]), np.nan  # as a fit that failed at the second mass
        out[1], out[4], out[11] = s, nll, False
        return tuple(out)

    monkeypatch.setattr(calls, "scan_table", one_failed)
    rng = np.random.default_rng(5)
    x = np.concatenate([WINDOW[0] + rng.exponential(90.0, 20_000),
                        rng.normal(180.0, SIGMA, 150)])
    h = MassHistogram(bins=200, range=WINDOW).fill(x)
    counts, edges = np.histogram(x, bins=200, range=WINDOW)
    for what in ("first", "kept"):
        r = scan(h, "gaussian", "exponential", MASSES, absolute_resolution=SIGMA,
                 refit=False)
        for j in (0, 2):
            q0, _, _ = _iminuit_q0(edges, counts, MASSES[j], SIGMA)
            assert abs(r.q0[j] - q0) < 0.02 + 1e-3 * q0, (what, j)
            z = np.sqrt(r.q0[j])
            assert r.z_local[j] == pytest.approx(z, rel=1e-12), what
            assert r.p_local[j] == pytest.approx(stats.norm.sf(z), rel=1e-12), what
        assert r.best_index == 0, what  # the injected peak at 180


def test_a_scan_asked_again_follows_every_change_in_place():
    """The same objects scanned again (the histogram, the hypotheses' array and the
    resolution: the repeated scan found by their identity, ``stats/scan_kept.py``), then
    after the caller changed, in place, the histogram's bins, then the hypotheses' array,
    after nine other preparations dropped this one from the store, and with the numpy
    reference set (``PEAKSIFT_NUMPY_COST=1``): each scan gives iminuit's q0
    and yield (test_scan's binned NLL, Cowan et al. 2011 eq. 12; tolerances as
    ``_check``) for what the inputs hold then, never the last answer; a repeated scan's
    model (made when first read) holds the counts of its own scan."""
    import os

    from peaksift import Resolution

    rng = np.random.default_rng(33)
    x = np.concatenate([WINDOW[0] + rng.exponential(90.0, 20_000),
                        rng.normal(320.0, SIGMA, 150)])
    h = MassHistogram(bins=250, range=WINDOW).fill(x)
    counts, edges = np.histogram(x, bins=250, range=WINDOW)
    masses = MASSES.copy()
    res = Resolution.absolute(SIGMA)

    def again(what, n=3):
        for i in range(n):   # the first prepares, the second is kept, the third repeated
            r = scan(h, "gaussian", "exponential", masses, resolution=res, refit=False)
            for j, m in enumerate(masses):
                q0, s_hat, s_err = _iminuit_q0(edges, counts, m, SIGMA)
                assert abs(r.q0[j] - q0) < 0.02 + 1e-3 * q0, (what, i, m, r.q0[j], q0)
                assert abs(r.signal_yield[j] - s_hat) < 0.01 * s_err, (what, i, m)
        return r

    r = again("first")
    np.testing.assert_array_equal(r.model.counts, counts)
    before = r.q0[1]
    # 15 more events in each bin of 248-252 GeV, written into the histogram's own arrays
    sel = (edges[:-1] >= 248.0) & (edges[1:] <= 252.0)
    h.values()[sel] += 15.0
    h.variances()[sel] += 15.0
    counts = counts + np.where(sel, 15, 0)
    r = again("bins changed", 1)
    assert r.q0[1] > before + 1.0
    np.testing.assert_array_equal(r.model.counts, counts)
    r = again("bins changed, repeated")
    masses[:] = [180.0, 320.0, 250.0]   # the hypotheses' array the scans were given
    r = again("masses changed", 1)
    np.testing.assert_array_equal(r.masses, masses)
    assert r.best_index == 1   # the injected peak at 320
    again("masses changed, repeated")
    for bins in range(100, 109):   # nine other preparations: this one is dropped
        scan(MassHistogram(bins=bins, range=WINDOW).fill(x), "gaussian", "exponential",
             masses, resolution=res, refit=False)
    again("its preparation dropped")
    os.environ["PEAKSIFT_NUMPY_COST"] = "1"
    try:
        again("numpy reference", 1)
    finally:
        del os.environ["PEAKSIFT_NUMPY_COST"]
