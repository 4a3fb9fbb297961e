"""The Dask engine: a client the user holds, a running scheduler, or a local cluster started
for the call (:class:`DaskSession`), and the runner that keeps the cluster busy."""

from __future__ import annotations

import contextlib
import logging
import os
import queue
import signal
import sys
import time
import uuid
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

from .._processes import (
    die_with_parent,
    quiet_fork,
    resolve_start_method,
    signals_held,
    worker_start,
)
from .._stall import watched
from ..errors import ExecutionError, PeaksiftError
from ._local import (
    _INFLIGHT_PER_WORKER,
    _dead_worker_error,
    _install_exit_fast,
    _Run,
)

#: A forked worker's resident memory includes the pages it shares with this process, and
#: Dask's memory monitor pauses (80%) or restarts (95%) a worker by that figure.  ``"auto"``
#: forks a local cluster's workers only while this process is below this fraction of each
#: worker's memory limit (LocalCluster's default: the memory available to this process,
#: cgroup limits included, over the workers), leaving the rest for the chunk work (~0.4 GiB
#: per worker at the default chunk size).
_FORK_RSS_FRACTION = 0.3


def _local_cluster_method(start_method: str, workers: int) -> str:
    """How a local cluster's workers start: ``start_method`` resolved, except that
    ``"auto"`` spawns when this process is too large to fork (see ``_FORK_RSS_FRACTION``)."""
    method = resolve_start_method(start_method)
    if start_method != "auto" or method != "fork":
        return method
    try:
        import psutil  # comes with distributed
        from distributed.system import MEMORY_LIMIT
    except ImportError:  # pragma: no cover
        return "spawn"
    per_worker = MEMORY_LIMIT / max(1, workers)
    rss = psutil.Process().memory_info().rss
    return "fork" if rss < _FORK_RSS_FRACTION * per_worker else "spawn"


#: the one line a user without the optional extra sees (the README says the same)
MISSING_DASK = ("engine 'dask' needs the optional 'distributed' extra (the dask and "
                "distributed packages), which is not installed: pip install "
                "'peaksift[distributed]' (from a checkout: pip install '.[distributed]'), or "
                "use engine 'serial' or 'processes'")


def require_dask() -> None:
    """Raise :class:`ExecutionError` naming the extra when dask/distributed are missing."""
    try:
        import dask  # noqa: F401
        import distributed  # noqa: F401
    except ImportError:
        raise ExecutionError(MISSING_DASK) from None


def _local_worker_setup() -> None:
    """Run on every worker of a local cluster we start, as its first task: the signals of
    every worker of ours (Ctrl-C left to this process, SIGTERM at its default action and
    unblocked: it started blocked, see :class:`DaskSession`), one thread per library
    (Arrow's count from the environment: a forked worker inherits this process's pool
    size), a fast exit, and an end with this process however it ends: the nannies of a
    local cluster live in this process, and a worker whose parent was killed waited on
    distributed's own time-outs, several seconds (forked workers hold each other's
    parent-alive pipes open, so none sees its pipe close)."""
    import os

    from ._dask_watch import worker_setup

    worker_start()
    die_with_parent(os.getppid())
    _install_exit_fast()
    worker_setup()  # after the threads above: the worker's own, left out of the stall watch


