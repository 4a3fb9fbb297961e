"""A worker process that waits forever, told apart from a slow one (Linux; base layer:
no peaksift imports).

A forked worker can inherit a lock that a thread of its parent held at the fork, or wait
on a thread that did not survive the fork (a CI run hung for good in Arrow's reader so).
Its parent then waits for the task's result forever.  No time limit on a task can tell
that from a task that is only slow (a loaded machine, a big file), so the watch here looks
at what the worker's threads are doing, as the kernel reports it (Linux ``proc(5)``:
``/proc/<pid>/task/<tid>/stat`` and ``.../syscall``).

A worker is *stuck* when, at every look for ``limit`` seconds in a row:

* its main thread (the one running the task) waits in ``futex(2)`` -- on a lock or a
  condition, which only another thread of its own could release;
* every other thread of it waits in ``futex`` too, or is the parent-watch thread of
  :func:`peaksift._processes.die_with_parent` asleep (``nanosleep``; found by the name
  :data:`SLEEPER` it gives itself: another thread asleep is a back-off between attempts
  of a retried request, which wakes to try again);
* no thread of it is running, runnable (state R: a starved thread on a loaded machine is
  runnable), in uninterruptible I/O (D: a slow disk, a network file system) or stopped
  (T/t: a debugger), and none waits in any other system call (a read, ``poll``/``epoll``:
  a download through fsspec's event-loop thread, however slow);
* together its threads used no CPU time (a few clock ticks allowed: the parent-watch
  thread wakes twice a second).

Nothing healthy in peaksift's own tasks looks like that for long, so the watch is kept to
them (functions of peaksift's modules: a user's function may wait on a lock shared with
other processes).  Where the files cannot be read (another system, no permission, an
unknown architecture) the watch never calls a worker stuck.  ``PEAKSIFT_STALL_SECONDS``
sets ``limit`` (default :data:`DEFAULT_LIMIT`; 0 turns the watch off).

Every pool of peaksift's is watched by the same pieces: in each worker,
:func:`worker_tracking` (each task's start reported with :func:`tracked`, the threads'
stacks written on :data:`STACKS_SIGNAL`); in the parent, :func:`result_watched` waits for a
task's result in :data:`LOOK` steps and raises the caller's error for a stuck worker, after
asking it for its stacks.  The execution engines' process pool (``execution._local``) and
the toy engine's ``workers=`` pool (``stats.toys``) use them; a local Dask cluster's
workers run other threads beside the task (an event loop), so there :class:`Threads` names
the task's thread and the machinery's threads to leave out.
"""

from __future__ import annotations

import contextlib
import functools
import math
import os
import platform
import signal
import sys
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from typing import Any

#: seconds a worker must look stuck, at every look, before it is called stuck
DEFAULT_LIMIT = 120.0
#: seconds between two looks (the wait for a task's result is cut into these)
LOOK = 2.0

#: the OS name of the parent-watch thread (``/proc/<pid>/task/<tid>/comm``, at most 15
#: bytes): the one thread that may sleep in a stuck worker
SLEEPER = "peaksift-parent"

#: system call numbers (``futex``, and the sleeps) of the architectures we know
_SYSCALLS = {"x86_64": (202, {35, 230}), "aarch64": (98, {101, 115})}


def watched(func: Callable[..., Any]) -> bool:
    """Whether tasks of ``func`` are watched: peaksift's own functions only."""
    while isinstance(func, functools.partial):
        func = func.func
    return str(getattr(func, "__module__", "") or "").startswith("peaksift.")


def limit_from_env() -> float:
    """``PEAKSIFT_STALL_SECONDS`` (default :data:`DEFAULT_LIMIT`); 0 or a bad value: off."""
    text = os.environ.get("PEAKSIFT_STALL_SECONDS", "")
    if not text.strip():
        return DEFAULT_LIMIT
    try:
        value = float(text)
    except ValueError:
        return 0.0
    return value if value > 0 and math.isfinite(value) else 0.0


def _ticks(fields: list[str]) -> int:
    return int(fields[11]) + int(fields[12])  # utime, stime (proc(5) fields 14 and 15)


@dataclass(frozen=True)
class Threads:
    """The threads of process ``pid`` the watch judges: ``main`` runs the task (it must wait
    on a lock), the ones in ``skip`` are never looked at (a Dask worker's event loop and its
    watches of its parent: they run and wait on sockets whatever the task does)."""

    pid: int
    main: int
    skip: frozenset[int] = frozenset()


def snapshot(pid: int, main: int | None = None,
             skip: frozenset[int] = frozenset()) -> tuple[bool, int] | None:
    """``(blocked, cpu_ticks)`` of process ``pid``: whether all its threads (but ``skip``)
    wait as a stuck worker's do (see the module guide; ``main``, default the process's
    first thread, is the one running the task), and their CPU time in clock ticks.  None
    when it cannot be told (gone, not readable, not Linux, an unknown architecture)."""
    numbers = _SYSCALLS.get(platform.machine())
    if numbers is None or not sys.platform.startswith("linux"):
        return None
    futex, sleeps = numbers
    main = pid if main is None else main
    blocked, ticks = True, 0
    try:
        tids = [t for t in os.listdir(f"/proc/{pid}/task") if int(t) not in skip]
        if str(main) not in tids:  # the task's thread is gone: nothing waits there
            return None
        for tid in tids:
            with open(f"/proc/{pid}/task/{tid}/stat") as f:
                fields = f.read().rsplit(")", 1)[1].split()
            ticks += _ticks(fields)
            if fields[0] != "S":
                blocked = False
                continue
            with open(f"/proc/{pid}/task/{tid}/syscall") as f:
                call = f.read().split()
            if not call or not call[0].lstrip("-").isdigit():  # "running"
                blocked = False
                continue
            nr = int(call[0])
            if nr != futex and (int(tid) == main or nr not in sleeps
                                or _name(pid, tid) != SLEEPER):
                blocked = False
    except (OSError, ValueError, IndexError):
        return None
    return blocked, ticks


