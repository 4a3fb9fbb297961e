"""The compiled pieces of the joint fit's start (peaksift.stats.joint_kernels:
channel_quadratic, moved_starts) against numpy's linear algebra written here: the profiled
curvature of a quadratic form in one variable is 1 / (H^-1)_ss and the other variables'
minimising slope is -H_ee^-1 H_es (Schur complement, common practice)."""

from __future__ import annotations

import numpy as np

from peaksift.stats.joint_kernels import channel_quadratic, moved_starts


def _hessians(rows, p, seed=3):
    rng = np.random.default_rng(seed)
    a = rng.normal(size=(rows, p, p))
    return np.einsum("rij,rkj->rik", a, a) + p * np.eye(p)   # positive definite


def test_channel_quadratic_matches_numpy_linear_algebra():
    """w = 1/(H^-1)_ss and slope = -H_ee^-1 H_es to 1e-12 relative; rows with a non-finite
    input or k <= 0 are marked unusable with w = 0 and yield 0."""
    rows, p = 6, 3
    h = _hessians(rows, p)
    s = np.linspace(1.0, 6.0, rows)
    eta = np.column_stack([np.full(rows, 100.0), np.full(rows, -1.5)])
    k = np.ones(rows)
    s[1] = np.nan
    h[2, 0, 1] = np.inf
    k[3] = 0.0
    w, sh = np.zeros(rows), np.empty(rows)
    slope, ok = np.zeros((rows, p - 1)), np.empty(rows, np.bool_)
    channel_quadratic(s, eta, h, k, w, slope, ok, sh)
    assert ok.tolist() == [True, False, False, False, True, True]
    for r in np.flatnonzero(ok):
        assert abs(w[r] * np.linalg.inv(h[r])[0, 0] - 1.0) < 1e-12
        ref = -np.linalg.solve(h[r, 1:, 1:], h[r, 1:, 0])
        assert np.allclose(slope[r], ref, rtol=1e-12, atol=0)
        assert sh[r] == s[r]
    assert np.all(w[~ok] == 0.0) and np.all(sh[~ok] == 0.0)


def test_moved_starts_match_the_numpy_expressions():
    """eta + slope * ds, the shape clipped to its bounds (np.clip), the background-only fit
    where the row is unusable or the moved yield is not positive: the same numbers."""
    rng = np.random.default_rng(5)
    rows = 8
    eta = np.column_stack([rng.uniform(50, 150, rows), rng.uniform(-2, 2, rows)])
    slope = rng.normal(size=(rows, 2)) * 10
    ds = rng.normal(size=rows) * 20
    ok = np.ones(rows, np.bool_)
    ok[0] = False
    ds[1], slope[1, 0] = -1e6, 1.0   # the moved yield goes negative
    lower, upper = np.array([-1.0]), np.array([1.0])
    b, th = np.empty(rows), np.empty((rows, 1))
    moved_starts(eta, slope, ds, ok, lower, upper, 99.0, np.array([0.25]), b, th)
    moved = eta + slope * ds[:, None]
    good = ok & np.all(np.isfinite(moved), axis=1) & (moved[:, 0] > 0)
    assert not good[0] and not good[1]
    assert np.array_equal(b, np.where(good, moved[:, 0], 99.0))
    assert np.array_equal(th, np.where(good[:, None], np.clip(moved[:, 1:], lower, upper),
                                       0.25))