def _start_local_cluster(workers: int, start_method: str = "auto") -> Any:
    """A LocalCluster of ``workers`` single-threaded processes, quiet, no dashboard.

    The nannies start their workers with ``start_method`` (``"auto"``: fork on Linux when
    this process is small, see :func:`_local_cluster_method` and the module guide): forked
    from this process, a worker starts with distributed, the chunk work and its kernels
    already loaded.

    Dask's nannies start workers with ``MALLOC_TRIM_THRESHOLD_=65536``, which makes glibc
    return freed memory to the system at once: every large temporary array of a chunk is
    then mapped afresh, page by page (measured here: ~9x the page faults and ~40% more CPU
    per chunk).  Workers of the clusters we start keep the default allocator behaviour.
    Their statistical profiler (a thread sampling the running task every 10 ms, for the
    dashboard) is off too, since these clusters have no dashboard (~5% of a chunk's CPU), and
    the diagnostic event-loop tick (every 20 ms) and system monitor (every 0.5 s) run once a
    second and every ten: on two cores the scheduler's and workers' housekeeping competes
    with the chunks (measured: ~0.1 s of a 2.3 s run).
    """
    import logging

    import dask
    from distributed import LocalCluster

    env = dict(dask.config.get("distributed.nanny.pre-spawn-environ", {}) or {})
    env.pop("MALLOC_TRIM_THRESHOLD_", None)
    method = _local_cluster_method(start_method, workers)
    with dask.config.set({"distributed.nanny.pre-spawn-environ": env,
                          "distributed.worker.multiprocessing-method": method,
                          "distributed.worker.profile.enabled": False,
                          "distributed.admin.tick.interval": "1s",
                          "distributed.admin.system-monitor.interval": "10s"}), quiet_fork():
        # dashboard off; the scheduler's small HTTP endpoint takes a free port, not 8787
        return LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                            dashboard_address=None, silence_logs=logging.ERROR,
                            scheduler_kwargs={"dashboard": False, "dashboard_address": ":0"})


class DaskSession:
    """The Dask client one run uses, and what to close after it.

    In order of preference: the ``client`` given; a scheduler ``address``; the client that is
    current in this process (``distributed.get_client()``, e.g. made in a notebook), used
    with a note in ``info``; else a local cluster started here and closed by :meth:`close`.
    A user's client and cluster are never closed.
    """

    def __init__(self, address: str | None, client: Any, workers: int, method: str,
                 info: dict[str, Any], timeout: str = "30s") -> None:
        require_dask()
        from distributed import Client

        self.cluster: Any = None
        self.client: Any = None
        self.own_client = False
        if client is None and address is None:
            client = _current_client()
            if client is not None:
                info["note"] = (f"used the Dask client current in this process (scheduler "
                                f"{client.scheduler.address}); pass client=... or an address "
                                "to choose another")
        if client is not None:
            if not hasattr(client, "submit") or not hasattr(client, "scheduler"):
                raise ExecutionError(f"client must be a distributed.Client, got "
                                     f"{type(client).__name__}")
            self.client = client
            info["address"] = client.scheduler.address
        elif address is not None:
            try:
                self.client = Client(address, set_as_default=False, timeout=timeout)
            except (OSError, TimeoutError) as exc:
                raise ExecutionError(
                    f"cannot connect to the Dask scheduler at {address!r} "
                    f"({type(exc).__name__}: {exc}); check the address and that the scheduler "
                    "is running, or leave the address unset to start a local cluster"
                ) from None
            self.own_client = True
        else:
            # SIGTERM held while the workers start (as around every fork of ours): forked
            # from a thread that blocks it, each worker starts with it blocked until
            # _local_worker_setup sets the default action, and a SIGTERM meanwhile is
            # raised once the cluster is in hand, so that it is closed, never left half
            # started (a stray worker, the interpreter's exit hanging on it)
            # (a worker that a SIGTERM to the whole process group ends as it sets up makes
            # the scheduler log a failed broadcast: the run ends anyway, quietly)
            # Ctrl-C likewise (signals_held holds both): it reaches the whole process group, and a
            # worker between its fork and _local_worker_setup would print a traceback, a
            # KeyboardInterrupt inside LocalCluster's start-up leave workers nothing stops
            # Spawned workers: multiprocessing's resource tracker, started with the first
            # spawned process, unblocks SIGINT and SIGTERM in the thread that starts it
            # (Dask's event loop) once it is up, so the workers spawned after it would start
            # without the block and print a KeyboardInterrupt from their start-up; started
            # here first, it leaves the block alone
            method = _local_cluster_method(method, workers)
            if method != "fork":
                from multiprocessing import resource_tracker

                resource_tracker.ensure_running()
            try:
                with signals_held(), _quiet_distributed():
                    self.cluster = _start_local_cluster(workers, method)
                    self.client = Client(self.cluster, set_as_default=False)
                    self.own_client = True
                    self.client.run(_local_worker_setup)  # our own workers only
            except BaseException:
                self.close(abort=True)
                raise
            info["address"] = self.cluster.scheduler_address
        _check_versions(self.client)

    def stop_workers(self) -> None:
        """End the worker processes of the local cluster started here at once, tasks in
        flight included: the run is being abandoned (Ctrl-C, SIGTERM, an error).  Closing
        the cluster politely would wait for each running task (Dask gives a worker 4 s,
        then kills it with a warning) and let the workers log their cancelled tasks.  A
        user's cluster is never touched."""
        if self.cluster is None:
            return
        for nanny in list(getattr(self.cluster, "workers", {}).values()):
            with contextlib.suppress(AttributeError, ProcessLookupError, TypeError):
                nanny.close_gracefully(reason="peaksift run stopped")  # do not restart it
                pid = nanny.pid
                if pid:
                    os.kill(pid, signal.SIGKILL)

    def close(self, abort: bool = False) -> None:
        """Close the client and the local cluster started here.  ``abort``: the run is
        being abandoned; end the local workers at once (:meth:`stop_workers`) and keep
        the shutdown's messages about them (lost workers, cancelled tasks) quiet."""
        if not abort:
            self._close()
            return
        self.stop_workers()
        with _quiet_distributed():
            self._close()

    def _close(self) -> None:
        if self.own_client and self.client is not None:
            self.client.close()
        if self.cluster is not None:
            self.cluster.close()


