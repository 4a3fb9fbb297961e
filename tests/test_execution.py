"""Execution engines: serial, local processes and Dask give the same results.

One small LocalCluster (two single-threaded workers, no dashboard) serves the whole module.
"""

from __future__ import annotations

import dataclasses
import json
import logging
import os
import pickle
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from peaksift import _processes, execution
from peaksift.errors import ConfigError, DataWarning, ExecutionError, InputError, PeaksiftError
from peaksift.execution import _dask, _engines, _local
from peaksift.histogram.binning import regular_index


@pytest.fixture(scope="module")
def dask_address():
    """A two-worker LocalCluster started by the engine's own helper, closed at module end."""
    # (distributed is imported here, not at module level: pool workers import this file)
    pytest.importorskip("distributed")
    logging.getLogger("distributed").setLevel(logging.CRITICAL)
    import dask

    # no retries, so a task that kills its worker fails at once (default: 3 more tries)
    with dask.config.set({"distributed.scheduler.allowed-failures": 0}):
        cluster = _dask._start_local_cluster(2)
    try:
        yield cluster.scheduler_address
    finally:
        cluster.close()
    assert cluster.status.name == "closed"


# ------------------------------------------------------------------- test data
EDGES = np.linspace(0.0, 200.0, 101)
WINDOW = (20.0, 120.0)
SEL = execution.Selection(first="muon", edges=EDGES, window=WINDOW, charge="opposite",
                          cut="pt > 8 and abs(eta) < 2.4")


def _write_events(path, n_events, seed, *, weighted=False, row_group=1000, nan_pt=0):
    """Random muon events (list-of-struct layout) in row groups of ``row_group`` events."""
    rng = np.random.default_rng(seed)
    n_obj = np.minimum(rng.poisson(2.2, n_events), 6)
    tot = int(n_obj.sum())
    pt = 5.0 + rng.exponential(20.0, tot)
    if nan_pt:
        pt[rng.choice(tot, nan_pt, replace=False)] = np.nan
    flat = pa.StructArray.from_arrays(
        [pa.array(pt), pa.array(rng.uniform(-2.6, 2.6, tot)),
         pa.array(rng.uniform(-np.pi, np.pi, tot)), pa.array(np.full(tot, 0.1057)),
         pa.array(rng.choice([-1, 1], tot).astype(np.int8))],
        names=["pt", "eta", "phi", "mass", "charge"])
    offsets = pa.array(np.concatenate([[0], np.cumsum(n_obj)]).astype(np.int32))
    cols = {"muon": pa.ListArray.from_arrays(offsets, flat)}
    if weighted:
        cols["weight"] = pa.array(rng.uniform(0.5, 1.5, n_events))
    pq.write_table(pa.table(cols), path, row_group_size=row_group)
    return path


@pytest.fixture(scope="module")
def dataset(tmp_path_factory):
    d = tmp_path_factory.mktemp("events")
    files = [_write_events(d / f"run_{k}.parquet", 3000, seed=100 + k) for k in range(3)]
    return [str(f) for f in files]


@pytest.fixture(scope="module")
def weighted_dataset(tmp_path_factory):
    d = tmp_path_factory.mktemp("weighted")
    files = [_write_events(d / f"sim_{k}.parquet", 2500, seed=200 + k, weighted=True)
             for k in range(2)]
    return [str(f) for f in files]


def _one_pass(files, sel=SEL):
    """Reference outside the execution layer: read everything at once, pair once and
    histogram with numpy.histogram (common practice)."""
    from peaksift import pair, read_events  # not at module level: workers import this file

    ev = read_events(files, list(sel.collections))
    c = pair(ev, sel.first, cut=sel.cut, charge=sel.charge)
    counts, _ = np.histogram(c.mass, bins=np.asarray(sel.edges), weights=c.weight)
    lo, hi = sel.window
    inwin = (c.mass >= lo) & (c.mass <= hi)  # the window closes both ends, as numpy's bins
    return c, counts, c.mass[inwin], c.weight[inwin]


def _assert_same(a, b):
    """Bit-for-bit equality of two Collected results."""
    assert a.histogram == b.histogram
    np.testing.assert_array_equal(a.window_mass, b.window_mass)
    np.testing.assert_array_equal(a.window_weight, b.window_weight)
    assert a.pt_histogram == b.pt_histogram
    assert a.rapidity_histogram == b.rapidity_histogram
    assert a.cutflow == b.cutflow
    assert (a.events_read, a.candidates, a.files_read) == (b.events_read, b.candidates,
                                                           b.files_read)


