"""Heavy imports made lighter: ``scipy.special`` without the numpy submodules nobody here
uses, matplotlib without its artists' ``set()`` docstrings (base layer).

:func:`scipy_special` -- import ``scipy.special`` (once per process; the command and the
figure process call it before anything else imports scipy).
:func:`matplotlib_without_set_docs` -- around the figure process's import of matplotlib:
its artists' generated ``set()`` docstrings are not built (see its guide).

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

import contextlib
import importlib
import importlib.util
import sys
import types
from collections.abc import Iterator

__all__ = ["matplotlib_without_set_docs", "scipy_special"]

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
        with _scipy_docs_as_they_are():
            import scipy.special
    finally:
        for name, stand_in in standing.items():
            if names.get(name) is stand_in:  # (a real import meanwhile replaced it)
                delattr(np, name)
    return scipy.special


class _DocAsIs:
    """In place of scipy's ``FunctionDoc`` for ``xp_capabilities``: the function's docstring
    as it is, and nowhere to add a note."""

    def __init__(self, func: object) -> None:
        self._doc = getattr(func, "__doc__", None) or ""
        if type(func).__name__ == "ufunc":  # numpy's generated signature line first: the
            self._doc = self._doc.split("\n\n", 1)[-1]  # docstring is what follows it
        self._notes: list[str] = []

    def __getitem__(self, section: str) -> list[str]:
        return self._notes

    def __str__(self) -> str:  # (its first line, the signature, is dropped by the caller)
        return "\n" + self._doc


@contextlib.contextmanager
def _scipy_docs_as_they_are() -> Iterator[None]:
    """Inside the block, scipy's ``xp_capabilities`` decorator leaves the docstrings of the
    functions it marks as they are.  Why: at the import of ``scipy.special`` it parses the
    numpydoc docstring of each of its ~100 functions and writes it out again with a table
    of the array libraries each supports (~30-40 ms of CPU): text only ``help()`` shows.
    Its table of capabilities (what scipy's own tests read) is filled as before, and the
    functions are the same objects.  Nothing changes on a scipy without that decorator."""
    try:
        import scipy._lib._array_api as array_api
    except ImportError:  # (another scipy)
        yield
        return
    own = getattr(array_api, "FunctionDoc", None)
    if own is None or not hasattr(array_api, "xp_capabilities"):
        yield
        return
    array_api.FunctionDoc = _DocAsIs
    try:
        yield
    finally:
        array_api.FunctionDoc = own


@contextlib.contextmanager
def matplotlib_without_set_docs() -> Iterator[None]:
    """Inside the block, matplotlib's artist classes get their ``set()`` method without its
    generated signature and docstring (for a drawing process of ours: the figure process).

    Why: every Artist subclass matplotlib defines at import (~60, from lines and text to
    the axes and the legend) has ``Artist.__init_subclass__`` build a ``set()`` whose
    docstring lists every property with its accepted values (``kwdoc``), by inspecting
    every setter's docstring and signature: ~0.1 s of the ~0.4 s of CPU that importing the
    drawing stack costs, for text only ``help()`` shows.  The ``set()`` itself is the same
    (``Artist.set``), so is everything drawn.  Nothing changes when ``matplotlib.artist``
    is loaded already (its subclasses are then made), and the classes made after the
    block get their docstrings as usual."""
    if "matplotlib.artist" in sys.modules:
        yield
        return
    from matplotlib.artist import Artist

    own = Artist.__dict__.get("_update_set_signature_and_docstring")
    if not isinstance(own, classmethod):  # (another matplotlib: left as it is)
        yield
        return

    def lean(cls: type) -> None:
        cls.set._autogenerated_signature = True  # type: ignore[attr-defined]  # (subclasses
        # of this class get their own set() too, as matplotlib's would)

    Artist._update_set_signature_and_docstring = classmethod(lean)  # type: ignore[assignment]
    try:
        yield
    finally:
        Artist._update_set_signature_and_docstring = own  # type: ignore[assignment]
