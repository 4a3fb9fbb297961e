"""How peaksift starts worker processes on this machine (base layer: no peaksift imports).

* :func:`resolve_start_method` -- ``"auto"`` to ``"fork"`` (Linux) or ``"spawn"``.
* :func:`quiet_fork`           -- around our own forks: Python 3.12+ warns at every fork of
  a process that holds threads; the child starts with the heap it inherits frozen for its
  garbage collector.
* :func:`process_pool`         -- a :class:`concurrent.futures.ProcessPoolExecutor` started
  with the resolved method.
* :func:`worker_start`         -- the first step in every pool worker we start: signals,
  one thread per library, whatever a forked worker inherited.
* :func:`stop_pool`            -- stop a pool now (Ctrl-C, an error): cancel what waits,
  terminate the workers, kill any that outlive it.
* :func:`die_with_parent`      -- in a worker: end as soon as the process that started it
  ends, however it ends (``kill -9`` included).
* :class:`Terminated` and :func:`sigterm_as_interrupt` -- SIGTERM (what ``timeout`` and
  batch systems send) handled like Ctrl-C: the same clean-up, then exit status 143;
  :func:`terminated` says whether it came (when other code turned it into its own error).
* :func:`sigterm_held` -- around a fork: SIGTERM waits until the child has set up its
  signals.
* :func:`signals_held` -- :func:`sigterm_held` and :func:`interrupt_held` together, around
  every fork of ours (the submits of :func:`process_pool`'s pools, the stages beside) and
  the moves of a run's outputs into place.
* :func:`interrupt_held` -- around a start-up that forks in threads of its own (a local
  Dask cluster): Ctrl-C waits until the start-up is over, so the caller can close what
  started, and the children never see it.

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

__all__ = [
    "WORKER_ENV",
    "Terminated",
    "arrow_threads_from_env",
    "die_with_parent",
    "interrupt_held",
    "process_pool",
    "quiet_fork",
    "resolve_start_method",
    "signals_held",
    "sigterm_as_interrupt",
    "sigterm_held",
    "stop_pool",
    "terminated",
    "worker_start",
]

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
    a fork or use none).  A child forked inside starts with the heap it inherits frozen for
    its garbage collector (:func:`peaksift._collector.frozen_for_fork`)."""
    from ._collector import frozen_for_fork

    with frozen_for_fork(), warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=r".*use of fork\(\) may lead to deadlocks",
                                category=DeprecationWarning)
        yield


@contextlib.contextmanager
def sigterm_held() -> Iterator[None]:
    """Around a fork whose child calls :func:`worker_start` first: SIGTERM stays pending in
    this thread while inside, and the child starts with it blocked.  Without this, a SIGTERM
    that reaches the child before it resets its handler (a parent stopping a child it just
    started) runs the handler the child inherited: :class:`Terminated` is raised in the
    child's copy of the parent's stack and the child carries on as the parent, running the
    parent's code (seen with a search stopped by an input error right after forking its
    figure process, inside a test session).  :func:`worker_start` unblocks it.

    The mask covers this thread only: a SIGTERM the kernel hands to another thread (Arrow's
    readers, a pool's manager) would still have :func:`sigterm_as_interrupt`'s handler run
    here, in the middle of the fork's bookkeeping (a worker started but not yet recorded,
    so not stopped).  That handler therefore only notes a SIGTERM while inside, and it is
    raised again on the way out."""
    if not hasattr(signal, "pthread_sigmask"):  # pragma: no cover - not on Windows
        yield
        return
    old = signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGTERM})
    _HELD[0] += 1
    try:
        yield
    finally:
        _HELD[0] -= 1
        signal.pthread_sigmask(signal.SIG_SETMASK, old)
        if _HELD[0] == 0 and _HELD[1]:
            _HELD[1] = False
            signal.raise_signal(signal.SIGTERM)  # the handler runs now, outside


