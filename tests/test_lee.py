"""Look-elsewhere effect: upcrossings, Gross-Vitells vs toys, p_global >= p_local."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from peaksift import MassHistogram
from peaksift.errors import FitError
from peaksift.stats import scan
from peaksift.stats.lee import (
    binomial_error,
    global_from_toys,
    global_from_upcrossings,
    upcrossings,
)


def test_upcrossings_count():
    """An upcrossing is q0[i] <= u < q0[i+1] (Gross, Vitells, EPJC 70 (2010) 525, sec. 2);
    counted by hand for this sequence."""
    q = np.array([0.0, 1.0, 0.2, 0.7, 0.9, 0.1, 3.0, 3.0, 0.0])
    assert upcrossings(q, 0.5).tolist() == [3]
    assert upcrossings(q, 2.0).tolist() == [1]
    assert upcrossings(np.vstack([q, np.zeros_like(q)]), 0.5).tolist() == [3, 0]
    # a failed fit (NaN) is not silently a low value
    with pytest.raises(FitError, match="failed fits"):
        upcrossings([np.nan, 1.0, np.nan, 1.0], 0.5)


def test_upcrossings_per_segment_across_a_blinded_gap():
    """Upcrossings are counted within each contiguous segment and summed (Gross, Vitells
    2010 sec. 2 define them along a connected parameter range): the pair joining the two
    sides of a gap is no upcrossing.  Counted by hand: segment [0.0, 1.0, 0.2] has 1,
    segment [0.9, 0.1, 3.0] has 1; joined naively, 0.2 -> 0.9 would add a third."""
    q = np.array([0.0, 1.0, 0.2, 0.9, 0.1, 3.0])
    gaps = np.array([False, False, True, False, False])
    assert upcrossings(q, 0.5).tolist() == [3]
    assert upcrossings(q, 0.5, gaps=gaps).tolist() == [2]
    with pytest.raises(FitError, match="gaps needs 5"):
        upcrossings(q, 0.5, gaps=[True])


def test_blinded_scan_counts_upcrossings_per_segment():
    """ScanResult.global_significance with N0 from the observed scan: equal to the sum of
    upcrossings counted separately on the hypotheses below and above the blinded range
    (Gross, Vitells 2010 sec. 2, per connected range)."""
    rng = np.random.default_rng(10)   # seed chosen so the gap pair is an upcrossing
    x = 100.0 + rng.exponential(100.0, 20_000)
    h = MassHistogram(bins=300, range=(100.0, 400.0)).fill(x)
    r = scan(h, "gaussian", "exponential", 121, relative_resolution=0.01, blind=(240.0, 260.0),
             refit=False)
    res = r.global_significance("upcrossings", toys=0, u0=0.5)
    low = r.q0[~r.blinded & (r.masses < 240.0)]
    high = r.q0[~r.blinded & (r.masses > 260.0)]
    want = upcrossings(low, 0.5)[0] + upcrossings(high, 0.5)[0]
    assert res["N0"] == want
    # joining the sides would count the pair across the gap (low[-1] <= 0.5 < high[0])
    assert low[-1] <= 0.5 < high[0]
    assert upcrossings(np.concatenate([low, high]), 0.5)[0] == want + 1


def test_capped_p_global_has_no_error():
    """When p_local + N0 exp(-(u - u0)/2) exceeds 1 the estimate is capped at 1 (a
    probability, Gross and Vitells 2010 eq. 4 is an upper-bound approximation) and its linear
    error is meaningless: reported as None with p_global_capped."""
    scans = np.tile([0.0, 1.0] * 10, (5, 1))
    scans[0, -1] = 0.0
    res = global_from_upcrossings(0.5, scans, u0=0.5)
    assert res["p_global"] == 1.0 and res["p_global_capped"] is True
    assert res["p_global_error"] is None
    ok = global_from_upcrossings(16.0, scans, u0=0.5)
    assert ok["p_global_capped"] is False and 0 < ok["p_global_error"] < ok["p_global"]


def test_failed_toys_are_counted_not_treated_as_low():
    """Toys with a NaN q0 (failed fit) are left out and counted in n_failed_toys, for both
    estimates (the remaining fractions as defined, common practice)."""
    scans = np.array([[0.0, 1.0, 0.0], [0.0, np.nan, 0.0], [2.0, 0.0, 9.0], [0.0, 0.2, 0.0]])
    up = global_from_upcrossings(4.0, scans, u0=0.5)
    assert up["n_failed_toys"] == 1 and up["n_toys"] == 3
    assert up["N0"] == pytest.approx(2 / 3)
    toy = global_from_toys(4.0, scans.max(axis=1))
    assert toy["n_failed_toys"] == 1 and toy["n_toys"] == 3 and toy["n_toys_above"] == 1
    assert toy["p_global"] == pytest.approx(1 / 3)


def test_binomial_error_matches_scipy():
    """sqrt(p(1-p)/n), the standard deviation of scipy.stats.binom divided by n."""
    assert binomial_error(30, 1000) == pytest.approx(stats.binom(1000, 0.03).std() / 1000)


@settings(max_examples=60, deadline=None, derandomize=True)
@given(q_obs=st.floats(0.0, 60.0),
       scans=st.lists(st.lists(st.floats(0.0, 40.0), min_size=3, max_size=12),
                      min_size=1, max_size=20).filter(lambda v: len({len(r) for r in v}) == 1))
def test_p_global_never_below_p_local(q_obs, scans):
    """The largest q0 over the range is at least its value at the best mass, so p_global >=
    p_local (a property of the definition) for both estimates."""
    arr = np.array(scans)
    for res in (global_from_upcrossings(q_obs, arr), global_from_toys(q_obs, arr.max(axis=1))):
        p_loc = 0.5 * stats.chi2.sf(q_obs, 1)
        assert res["p_global"] >= p_loc * (1 - 1e-12)
        assert res["p_global"] <= 1.0


def test_toys_with_no_exceedance_give_a_bound():
    res = global_from_toys(30.0, np.full(200, 5.0))
    assert res["z_global_is_lower_bound"] and res["n_toys_above"] == 0
    assert res["p_global"] == pytest.approx(1 - 0.05 ** (1 / 200))


@pytest.mark.slow
def test_upcrossings_agree_with_toys_for_moderate_excess():
    """For a moderate excess (Z_local ~ 3.4) on a scan grid finer than the resolution, the Gross-Vitells extrapolation from 300 toys at
    u0 = 0.5 and the direct toy estimate from 3000 toys agree within their combined errors
    (Gross, Vitells 2010 sec. 3 show agreement at this level; we allow 3 combined sigma plus
    10% for the asymptotic approximation)."""
    rng = np.random.default_rng(8)
    x = np.concatenate([100.0 + rng.exponential(100.0, 30_000), rng.normal(260.0, 2.6, 45)])
    h = MassHistogram(bins=300, range=(100.0, 400.0)).fill(x)
    r = scan(h, "gaussian", "exponential", 250, relative_resolution=0.01, refit=False)
    assert 2.5 < r.z_local[r.best_index] < 3.7
    up = r.global_significance("upcrossings", toys=300, seed=1)
    toy = r.global_significance("toys", toys=3000, seed=2)
    assert up["global_method"] == "upcrossings" and toy["global_method"] == "toys"
    assert up["n0_source"] == "300 background-only toys"
    err = np.hypot(up["p_global_error"], toy["p_global_error"])
    assert abs(up["p_global"] - toy["p_global"]) < 3 * err + 0.1 * toy["p_global"]
    for res in (up, toy):
        assert res["p_global"] >= res["p_local"]
        assert res["z_global"] <= res["z_local"]
        assert set(res) >= {"mass", "z_local", "p_local", "z_global", "p_global",
                            "global_method"}
    # from the observed scan alone, stated as such
    obs = r.global_significance("upcrossings", toys=0)
    assert obs["n0_source"] == "observed scan" and obs["p_global"] >= obs["p_local"]
