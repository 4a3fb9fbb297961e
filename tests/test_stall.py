"""The watch for a stuck worker (peaksift._stall): a deadlocked process is named, a slow,
sleeping, waiting-on-input or CPU-starved one never is; in the process engine's pool, the
toy engine's ``workers=`` pool, a local Dask cluster and the stages beside a search.

Outside references: Linux ``proc(5)`` (``/proc/<pid>/task/<tid>/stat``: field 3 the state,
R running or runnable, S sleeping, D uninterruptible; fields 14-15 the CPU time in clock
ticks; ``.../syscall``: the number of the system call the thread is blocked in),
``futex(2)`` (what a thread blocked on a lock waits in), ``sched(7)`` (a nice 19 thread
sharing a CPU with a nice 0 one gets ~1.5% of it: weights 15 and 1024) and
``sched_setaffinity(2)``.  Times here are margins, not measurements: the watch is asked
about a child that has waited the limit several times over.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time

import pytest

from peaksift import _stall, execution
from peaksift.errors import ExecutionError
from peaksift.execution import _local

pytestmark = pytest.mark.skipif(
    not sys.platform.startswith("linux") or _stall.snapshot(os.getpid()) is None,
    reason="reads /proc/<pid>/task/<tid>/syscall")

CHILDREN = {
    # blocked for good on a lock it holds itself: futex(2), no CPU
    "deadlocked": "import threading; l = threading.Lock(); l.acquire(); print(1, flush=True); "
                  "l.acquire()",
    "sleeping": "import time; print(1, flush=True); time.sleep(60)",
    # waiting for input that does not come (a slow download looks so): select(2)
    "waiting on input": "import select; print(1, flush=True); select.select([], [], [], 60)",
    "busy": "print(1, flush=True)\nwhile True: pass",
    # a task waiting (futex) on a helper thread of its own that sleeps between attempts,
    # as a retry with back-off does: healthy, its helper wakes to try again
    "waiting on a helper in back-off": (
        "import threading, time; t = threading.Thread(target=time.sleep, args=(60,)); "
        "t.start(); print(1, flush=True); t.join()"),
}


def _start(code: str, nice: int = 0, cpu: int | None = None) -> subprocess.Popen:
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE)
    if cpu is not None:
        os.sched_setaffinity(proc.pid, {cpu})
    if nice:
        os.setpriority(os.PRIO_PROCESS, proc.pid, nice)
    assert proc.stdout.readline().strip() == b"1"  # running its code
    return proc


def _watch_for(pids: list[int], limit: float, seconds: float) -> tuple[int, float] | None:
    watch = _stall.StallWatch(limit)
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        found = watch.stuck(pids)
        if found is not None:
            return found
        time.sleep(0.2)
    return None


@pytest.mark.parametrize("kind", list(CHILDREN))
def test_only_a_deadlocked_process_is_called_stuck(kind):
    proc = _start(CHILDREN[kind])
    try:
        found = _watch_for([proc.pid], limit=1.0, seconds=4.0)
    finally:
        proc.kill()
        proc.wait()
    if kind == "deadlocked":
        assert found is not None and found[0] == proc.pid and found[1] >= 1.0
    else:
        assert found is None


def test_the_parent_watch_thread_is_the_one_allowed_to_sleep():
    """A worker's parent-watch thread (``die_with_parent``) sleeps in ``clock_nanosleep``
    while its task is blocked on a lock: stuck; the same with an unnamed sleeping thread
    (a back-off above): not.  The watch tells the two apart by the thread's name, which a
    thread sets for itself in ``/proc/<pid>/task/<tid>/comm`` (proc(5))."""
    code = ("import os, threading; from peaksift._processes import die_with_parent; "
            "die_with_parent(os.getppid()); l = threading.Lock(); l.acquire(); "
            "print(1, flush=True); l.acquire()")
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE,
                            env={**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)})
    try:
        assert proc.stdout.readline().strip() == b"1"
        found = _watch_for([proc.pid], limit=1.0, seconds=4.0)
    finally:
        proc.kill()
        proc.wait()
    assert found is not None and found[0] == proc.pid


def test_a_cpu_starved_process_is_not_called_stuck():
    """A busy child at nice 19 sharing one CPU with a busy child at nice 0 gets about 1.5%
    of it (sched(7)): over the watch's window it used almost no CPU time, yet it is not
    stuck -- it is runnable (state R) whenever it is not running."""
    cpu = min(os.sched_getaffinity(0))
    hog = _start(CHILDREN["busy"], cpu=cpu)
    starved = _start(CHILDREN["busy"], nice=19, cpu=cpu)
    try:
        found = _watch_for([starved.pid], limit=1.0, seconds=4.0)
    finally:
        for p in (hog, starved):
            p.kill()
            p.wait()
    assert found is None


def deadlock(seconds: float) -> float:
    import threading

    lock = threading.Lock()
    lock.acquire()
    lock.acquire()  # never returns
    return seconds  # pragma: no cover


def busy(seconds: float) -> float:
    t0 = time.monotonic()
    while time.monotonic() - t0 < seconds:
        pass
    return seconds


def _pool_children() -> set[int]:
    me = os.getpid()
    out = set()
    for d in os.listdir("/proc"):
        if d.isdigit():
            try:
                with open(f"/proc/{d}/stat") as f:
                    fields = f.read().rsplit(")", 1)[1].split()
            except OSError:
                continue
            if int(fields[1]) == me and fields[0] != "Z":
                out.add(int(d))
    return out


@pytest.fixture
def watch_test_tasks(monkeypatch):
    """The watch applies to peaksift's own functions: here to the tests' too, with a short
    limit."""
    monkeypatch.setattr(_local, "watched", lambda func: True)
    monkeypatch.setenv("PEAKSIFT_STALL_SECONDS", "3")


def test_a_stuck_worker_ends_the_run_with_an_error_naming_its_task(watch_test_tasks, capfd):
    before = _pool_children()
    with pytest.raises(ExecutionError) as raised:
        execution.map_tasks(deadlock, [0.0], engine="processes", workers=2)
    text = str(raised.value)
    assert "is stuck on task 0" in text and "[1 of 1]" in text
    assert "PEAKSIFT_STALL_SECONDS" in text
    time.sleep(0.5)
    assert _pool_children() <= before  # the stuck worker was stopped
    err = capfd.readouterr().err
    assert "in deadlock" in err  # its stack (faulthandler) names the function it hangs in


def slow(seconds: float) -> float:
    """Busy for half of ``seconds``, then waiting on input (select(2)) for the other half."""
    import select

    busy(seconds / 2)
    select.select([], [], [], seconds / 2)
    return seconds


def test_slow_healthy_tasks_are_left_to_finish(watch_test_tasks):
    """Tasks 3x longer than the limit, busy or waiting on input, finish with their results."""
    assert execution.map_tasks(slow, [9.0, 18.0], engine="processes", workers=2) == [9.0, 18.0]


def test_the_limit_from_the_environment(monkeypatch):
    for text, limit in (("", _stall.DEFAULT_LIMIT), ("30", 30.0), ("0", 0.0), ("-1", 0.0),
                        ("nan", 0.0), ("soon", 0.0)):
        monkeypatch.setenv("PEAKSIFT_STALL_SECONDS", text)
        assert _stall.limit_from_env() == limit


def test_the_watch_keeps_to_peaksift_functions():
    import functools

    from peaksift.stats.toys import run_toy_batch

    assert _stall.watched(run_toy_batch) and _stall.watched(functools.partial(run_toy_batch))
    assert not _stall.watched(busy) and not _stall.watched(time.sleep)


# ------------------------------------------------------------ stages beside a search
_PARENT = os.getpid()


def _doubled_but_stuck_in_a_child(x: int) -> int:
    if os.getpid() != _PARENT:  # in the forked child: waits forever
        deadlock(0.0)
    return 2 * x


def test_a_stuck_stage_beside_is_stopped_and_computed_here(monkeypatch, caplog):
    from peaksift.search import parallel

    if not parallel.forking():
        pytest.skip("stages are not forked here")
    monkeypatch.setenv("PEAKSIFT_STALL_SECONDS", "2")
    job = parallel.Beside(_doubled_but_stuck_in_a_child, 21)
    pid = job._proc.pid
    with caplog.at_level("WARNING", logger="peaksift.search"):
        assert job.result() == 42
    assert f"pid {pid}" in caplog.text and "stuck" in caplog.text
    assert pid not in _pool_children()


def test_a_stuck_figure_process_is_stopped_and_its_figures_drawn_here(monkeypatch, tmp_path):
    from peaksift import plotting
    from peaksift.search import parallel

    if not parallel.forking():
        pytest.skip("stages are not forked here")

    def figures(result, outdir, names, **kw):
        if os.getpid() != _PARENT:  # a drawer (the first or the one it forked)
            deadlock(0.0)
        return {n: outdir / f"{n}.png" for n in names}

    monkeypatch.setattr(plotting, "search_figures", figures)
    monkeypatch.setenv("PEAKSIFT_STALL_SECONDS", "2")
    worker = parallel.FigureWorker(tmp_path)
    pid = worker._proc.pid
    worker.draw(["spectrum", "scan"], None)
    assert worker.finish() == {"spectrum": tmp_path / "spectrum.png",
                               "scan": tmp_path / "scan.png"}
    assert pid not in _pool_children()


# ------------------------------------------------------------ the toy engine's own pool
def _toys_stuck_in_a_child(spec):
    from peaksift.stats.toys import run_toy_batch

    if spec.first == 0 and os.getpid() != _PARENT:  # the first batch, in a pool worker
        deadlock(0.0)
    return run_toy_batch(spec)


def _toys_after_a_wait(spec):
    """Waits on input (select(2)) for 4 s, then computes the batch: slow, healthy."""
    import select

    from peaksift.stats.toys import run_toy_batch

    select.select([], [], [], 4.0)
    return run_toy_batch(spec)


def _toy_model():
    import numpy as np

    from peaksift import MassHistogram
    from peaksift.stats.scan_inputs import _prepare_model

    x = 100.0 + np.random.default_rng(21).exponential(120.0, 20_000)
    h = MassHistogram(bins=200, range=(100.0, 500.0)).fill(x)
    model, _, _ = _prepare_model(h, "gaussian", "exponential", np.linspace(120.0, 480.0, 8),
                                 relative_resolution=0.01, window=None, natural_width=None,
                                 blind=None, signal_params=None, bins=None)
    return model


@pytest.fixture
def watch_test_toys(monkeypatch):
    from peaksift.stats import toys

    monkeypatch.setattr(toys, "watched", lambda func: True)
    monkeypatch.setenv("PEAKSIFT_STALL_SECONDS", "3")


def test_a_stuck_toy_worker_ends_the_toys_with_an_error_naming_its_batch(watch_test_toys,
                                                                          capfd):
    from peaksift.stats.toys import run_toys

    model = _toy_model()
    before = _pool_children()
    with pytest.raises(ExecutionError) as raised:
        run_toys(model, 20, seed=3, batch=10, workers=2, progress=False,
                 batch_function=_toys_stuck_in_a_child)
    text = str(raised.value)
    assert "is stuck on toy batch 1 of 2 (toys 0-9" in text, text
    assert "PEAKSIFT_STALL_SECONDS" in text and "workers=1" in text
    time.sleep(0.5)
    assert _pool_children() <= before  # every toy worker was stopped
    assert "in deadlock" in capfd.readouterr().err  # the stuck worker's stack (faulthandler)


def test_slow_healthy_toy_batches_are_left_to_finish(watch_test_toys):
    """Batches that wait on input longer than the limit finish, and give the toys of the
    serial loop (reference: the same batches computed in this process, per-toy seeding;
    1e-9: single-threaded BLAS in the workers may round products differently)."""
    import numpy as np

    from peaksift.stats.toys import run_toys

    model = _toy_model()
    serial = run_toys(model, 20, seed=3, batch=10, progress=False)
    pooled = run_toys(model, 20, seed=3, batch=10, workers=2, progress=False,
                      batch_function=_toys_after_a_wait)
    assert np.allclose(pooled, serial, rtol=1e-9, atol=1e-9)


# ------------------------------------------------------------ a local Dask cluster
def deadlock_on_zero(x: float) -> float:
    """Task 0 deadlocks (in the Dask worker's task thread); the others wait on input for
    ``|x|`` seconds (select(2)): slow, healthy; a negative ``x`` waits (futex) on a thread
    of its own that waits on input, as a download through an event-loop thread does."""
    import select
    import threading

    if x == 0:
        deadlock(0.0)
    if x < 0:
        helper = threading.Thread(target=select.select, args=([], [], [], -x))
        helper.start()
        helper.join()
    else:
        select.select([], [], [], x)
    return x


@pytest.fixture
def watch_dask_tasks(monkeypatch):
    pytest.importorskip("distributed")
    from peaksift.execution import _dask

    monkeypatch.setattr(_dask, "watched", lambda func: True)
    monkeypatch.setenv("PEAKSIFT_STALL_SECONDS", "3")


def test_a_stuck_dask_task_ends_the_run_with_an_error_naming_it(watch_dask_tasks, capfd):
    """A local cluster's worker whose task thread deadlocks while its event loop runs on
    (heart-beats, sockets): the run ends naming the task, and the cluster's processes end."""
    before = _pool_children()
    with pytest.raises(ExecutionError) as raised:
        execution.map_tasks(deadlock_on_zero, [0.0, 1.0], engine="dask", workers=2)
    text = str(raised.value)
    assert "Dask worker process" in text and "is stuck on task 0" in text, text
    assert "PEAKSIFT_STALL_SECONDS" in text and "fewer workers" in text
    deadline = time.monotonic() + 30  # generous: the cluster's close on a loaded machine
    while _pool_children() - before and time.monotonic() < deadline:
        time.sleep(0.2)
    assert not _pool_children() - before  # the local cluster's workers were ended
    assert "in deadlock" in capfd.readouterr().err  # the stuck worker's stack


def test_slow_healthy_dask_tasks_are_left_to_finish(watch_dask_tasks):
    """Tasks that wait on input for over twice the limit, themselves or through a thread
    they started, finish with their results."""
    assert execution.map_tasks(deadlock_on_zero, [7.0, -8.0], engine="dask",
                               workers=2) == [7.0, -8.0]