def _name(pid: int, tid: str) -> str:
    with open(f"/proc/{pid}/task/{tid}/comm") as f:
        return f.read().strip()


class StallWatch:
    """Looks at the workers running tasks; :meth:`stuck` names one stuck for ``limit``
    seconds.  Call it every :data:`LOOK` seconds or so while waiting."""

    def __init__(self, limit: float | None = None) -> None:
        self.limit = limit_from_env() if limit is None else float(limit)
        per_second = os.sysconf("SC_CLK_TCK") if hasattr(os, "sysconf") else 100
        # the parent-watch thread's wake-ups: far below 0.1% of a core
        self.allowed = max(5, int(0.001 * self.limit * per_second))
        self._since: dict[int, tuple[float, int]] = {}

    @property
    def on(self) -> bool:
        return self.limit > 0

    def stuck(self, pids: Iterable[Any]) -> tuple[Any, float] | None:
        """``(pid, seconds)`` of a worker among ``pids`` stuck for ``limit`` s, else None.
        An item may be a :class:`Threads` instead of a pid (returned as it was given)."""
        now = time.monotonic()
        pids = set(pids)
        for pid in list(self._since):
            if pid not in pids:  # idle now, or gone: its next task starts afresh
                del self._since[pid]
        for pid in sorted(pids, key=_order):
            snap = (snapshot(pid.pid, pid.main, pid.skip) if isinstance(pid, Threads)
                    else snapshot(pid))
            first = self._since.get(pid)
            if snap is None or not snap[0]:
                self._since.pop(pid, None)
            elif first is None or snap[1] - first[1] > self.allowed:
                self._since[pid] = (now, snap[1])
            elif now - first[0] >= self.limit:
                return pid, now - first[0]
        return None


def _order(pid: Any) -> tuple[int, int]:
    return (pid.pid, pid.main) if isinstance(pid, Threads) else (pid, pid)


#: the signal that has a watched worker write its threads' stacks (faulthandler)
STACKS_SIGNAL = signal.SIGUSR1 if hasattr(signal, "SIGUSR1") else signal.SIGTERM

_TRACK: Any = None  # in a watched pool's worker: queue of (pid, task index) as tasks start


def worker_tracking(track: Any) -> None:
    """In a pool worker, at its start: report each task's start on ``track`` (a queue the
    parent reads with :func:`drain`; :func:`tracked` runs the task) and write the stacks of
    every thread on :data:`STACKS_SIGNAL`, even in a deadlock (asked for by the parent
    before it stops a worker stuck)."""
    global _TRACK
    _TRACK = track
    import faulthandler

    faulthandler.register(STACKS_SIGNAL, all_threads=True)


def tracked(func: Callable[[Any], Any], index: int, task: Any) -> Any:
    """Run one task in a pool worker, first telling the parent which process took it."""
    if _TRACK is not None:
        _TRACK.put((os.getpid(), index))
    return func(task)


def drain(track: Any, started: dict[int, int]) -> None:
    """Read the (pid, task) start records into ``started``; done after every result, so
    the pipe never fills (a worker blocked on a full pipe would stall the pool)."""
    with contextlib.suppress(OSError, EOFError):
        while not track.empty():
            pid, index = track.get()
            started[pid] = index


def ask_for_stacks(pid: int) -> None:
    """Have a stuck worker write its threads' stacks to stderr (see
    :func:`worker_tracking`), and give it a moment to, before it is stopped."""
    with contextlib.suppress(OSError):
        os.kill(pid, STACKS_SIGNAL)
        time.sleep(0.5)


def result_watched(fut: Any, watch: StallWatch | None, track: Any, started: dict[int, int],
                   running: Callable[[], Iterable[int]],
                   stuck: Callable[[int, float, int], BaseException]) -> Any:
    """``fut.result()`` (a :mod:`concurrent.futures` future), looking every :data:`LOOK`
    seconds that none of the workers running the tasks ``running()`` (indices, the awaited
    one included) is stuck; a stuck one has its stacks written, then
    ``stuck(pid, seconds, task index)`` is raised (the caller stops its pool)."""
    from concurrent.futures import TimeoutError as WaitTimeout

    if watch is None or not watch.on:
        return fut.result()
    while True:
        try:
            return fut.result(timeout=LOOK)
        except WaitTimeout:
            if fut.done():  # the task's own TimeoutError: raised as it is
                return fut.result()
        drain(track, started)
        now = set(running())
        found = watch.stuck(pid for pid, j in started.items() if j in now)
        if found is not None:
            ask_for_stacks(found[0])
            raise stuck(found[0], found[1], started[found[0]])