# ----------------------------------------------------------------- stand-in tasks
# Module-level so that spawned processes and Dask workers can import them.
def seeded_draw(spec: tuple[int, int]) -> np.ndarray:
    """Per-task random numbers, seeded from the task (as toy batches are)."""
    seed, n = spec
    return np.random.default_rng(seed).standard_normal(n)


def fail_on_three(spec: int) -> int:
    if spec == 3:
        raise PeaksiftError(f"task {spec} refused on purpose")
    return spec * spec


def die_on_two(spec: int) -> int:
    if spec == 2:
        os._exit(7)  # a worker that crashes without a Python exception
    return spec


def pid_after_pause(spec: int) -> tuple[int, int]:
    time.sleep(0.02)
    return spec, os.getpid()


# ---------------------------------------------------------------------- map_tasks
SPECS = [(seed, 500) for seed in range(7)]


def _reference():
    # Reference from outside the engines: numpy's generator called directly, in order.
    return [np.random.default_rng(seed).standard_normal(n) for seed, n in SPECS]


def test_map_tasks_serial_matches_direct_calls():
    got = execution.map_tasks(seeded_draw, SPECS)
    assert len(got) == len(SPECS)
    for a, b in zip(got, _reference()):
        np.testing.assert_array_equal(a, b)


def test_map_tasks_processes_same_results_in_order():
    got = execution.map_tasks(seeded_draw, SPECS, engine="processes", workers=2)
    for a, b in zip(got, _reference()):
        np.testing.assert_array_equal(a, b)


def test_map_tasks_processes_many_small_tasks():
    # Thousands of tasks: the pool's per-task bookkeeping must not fill any pipe and stall.
    got = execution.map_tasks(abs, range(-3000, 0), engine="processes", workers=2)
    assert got == list(range(3000, 0, -1))


def test_map_tasks_dask_same_results_in_order(dask_address):
    got = execution.map_tasks(seeded_draw, SPECS, engine="dask", address=dask_address)
    for a, b in zip(got, _reference()):
        np.testing.assert_array_equal(a, b)


@pytest.mark.parametrize("engine", ["serial", "processes"])
def test_map_tasks_task_error_propagates(engine):
    with pytest.raises(PeaksiftError, match="task 3 refused on purpose"):
        execution.map_tasks(fail_on_three, range(6), engine=engine, workers=2)


def test_map_tasks_task_error_propagates_from_dask(dask_address):
    with pytest.raises(PeaksiftError, match="task 3 refused on purpose"):
        execution.map_tasks(fail_on_three, range(6), engine="dask", address=dask_address)


def test_dead_process_worker_is_reported_with_the_task():
    before = _pool_children()
    # Normally the message names the task and its exit code; when the pool does not say
    # which worker died, it lists the tasks in flight instead (task 2 among them).
    with pytest.raises(ExecutionError, match=r"worker process died") as err:
        execution.map_tasks(die_on_two, range(5), engine="processes", workers=2)
    msg = str(err.value)
    assert (re.search(r"while running task 2 \(2\).*exit code 7", msg)
            or re.search(r"in flight: .*task 2 \(2\)", msg)), msg
    assert _pool_children() == before


def test_collect_runner_shares_the_tasks_between_this_process_and_the_pool():
    # collect's "processes" runner: this process takes tasks while the pool's worker starts
    # (the first two always go to the pool); every result comes back once, in task order
    info: dict = {}
    threads = pa.cpu_count()
    run = _engines._run(pid_after_pause, list(range(30)), engine="processes", workers=2,
                         address=None, describe=str, info=info, parent_helps=True)
    got = [(i, ok, value) for i, ok, value in run]
    assert [i for i, _, _ in got] == list(range(30)) and all(ok for _, ok, _ in got)
    assert [v[0] for _, _, v in got] == list(range(30))
    pids = [v[1] for _, _, v in got]
    assert pids[0] != os.getpid() and pids[1] != os.getpid()
    assert os.getpid() in pids and info["workers"] == 2
    assert pa.cpu_count() == threads  # Arrow's decoding threads given back


