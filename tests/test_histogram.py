"""MassHistogram: filling against numpy.histogram, merging, rebinning, files, errors.

Reference: ``numpy.histogram`` (with ``weights=w`` for the sum of weights and ``weights=w**2``
for the sum of squared weights), whose edge rule peaksift follows: bins [e_i, e_{i+1}) and a
closed last bin [e_{n-1}, e_n].  The scaled-Poisson factors are checked against their
definition (Bohm and Zech, NIM A 748 (2014) 1, from memory).
"""

from __future__ import annotations

import pickle

import numpy as np
import pytest

from peaksift import MassHistogram
from peaksift.errors import InputError

EDGES_VAR = np.array([60.0, 70.0, 75.0, 80.0, 85.0, 88.0, 91.0, 94.0, 100.0, 110.0, 120.0])


def _data(n=20000, seed=3):
    rng = np.random.default_rng(seed)
    m = np.concatenate([rng.exponential(40.0, n) + 50.0, rng.normal(91.2, 2.5, n // 5)])
    w = rng.uniform(0.2, 3.0, m.size)
    return m, w


@pytest.mark.parametrize("edges", [np.linspace(60, 120, 121), EDGES_VAR])
def test_weighted_fill_matches_numpy_histogram(edges):
    m, w = _data()
    h = MassHistogram(edges).fill(m, w)
    ref_w, _ = np.histogram(m, bins=edges, weights=w)  # numpy.histogram
    ref_w2, _ = np.histogram(m, bins=edges, weights=w * w)
    np.testing.assert_allclose(h.values(), ref_w, rtol=1e-12)
    np.testing.assert_allclose(h.variances(), ref_w2, rtol=1e-12)
    assert h.underflow == pytest.approx(w[m < edges[0]].sum(), rel=1e-12)
    assert h.overflow == pytest.approx(w[m > edges[-1]].sum(), rel=1e-12)
    assert h.underflow_variance == pytest.approx((w[m < edges[0]] ** 2).sum(), rel=1e-12)
    assert h.total(flow=True) == pytest.approx(w.sum(), rel=1e-12)
    assert h.is_weighted
    np.testing.assert_allclose(h.errors, np.sqrt(ref_w2), rtol=1e-12)


def test_unweighted_fill_counts_and_edges_rule():
    m, _ = _data()
    h = MassHistogram(bins=60, range=(60, 120)).fill(m)
    ref, _ = np.histogram(m, bins=np.linspace(60, 120, 61))  # numpy.histogram
    np.testing.assert_array_equal(h.values(), ref)
    np.testing.assert_array_equal(h.variances(), ref)
    assert not h.is_weighted
    # numpy.histogram's rule: a value on an inner edge goes up, the last edge is in the last
    # bin (numpy.histogram([0, 1, 2], bins=[0, 1, 2]) gives [1, 2])
    e = MassHistogram([0.0, 1.0, 2.0]).fill([0.0, 1.0, 2.0, -1e-300, np.nan, np.inf, -np.inf,
                                             np.nextafter(2.0, 3.0)])
    assert e.values().tolist() == np.histogram([0.0, 1.0, 2.0], bins=[0.0, 1.0, 2.0])[0].tolist()
    assert e.values().tolist() == [1.0, 2.0]
    assert (e.underflow, e.overflow, e.n_nan) == (2.0, 2.0, 1)
    # scalar weight broadcasts
    s = MassHistogram([0.0, 1.0, 2.0]).fill([0.5, 1.5, 1.7], 2.0)
    assert s.values().tolist() == [2.0, 4.0] and s.variances().tolist() == [4.0, 8.0]


@pytest.mark.parametrize("edges", [np.linspace(60, 120, 241),  # arithmetic index (>= 128 bins)
                                   np.linspace(60, 120, 13), EDGES_VAR,
                                   np.arange(201) * 0.1])  # edges not exact in binary
def test_values_on_every_edge_follow_numpy_histogram(edges):
    """Values exactly on, just below and just above every edge, weighted: the bins equal
    numpy.histogram's (the outside reference; its last bin is closed), to the last bit for
    the counts and to 1e-12 for the weights; the flows hold what lies strictly outside."""
    rng = np.random.default_rng(8)
    v = np.concatenate([edges, np.nextafter(edges, -np.inf), np.nextafter(edges, np.inf),
                        rng.uniform(edges[0] - 1, edges[-1] + 1, 5000)])
    rng.shuffle(v)
    w = rng.uniform(0.2, 3.0, v.size)
    h = MassHistogram(edges).fill(v, w)
    np.testing.assert_allclose(h.values(), np.histogram(v, bins=edges, weights=w)[0], rtol=1e-12)
    np.testing.assert_allclose(h.variances(), np.histogram(v, bins=edges, weights=w * w)[0],
                               rtol=1e-12)
    counts = MassHistogram(edges).fill(v)
    np.testing.assert_array_equal(counts.values(), np.histogram(v, bins=edges)[0])
    assert counts.underflow == np.count_nonzero(v < edges[0])
    assert counts.overflow == np.count_nonzero(v > edges[-1])
    assert h.overflow == pytest.approx(w[v > edges[-1]].sum(), rel=1e-12)
    assert h.total(flow=True) == pytest.approx(w.sum(), rel=1e-12)
    # from_masses is the same fill in one call
    assert MassHistogram.from_masses(v, w, edges=edges) == h


def test_restrict_keeps_the_bins_inside_the_window():
    m, w = _data()
    h = MassHistogram(np.linspace(60, 120, 61)).fill(m, w)
    r = h.restrict((70.4, 100.0 + 1e-12))  # snaps to 71 and 100: bins completely inside
    assert (r.lo, r.hi, r.nbins) == (71.0, 100.0, 29)
    sub = np.linspace(71, 100, 30)
    # numpy.histogram on the restricted edges (no mass falls exactly on 100 here)
    assert not np.any(m == 100.0)
    np.testing.assert_allclose(r.values(), np.histogram(m, bins=sub, weights=w)[0], rtol=1e-12)
    np.testing.assert_allclose(r.variances(), np.histogram(m, bins=sub, weights=w * w)[0],
                               rtol=1e-12)
    assert r.underflow == pytest.approx(w[m < 71].sum(), rel=1e-12)
    assert r.overflow == pytest.approx(w[m >= 100].sum(), rel=1e-12)
    assert r.total(flow=True) == pytest.approx(h.total(flow=True), rel=1e-12)
    assert h.restrict((50.0, 130.0)) == h  # a window around the whole range keeps it all
    with pytest.raises(InputError, match=r"contains no complete bin.*e\.g\. \(71, 72\)"):
        h.restrict((70.2, 71.8))
    with pytest.raises(InputError, match="lo < hi"):
        h.restrict((80.0, 80.0))


def test_scaled_poisson_factors_follow_their_definition():
    """s_i = sum(w)/sum(w^2) over the entries of bin i (Bohm and Zech, NIM A 748 (2014) 1,
    from memory), written out bin by bin with numpy.histogram's edge rule; an empty bin takes
    the ratio of the totals; unweighted bins give 1, equal weights w give exactly 1/w (the
    effective counts s_i values_i are then the raw counts).  For weights uniform on [0.5, 1.5]
    the factor estimates E[w]/E[w^2] = 1/(1 + 1/12) = 12/13 (within 2% at ~2000 entries per
    bin)."""
    rng = np.random.default_rng(4)
    edges = np.linspace(0.0, 10.0, 11)
    m = np.concatenate([rng.uniform(0.0, 8.0, 400), [10.0, 10.0]])  # bin 8 empty, 9 on edge
    w = rng.uniform(0.2, 3.0, m.size)
    h = MassHistogram(edges).fill(m, w)
    want = []
    for i in range(10):
        last = i == 9
        inside = (m >= edges[i]) & ((m <= edges[i + 1]) if last else (m < edges[i + 1]))
        want.append(w[inside].sum() / (w[inside] ** 2).sum() if inside.any() else np.nan)
    want = np.array(want)
    overall = w.sum() / (w**2).sum()
    want[np.isnan(want)] = overall
    assert h.values()[8] == 0.0 and h.values()[9] > 0.0  # the empty bin and the closed last bin
    np.testing.assert_allclose(h.scaled_poisson_factors(), want, rtol=1e-12)
    unweighted = MassHistogram(edges).fill(m)
    assert unweighted.scaled_poisson_factors().tolist() == [1.0] * 10
    equal = MassHistogram(edges).fill(m, 2.5)
    np.testing.assert_allclose(equal.scaled_poisson_factors(), 0.4, rtol=1e-15)
    np.testing.assert_allclose(equal.scaled_poisson_factors() * equal.values(), unweighted.values(),
                               rtol=1e-12)
    big = MassHistogram(edges).fill(rng.uniform(0, 10, 20_000), rng.uniform(0.5, 1.5, 20_000))
    np.testing.assert_allclose(big.scaled_poisson_factors(), 12.0 / 13.0, rtol=0.02)


def test_merge_equals_single_pass():
    m, w = _data()
    edges = np.linspace(60, 120, 121)
    one = MassHistogram(edges).fill(m)
    parts = [MassHistogram(edges).fill(c) for c in np.array_split(m, 7)]
    merged = sum(parts)
    assert merged == one  # unweighted: exact
    merged2 = parts[0] + parts[1]
    merged2 += sum(parts[2:], MassHistogram(edges))
    assert merged2 == one
    # weighted: the same to rounding
    onew = MassHistogram(edges).fill(m, w)
    pw = [MassHistogram(edges).fill(a, b) for a, b in zip(np.array_split(m, 5), np.array_split(w, 5))]
    mw = sum(pw)
    np.testing.assert_allclose(mw.values(), onew.values(), rtol=1e-12)
    np.testing.assert_allclose(mw.variances(), onew.variances(), rtol=1e-12)
    assert mw.overflow == pytest.approx(onew.overflow, rel=1e-12)
    # the inputs are not modified by +
    assert parts[0] == MassHistogram(edges).fill(np.array_split(m, 7)[0])


def test_rebin_by_factor_and_onto_edges():
    m, w = _data()
    fine = MassHistogram(np.linspace(60, 120, 121)).fill(m)
    coarse = fine.rebin(4)
    ref, _ = np.histogram(m, bins=np.linspace(60, 120, 31))  # numpy.histogram
    np.testing.assert_array_equal(coarse.values(), ref)
    assert coarse.nbins == 30 and coarse.underflow == fine.underflow
    sub = np.array([70.0, 80.0, 85.5, 100.0, 110.0])
    r = fine.rebin(edges=sub)
    ref, _ = np.histogram(m, bins=sub)
    np.testing.assert_array_equal(r.values(), ref)
    # what falls outside the new range moves to the flows: nothing is lost
    assert r.total(flow=True) == fine.total(flow=True)
    assert r.underflow == fine.underflow + ((m >= 60) & (m < 70)).sum()
    fw = MassHistogram(np.linspace(60, 120, 121)).fill(m, w)
    np.testing.assert_allclose(fw.rebin(edges=sub).variances(), np.histogram(m, sub, weights=w * w)[0],
                               rtol=1e-12)
    # edges equal to current ones up to rounding are accepted
    assert fine.rebin(edges=sub + 1e-13) .nbins == 4


@pytest.mark.parametrize("suffix", [".npz", ".json"])
def test_save_load_round_trip_is_exact(tmp_path, suffix):
    m, w = _data()
    h = MassHistogram(EDGES_VAR, unit="GeV", label="m_{ee}").fill(m, w).fill([np.nan])
    path = h.save(tmp_path / "sub" / f"spectrum{suffix}")
    back = MassHistogram.load(path)
    assert back == h
    np.testing.assert_array_equal(back.edges, h.edges)
    assert (back.unit, back.label, back.n_nan) == ("GeV", "m_{ee}", 1)
    assert [p.name for p in path.parent.iterdir()] == [path.name]  # no temporary left behind
    assert pickle.loads(pickle.dumps(h)) == h


def test_bad_input_errors():
    with pytest.raises(InputError, match=r"must increase strictly, but edge 2 \(1\.0\) is not "
                                         r"above edge 1 \(2\.0\)"):
        MassHistogram([0.0, 2.0, 1.0])
    with pytest.raises(InputError, match="must increase strictly.*remove duplicates"):
        MassHistogram([0.0, 1.0, 1.0, 2.0])
    with pytest.raises(InputError, match=r"histogram edge 1 is nan; all edges must be finite"):
        MassHistogram([0.0, np.nan, 2.0])
    with pytest.raises(InputError, match="at least 2 numbers"):
        MassHistogram([1.0])
    with pytest.raises(InputError, match="edges must be numbers"):
        MassHistogram(["a", "b"])
    with pytest.raises(InputError, match="range must be finite with hi > lo"):
        MassHistogram(bins=10, range=(5, 5))
    with pytest.raises(InputError, match="bins must be a positive integer"):
        MassHistogram(bins=2.5, range=(0, 1))
    a = MassHistogram(bins=10, range=(0, 10))
    with pytest.raises(InputError, match=r"cannot add histograms with different binning "
                                         r"\(10 bins on \[0, 10\] vs 5 bins on \[0, 10\]\)"):
        a + MassHistogram(bins=5, range=(0, 10))
    with pytest.raises(InputError, match="can only add a histogram to a MassHistogram"):
        a + np.zeros(10)
    with pytest.raises(InputError, match="3 masses but 2 weights"):
        a.fill([1, 2, 3], [1, 2])
    with pytest.raises(InputError, match="weights must be finite"):
        a.fill([1, 2], [1, np.nan])
    with pytest.raises(InputError, match="must be numbers"):
        a.fill(["x"])
    with pytest.raises(InputError, match="does not divide the 10 bins"):
        a.rebin(3)
    with pytest.raises(InputError, match="rebin edge 2.5 is not one of the current edges"):
        a.rebin(edges=[0, 2.5, 10])


def test_load_errors(tmp_path):
    with pytest.raises(InputError, match="does not exist"):
        MassHistogram.load(tmp_path / "none.npz")
    bad = tmp_path / "bad.npz"
    bad.write_bytes(b"not a zip")
    with pytest.raises(InputError, match="cannot read histogram file"):
        MassHistogram.load(bad)
    j = tmp_path / "other.json"
    j.write_text('{"format": "something else"}')
    with pytest.raises(InputError, match="not a peaksift mass histogram"):
        MassHistogram.load(j)
    j.write_text("[1, 2]")
    with pytest.raises(InputError, match="not a peaksift mass histogram"):
        MassHistogram.load(j)


def test_plot_labels_and_points(tmp_path):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    m, _ = _data(4000)
    h = MassHistogram(bins=60, range=(60, 120)).fill(m)
    fig = h.plot()  # a Figure, as every plot() in peaksift
    ax = fig.axes[0]
    assert ax.get_xlabel() == "$m$ [GeV]"
    assert ax.get_ylabel() == "candidates / 1 GeV"
    line = ax.lines[0]
    np.testing.assert_allclose(line.get_ydata(), h.values())
    ax.figure.savefig(tmp_path / "spectrum.png")
    plt.close(ax.figure)
    hv = MassHistogram(EDGES_VAR).fill(m)
    ax = hv.plot().axes[0]
    np.testing.assert_allclose(ax.lines[0].get_ydata(), hv.values() / hv.widths)
    assert ax.get_ylabel() == "candidates / GeV"
    plt.close(ax.figure)
