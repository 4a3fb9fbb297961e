"""Signal and background shapes normalised on a fit window.

Which shape
-----------
Signal (``kind == "signal"``): ``gaussian``, ``crystalball`` (double-sided),
``breitwigner`` (relativistic), ``voigt``.
Background (``kind == "background"``): ``exppoly`` (``order=1..3``), ``exponential``,
``bernstein`` (``degree=n``), ``powerlaw``, ``dijet`` (``npar=2..4``, ``sqrt_s=``),
``turnon``.

Use :func:`get` to turn a name (as written in a config) into a shape, with options:
``shapes.get("bernstein", degree=4)``, ``shapes.get("gaussian", mass=91.2)`` (a parameter
name sets its default start).  :func:`available` lists every name with its kind and
parameters.  The shared interface is described in :mod:`peaksift.shapes._base`.
"""

from __future__ import annotations

from typing import Any

from ..errors import FitError
from ._base import Parameter, Shape, as_window
from .background import Bernstein, Dijet, Exponential, ExpPoly, PowerLaw, PowerSum
from .signal import BreitWigner, CrystalBall, Gaussian
from .turnon import TurnOn
from .voigt import Voigt

__all__ = [
    "Bernstein",
    "BreitWigner",
    "CrystalBall",
    "Dijet",
    "ExpPoly",
    "Exponential",
    "Gaussian",
    "Parameter",
    "PowerLaw",
    "PowerSum",
    "Shape",
    "TurnOn",
    "Voigt",
    "as_window",
    "available",
    "get",
]

_REGISTRY: dict[str, type[Shape]] = {
    cls.name: cls
    for cls in (Gaussian, CrystalBall, BreitWigner, Voigt,
                ExpPoly, Exponential, Bernstein, PowerLaw, PowerSum, Dijet, TurnOn)
}


def available() -> dict[str, dict[str, Any]]:
    """Every shape name -> ``{"kind": ..., "parameters": (...), "doc": first line}``.

    Parameters listed are those of the default options (e.g. ``exppoly`` order 1).
    """
    out = {}
    for name, cls in _REGISTRY.items():
        inst = cls()
        doc = (cls.__doc__ or "").strip().splitlines()[0] if cls.__doc__ else ""
        out[name] = {"kind": cls.kind, "parameters": inst.parameter_names, "doc": doc}
    return out


def get(name_or_shape: str | Shape, **options: Any) -> Shape:
    """Return a shape from its registry name (with options) or pass a shape through.

    Raises
    ------
    FitError
        Unknown name (the message lists the valid names) or bad options.
    """
    if isinstance(name_or_shape, Shape):
        if options:
            raise FitError(f"options {sorted(options)} given with an already built shape "
                           f"{name_or_shape!r}; pass the shape name instead")
        return name_or_shape
    if not isinstance(name_or_shape, str):
        raise FitError(f"a shape must be a name or a Shape, got {type(name_or_shape).__name__}; "
                       f"valid names: {', '.join(_REGISTRY)}")
    key = name_or_shape.strip().lower()
    if key not in _REGISTRY:
        from ..errors import closest

        hint = closest(key, _REGISTRY)
        extra = f" (did you mean {hint!r}?)" if hint else ""
        raise FitError(f"unknown shape {name_or_shape!r}{extra}; valid names: "
                       f"{', '.join(_REGISTRY)}")
    try:
        return _REGISTRY[key](**options)
    except TypeError as exc:
        raise FitError(f"bad options for shape {key!r}: {exc}") from None