def _pool_children():
    """Pids of this test process's child processes still alive (forked or spawned), less
    multiprocessing's resource tracker, which lives as long as the test process."""
    psutil = pytest.importorskip("psutil")
    alive = []
    for p in psutil.Process().children(recursive=True):
        try:
            if p.status() != psutil.STATUS_ZOMBIE and not any("resource_tracker" in a
                                                               for a in p.cmdline()):
                alive.append(p.pid)
        except psutil.NoSuchProcess:
            pass
    return sorted(alive)


@pytest.mark.parametrize("caller_sigterm", ["default", "ignored by the caller"])
def test_keyboard_interrupt_stops_the_pool_and_propagates(caller_sigterm):
    # A caller that ignores SIGTERM (a graceful-shutdown handler, say) must not pass that on
    # to forked workers: they would outlive the interrupt, sleeping out their tasks.
    def interrupt(signum, frame):
        raise KeyboardInterrupt

    before = _pool_children()
    old = signal.signal(signal.SIGALRM, interrupt)
    old_term = signal.getsignal(signal.SIGTERM)
    if caller_sigterm != "default":
        signal.signal(signal.SIGTERM, lambda signum, frame: None)
    signal.setitimer(signal.ITIMER_REAL, 1.5)
    try:
        with pytest.raises(KeyboardInterrupt):
            execution.map_tasks(time.sleep, [30.0] * 4, engine="processes", workers=2)
        assert _pool_children() == before  # no worker still asleep in its task
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, old)
        signal.signal(signal.SIGTERM, old_term)


_NO_MAIN_GUARD = """
from peaksift import execution

execution.map_tasks(abs, [-1, -2, -3], engine="processes", workers=2, start_method="spawn")
"""


def test_spawn_without_main_guard_says_so(tmp_path):
    # Spawned workers re-run the script on import and refuse to start a pool from there;
    # the error must point at the missing guard, not only at a dead worker.
    script = tmp_path / "no_guard.py"
    script.write_text(_NO_MAIN_GUARD)
    done = subprocess.run([sys.executable, str(script)], capture_output=True, text=True,
                          timeout=300, check=False)
    assert done.returncode != 0
    last = done.stderr.strip().splitlines()[-1]
    assert last.startswith("peaksift.errors.ExecutionError") and "__main__" in last, last


def worker_signals(_: int) -> tuple[bool, bool]:
    return (signal.getsignal(signal.SIGINT) == signal.SIG_IGN,
            signal.getsignal(signal.SIGTERM) == signal.SIG_DFL)


@pytest.mark.parametrize("pool", ["execution", "toy engine"])
def test_workers_leave_ctrl_c_to_the_caller_and_obey_sigterm(pool):
    # Forked workers inherit the caller's handlers; every pool we start resets them: SIGINT
    # ignored (the caller stops the pool), SIGTERM at its default (so the stop works).
    from peaksift import _processes

    old_term = signal.signal(signal.SIGTERM, lambda signum, frame: None)
    try:
        if pool == "execution":
            got = execution.map_tasks(worker_signals, [0, 1], engine="processes", workers=2)
        else:  # the pool stats.toys.run_toys(workers=) starts
            with _processes.process_pool(2, initializer=_processes.worker_start) as p, \
                    _processes.quiet_fork():
                got = list(p.map(worker_signals, [0, 1]))
    finally:
        signal.signal(signal.SIGTERM, old_term)
    assert got == [(True, True), (True, True)]


def test_unpicklable_function_is_refused_before_starting():
    with pytest.raises(ExecutionError, match="cannot be sent to worker processes"):
        execution.map_tasks(lambda s: s, [1, 2], engine="processes", workers=2)


def test_unknown_engine_suggests_closest():
    with pytest.raises(ConfigError, match="did you mean 'processes'"):
        execution.map_tasks(seeded_draw, SPECS, engine="proceses")
    with pytest.raises(ConfigError, match="unknown start_method 'forks'.*did you mean 'fork'"):
        execution.collect([], SEL, engine="processes", start_method="forks")


