"""Local worker processes: how they start (fork or spawn), the serial and process-pool
runners, and the diagnosis of a worker that died.

Each runner yields ``(index, ok, value)`` strictly in task order; ``ok=False`` carries a
:class:`~peaksift.errors.PeaksiftError` raised by the task (the caller decides: raise it, or
skip a bad file).  Failures of the machinery itself (a dead worker) raise
:class:`~peaksift.errors.ExecutionError`.
"""

from __future__ import annotations

import atexit
import contextlib
import multiprocessing
import os
import pickle
import signal
import sys
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from typing import Any

from .._processes import WORKER_ENV, process_pool, quiet_fork, stop_pool, worker_start
from .._stall import StallWatch, drain, result_watched, tracked, watched, worker_tracking
from ..errors import ExecutionError, PeaksiftError

#: Chunks allowed in flight (running, queued or waiting to be reduced) per worker.
_INFLIGHT_PER_WORKER = 2


def _default_workers() -> int:
    return max(1, os.cpu_count() or 1)


def _prepare_to_fork(func: Callable[[Any], Any]) -> None:
    """Get this process ready to be forked: whatever ``func.prepare`` loads (the chunk
    work's imports and numba kernels) is then inherited by every worker."""
    prepare = getattr(func, "prepare", None)
    if callable(prepare):
        prepare()


def _exit_fast() -> None:
    """Last step of a worker process we started: end without the interpreter's final
    clean-up.  A worker that has delivered its results has nothing left to save, and
    finalising numba's compiler objects alone takes about a second per process, which the
    pool's (or the local cluster's) shutdown would otherwise wait for."""
    import logging

    logging.shutdown()
    for stream in (sys.stdout, sys.stderr):
        with contextlib.suppress(OSError, ValueError, AttributeError):
            stream.flush()
    os._exit(0)


def _install_exit_fast() -> None:
    # registered late, so it runs first among the exit handlers; the ones it skips are
    # multiprocessing's (already run by then for pool workers) and module finalisers
    atexit.register(_exit_fast)


def _worker_init(track: Any) -> None:
    """Pool workers: signals and thread counts (:func:`peaksift._processes.worker_start`),
    the task-start records and the stacks on request (:func:`peaksift._stall.worker_tracking`),
    and a fast exit."""
    worker_start()
    worker_tracking(track)
    _install_exit_fast()


def _pool(size: int, method: str, track: Any) -> Any:
    """A process pool of ``size`` workers started with ``method`` ("fork" or "spawn")."""
    return process_pool(size, method, initializer=_worker_init, initargs=(track,))


@contextlib.contextmanager
def _spawn_env(env: Mapping[str, str]) -> Iterator[None]:
    """Set ``env`` in ``os.environ`` (keeping values the user set) while workers are spawned;
    spawned processes take the environment of the moment they start."""
    added = [k for k in env if k not in os.environ]
    os.environ.update({k: env[k] for k in added})
    try:
        yield
    finally:
        for k in added:
            os.environ.pop(k, None)


def _check_picklable(obj: Any, what: str) -> None:
    try:
        pickle.dumps(obj)
    except (pickle.PicklingError, TypeError, AttributeError) as exc:
        raise ExecutionError(
            f"{what} cannot be sent to worker processes ({type(exc).__name__}: {exc}); "
            "use cut strings or module-level functions instead of lambdas and local "
            "functions, or engine='serial'"
        ) from None


# Each runner yields (index, ok, value) strictly in task order: ok=False carries a
# PeaksiftError raised by the task (the caller decides: raise it, or skip a bad file).
# Failures of the machinery itself (a dead worker, a lost scheduler) raise ExecutionError.
_Run = Iterator[tuple[int, bool, Any]]


def _run_serial(func: Callable[[Any], Any], tasks: Sequence[Any]) -> _Run:
    for i, task in enumerate(tasks):
        try:
            value = func(task)
        except PeaksiftError as exc:
            yield i, False, exc
        else:
            yield i, True, value


def _dead_worker_error(kind: str, i: int, n: int, describe: Callable[[int], str],
                       running: Sequence[int], detail: str, hint: str) -> ExecutionError:
    others = [j for j in running if j != i]
    also = f" (with {len(others)} other task(s) in flight)" if others else ""
    return ExecutionError(
        f"a {kind} died while running {describe(i)} [{i + 1} of {n}]{also}: {detail}; {hint}"
    )