@contextlib.contextmanager
def _quiet_distributed() -> Any:
    """Dask's own log messages off while inside (a local cluster starting or abandoned:
    what it would say about lost workers and cancelled tasks is no news to the user)."""
    log = logging.getLogger("distributed")
    level = log.level
    log.setLevel(logging.CRITICAL)
    try:
        yield
    finally:
        log.setLevel(level)


def _current_client() -> Any:
    try:
        from distributed import get_client

        return get_client()
    except (ValueError, ImportError):  # no client in this process
        return None


def _peaksift_version() -> str:
    from .. import __version__

    return __version__


def _check_versions(client: Any) -> None:
    """Refuse workers (present now) whose peaksift differs from this process's."""
    ours = _peaksift_version()
    try:
        theirs = client.run(_peaksift_version)
    except ModuleNotFoundError as exc:
        raise ExecutionError(f"the Dask workers cannot import peaksift ({exc}); install "
                             f"peaksift {ours} in every worker's environment") from None
    bad = {w: v for w, v in theirs.items() if v != ours}
    if bad:
        w, v = next(iter(bad.items()))
        raise ExecutionError(
            f"Dask worker {w} runs peaksift {v} but this process runs {ours} ({len(bad)} of "
            f"{len(theirs)} workers differ); install the same peaksift version on every worker "
            "so that results do not depend on where a chunk ran")


@dataclass(frozen=True)
class _Versioned:
    """The task function with the client's peaksift version: a worker that joins later with
    another version refuses the task instead of computing it differently."""

    func: Any
    version: str

    def __call__(self, task: Any) -> Any:
        here = _peaksift_version()
        if here != self.version:
            raise ExecutionError(
                f"this Dask worker runs peaksift {here} but the client runs {self.version}; "
                "install the same peaksift version on every worker")
        return self.func(task)


def _dask_threads(client: Any) -> int:
    try:
        return max(1, sum(int(v) for v in client.nthreads().values()))
    except (KeyError, TypeError, AttributeError, OSError):  # pragma: no cover
        return 1


#: how often the cluster's thread count is asked for while waiting (workers come and go)
_RESIZE_SECONDS = 0.2
#: results that finished early may wait for their predecessors, up to this many per thread
_WAITING_PER_THREAD = 4