@contextlib.contextmanager
def interrupt_held() -> Iterator[None]:
    """Ctrl-C held while inside, raised on the way out (by the handler the caller had).

    For a start-up that forks worker processes from threads it makes itself (a local Dask
    cluster): a KeyboardInterrupt raised in the middle would leave workers started but not
    yet recorded, so nothing would stop them.  Ctrl-C reaches the whole process group, so
    the children are protected too: SIGINT is blocked in this thread, and the threads made
    inside (and the processes they fork or spawn: the mask survives ``exec``) inherit the
    block until :func:`worker_start` ignores and unblocks it.  A SIGINT the kernel hands to
    an older thread runs this context's handler, which only notes it.  Outside the main
    thread only the mask is set (Python runs handlers in the main thread only)."""
    import threading

    if not hasattr(signal, "pthread_sigmask"):  # pragma: no cover - not on Windows
        yield
        return
    noted: list[bool] = []
    main = threading.current_thread() is threading.main_thread()
    old_handler = signal.signal(signal.SIGINT, lambda signum, frame: noted.append(True)) \
        if main else None
    old_mask = signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT})
    try:
        yield
    finally:
        if main:  # (None: a handler not set from Python; Python's own is the nearest)
            signal.signal(signal.SIGINT, signal.default_int_handler if old_handler is None
                          else old_handler)
        # a SIGINT pending on this thread (or the process) is delivered here, to the handler
        # the caller had; one noted by an older thread is raised again the same way
        signal.pthread_sigmask(signal.SIG_SETMASK, old_mask)
        if noted:
            signal.raise_signal(signal.SIGINT)


@contextlib.contextmanager
def signals_held() -> Iterator[None]:
    """Around a fork of ours (:func:`process_pool`'s submits, the search's stages beside)
    and a step that must not stop half-way (the renames that put a run's outputs in place):
    SIGTERM and Ctrl-C both wait until the way out (:func:`sigterm_held`,
    :func:`interrupt_held`), and the child starts with both blocked until
    :func:`worker_start`.  Ctrl-C reaches the whole process group: without the block, a
    child between its fork and :func:`worker_start` would raise KeyboardInterrupt in its
    copy of the caller's stack and print a traceback, and a KeyboardInterrupt raised in the
    caller between a fork and its record (a pool's list of workers) would leave a worker
    nothing stops.  A SIGTERM noted inside outranks a Ctrl-C (it is raised last)."""
    with sigterm_held(), interrupt_held():
        yield


#: [depth of sigterm_held, whether a SIGTERM was noted inside, whether Terminated was
#: raised]; see :func:`sigterm_held` and :func:`terminated`
_HELD: list[Any] = [0, False, False]


def terminated() -> bool:
    """Whether :func:`sigterm_as_interrupt` has raised :class:`Terminated` in this process.
    Code that turns any exception into its own (an extension module's import, which re-raises
    a failure as ImportError) can hide it; the command line asks this before it reports a
    raw error."""
    return bool(_HELD[2])


def process_pool(size: int, start_method: str = "auto",
                 initializer: Callable[..., Any] | None = None,
                 initargs: tuple[Any, ...] = ()) -> Any:
    """A process pool of ``size`` workers started with ``start_method`` (resolved with
    :func:`resolve_start_method`).  Its processes start at the submits: wrap the first ones
    in :func:`quiet_fork`.  Every worker starts with :func:`worker_start` (then the caller's
    ``initializer``), and every submit that may start one holds SIGTERM and Ctrl-C
    (:func:`signals_held`), so a SIGTERM between a fork and the worker's own signal set-up
    ends the worker instead of running the caller's handler in it, and a Ctrl-C meanwhile
    is raised once every worker started is on the pool's list (so stopped)."""
    import functools

    ctx = multiprocessing.get_context(resolve_start_method(start_method))
    # every worker first ties its life to this process's, whatever the caller's initializer
    init = functools.partial(_start_worker, os.getpid(), initializer, initargs)
    return _pool_class()(max_workers=size, mp_context=ctx, initializer=init)


