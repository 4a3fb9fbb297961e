"""The stuck-worker watch (:mod:`peaksift._stall`) over a local Dask cluster we started.

A Dask worker process runs more than the task: its event loop (heart-beats to the
scheduler, waiting on sockets) and threads that watch its parent.  The process as a whole
never looks stuck, so the watch judges the task's own thread and the threads the task may
have started (Arrow's readers, a download's event loop), leaving out the ones the worker
had before its first task (:func:`worker_setup` notes them).  Every :data:`LOOK` seconds
while the run waits, each worker says, in its event loop (``Client.run``), which thread
runs which task (``Worker.active_threads``); the look is given :data:`LOOK` seconds to
answer.  A worker frozen whole (its event loop cannot run) does not answer: Dask's own
heart-beat time-out then removes it, as without the watch.

Only a local cluster of ours is watched: /proc is read on this machine, and a user's
cluster is never stopped.
"""

from __future__ import annotations

import asyncio
import contextlib
import os
import threading
import time
from collections.abc import Callable, Mapping
from typing import Any

from .._stall import LOOK, StallWatch, Threads, ask_for_stacks, worker_tracking
from ..errors import ExecutionError

#: in a local cluster's worker: native ids of the threads it had before its first task
_MACHINERY: list[frozenset[int]] = [frozenset()]


def worker_setup() -> None:
    """In a local cluster's worker, before any task: note Dask's own threads (left out of
    the watch) and write every thread's stack on request."""
    _MACHINERY[0] = frozenset(t.native_id for t in threading.enumerate()
                              if t.native_id is not None)
    worker_tracking(None)


def task_threads(dask_worker: Any = None) -> tuple[int, dict[str, int], list[int]]:
    """In a worker (``Client.run``): its pid, the native thread id running each task key,
    and the threads to leave out."""
    native = {t.ident: t.native_id for t in threading.enumerate()}
    active = dict(getattr(dask_worker, "active_threads", None) or {})
    keys = {str(key): native[ident] for ident, key in active.items()
            if native.get(ident) is not None}
    return os.getpid(), keys, sorted(_MACHINERY[0])


class DaskWatch:
    """Looks at the local workers running tasks ``{prefix}{index}``; :meth:`look` raises an
    :class:`ExecutionError` naming a task stuck for ``PEAKSIFT_STALL_SECONDS``."""

    def __init__(self, client: Any, prefix: str, n: int,
                 describe: Callable[[int], str]) -> None:
        self.client, self.prefix, self.n, self.describe = client, prefix, n, describe
        self.watch = StallWatch()
        self.last = time.monotonic()
        self.index: dict[Threads, int] = {}  # the task each thread judged last ran

    def look(self) -> None:
        """Every :data:`LOOK` seconds (at most): ask the workers, judge their task threads."""
        if not self.watch.on or time.monotonic() - self.last < LOOK:
            return
        self.last = time.monotonic()
        try:
            # (callback_timeout: Client.sync's bound on the call, so that a frozen worker
            # cannot hold the run here; a worker's own failure comes back as its answer)
            answers = self.client.run(task_threads, on_error="return",
                                      callback_timeout=LOOK)
        except (TimeoutError, asyncio.TimeoutError, OSError):
            return  # no answer in time, the scheduler gone: judged at the next look
        found = self.watch.stuck(self._targets(answers))
        if found is not None:
            raise self._stuck(*found)

    def _targets(self, answers: Mapping[str, Any]) -> dict[Threads, int]:
        out: dict[Threads, int] = {}
        for answer in answers.values():
            if not isinstance(answer, tuple):  # that worker failed to answer
                continue
            pid, keys, skip = answer
            for key, tid in keys.items():
                if key.startswith(self.prefix):
                    with contextlib.suppress(ValueError):
                        out[Threads(pid, tid, frozenset(skip))] = int(key[len(self.prefix):])
        self.index = out
        return out

    def _stuck(self, target: Threads, seconds: float) -> ExecutionError:
        ask_for_stacks(target.pid)
        i = self.index[target]
        return ExecutionError(
            f"Dask worker process {target.pid} is stuck on {self.describe(i)} [{i + 1} of "
            f"{self.n}]: for {seconds:.0f} s the task's thread, and every thread it may have "
            "started, has waited on a lock or slept, using no CPU (a deadlock, not a slow "
            "task); the local cluster was stopped and the stacks of its threads written to "
            "stderr. Run again with fewer workers, start_method 'spawn' or engine 'serial', "
            "or raise PEAKSIFT_STALL_SECONDS if the task only waited on something slow (0 "
            "never stops it); report a recurring one with those stacks")