_KERNEL_PROBE = """
import sys
from peaksift import execution
from peaksift.execution import _engines
from peaksift.execution._chunk import _ChunkTask

class Probe(_ChunkTask):
    # what a worker holds when its first task starts
    def __call__(self, spec):
        kernels = sys.modules.get("peaksift.pairing.kernels")
        return kernels is not None and len(kernels._count_pairs.overloads) > 0

if __name__ == "__main__":
    sel = execution.Selection(first="muon", edges=[0.0, 100.0])
    for method in ("fork", "spawn"):
        info = {}
        run = _engines._run(Probe(sel), [0, 1], engine="processes", workers=2, address=None,
                             describe=str, info=info, start_method=method)
        print(method, info["start_method"], [v for _, _, v in run])
"""


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="fork is used on Linux only")
def test_forked_workers_start_with_the_pairing_kernels_loaded(tmp_path):
    # A fresh interpreter, so nothing is loaded before the run: with fork the parent loads
    # the chunk work and numba's kernels first and the workers inherit them; spawned
    # workers start without them (and pay numba's first-call set-up themselves).
    script = tmp_path / "probe.py"
    script.write_text(_KERNEL_PROBE)
    done = subprocess.run([sys.executable, str(script)], capture_output=True, text=True,
                          timeout=300, check=False)
    assert done.returncode == 0, done.stderr[-2000:]
    out = done.stdout.split("\n")
    assert out[0] == "fork fork [True, True]", out
    assert out[1] == "spawn spawn [False, False]", out
    assert _processes.resolve_start_method("auto") == "fork"


def test_bad_scheduler_address_is_reported():
    with pytest.raises(ExecutionError, match="cannot connect to the Dask scheduler"):
        _dask.DaskSession("tcp://127.0.0.1:1", None, 1, "spawn", {}, timeout="1s")


# ------------------------------------------------------------------------ collect
def test_serial_collect_equals_one_pass_reference(dataset):
    got = execution.collect(dataset, SEL, chunk_events=700)
    c, counts, wm, _ = _one_pass(dataset)
    assert got.engine_info["chunks"] == 9  # 3 files x 3 row groups, each above 700 events
    np.testing.assert_array_equal(got.histogram.values(), counts)  # exact for unweighted data
    np.testing.assert_array_equal(got.histogram.variances(), counts)
    assert not got.histogram.is_weighted
    np.testing.assert_array_equal(got.window_mass, wm)
    assert got.events_read == 9000 == got.cutflow["events_in"]
    assert got.cutflow == c.cutflow
    assert got.candidates == len(c)
    assert got.files_read == tuple(dataset) and got.files_skipped == ()
    # the pT / rapidity summaries hold the candidates inside the fit window
    inrange = (c.mass >= WINDOW[0]) & (c.mass <= WINDOW[-1])
    assert got.pt_histogram.total(flow=True) == inrange.sum()
    ref_y, _ = np.histogram(c.rapidity[inrange], bins=np.asarray(SEL.rapidity_edges))
    np.testing.assert_array_equal(got.rapidity_histogram.values(), ref_y)


def test_chunked_equals_one_pass_for_any_chunk_size(dataset):
    whole = execution.collect(dataset, SEL, chunk_events=10**9)
    assert whole.engine_info["chunks"] == 3  # chunks never span files
    for chunk_events in (1, 1000, 2500):
        _assert_same(execution.collect(dataset, SEL, chunk_events=chunk_events), whole)


def test_engines_agree_exactly(weighted_dataset, dask_address):
    # Weighted data: even sums of non-integer weights must agree bit for bit, which holds
    # because every engine reduces the chunks in the same order.
    files = weighted_dataset
    ref = execution.collect(files, SEL, chunk_events=1000)
    assert ref.histogram.is_weighted and ref.engine_info["chunks"] == 6
    procs = execution.collect(files, SEL, engine="processes", workers=2, chunk_events=1000)
    spawned = execution.collect(files, SEL, engine="processes", workers=2, chunk_events=1000,
                                start_method="spawn")
    dask = execution.collect(files, SEL, engine="dask", address=dask_address, chunk_events=1000)
    _assert_same(procs, ref)
    _assert_same(spawned, ref)
    _assert_same(dask, ref)
    assert spawned.engine_info["start_method"] == "spawn"
    assert "start_method" not in dask.engine_info  # a running cluster's workers are its own
    assert procs.engine_info["engine"] == "processes" and procs.engine_info["workers"] == 2
    assert dask.engine_info["address"] == dask_address and dask.engine_info["workers"] == 2
    # and the weighted sums equal one pass to rounding (numpy.histogram with weights)
    _, counts, _, ww = _one_pass(files)
    np.testing.assert_allclose(ref.histogram.values(), counts, rtol=1e-12)
    np.testing.assert_array_equal(ref.window_weight, ww)


