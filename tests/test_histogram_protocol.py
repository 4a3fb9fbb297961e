"""MassHistogram and the cross-library histogram protocol, checked against outside code:
the protocol's own runtime definition (uhi.typing.plottable), a general-purpose C++-backed
histogram library (boost-histogram) and numpy.histogram."""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest

import peaksift
from peaksift.errors import FitError, InputError
from peaksift.histogram import MassHistogram

bh = pytest.importorskip("boost_histogram")

RNG = np.random.default_rng(20261202)
MASSES = np.concatenate([RNG.exponential(30.0, 6000) + 55.0, RNG.normal(91.0, 2.5, 800)])
WEIGHTS = RNG.uniform(0.5, 1.5, MASSES.size)
EDGES = (90, 60.0, 150.0)


def _ours(weighted: bool = False) -> MassHistogram:
    return MassHistogram.from_masses(MASSES, WEIGHTS if weighted else None, bins=EDGES[0],
                                     range=EDGES[1:])


def _theirs(weighted: bool = False):
    h = bh.Histogram(bh.axis.Regular(*EDGES),
                     storage=bh.storage.Weight() if weighted else bh.storage.Int64())
    h.fill(MASSES, weight=WEIGHTS if weighted else None)
    return h


def test_speaks_the_protocol_as_its_reference_defines_it():
    uhi = pytest.importorskip("uhi.typing.plottable")
    h = _ours(weighted=True)
    assert isinstance(h, uhi.PlottableHistogram)
    assert isinstance(h.axes[0].traits, uhi.PlottableTraits)
    assert h.kind == "COUNT" and len(h.axes) == 1 and len(h.axes[0]) == 90
    assert h.axes[0][0] == (60.0, 61.0) and h.axes[0][-1] == (149.0, 150.0)
    assert not h.axes[0].traits.circular and not h.axes[0].traits.discrete


@pytest.mark.parametrize("weighted", [False, True])
def test_values_variances_flows_and_edges_match_the_other_library(weighted):
    # No mass lies exactly on an edge, so the two edge rules (their last bin half-open,
    # ours closed) agree; tolerance: edges to 1e-12 GeV (their edges are computed, not
    # numpy.linspace), contents to 1e-12 relative (summation order).
    ours, theirs = _ours(weighted), _theirs(weighted)
    np.testing.assert_allclose(ours.axes[0].edges, theirs.axes[0].edges, rtol=0, atol=1e-12)
    np.testing.assert_allclose(ours.values(flow=True), theirs.values(flow=True), rtol=1e-12)
    np.testing.assert_allclose(ours.variances(flow=True), theirs.variances(flow=True),
                               rtol=1e-12)
    if not weighted:  # their Weight storage returns its values from counts(); ours follows
        # the protocol's documented effective count (test_counts_are_effective_entries...)
        np.testing.assert_array_equal(ours.counts(), theirs.counts())
    back = MassHistogram.from_protocol(theirs)
    np.testing.assert_allclose(back.values(), ours.values(), rtol=1e-12)
    np.testing.assert_allclose(back.variances(), ours.variances(), rtol=1e-12)
    assert back.underflow == pytest.approx(ours.underflow, rel=1e-12)
    assert back.overflow == pytest.approx(ours.overflow, rel=1e-12)
    assert back.overflow_variance == pytest.approx(ours.overflow_variance, rel=1e-12)
    assert back.is_weighted == weighted


def test_counts_are_effective_entries_for_weights():
    # the protocol's counts() for weighted bins: (sum w)^2 / sum w^2, by hand
    h = MassHistogram.from_masses([61.5, 61.5, 70.2], [1.0, 3.0, 2.0], bins=90, range=(60, 150))
    c = h.counts()
    assert c[1] == pytest.approx(16.0 / 10.0, rel=1e-14) and c[10] == pytest.approx(1.0)
    assert c.sum() == pytest.approx(2.6)


def test_sum_with_another_library_histogram():
    s = _ours() + _theirs()
    np.testing.assert_allclose(s.values(), 2 * _ours().values(), rtol=0)
    assert s.overflow == 2 * _ours().overflow
    with pytest.raises(InputError, match="different binning"):
        _ours() + bh.Histogram(bh.axis.Regular(45, 60.0, 150.0))


def test_numpy_histogram_pair_by_the_explicit_constructor():
    counts, edges = np.histogram(MASSES, bins=90, range=(60, 150))
    h = MassHistogram.from_counts(counts, edges)
    np.testing.assert_array_equal(h.values(), counts)
    np.testing.assert_array_equal(h.variances(), counts)
    with pytest.raises(InputError, match="91 edges need 90 counts"):
        MassHistogram.from_counts(counts[:-1], edges)
    with pytest.raises(InputError, match="negative counts need their variances"):
        MassHistogram.from_counts(counts - 1000, edges)


