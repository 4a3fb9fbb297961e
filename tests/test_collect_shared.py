"""Several selections on one input read once (``execution.collect_shared``): each selection's
result equals its own read, on every engine, and a one-pass reference outside the execution
layer (read everything, pair once, ``numpy.histogram``: common practice)."""

from __future__ import annotations

import logging
import warnings

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from peaksift import execution
from peaksift.errors import ConfigError, DataWarning
from peaksift.execution import _dask

EDGES = np.linspace(0.0, 200.0, 101)
WINDOW = (20.0, 120.0)
# two categories of one collection (central, forward) and another collection
SELS = (
    execution.Selection(first="muon", edges=EDGES, window=WINDOW, charge="opposite",
                        cut="pt > 8 and abs(eta) < 1.2"),
    execution.Selection(first="muon", edges=EDGES, window=WINDOW, charge="opposite",
                        cut="pt > 8 and abs(eta) >= 1.2"),
    execution.Selection(first="electron", edges=EDGES, window=WINDOW, charge="opposite",
                        cut="pt > 10", choose="leading"),
)


def _objects(rng, n_events, nan_pt):
    n_obj = np.minimum(rng.poisson(2.2, n_events), 6)
    tot = int(n_obj.sum())
    pt = 5.0 + rng.exponential(20.0, tot)
    pt[rng.choice(tot, nan_pt, replace=False)] = np.nan
    flat = pa.StructArray.from_arrays(
        [pa.array(pt), pa.array(rng.uniform(-2.6, 2.6, tot)),
         pa.array(rng.uniform(-np.pi, np.pi, tot)), pa.array(np.full(tot, 0.1)),
         pa.array(rng.choice([-1, 1], tot).astype(np.int8))],
        names=["pt", "eta", "phi", "mass", "charge"])
    offsets = pa.array(np.concatenate([[0], np.cumsum(n_obj)]).astype(np.int32))
    return pa.ListArray.from_arrays(offsets, flat)


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("shared")
    out = []
    for k in range(2):
        rng = np.random.default_rng(40 + k)
        n = 2500
        table = pa.table({"muon": _objects(rng, n, 3), "electron": _objects(rng, n, 2),
                          "weight": pa.array(rng.uniform(0.5, 1.5, n))})
        path = d / f"run_{k}.parquet"
        pq.write_table(table, path, row_group_size=1000)
        out.append(str(path))
    return out


@pytest.fixture(scope="module")
def dask_address():
    pytest.importorskip("distributed")
    logging.getLogger("distributed").setLevel(logging.CRITICAL)
    cluster = _dask._start_local_cluster(2)
    try:
        yield cluster.scheduler_address
    finally:
        cluster.close()


def _same(a, b):
    """Everything a search takes from a Collected, bit for bit."""
    assert a.histogram == b.histogram
    np.testing.assert_array_equal(a.window_mass, b.window_mass)
    np.testing.assert_array_equal(a.window_weight, b.window_weight)
    assert a.pt_histogram == b.pt_histogram and a.rapidity_histogram == b.rapidity_histogram
    assert a.cutflow == b.cutflow and a.requirements == b.requirements
    assert (a.events_read, a.candidates, a.files_read) == (b.events_read, b.candidates,
                                                           b.files_read)
    assert a.data_warnings == b.data_warnings and a.dropped_objects == b.dropped_objects


def _quiet(func, *args, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataWarning)
        return func(*args, **kw)


def test_shared_read_equals_each_selection_read_alone_and_a_one_pass_reference(files):
    from peaksift import pair, read_events

    shared = _quiet(execution.collect_shared, files, SELS, chunk_events=700)
    assert shared[0].engine_info["shared_by"] == 3
    for sel, got in zip(SELS, shared):
        _same(got, _quiet(execution.collect, files, sel, chunk_events=700))
        # outside the execution layer: one read, one pairing, numpy.histogram with the
        # weights (common practice); sums of weights agree to rounding (chunk order)
        ev = _quiet(read_events, files, list(sel.collections))
        c = pair(ev, sel.first, cut=sel.cut, charge=sel.charge, choose=sel.choose)
        counts, _ = np.histogram(c.mass, bins=EDGES, weights=c.weight)
        np.testing.assert_allclose(got.histogram.values(), counts, rtol=1e-12)
        assert got.candidates == len(c) and got.events_read == 5000
    # the repair warnings of each selection name only its own collection
    assert all("'electron'" not in m for m in shared[0].data_warnings)
    assert all("'muon'" not in m for m in shared[2].data_warnings)
    assert shared[0].dropped_objects == {"muon": {"NaN or infinite kinematics": 6}}
    assert shared[2].dropped_objects == {"electron": {"NaN or infinite kinematics": 4}}


def test_each_chunk_is_read_once(files, monkeypatch):
    from peaksift import events

    calls = []
    real = events.read_chunk

    def counting(spec, *a, **kw):
        calls.append(spec)
        return real(spec, *a, **kw)

    monkeypatch.setattr(events, "read_chunk", counting)
    out = _quiet(execution.collect_shared, files, SELS, chunk_events=1000)
    assert len(calls) == out[0].engine_info["chunks"] == 6  # 2 files x 3 row groups


def test_engines_agree_exactly(files, dask_address):
    ref = _quiet(execution.collect_shared, files, SELS, chunk_events=1000)
    procs = _quiet(execution.collect_shared, files, SELS, engine="processes", workers=2,
                   chunk_events=1000)
    dask = _quiet(execution.collect_shared, files, SELS, engine="dask", address=dask_address,
                  chunk_events=1000)
    for a, b, c in zip(ref, procs, dask):
        _same(b, a)
        _same(c, a)


def test_selections_that_read_differently_are_refused(files):
    other = execution.Selection(first="muon", edges=EDGES, strict=True)
    with pytest.raises(ConfigError, match="differ in strict"):
        execution.collect_shared(files, (SELS[0], other))
    with pytest.raises(ConfigError, match="non-empty"):
        execution.collect_shared(files, ())