def _garbage(path):
    path.write_bytes(b"PAR1" + bytes(range(256)) * 8)  # not Parquet: no valid footer
    return str(path)


def test_corrupt_file_is_named_or_skipped(dataset, tmp_path):
    bad = _garbage(tmp_path / "run_1b.parquet")
    files = [dataset[0], bad, dataset[1]]
    with pytest.raises(InputError, match="run_1b.parquet"):
        execution.collect(files, SEL)
    got = execution.collect(files, SEL, unreadable_files="left_out", chunk_events=1000)
    assert [s.path for s in got.files_skipped] == [bad]
    assert "run_1b.parquet" in got.files_skipped[0].reason
    assert got.files_read == (dataset[0], dataset[1])
    _assert_same(got, execution.collect([dataset[0], dataset[1]], SEL, chunk_events=1000))


def _corrupt_last_row_group(src, dst):
    """Copy of ``src`` whose footer is intact but whose last row group's page headers are
    noise, so the file plans fine and fails only when that chunk is read."""
    data = bytearray(Path(src).read_bytes())
    footer_len = int.from_bytes(data[-8:-4], "little")
    footer_start = len(data) - 8 - footer_len
    meta = pq.ParquetFile(src).metadata
    rg = meta.row_group(meta.num_row_groups - 1)
    for j in range(rg.num_columns):
        col = rg.column(j)
        start = col.dictionary_page_offset if col.has_dictionary_page else col.data_page_offset
        assert start + 16 < footer_start
        data[start:start + 16] = b"\xff" * 16
    Path(dst).write_bytes(bytes(data))
    pq.ParquetFile(dst)  # the footer still reads
    return str(dst)


def test_file_failing_mid_run_is_named_or_skipped_whole(dataset, tmp_path):
    bad = _corrupt_last_row_group(dataset[2], tmp_path / "run_2b.parquet")
    files = [dataset[0], bad, dataset[1]]
    with pytest.raises(InputError, match=r"row groups \[2\] of '.*run_2b\.parquet'"):
        execution.collect(files, SEL, chunk_events=1000)
    expected = execution.collect([dataset[0], dataset[1]], SEL, chunk_events=1000)
    for engine in ("serial", "processes"):
        got = execution.collect(files, SEL, engine=engine, workers=2, chunk_events=1000,
                                unreadable_files="left_out")
        assert [s.path for s in got.files_skipped] == [bad]
        assert "run_2b.parquet" in got.files_skipped[0].reason
        # its first two (readable) chunks were discarded too: the file counts not at all
        _assert_same(got, expected)


def test_file_without_the_collection_stops_the_run_before_any_chunk(dataset, tmp_path,
                                                                    monkeypatch):
    # A file whose footer shows it lacks the paired collection is refused (or skipped) at
    # planning: no chunk of the files before it is processed first.
    from peaksift.execution import _chunk

    other = tmp_path / "run_e.parquet"
    pq.write_table(pa.table({"electron_pt": pa.array([[30.0]] * 1500)}), other,
                   row_group_size=500)
    files = [dataset[0], dataset[1], str(other)]
    calls = []
    real = _chunk.process_chunk
    monkeypatch.setattr(_chunk, "process_chunk", lambda spec, sel: calls.append(spec) or
                        real(spec, sel))
    with pytest.raises(InputError, match=r"run_e\.parquet.*muon|muon.*run_e\.parquet"):
        execution.collect(files, SEL, chunk_events=1000)
    assert calls == []
    got = execution.collect(files, SEL, chunk_events=1000, unreadable_files="left_out")
    assert [s.path for s in got.files_skipped] == [str(other)]
    assert "muon" in got.files_skipped[0].reason
    _assert_same(got, execution.collect(dataset[:2], SEL, chunk_events=1000))


