"""Python's cyclic garbage collector in the processes peaksift owns (base layer: no peaksift
imports).  Why: ``docs/decisions/garbage-collector-in-the-command.md``.

* :func:`pause`         -- the collector off while a process imports its modules (returns
  whether it was on); :func:`settle` turns it on again.
* :func:`settle`        -- the collector on, what exists frozen (:func:`gc.freeze`: never
  walked again), the youngest generation collected every 10,000 allocations, not 700.
  Only in a process of ours (the command, a drawer): frozen objects are never freed.
* :func:`frozen_for_fork` -- around a fork: the child starts with the inherited heap
  frozen, this process's is unfrozen at once (constant time), so it frees what it did.

Full collections walk every object of the heap; during a search's imports (~1 s of CPU,
hundreds of thousands of objects that live as long as the process) they ran again at each
quarter of growth (~10% of the start-up's CPU), and in every forked child they walked the
parent's heap again, writing to each object (so copying its pages for the child).
"""

from __future__ import annotations

import contextlib
import gc
import os
from collections.abc import Iterator

__all__ = ["frozen_for_fork", "pause", "settle"]

#: the youngest generation's threshold in our own processes (Python's default: 700)
YOUNG = 10_000


def pause() -> bool:
    """Turn the collector off; returns whether it was on (call :func:`settle` if so)."""
    was = gc.isenabled()
    gc.disable()
    return was


def settle() -> None:
    """The collector on again, with every object that exists now frozen and the youngest
    generation collected every :data:`YOUNG` allocations (a figure or a fit leaves
    thousands of objects in reference cycles)."""
    gc.freeze()
    gc.enable()
    young, *older = gc.get_threshold()
    gc.set_threshold(max(young, YOUNG), *older)


@contextlib.contextmanager
def frozen_for_fork() -> Iterator[None]:
    """Around a fork (as Python's documentation recommends for ``gc.freeze``): a child
    forked inside starts with everything it inherits frozen, so its collections neither
    walk nor copy the parent's pages; this process's heap is unfrozen on leaving (its
    objects join the oldest generation).  Nothing is done when the collector is off or
    someone else froze a heap; a child of ``os.fork()`` leaving the block keeps its own."""
    me = os.getpid()
    freeze = gc.isenabled() and gc.get_freeze_count() == 0
    if freeze:
        gc.freeze()
    try:
        yield
    finally:
        if freeze and os.getpid() == me:
            gc.unfreeze()