def _broken_pool_error(procs: dict[int, Any], track: Any, started: dict[int, int],
                       unfinished: set[int], n: int, describe: Callable[[int], str],
                       method: str) -> ExecutionError:
    """The error for a process pool broken by a dying worker: the task it ran when the pool
    can tell, otherwise the tasks in flight."""
    hint = ("it was killed or crashed: lower chunk_events or workers, or run "
            "engine='serial' to see the underlying error")
    drain(track, started)
    if method == "spawn" and not started:
        # no worker got as far as a task: most often a script without the main guard,
        # which spawned workers re-run on import (and which refuses to start them)
        hint += ("; no worker started a task: with start_method 'spawn' a script must run "
                 "peaksift under `if __name__ == \"__main__\":`")
    found = _culprit(procs, track, started, unfinished)
    if found is None:
        return _dead_worker_unknown("worker process", n, describe, sorted(unfinished), hint)
    j, detail = found
    return _dead_worker_error("worker process", j, n, describe, sorted(unfinished), detail,
                              hint)


def _submit(pool: Any, func: Callable[[Any], Any], index: int, task: Any) -> Any:
    """Submit one task to the process pool.  A pool that a dying worker has already broken
    refuses new work; the refusal comes back as a failed future, so it surfaces where the
    results are read and is reported like any other dead worker."""
    from concurrent.futures import Future
    from concurrent.futures.process import BrokenProcessPool

    try:
        return pool.submit(tracked, func, index, task)
    except BrokenProcessPool as exc:
        failed: Future = Future()
        failed.set_exception(exc)
        return failed


def _dead_worker_unknown(kind: str, n: int, describe: Callable[[int], str],
                         running: Sequence[int], hint: str) -> ExecutionError:
    """A worker died, but the pool did not tell which of the tasks in flight it ran."""
    listed = ", ".join(f"{describe(j)} [{j + 1} of {n}]" for j in running[:6])
    more = f" and {len(running) - 6} more" if len(running) > 6 else ""
    return ExecutionError(
        f"a {kind} died while one of these tasks was in flight: {listed}{more} "
        f"(the pool did not report which); {hint}"
    )


def _exit_text(code: int | None) -> str:
    if code is None:
        return "exit code unknown"
    if code < 0:
        try:
            name = signal.Signals(-code).name
        except ValueError:
            name = f"signal {-code}"
        return f"killed by {name}" + (" (out of memory?)" if -code == signal.SIGKILL else "")
    return f"exit code {code}"


def _culprit(procs: dict[int, Any], track: Any, started: dict[int, int],
             unfinished: set[int]) -> tuple[int, str] | None:
    """The task whose worker died first: it started last on a process that did not exit
    by the pool's own SIGTERM."""
    for attempt in range(3):  # start records and exit codes can lag the pool's notice
        drain(track, started)
        found = _dead_tasks(procs, started, unfinished)
        if found:
            return min(found)
        time.sleep(0.2 * (attempt + 1))
    return None


def _dead_tasks(procs: dict[int, Any], started: dict[int, int],
                unfinished: set[int]) -> list[tuple[int, str]]:
    found = []
    for pid, index in started.items():
        proc = procs.get(pid)
        if proc is None or index not in unfinished:
            continue
        proc.join(timeout=2)
        code = proc.exitcode
        if code is not None and code != -signal.SIGTERM:
            found.append((index, _exit_text(code)))
    return found


def _result(fut: Any, watch: StallWatch | None, track: Any, started: dict[int, int],
            i: int, pending: dict[int, Any], n: int, describe: Callable[[int], str]) -> Any:
    """``fut.result()`` of task ``i``, looking every few seconds that the workers running
    it and the ``pending`` tasks are not stuck (:func:`peaksift._stall.result_watched`); a
    stuck one is an :class:`ExecutionError` naming its task."""
    return result_watched(
        fut, watch, track, started,
        lambda: {i, *(k for k, f in pending.items() if not f.done())},
        lambda pid, seconds, j: _stuck_error(pid, seconds, j, n, describe))


def _stuck_error(pid: int, seconds: float, i: int, n: int,
                 describe: Callable[[int], str]) -> ExecutionError:
    return ExecutionError(
        f"worker process {pid} is stuck on {describe(i)} [{i + 1} of {n}]: for "
        f"{seconds:.0f} s every thread of it has waited on a lock or slept, using no CPU "
        "(a deadlock, not a slow task); the workers were stopped and the stacks of its "
        "threads written to stderr. Run again with fewer workers, start_method 'spawn' or "
        "engine 'serial', or raise PEAKSIFT_STALL_SECONDS if the task only waited on "
        "something slow (0 never stops it); report a recurring one with those stacks"
    )


def _stop_pool(pool: Any, procs: dict[int, Any]) -> None:
    """Cancel what is queued and stop the pool's processes now."""
    stop_pool(pool, procs)


def _close_pool(pool: Any, procs: dict[int, Any], track: Any, clean: bool) -> None:
    """After a run: wait for a pool that finished cleanly; stop one now after an error, an
    early stop or Ctrl-C (no waiting for running tasks)."""
    if clean:
        pool.shutdown(wait=True)
    else:
        _stop_pool(pool, procs)
    track.close()


