"""How peaksift starts worker processes on this machine (base layer: no peaksift imports).

* :func:`resolve_start_method` -- ``"auto"`` to ``"fork"`` (Linux) or ``"spawn"``.
* :func:`quiet_fork`           -- around our own forks: Python 3.12+ warns at every fork of
  a process that holds threads.
* :func:`process_pool`         -- a :class:`concurrent.futures.ProcessPoolExecutor` started
  with the resolved method.

The execution engines (:mod:`peaksift.execution`) and the toy engine's ``workers=`` pool
(:mod:`peaksift.stats.toys`) share these, so every pool peaksift starts behaves alike.  Why
forking is safe here, and when to choose ``"spawn"``, is in the execution module's guide.
"""

from __future__ import annotations

import contextlib
import multiprocessing
import sys
import warnings
from collections.abc import Callable, Iterator
from typing import Any

__all__ = ["process_pool", "quiet_fork", "resolve_start_method"]


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
