"""numba's first use in a process, without its third-party extensions.

:func:`numba_extensions_deferred` -- a ``with`` block in which this thread's numba
compilations and cache loads skip numba's ``numba_extensions`` entry points;
:func:`compiled_module` -- a module of compiled kernels, imported on its first use.

The first numba compilation or cache load in a process runs every installed
``numba_extensions`` entry point (``numba.core.entrypoints.init_all``): awkward's and
vector's among them, 0.25-0.4 s of CPU, more than loading all of a search's kernels from
the disk cache.  peaksift's kernels take plain numpy arrays and need none of them.  Inside
the block ``init_all`` is replaced by a function that does nothing when called from a
thread inside such a block and the real thing from any other thread (whose compilations
may need the extensions); the last thread to leave puts the real one back, and the next
compilation outside loads the extensions as usual.  numba's own "initialised" flag is
never touched (``docs/decisions/numba-extensions-deferred.md``).  Only peaksift's own
kernels may run inside: no user code (a callable cut, a user's ``njit`` function).  The
block does nothing once the extensions are in.  A process forked inside inherits the
replacement and keeps it.
"""

from __future__ import annotations

import contextlib
import importlib
import sys
import threading
from collections.abc import Callable, Iterator
from types import ModuleType

_LOCK = threading.Lock()
_OWNERS: set[int] = set()  # threads inside a block now
_REAL: list[Callable[[], None]] = []  # numba's own init_all while replaced


def _init_all_outside_blocks() -> None:
    if threading.get_ident() not in _OWNERS and _REAL:
        _REAL[0]()


@contextlib.contextmanager
def numba_extensions_deferred() -> Iterator[None]:
    """Skip numba's third-party extensions in this thread for the block (see the module's
    guide); nested blocks and blocks in other threads are allowed."""
    try:
        from numba.core import entrypoints as eps
    except ImportError:  # pragma: no cover -- numba is a dependency
        yield
        return
    me = threading.get_ident()
    with _LOCK:
        if (me in _OWNERS or getattr(eps, "_already_initialized", True) is not False
                or not callable(getattr(eps, "init_all", None))):
            entered = False
        else:
            entered = True
            _OWNERS.add(me)
            if not _REAL:
                _REAL.append(eps.init_all)
                eps.init_all = _init_all_outside_blocks
    try:
        yield
    finally:
        if entered:
            with _LOCK:
                _OWNERS.discard(me)
                if not _OWNERS and _REAL:
                    eps.init_all = _REAL.pop()


def compiled_module(name: str) -> ModuleType:
    """The module ``name`` (a full dotted name), imported at its first use: modules whose
    kernels are optional import them where they are needed, so that importing them loads
    no numba.  After the first call this is one dictionary look-up; an import statement
    inside a function costs ~3-7 us at every call (a free fit made ~26 of them)."""
    mod = sys.modules.get(name)
    return mod if mod is not None else importlib.import_module(name)