def test_empty_file_is_read_with_no_events(dataset, tmp_path):
    empty = str(_write_events(tmp_path / "empty.parquet", 0, seed=1))
    got = execution.collect([empty, dataset[0]], SEL)
    assert got.files_read == (empty, dataset[0]) and got.files_skipped == ()
    _assert_same(dataclasses.replace(got, files_read=(dataset[0],)),
                 execution.collect([dataset[0]], SEL))
    alone = execution.collect([empty], SEL)
    assert (alone.events_read, alone.candidates, alone.window_mass.size) == (0, 0, 0)


def test_every_file_bad_is_an_error(tmp_path):
    bad = _garbage(tmp_path / "only.parquet")
    with pytest.raises(ExecutionError, match="every input file was skipped.*only.parquet"):
        execution.collect([bad], SEL, unreadable_files="left_out")


def test_bad_values_reported_once_with_counts(tmp_path):
    f = _write_events(tmp_path / "nan.parquet", 2000, seed=5, nan_pt=7)
    with pytest.warns(DataWarning, match="2 of 2 chunks had input repaired") as rec:
        got = execution.collect([str(f)], SEL, chunk_events=1000)
    assert len([w for w in rec if issubclass(w.category, DataWarning)]) == 1
    # 7 NaN values were written by construction
    assert got.dropped_objects == {"muon": {"NaN or infinite kinematics": 7}}
    json.dumps(got.to_dict())


def test_selection_is_validated_and_checked_for_pickling(dataset):
    with pytest.raises(ConfigError, match="Selection.edges must be"):
        execution.Selection(first="muon", edges=[0, 10, 5])
    with pytest.raises(ConfigError, match="Selection.window must be two numbers"):
        execution.Selection(first="muon", edges=EDGES, window=(1, 2, 3))
    sel = execution.Selection(first="muon", edges=EDGES, cut=lambda mu: mu.pt > 8)
    with pytest.raises(ExecutionError, match="selection cannot be sent to worker processes"):
        execution.collect(dataset, sel, engine="processes", workers=2)
    assert pickle.loads(pickle.dumps(SEL)) == SEL
    assert SEL.collections == ("muon",) and SEL.window == WINDOW


@pytest.mark.parametrize("edges", [np.linspace(2.0, 150.0, 741), np.arange(201) * 0.1,
                                   np.linspace(-1e3, 1e3, 129)])
def test_fast_regular_binning_matches_binary_search(edges):
    # Reference: numpy.searchsorted(side="right"), the rule MassHistogram.fill uses;
    # values on, just below and just above every edge, and infinities.
    rng = np.random.default_rng(11)
    v = np.concatenate([rng.uniform(edges[0] - 5, edges[-1] + 5, 20_000), edges,
                        np.nextafter(edges, -np.inf), np.nextafter(edges, np.inf),
                        [np.inf, -np.inf, 1e300, -1e300]])
    rng.shuffle(v)
    np.testing.assert_array_equal(regular_index(edges, v),
                                  np.searchsorted(edges, v, side="right"))
    w = rng.uniform(0.5, 1.5, v.size)
    from peaksift.histogram import MassHistogram

    # the fill (which takes the arithmetic index for many regular bins) against bin sums
    # from the binary-search index, with numpy.histogram's closed last bin: a value equal to
    # the last edge is counted in the last bin, not in the overflow
    h = MassHistogram(edges).fill(v, w)
    idx = np.searchsorted(edges, v, side="right")
    idx[v == edges[-1]] = edges.size - 1
    ref = np.bincount(idx, weights=w, minlength=edges.size + 1)
    np.testing.assert_array_equal(h.values(), ref[1:-1])
    assert (h.underflow, h.overflow) == (ref[0], ref[-1])
    np.testing.assert_allclose(h.values(), np.histogram(v, bins=edges, weights=w)[0], rtol=1e-12)


@pytest.mark.parametrize("start_method", ["auto", "spawn"])
def test_local_cluster_started_and_closed_when_no_address(start_method):
    pytest.importorskip("distributed")
    before = _pool_children()
    got = execution.map_tasks(seeded_draw, SPECS[:3], engine="dask", workers=1,
                              start_method=start_method)
    for a, b in zip(got, _reference()[:3]):
        np.testing.assert_array_equal(a, b)
    assert _pool_children() == before  # the cluster's processes are gone


def arrow_threads(_: int) -> int:
    return pa.cpu_count()


