"""The expected spectrum of one channel: signal component(s) plus a background, with yields.

:class:`Model` is the part of the likelihood that knows the shapes: it turns a parameter
vector into expected bin contents (:meth:`Model.expected`, bin integrals from CDF
differences, never densities at bin centres), their derivatives, and densities for unbinned
fits and figures.  The costs in :mod:`.cost` combine it with :mod:`.poisson`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np

from .. import shapes as _shapes
from ..errors import FitError
from ..shapes import Parameter, Shape, as_window

__all__ = ["Model"]


class Model:
    """Signal component(s) plus a background, with extended yields, on a window.

    Parameters
    ----------
    signal : str, Shape or sequence of them
        Signal shape(s); names are resolved with :func:`peaksift.shapes.get`.
    background : str or Shape
    window : (float, float)

    Attributes
    ----------
    parameter_names : tuple of str
        All parameters in order: per signal component its shape parameters then
        ``signal_yield`` (suffix ``_2``, ``_3`` for later components), then the
        background parameters and ``background_yield``.
    parameters : tuple of Parameter
        The same with window-dependent starts/bounds (yields: start NaN, set by :func:`fit`).

    A model cannot be changed once built (a FitError says so): the fits of shapes given by
    name share one per shapes and window, each result's ``model`` among them.
    """

    def __init__(self, signal: Any, background: Any, window: tuple[float, float]) -> None:

        self.window = as_window(window)
        sig = signal if isinstance(signal, (list, tuple)) else [signal]
        if not sig:
            raise FitError("no signal shape given; name one, e.g. signal='gaussian'")
        signals = [_shapes.get(s) for s in sig]
        self.signals: tuple[Shape, ...] = tuple(signals)
        self.background: Shape = _shapes.get(background)
        for s in signals:
            if s.kind != "signal":
                raise FitError(f"{s.name!r} is a {s.kind} shape but was given as the signal")
        if self.background.kind != "background":
            raise FitError(f"{self.background.name!r} is a {self.background.kind} shape but "
                           "was given as the background")
        pars: list[Parameter] = []
        blocks: list[tuple[Shape, slice, int]] = []  # shape, its params, its yield index
        for k, s in enumerate(signals):
            suffix = "" if k == 0 else f"_{k + 1}"
            first = len(pars)
            for p in s.parameters_for(self.window):
                pars.append(Parameter(p.name + suffix, p.start, p.lower, p.upper, p.unit))
            pars.append(Parameter("signal_yield" + suffix, math.nan, unit="events"))
            blocks.append((s, slice(first, len(pars) - 1), len(pars) - 1))
        first = len(pars)
        pars.extend(self.background.parameters_for(self.window))
        pars.append(Parameter("background_yield", math.nan, 0.0, unit="events"))
        blocks.append((self.background, slice(first, len(pars) - 1), len(pars) - 1))
        names = [p.name for p in pars]
        dup = {n for n in names if names.count(n) > 1}
        if dup:
            raise FitError(f"parameter names collide: {sorted(dup)}")
        self.blocks: tuple[tuple[Shape, slice, int], ...] = tuple(blocks)
        self.parameters = tuple(pars)
        self.parameter_names = tuple(names)  # the last: the model is built (__setattr__)

    # a model of shapes given by name is kept between fits (fitting.setup) and is every
    # result's ``model``: changed through one result it would change the later fits
    def __setattr__(self, name: str, value: Any) -> None:
        if "parameter_names" in self.__dict__:
            raise FitError(f"a Model cannot be changed once built (setting {name!r}): it is "
                           "shared by the fits of the same shapes and window; build a new "
                           "Model(signal, background, window) instead")
        object.__setattr__(self, name, value)

    def __delattr__(self, name: str) -> None:
        raise FitError(f"a Model cannot be changed once built (deleting {name!r}); build a "
                       "new Model(signal, background, window) instead")

    def __repr__(self) -> str:
        sig = " + ".join(s.name for s in self.signals)
        return f"<Model {sig} + {self.background.name} on {self.window}>"

    def _values(self, values: Any) -> list[Any]:
        if isinstance(values, Mapping):
            missing = [n for n in self.parameter_names if n not in values]
            if missing:
                raise FitError(f"model values missing {missing}; need {list(self.parameter_names)}")
            return [values[n] for n in self.parameter_names]
        vals = list(values)
        if len(vals) != len(self.parameter_names):
            raise FitError(f"model takes {len(self.parameter_names)} values "
                           f"({', '.join(self.parameter_names)}), got {len(vals)}")
        return vals

    def expected(self, edges: Any, values: Any) -> np.ndarray:
        """Expected bin contents ``sum_k yield_k * bin_fractions_k`` (bins on the last axis).

        ``values`` is a mapping name -> value or a sequence in ``parameter_names`` order;
        values may be arrays broadcasting against ``edges`` (e.g. shape ``(ntoys, 1)``).
        ``edges`` must lie inside the model window.
        """
        v = self._values(values)
        out = 0.0
        for shape, sl, iy in self.blocks:
            out = out + v[iy] * shape.bin_fractions(edges, v[sl], self.window)
        return out

    def grad_expected(self, edges: Any, values: Any) -> np.ndarray:
        """Derivatives of :meth:`expected` w.r.t. every parameter, stacked on axis 0
        (analytic for yields and for shapes with analytic derivatives)."""
        v = self._values(values)
        parts: list[Any] = [None] * len(v)
        for shape, sl, iy in self.blocks:
            f = shape.bin_fractions(edges, v[sl], self.window)
            parts[iy] = f
            if sl.stop > sl.start:
                g = shape.grad_bin_fractions(edges, v[sl], self.window)
                for j, i in enumerate(range(sl.start, sl.stop)):
                    parts[i] = v[iy] * g[j]
        return np.array(np.broadcast_arrays(*parts))

    def density(self, x: Any, values: Any) -> np.ndarray:
        """Expected events per unit mass, ``sum_k yield_k * pdf_k(x)``."""
        v = self._values(values)
        return sum(v[iy] * shape.pdf(x, v[sl], self.window) for shape, sl, iy in self.blocks)

    def components(self, x: Any, values: Any) -> dict[str, np.ndarray]:
        """Events per unit mass of each component: ``signal``, ``signal_2``, ..., ``background``."""
        v = self._values(values)
        out = {}
        for k, (shape, sl, iy) in enumerate(self.blocks):
            key = "background" if shape is self.background else (
                "signal" if k == 0 else f"signal_{k + 1}")
            out[key] = v[iy] * shape.pdf(x, v[sl], self.window)
        return out


# ============================================================== cost functions