def _pool_class() -> type:
    from concurrent.futures import ProcessPoolExecutor

    class HeldPool(ProcessPoolExecutor):
        """A ProcessPoolExecutor whose submits (where it forks or spawns its workers)
        run with SIGTERM and Ctrl-C held (:func:`signals_held`) until every worker is up;
        later submits start none (a full pool does not replace a worker that died: it
        breaks) and skip the hold's system calls."""

        def submit(self, fn: Callable[..., Any], /, *args: Any, **kwargs: Any) -> Any:
            if len(getattr(self, "_processes", None) or ()) >= self._max_workers:
                return super().submit(fn, *args, **kwargs)
            with signals_held():
                return super().submit(fn, *args, **kwargs)

    return HeldPool


def _start_worker(parent: int, initializer: Callable[..., Any] | None,
                  initargs: tuple[Any, ...]) -> None:
    worker_start()  # signals first: a SIGTERM held since the fork now ends us, not earlier
    die_with_parent(parent)
    if initializer is not None:
        initializer(*initargs)


#: Linux ``prctl`` option: the signal the kernel sends this process when its parent ends
_PR_SET_PDEATHSIG = 1
#: how often the fallback watcher looks for the parent (seconds)
_WATCH_INTERVAL = 0.5


def die_with_parent(parent: int) -> None:
    """End this (worker) process as soon as process ``parent`` ends, however it ends.

    A worker blocked on its task pipe would otherwise outlive a parent killed with
    ``kill -9``: the other workers hold the pipe's other end open, so no end-of-file ever
    comes.  On Linux the kernel sends SIGKILL at the parent's death (``prctl(2)``,
    PR_SET_PDEATHSIG); everywhere a daemon thread also checks every
    ``_WATCH_INTERVAL`` s that the parent is still ours (an orphan is re-parented, so
    ``getppid`` changes) -- the kernel's signal also covers a worker stuck in C code.
    """
    if sys.platform.startswith("linux"):
        import ctypes
        import ctypes.util

        with contextlib.suppress(OSError, AttributeError, TypeError):
            libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6", use_errno=True)
            libc.prctl(_PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)
    if os.getppid() != parent:  # the parent died before the request took effect
        os._exit(1)
    import threading

    from ._stall import SLEEPER

    def watch() -> None:
        # named for the stall watch: the one thread of a worker that may sleep while its
        # task waits on a lock (proc(5): a thread may set its own comm)
        with (contextlib.suppress(OSError),
              open(f"/proc/self/task/{threading.get_native_id()}/comm", "w") as f):
            f.write(SLEEPER)
        while True:
            time.sleep(_WATCH_INTERVAL)
            if os.getppid() != parent:
                os._exit(1)

    threading.Thread(target=watch, name="peaksift-parent-watch", daemon=True).start()


class Terminated(KeyboardInterrupt):
    """SIGTERM arrived.  A :class:`KeyboardInterrupt`, so every clean-up written for
    Ctrl-C (stop the worker pools, remove the staging folder) runs for it as well."""