def _run_dask(func: Callable[[Any], Any], tasks: Sequence[Any], workers: int,
              address: str | None, describe: Callable[[int], str], info: dict[str, Any],
              method: str, client: Any = None, session: DaskSession | None = None) -> _Run:
    """Yield ``(i, ok, value)`` in task order while the cluster works in any order.

    Tasks in flight follow the cluster's thread count (asked again every
    ``_RESIZE_SECONDS`` while waiting), so workers that join late get work at once; results
    are taken as they complete and handed on in task order (the reduce stays bit-identical
    to serial); at most ``_WAITING_PER_THREAD`` x threads results wait for a slow
    predecessor, which bounds memory."""
    n = len(tasks)
    own = session is None
    if own:
        session = DaskSession(address, client, workers, method, info)
    cl = session.client
    info["address"] = cl.scheduler.address
    running: dict[int, Any] = {}
    done: dict[int, tuple[bool, Any]] = {}
    finished: queue.SimpleQueue[int] = queue.SimpleQueue()  # filled by the client's thread
    try:
        task_func = _Versioned(func, _peaksift_version())
        token = uuid.uuid4().hex[:12]
        watch = _watch(session, func, f"peaksift-{token}-", n, describe)
        nxt = 0
        emit = 0
        threads = _dask_threads(cl)
        last = time.monotonic()
        info["workers"] = threads
        while emit < n:
            if time.monotonic() - last > _RESIZE_SECONDS:
                threads, last = _dask_threads(cl), time.monotonic()
                info["workers"] = max(info["workers"], threads)
            while (nxt < n and len(running) < _INFLIGHT_PER_WORKER * threads
                   and nxt - emit < _WAITING_PER_THREAD * threads):
                fut = cl.submit(task_func, tasks[nxt], key=f"peaksift-{token}-{nxt}",
                                pure=False)
                fut.add_done_callback(lambda _f, i=nxt: finished.put(i))
                running[nxt] = fut
                nxt += 1
            if emit not in done:
                try:
                    ready = [finished.get(timeout=_RESIZE_SECONDS)]
                except queue.Empty:
                    if watch is not None:
                        watch.look()  # a stuck task: an ExecutionError, the workers stopped
                    continue
                while not finished.empty():
                    ready.append(finished.get())
                for i in ready:
                    done[i] = _outcome(running, i, n, describe)
            while emit in done:
                ok, value = done.pop(emit)
                yield emit, ok, value
                emit += 1
    finally:
        # an exception here (an error, Ctrl-C, SIGTERM, or close() before the end) abandons
        # the run: the local workers end first, so no cancelled task is waited for
        abandoned = sys.exc_info()[0] is not None
        if abandoned:
            session.stop_workers()
        if running:
            with contextlib.suppress(OSError, RuntimeError, TimeoutError):  # scheduler gone
                cl.cancel(list(running.values()))
        if own:
            session.close(abort=abandoned)


def _watch(session: DaskSession, func: Callable[[Any], Any], prefix: str, n: int,
           describe: Callable[[int], str]) -> Any:
    """The stuck-worker watch over a local cluster started here, for peaksift's own tasks
    (:mod:`peaksift.execution._dask_watch`); None for a user's cluster or function."""
    if session.cluster is None or not watched(func):
        return None
    from ._dask_watch import DaskWatch

    return DaskWatch(session.client, prefix, n, describe)


def _outcome(running: dict[int, Any], i: int, n: int, describe: Callable[[int], str]
             ) -> tuple[bool, Any]:
    from distributed import KilledWorker

    fut = running.pop(i)
    try:
        return True, fut.result()
    except PeaksiftError as exc:
        return False, exc
    except KilledWorker as exc:
        # tasks queued on the same worker may have failed with it; name them too
        also = [j for j, f in running.items() if f.status == "error"]
        detail = f"KilledWorker: {exc}" + (
            f" (tasks {', '.join(map(str, also))} failed with it)" if also else "")
        raise _dead_worker_error(
            "Dask worker", i, n, describe, [i, *running], detail,
            "the worker process running it was killed or crashed (out of memory?): "
            "lower chunk_events, or run engine='serial' to see the underlying error",
        ) from None
    except ModuleNotFoundError as exc:
        if "peaksift" in str(exc):
            raise ExecutionError(
                f"the Dask workers cannot import peaksift ({exc}); install the same "
                "peaksift version in every worker's environment"
            ) from None
        raise
    finally:
        fut.release()
