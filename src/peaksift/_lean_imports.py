"""``scipy.special`` imported without the numpy submodules nobody here uses (base layer).

:func:`scipy_special` -- import ``scipy.special`` (once per process; the command and the
figure process call it before anything else imports scipy).

Why: ``scipy.special`` imports scipy's array-API shim, which clones numpy's namespace by
asking numpy for every public name, and numpy loads its lazily loaded submodules when they
are asked for: ``numpy.f2py`` (with its Fortran parser), ``numpy.testing``, ``numpy.ma``,
``numpy.polynomial``, ``numpy.matlib``, ``numpy.char``, ... -- 0.08-0.12 s of CPU in every
process that imports scipy.special, for modules a search never uses.  While scipy.special
is imported, each of them not loaded yet stands as a numpy attribute that loads the real
module on its first attribute access (so the shim's copy of it still works); afterwards the
attributes are taken away again and numpy's own lazy loading answers as before.  Nothing
changes for a module that is loaded already, or when scipy.special is imported already.
A listed name this numpy does not have (``numpy.strings`` before numpy 2.0) gets no
stand-in: the shim would copy it, and every attribute asked of it would fail.
"""

from __future__ import annotations

import importlib
import importlib.util
import sys
import types

__all__ = ["scipy_special"]

#: numpy's submodules that ``numpy.__getattr__`` loads on first access and that the shim's
#: clone of the namespace would load (numpy 2.x)
_LAZY = ("f2py", "testing", "matlib", "ctypeslib", "polynomial", "ma", "rec", "char",
         "strings", "core")


class _OnFirstUse(types.ModuleType):
    """A stand-in for ``numpy.<name>``: any attribute asked of it loads the real module."""

    def __getattr__(self, attr: str) -> object:
        return getattr(importlib.import_module(self.__name__), attr)


def scipy_special() -> types.ModuleType:
    """``scipy.special``, imported (if it is not yet) without numpy's unused lazy
    submodules (see the module's guide)."""
    if "scipy.special" in sys.modules:
        return sys.modules["scipy.special"]
    import numpy as np

    names = vars(np)
    standing: dict[str, types.ModuleType] = {}
    for name in _LAZY:
        if f"numpy.{name}" not in sys.modules and name not in names \
                and importlib.util.find_spec(f"numpy.{name}") is not None:
            standing[name] = _OnFirstUse(f"numpy.{name}")
            setattr(np, name, standing[name])
    try:
        import scipy.special
    finally:
        for name, stand_in in standing.items():
            if names.get(name) is stand_in:  # (a real import meanwhile replaced it)
                delattr(np, name)
    return scipy.special