@pytest.mark.parametrize("weighted", [False, True])
def test_fit_identical_from_every_form(weighted):
    # The same bins handed over as our histogram, the other library's histogram, and (for
    # unweighted data) numpy.histogram's pair: the fits agree to 1e-7 relative (their edges
    # differ from numpy.linspace's in the last bits; the minimiser's tolerance is far looser).
    ref = peaksift.fit(_ours(weighted), "gaussian", "exponential")
    forms = [_theirs(weighted)]
    if not weighted:
        forms.append(np.histogram(MASSES, bins=90, range=(60.0, 150.0)))
    for data in forms:
        r = peaksift.fit(data, "gaussian", "exponential")
        for k, v in ref.values.items():
            assert r.values[k] == pytest.approx(v, rel=1e-7), (type(data), k)
        assert r.nll == pytest.approx(ref.nll, rel=1e-9, abs=1e-6)


def test_scan_and_limits_take_the_other_library():
    h, b = _ours(), _theirs()
    kw = {"masses": np.array([80.0, 91.0, 110.0]), "relative_resolution": 0.03}
    s1 = peaksift.scan(h, "gaussian", "exponential", refit=False, **kw)
    s2 = peaksift.scan(b, "gaussian", "exponential", refit=False, **kw)
    np.testing.assert_allclose(s2.z_local, s1.z_local, rtol=1e-7)


@pytest.mark.parametrize("bad", [
    np.ones((10, 2)),                          # a 2-d table is not a list of masses
    {"mass": [1.0, 2.0]},                      # a mapping
    "masses.parquet",                          # a path
    np.array(["91.0", "92.0"]),                # strings
    [[91.0, 92.0], [93.0]],                    # ragged lists
    np.array([True, False]),                   # booleans
])
def test_array_likes_that_are_not_masses_are_refused(bad):
    for call in (lambda: peaksift.fit(bad, "gaussian", "exponential"),
                 lambda: peaksift.scan(bad, "gaussian", "exponential", [91.0],
                                       relative_resolution=0.03)):
        with pytest.raises(FitError, match="accepts a MassHistogram, a histogram speaking"):
            call()


def test_counts_with_bin_centres_are_refused_not_read_as_masses_and_weights():
    # (counts, centres) is the x/y slip: the centres (numpy.histogram's edges averaged, the
    # other library's axis.centers, and the same in float32) would be weights of masses
    # "counts"; refused by fit, scan and upper_limits with the accepted forms named.
    counts, edges = np.histogram(MASSES, bins=90, range=(60.0, 150.0))
    centres = [(edges[1:] + edges[:-1]) / 2, bh.axis.Regular(*EDGES).centers,
               ((edges[1:] + edges[:-1]) / 2).astype(np.float32)]
    calls = (lambda d: peaksift.fit(d, "gaussian", "exponential", start={"mass": 91.0}),
             lambda d: peaksift.scan(d, "gaussian", "exponential", [91.0],
                                     relative_resolution=0.03),
             lambda d: peaksift.upper_limits(d, "gaussian", "exponential", [91.0],
                                             relative_resolution=0.03))
    for c in centres:
        for call in calls:
            with pytest.raises(FitError, match=r"like bin centres.*give the bin edges "
                                               r"\(len\(counts\) \+ 1 values"):
                call((counts, c))
    # masses with weights are not taken for it: measured masses (even sorted) with their
    # weights, and evenly spaced masses weighted by a density (an Asimov-like sample)
    from peaksift.histogram import as_spectrum

    asimov = np.linspace(60.0, 150.0, 91)
    for x, w in ((np.sort(MASSES), WEIGHTS), (asimov, np.exp(-asimov / 30.0)),
                 (counts.astype(float), np.ones(counts.size))):
        got_x, got_w = as_spectrum((x, w))
        np.testing.assert_array_equal(got_x, x)
        np.testing.assert_array_equal(got_w, w)


def test_histogram_of_means_and_two_axes_refused():
    with pytest.raises(FitError, match="kind MEAN"):
        peaksift.fit(bh.Histogram(bh.axis.Regular(*EDGES), storage=bh.storage.Mean()),
                     "gaussian", "exponential")
    with pytest.raises(FitError, match="2 axes"):
        peaksift.fit(bh.Histogram(bh.axis.Regular(*EDGES), bh.axis.Regular(3, 0, 1)),
                     "gaussian", "exponential")
    with pytest.raises(FitError, match="weights= given with a histogram"):
        peaksift.fit(_theirs(), "gaussian", "exponential", weights=WEIGHTS)


def test_version_1_files_load_with_a_deprecation_note(tmp_path):
    h = _ours(weighted=True)
    d = h.to_dict()
    assert d["version"] == 2 and "values" in d and "variances" in d
    old = {("weight_sum" if k == "values" else "weight_sq_sum" if k == "variances" else
            k.replace("_variance", "_weight_sq_sum") if k.endswith("_variance") else k): v
           for k, v in d.items()}
    old["version"] = 1
    p = tmp_path / "spectrum.json"
    p.write_text(json.dumps(old))
    with pytest.warns(DeprecationWarning, match="version 1 mass histogram"):
        back = MassHistogram.load(p)
    assert back == h
    h.save(p)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert MassHistogram.load(p) == h
