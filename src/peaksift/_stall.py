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
"""

from __future__ import annotations

import functools
import math
import os
import platform
import sys
import time
from collections.abc import Callable, Iterable
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


def snapshot(pid: int) -> tuple[bool, int] | None:
    """``(blocked, cpu_ticks)`` of process ``pid``: whether all its threads wait as a stuck
    worker's do (see the module guide), and their CPU time in clock ticks.  None when it
    cannot be told (gone, not readable, not Linux, an unknown architecture)."""
    numbers = _SYSCALLS.get(platform.machine())
    if numbers is None or not sys.platform.startswith("linux"):
        return None
    futex, sleeps = numbers
    blocked, ticks = True, 0
    try:
        tids = os.listdir(f"/proc/{pid}/task")
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
            if nr != futex and (int(tid) == pid or nr not in sleeps
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

    def stuck(self, pids: Iterable[int]) -> tuple[int, float] | None:
        """``(pid, seconds)`` of a worker among ``pids`` stuck for ``limit`` s, else None."""
        now = time.monotonic()
        pids = set(pids)
        for pid in list(self._since):
            if pid not in pids:  # idle now, or gone: its next task starts afresh
                del self._since[pid]
        for pid in sorted(pids):
            snap = snapshot(pid)
            first = self._since.get(pid)
            if snap is None or not snap[0]:
                self._since.pop(pid, None)
            elif first is None or snap[1] - first[1] > self.allowed:
                self._since[pid] = (now, snap[1])
            elif now - first[0] >= self.limit:
                return pid, now - first[0]
        return None