@pytest.mark.parametrize("engine", ["processes", "dask"])
@pytest.mark.parametrize("start_method", ["fork", "spawn"])
def test_workers_decode_with_one_arrow_thread(engine, start_method, monkeypatch):
    # One process per core: a worker forked from a caller with a larger Arrow pool must not
    # inherit it (spawned ones read the thread count from their environment).
    monkeypatch.delenv("OMP_NUM_THREADS", raising=False)  # the default: one thread
    if engine == "dask":
        pytest.importorskip("distributed")
    if start_method == "fork" and not sys.platform.startswith("linux"):
        pytest.skip("fork is used on Linux only")
    threads = pa.cpu_count()
    pa.set_cpu_count(3)
    try:
        got = execution.map_tasks(arrow_threads, [0, 1], engine=engine, workers=2,
                                  start_method=start_method)
    finally:
        pa.set_cpu_count(threads)
    assert got == [1, 1]


def test_local_cluster_spawns_when_this_process_is_large(monkeypatch):
    # Forked workers count the caller's pages in their resident memory, by which Dask's
    # memory monitor pauses them: "auto" spawns when the caller is too large to fork.
    pytest.importorskip("psutil")
    if not sys.platform.startswith("linux"):
        pytest.skip("fork is used on Linux only")
    monkeypatch.setattr(_dask, "_FORK_RSS_FRACTION", 1e9)  # any caller is small enough
    assert _dask._local_cluster_method("auto", 2) == "fork"
    monkeypatch.setattr(_dask, "_FORK_RSS_FRACTION", 0.0)  # no caller is
    assert _dask._local_cluster_method("auto", 2) == "spawn"
    assert _dask._local_cluster_method("fork", 2) == "fork"  # asked for: honoured
    assert _dask._local_cluster_method("spawn", 2) == "spawn"


def test_dead_dask_worker_is_reported_with_the_task(dask_address):
    # Runs last: the nanny restarts the dead worker, so later tests would wait for it.
    # One task: with retries off, Dask also fails the tasks queued on the same worker,
    # so with several tasks the one named could be a bystander.
    with pytest.raises(ExecutionError, match=r"Dask worker died while running task 0 \(2\)"):
        execution.map_tasks(die_on_two, [2], engine="dask", address=dask_address)


def test_submit_to_a_broken_pool_fails_at_the_result_not_at_the_submit():
    # A pool broken by a dying worker refuses new work; the refusal must surface where
    # results are read (and be reported as a dead worker), not escape from the submit.
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor
    from concurrent.futures.process import BrokenProcessPool

    pool = ProcessPoolExecutor(max_workers=1, mp_context=multiprocessing.get_context("spawn"))
    try:
        with pytest.raises(BrokenProcessPool):
            pool.submit(die_on_two, 2).result(timeout=60)
        fut = _local._submit(pool, die_on_two, 3, 3)
        with pytest.raises(BrokenProcessPool):
            fut.result(timeout=5)
    finally:
        pool.shutdown(wait=True)


def test_ctrl_c_inside_interrupt_held_comes_after_the_block():
    """A SIGINT sent inside ``interrupt_held`` (the Dask cluster's start-up) is not raised
    there; it reaches the caller's handler once on the way out, the handler restored; a
    thread started inside inherits the block (POSIX pthread_sigmask(3): a new thread
    inherits its creator's signal mask)."""
    import threading

    from peaksift._processes import interrupt_held

    hits, masks = [], []
    old = signal.signal(signal.SIGINT, lambda signum, frame: hits.append(signum))
    try:
        with interrupt_held():
            os.kill(os.getpid(), signal.SIGINT)
            time.sleep(0.05)  # a pending handler would run here
            inside = list(hits)
            t = threading.Thread(
                target=lambda: masks.append(signal.pthread_sigmask(signal.SIG_BLOCK, [])))
            t.start()
            t.join()
        assert inside == [] and hits == [signal.SIGINT]
        assert signal.SIGINT in masks[0]
        assert signal.SIGINT not in signal.pthread_sigmask(signal.SIG_BLOCK, [])
        with pytest.raises(KeyboardInterrupt):  # Python's own handler: Ctrl-C as usual
            signal.signal(signal.SIGINT, signal.default_int_handler)
            with interrupt_held():
                os.kill(os.getpid(), signal.SIGINT)
    finally:
        signal.signal(signal.SIGINT, old)
