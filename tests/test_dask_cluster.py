"""The Dask engine as people run it: a client they already hold (passed, or current in the
process), workers that join after the work was submitted, a worker with another peaksift
version, and the per-chunk function on chunks held in memory.  Reference: the serial engine
(bit for bit) and, for the late-join test, the worker that ran each task as Dask reports it
(distributed.get_worker)."""

from __future__ import annotations

import logging
import threading
import time

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from peaksift import execution
from peaksift.errors import ExecutionError

distributed = pytest.importorskip("distributed")
logging.getLogger("distributed").setLevel(logging.CRITICAL)

EDGES = np.linspace(0.0, 200.0, 101)
SEL = execution.Selection(first="muon", edges=EDGES, window=(20.0, 120.0), charge="opposite",
                          cut="pt > 8")


def nap_and_say_where(i: int) -> tuple[int, str]:
    time.sleep(0.25)
    return i, distributed.get_worker().address


@pytest.fixture
def empty_cluster():
    """An in-process cluster with no workers yet (threads, for speed)."""
    cluster = distributed.LocalCluster(n_workers=0, threads_per_worker=1, processes=False,
                                       dashboard_address=None)
    client = distributed.Client(cluster, set_as_default=False)
    yield cluster, client
    client.close()
    cluster.close()


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    rng = np.random.default_rng(7)
    d = tmp_path_factory.mktemp("dask_events")
    out = []
    for k in range(2):
        n = 2000
        n_obj = np.minimum(rng.poisson(2.2, n), 6)
        tot = int(n_obj.sum())
        flat = pa.StructArray.from_arrays(
            [pa.array(5.0 + rng.exponential(20.0, tot)), pa.array(rng.uniform(-2.5, 2.5, tot)),
             pa.array(rng.uniform(-np.pi, np.pi, tot)), pa.array(np.full(tot, 0.1057)),
             pa.array(rng.choice([-1, 1], tot).astype(np.int8))],
            names=["pt", "eta", "phi", "mass", "charge"])
        offs = pa.array(np.concatenate([[0], np.cumsum(n_obj)]).astype(np.int32))
        t = pa.table({"muon": pa.ListArray.from_arrays(offs, flat),
                      "weight": pa.array(rng.uniform(0.5, 1.5, n))})
        pq.write_table(t, d / f"w{k}.parquet", row_group_size=500)
        out.append(str(d / f"w{k}.parquet"))
    return out


def test_workers_that_join_late_get_work(empty_cluster):
    # 24 tasks of 0.25 s; the first worker joins 0.3 s after the submission, three more at
    # 0.6 s.  Tasks in flight must follow the cluster's threads: all four workers run tasks.
    cluster, client = empty_cluster
    timers = [threading.Timer(0.3, cluster.scale, [1]), threading.Timer(0.6, cluster.scale, [4])]
    for t in timers:
        t.start()
    t0 = time.perf_counter()
    got = execution.map_tasks(nap_and_say_where, range(24), engine="dask", client=client)
    seconds = time.perf_counter() - t0
    assert [i for i, _ in got] == list(range(24))  # in task order
    where = [w for _, w in got]
    assert len(set(where)) == 4, where
    # with a fixed two tasks in flight this would take 24 x 0.25 / 2 = 3 s after the first
    # worker joined; matched to four threads about 1.5 s + 0.6 s (generous bound: 2 cores
    # shared with other work)
    assert seconds < 3.0, seconds
    assert client.status == "running"  # the user's client stays open


def test_engines_agree_bit_for_bit_with_late_workers(empty_cluster, files):
    cluster, client = empty_cluster
    ref = execution.collect(files, SEL, chunk_events=500)
    timer = threading.Timer(0.2, cluster.scale, [2])
    timer.start()
    got = execution.collect(files, SEL, engine="dask", client=client, chunk_events=500)
    timer.join()
    assert ref.histogram.is_weighted and got.engine_info["chunks"] == 8
    assert got.histogram == ref.histogram
    np.testing.assert_array_equal(got.window_mass, ref.window_mass)
    np.testing.assert_array_equal(got.window_weight, ref.window_weight)
    assert got.cutflow == ref.cutflow and got.files_read == ref.files_read
    # the same chunks in memory through the exposed per-chunk function, reduced in order
    from peaksift.events import plan_chunks, read_chunk

    outs = [execution.process_events(read_chunk(s, "muon"), SEL, first_event=s.first_event,
                                     file=s.path) for s in plan_chunks(files, chunk_events=500)]
    mine = execution.reduce_outputs(outs, SEL)
    assert mine.histogram == ref.histogram
    np.testing.assert_array_equal(mine.window_mass, ref.window_mass)


def test_current_client_is_used_with_a_note(empty_cluster, files):
    cluster, _ = empty_cluster
    cluster.scale(1)
    with distributed.Client(cluster) as current:  # becomes the current client
        got = execution.collect(files[:1], SEL, engine="dask", chunk_events=1000)
        assert "current in this process" in got.engine_info["note"]
        assert got.engine_info["address"] == current.scheduler.address


def test_worker_with_another_version_is_refused(files):
    import peaksift
    from peaksift.execution import _dask

    cluster = _dask._start_local_cluster(1)  # one worker process, forked: starts quickly
    try:
        with distributed.Client(cluster, set_as_default=False) as client:
            client.run(lambda: setattr(peaksift, "__version__", "0.0.1-other"))
            with pytest.raises(ExecutionError, match=r"runs peaksift 0\.0\.1-other but this "
                                                     r"process runs"):
                execution.collect(files, SEL, engine="dask", client=client)
    finally:
        cluster.close()
