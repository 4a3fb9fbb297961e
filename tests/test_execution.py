"""Execution engines: serial, local processes and Dask give the same results.

One small LocalCluster (two single-threaded workers, no dashboard) serves the whole module.
"""

from __future__ import annotations

import logging
import os
import signal
import time

import numpy as np
import pytest

from peaksift import execution
from peaksift.errors import ConfigError, ExecutionError, PeaksiftError

distributed = pytest.importorskip("distributed")


@pytest.fixture(scope="module")
def dask_address():
    """A two-worker LocalCluster started by the engine's own helper, closed at module end."""
    logging.getLogger("distributed").setLevel(logging.CRITICAL)
    import dask

    # no retries, so a task that kills its worker fails at once (default: 3 more tries)
    with dask.config.set({"distributed.scheduler.allowed-failures": 0}):
        cluster = execution._start_local_cluster(2)
    try:
        yield cluster.scheduler_address
    finally:
        cluster.close()
    assert cluster.status.name == "closed"


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
    with pytest.raises(ExecutionError,
                       match=r"worker process died while running task 2 \(2\).*exit code 7"):
        execution.map_tasks(die_on_two, range(5), engine="processes", workers=2)
    assert _pool_children() == before


def _pool_children():
    """Pids of spawned worker processes of this test process still alive."""
    psutil = pytest.importorskip("psutil")
    alive = []
    for p in psutil.Process().children(recursive=True):
        try:
            if p.status() != psutil.STATUS_ZOMBIE and any("spawn_main" in a for a in p.cmdline()):
                alive.append(p.pid)
        except psutil.NoSuchProcess:
            pass
    return sorted(alive)


def test_keyboard_interrupt_stops_the_pool_and_propagates():
    def interrupt(signum, frame):
        raise KeyboardInterrupt

    before = _pool_children()
    old = signal.signal(signal.SIGALRM, interrupt)
    signal.setitimer(signal.ITIMER_REAL, 1.5)
    try:
        with pytest.raises(KeyboardInterrupt):
            execution.map_tasks(time.sleep, [5.0] * 4, engine="processes", workers=2)
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, old)
    assert _pool_children() == before


def test_unpicklable_function_is_refused_before_starting():
    with pytest.raises(ExecutionError, match="cannot be sent to worker processes"):
        execution.map_tasks(lambda s: s, [1, 2], engine="processes", workers=2)


def test_unknown_engine_suggests_closest():
    with pytest.raises(ConfigError, match="did you mean 'processes'"):
        execution.map_tasks(seeded_draw, SPECS, engine="proceses")


def test_bad_scheduler_address_is_reported():
    with pytest.raises(ExecutionError, match="cannot connect to the Dask scheduler"):
        execution._connect("tcp://127.0.0.1:1", 1, timeout="1s")


def test_local_cluster_started_and_closed_when_no_address():
    got = execution.map_tasks(seeded_draw, SPECS[:3], engine="dask", workers=1)
    for a, b in zip(got, _reference()[:3]):
        np.testing.assert_array_equal(a, b)


def test_dead_dask_worker_is_reported_with_the_task(dask_address):
    # Runs last: the nanny restarts the dead worker, so later tests would wait for it.
    with pytest.raises(ExecutionError, match=r"Dask worker died while running task 2 \(2\)"):
        execution.map_tasks(die_on_two, range(5), engine="dask", address=dask_address)