@contextlib.contextmanager
def sigterm_as_interrupt() -> Iterator[None]:
    """While inside: SIGTERM raises :class:`Terminated` in the main thread (once: a second
    SIGTERM during the clean-up is ignored, so the clean-up can finish); Ctrl-C raises
    KeyboardInterrupt as usual.  Either, when it arrives where Python drops exceptions -- a
    native callback, a weak-reference callback, a ``__del__`` -- is delivered when that
    code has returned: SIGALRM retries it (the context owns SIGALRM, ``sys.unraisablehook``
    and, when Python's own Ctrl-C handler is set, SIGINT while inside; an ignored SIGINT,
    as in a background job, stays ignored).  Outside the main thread this does nothing
    (Python delivers signals to the main thread only)."""
    import threading

    if threading.current_thread() is not threading.main_thread():
        yield
        return

    # what is to be raised again once out of a place that drops it; Terminated outranks a
    # Ctrl-C (its exit status and message)
    pending: list[type[KeyboardInterrupt] | None] = [None]

    def ask_again(kind: type[KeyboardInterrupt]) -> None:
        if pending[0] is not Terminated:
            pending[0] = kind
        signal.setitimer(signal.ITIMER_REAL, _RETRY)

    def deliver(kind: type[KeyboardInterrupt]) -> None:
        if pending[0] is Terminated:  # (a Ctrl-C after a SIGTERM still to be raised)
            kind = Terminated
        pending[0] = None
        signal.setitimer(signal.ITIMER_REAL, 0)
        if kind is Terminated:
            _HELD[2] = True
            signal.signal(signal.SIGTERM, signal.SIG_IGN)
        raise kind

    def on_sigterm(signum: int, frame: Any) -> None:
        if _HELD[0] > 0:  # inside sigterm_held: raised again on its way out
            _HELD[1] = True
            return
        if _inside_native_callback(frame):  # raised here, ctypes would print and drop it
            ask_again(Terminated)
            return
        deliver(Terminated)

    def on_sigint(signum: int, frame: Any) -> None:
        if _inside_native_callback(frame):
            ask_again(KeyboardInterrupt)
            return
        deliver(KeyboardInterrupt)

    def retry(signum: int, frame: Any) -> None:
        kind = pending[0]
        if kind is None:  # only our own retry: any other SIGALRM inside is not a signal of ours
            return
        if _HELD[0] > 0 or _inside_native_callback(frame):  # not yet: a fork's bookkeeping
            signal.setitimer(signal.ITIMER_REAL, _RETRY)  # or a callback again
            return
        deliver(kind)

    def dropped(info: Any) -> None:
        # Python drops an exception raised in a weak-reference callback or a __del__ (a CI
        # run lost its SIGTERM inside numba's type-cache callback and ran on): ask again
        if isinstance(info.exc_value, KeyboardInterrupt):
            ask_again(Terminated if isinstance(info.exc_value, Terminated)
                      else KeyboardInterrupt)
            return
        old_hook(info)

    old = signal.signal(signal.SIGTERM, on_sigterm)
    old_alarm = signal.signal(signal.SIGALRM, retry)
    own_sigint = signal.getsignal(signal.SIGINT) is signal.default_int_handler
    if own_sigint:
        signal.signal(signal.SIGINT, on_sigint)
    old_hook, sys.unraisablehook = sys.unraisablehook, dropped
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        sys.unraisablehook = old_hook
        if own_sigint:
            signal.signal(signal.SIGINT, signal.default_int_handler)
        signal.signal(signal.SIGALRM, old_alarm)
        signal.signal(signal.SIGTERM, old)


#: seconds between two attempts to deliver a SIGTERM that arrived inside a native callback
_RETRY = 0.05


def _inside_native_callback(frame: Any) -> bool:
    """True while Python code that C calls back runs -- llvmlite's hooks while numba compiles
    a kernel (the first run of a fresh install).  An exception raised in such a callback is
    printed by ctypes and dropped, so the run would go on as if no SIGTERM (or Ctrl-C) had
    come."""
    while frame is not None:
        if "llvmlite" in frame.f_code.co_filename:
            return True
        frame = frame.f_back
    return False


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
    _HELD[:] = [0, False, False]  # a forked worker's copy of its parent's state is not its own
    if hasattr(signal, "pthread_sigmask"):  # started under sigterm_held: a pending SIGTERM
        # now ends us; started under interrupt_held: a pending SIGINT is now ignored
        signal.pthread_sigmask(signal.SIG_UNBLOCK, {signal.SIGTERM, signal.SIGINT})
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