def _first_submits(pool: Any, func: Callable[[Any], Any], tasks: Sequence[Any], limit: int,
                   pending: dict[int, Any]) -> int:
    """Submit the first ``limit`` tasks into ``pending``; these submits start the pool's
    workers, so they run with the workers' environment and Python's fork warning quiet.
    Returns the index of the next task to submit."""
    nxt = 0
    with _spawn_env(WORKER_ENV), quiet_fork():
        while nxt < min(len(tasks), limit):
            pending[nxt] = _submit(pool, func, nxt, tasks[nxt])
            nxt += 1
    return nxt


def _run_processes(func: Callable[[Any], Any], tasks: Sequence[Any], workers: int,
                   describe: Callable[[int], str], method: str) -> _Run:
    from concurrent.futures.process import BrokenProcessPool

    n = len(tasks)
    limit = _INFLIGHT_PER_WORKER * workers
    track = multiprocessing.get_context(method).SimpleQueue()
    pool = _pool(workers, method, track)
    pending: dict[int, Any] = {}
    procs: dict[int, Any] = {}
    started: dict[int, int] = {}
    clean = False
    watch = StallWatch() if watched(func) else None
    try:
        nxt = _first_submits(pool, func, tasks, limit, pending)
        procs.update(getattr(pool, "_processes", None) or {})
        for i in range(n):
            while nxt < n and nxt < i + limit:
                pending[nxt] = _submit(pool, func, nxt, tasks[nxt])
                nxt += 1
                procs.update(getattr(pool, "_processes", None) or {})
            fut = pending.pop(i)
            try:
                value = _result(fut, watch, track, started, i, pending, n, describe)
            except PeaksiftError as exc:
                drain(track, started)
                yield i, False, exc
                continue
            except BrokenProcessPool:
                raise _broken_pool_error(procs, track, started, {i, *pending}, n,
                                         describe, method) from None
            drain(track, started)
            yield i, True, value
        clean = True
    finally:
        _close_pool(pool, procs, track, clean)


def _run_processes_helping(func: Callable[[Any], Any], tasks: Sequence[Any], workers: int,
                           describe: Callable[[int], str], method: str) -> _Run:
    """``workers`` processes in all: this one and a pool of ``workers - 1``.

    This process takes tasks too, from the same ordered counter as the pool: the pool is
    kept at ``_INFLIGHT_PER_WORKER`` unfinished tasks per worker, this process runs the
    next task whenever the one to deliver is not ready.  Results are still yielded in task
    order (early ones wait; chunk outputs are small, the data they came from is freed).
    On 2 cores a third process would only share the cores (and, spawned, add a second
    start-up); a spawned worker's start-up is covered by this process's work.
    """
    from concurrent.futures.process import BrokenProcessPool

    n = len(tasks)
    size = workers - 1
    limit = _INFLIGHT_PER_WORKER * size
    track = multiprocessing.get_context(method).SimpleQueue()
    pending: dict[int, Any] = {}
    own: dict[int, tuple[bool, Any]] = {}
    procs: dict[int, Any] = {}
    started: dict[int, int] = {}
    clean = False
    import pyarrow as pa

    arrow_threads = pa.cpu_count()
    pa.set_cpu_count(1)  # like the workers: one process per core, no decoding threads
    pool = _pool(size, method, track)
    watch = StallWatch() if watched(func) else None
    try:
        nxt = _first_submits(pool, func, tasks, limit, pending)
        procs.update(getattr(pool, "_processes", None) or {})
        i = 0
        while i < n:
            drain(track, started)
            busy = sum(1 for f in pending.values() if not f.done())
            while nxt < n and busy < limit:
                pending[nxt] = _submit(pool, func, nxt, tasks[nxt])
                nxt += 1
                busy += 1
                procs.update(getattr(pool, "_processes", None) or {})
            if i in own:
                ok, value = own.pop(i)
                yield i, ok, value
                i += 1
                continue
            fut = pending.get(i)
            if fut is not None and not fut.done() and nxt < n:
                j = nxt  # this process takes the next task while the pool works
                nxt += 1
                try:
                    own[j] = (True, func(tasks[j]))
                except PeaksiftError as exc:
                    own[j] = (False, exc)
                continue
            if fut is None:  # pragma: no cover - every index is either own or pending
                raise ExecutionError(f"internal error: task {i} was never started")
            del pending[i]
            try:
                value = _result(fut, watch, track, started, i, pending, n, describe)
            except PeaksiftError as exc:
                drain(track, started)
                yield i, False, exc
                i += 1
                continue
            except BrokenProcessPool:
                unfinished = {i, *(k for k, f in pending.items() if not f.done())}
                raise _broken_pool_error(procs, track, started, unfinished, n,
                                         describe, method) from None
            drain(track, started)
            yield i, True, value
            i += 1
        clean = True
    finally:
        _close_pool(pool, procs, track, clean)
        pa.set_cpu_count(arrow_threads)
