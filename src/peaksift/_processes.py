"""How peaksift starts worker processes on this machine (base layer: no peaksift imports).

* :func:`resolve_start_method` -- ``"auto"`` to ``"fork"`` (Linux) or ``"spawn"``.
* :func:`quiet_fork`           -- around our own forks: Python 3.12+ warns at every fork of
  a process that holds threads.
* :func:`process_pool`         -- a :class:`concurrent.futures.ProcessPoolExecutor` started
  with the resolved method.
* :func:`worker_start`         -- the first step in every pool worker we start: signals,
  one thread per library, whatever a forked worker inherited.
* :func:`stop_pool`            -- stop a pool now (Ctrl-C, an error): cancel what waits,
  terminate the workers, kill any that outlive it.

The execution engines (:mod:`peaksift.execution`) and the toy engine's ``workers=`` pool
(:mod:`peaksift.stats.toys`) share these, so every pool peaksift starts behaves alike.  Why
forking is safe here, and when to choose ``"spawn"``, is in the execution module's guide.
"""

from __future__ import annotations

import contextlib
import multiprocessing
import os
import signal
import sys
import time
import warnings
from collections.abc import Callable, Iterator
from typing import Any

__all__ = ["WORKER_ENV", "arrow_threads_from_env", "process_pool", "quiet_fork",
           "resolve_start_method", "stop_pool", "worker_start"]

#: Environment of the worker processes we start (unless the user set these): they run one
#: process per core, so Arrow's decoding threads and BLAS threads would only contend with
#: the other workers (measured: ~10% faster chunks with one thread each).  Spawned workers
#: get it in their environment from the start; forked ones are told in :func:`worker_start`.
WORKER_ENV = {"OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}


def resolve_start_method(start_method: str = "auto") -> str:
    """``"fork"`` or ``"spawn"``: ``"auto"`` forks on Linux only (on macOS system libraries
    are not fork-safe, and Windows cannot fork); ``"fork"`` and ``"spawn"`` pass through."""
    if start_method == "auto":
        linux = sys.platform.startswith("linux")
        return "fork" if linux and "fork" in multiprocessing.get_all_start_methods() \
            else "spawn"
    return start_method


@contextlib.contextmanager
def quiet_fork() -> Iterator[None]:
    """Silence Python's warning about forking a process that holds threads, for forks whose
    children run only peaksift's own work (its libraries re-create their thread pools after
    a fork or use none)."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=r".*use of fork\(\) may lead to deadlocks",
                                category=DeprecationWarning)
        yield


def process_pool(size: int, start_method: str = "auto",
                 initializer: Callable[..., Any] | None = None,
                 initargs: tuple[Any, ...] = ()) -> Any:
    """A process pool of ``size`` workers started with ``start_method`` (resolved with
    :func:`resolve_start_method`).  Its processes start at the first submit: wrap that in
    :func:`quiet_fork`."""
    from concurrent.futures import ProcessPoolExecutor

    ctx = multiprocessing.get_context(resolve_start_method(start_method))
    return ProcessPoolExecutor(max_workers=size, mp_context=ctx, initializer=initializer,
                               initargs=initargs)


def arrow_threads_from_env() -> None:
    """Give Arrow's decoding pool ``OMP_NUM_THREADS`` threads (default 1) when Arrow is
    already loaded: a forked worker inherits the parent's pool size, not the environment."""
    arrow = sys.modules.get("pyarrow")
    if arrow is not None:
        with contextlib.suppress(ValueError):
            arrow.set_cpu_count(max(1, int(os.environ.get("OMP_NUM_THREADS", "1"))))


def worker_start() -> None:
    """First step of a pool worker we start.  Ctrl-C is left to the parent, which stops the
    workers cleanly; SIGTERM (how the parent stops them) ends the worker at once, whatever
    handler a forked worker inherited from the caller; one thread per library."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    for k, v in WORKER_ENV.items():
        os.environ.setdefault(k, v)
    arrow_threads_from_env()


def stop_pool(pool: Any, procs: dict[int, Any] | None = None, grace: float = 10.0) -> None:
    """Stop a process pool now: cancel the queued tasks, send every worker SIGTERM, and
    kill those still alive after ``grace`` seconds in all (one deadline for every worker,
    not one each).  ``procs`` adds processes the caller recorded (a broken pool may have
    dropped them)."""
    procs = {**(procs or {}), **(getattr(pool, "_processes", None) or {})}
    pool.shutdown(wait=False, cancel_futures=True)
    for p in procs.values():
        if p.is_alive():
            p.terminate()
    deadline = time.monotonic() + grace
    for p in procs.values():
        p.join(timeout=max(0.0, deadline - time.monotonic()))
    for p in procs.values():
        if p.is_alive():  # ignored SIGTERM: end it
            p.kill()
            p.join(timeout=5)
