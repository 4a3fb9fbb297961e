"""What every cost shares (:class:`_Cost`, the base of :class:`~.cost.BinnedCost` and
:class:`~.unbinned_cost.UnbinnedCost`): the free-parameter vector mapped into the model's
full one, the free parameters' bounds (never wider than a shape's own domain), the
constraint terms added to value, gradient, information and Hessian, once, and iminuit's
call protocol (``cost(*x)``, ``cost.grad(*x)``, ``errordef = 0.5``) with its last point
remembered.  The questions the costs answer are listed in :mod:`.cost`'s guide."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from .constraints import Constraint
from .model import Model


def _shallow_copy(obj: Any) -> Any:
    """``copy.copy`` of an instance with a plain ``__dict__`` (what it does for one, without
    its ~8 us of dispatch through ``__reduce_ex__``: a fit makes a cost for every start)."""
    out = object.__new__(type(obj))
    out.__dict__.update(obj.__dict__)
    return out


def _step_within(x: float, h: float, lo: float, hi: float) -> tuple[float, bool, bool]:
    """A difference step ``h`` at ``x`` and which sides stay within ``[lo, hi]``; shrunk to
    half the larger room when neither side fits (a huge error estimate on a bounded
    parameter must not step outside)."""
    up, dn = x + h <= hi, x - h >= lo
    if not (up or dn):
        h = 0.5 * max(hi - x, x - lo)
        up, dn = x + h <= hi, x - h >= lo
    return h, up, dn


class _Cost:
    """Free-parameter vector <-> full vector, constraints, iminuit's call protocol."""

    errordef = 0.5

    def __init__(self, model: Model, full: np.ndarray, free: np.ndarray,
                 constraints: Sequence[tuple[int, Constraint]] = ()) -> None:
        self.model = model
        self.full = np.asarray(full, float).copy()
        self.free = np.asarray(free, int)
        row = {int(i): k for k, i in enumerate(self.free)}
        self._row = row
        self._domain: tuple[np.ndarray, np.ndarray] | None = None  # see _shape_domain
        # constraints on free parameters, by row of the free vector
        self._cons = [(row[int(i)], c) for i, c in constraints if int(i) in row]
        self._last: tuple[bytes, float, np.ndarray] | None = None
        # the last value-only evaluation: (key, value, expectation or None)
        self._last_value: tuple[bytes, float, Any] | None = None
        self.ncall = 0

    def _free_bounds(self, lower: Any, upper: Any) -> tuple[np.ndarray, np.ndarray]:
        """Bounds of the free parameters: as given, else the model's (window-aware) ones,
        never wider than a shape's own domain."""
        pars = ([self.model.parameters[i] for i in self.free.tolist()]
                if lower is None or upper is None else ())
        own = self._shape_domain()
        lo = np.array([p.lower for p in pars], float) if lower is None else np.asarray(lower,
                                                                                      float)
        hi = np.array([p.upper for p in pars], float) if upper is None else np.asarray(upper,
                                                                                      float)
        return np.maximum(lo, own[0]), np.minimum(hi, own[1])

    def hessian_bounds(self, lower: Any, upper: Any) -> tuple[np.ndarray, np.ndarray]:
        """The bounds :meth:`observed_hessian`'s differences stay inside, for the free
        parameters' ``lower``/``upper``."""
        return self._free_bounds(lower, upper)

    def _shape_domain(self) -> tuple[np.ndarray, np.ndarray]:
        # made once per cost (the model and the free parameters do not change; the costs
        # copied from it share it): the observed Hessian asks at every minimum
        if self._domain is None:
            lo = np.full(self.free.size, -np.inf)
            hi = np.full(self.free.size, np.inf)
            for shape, sl, _ in self.model.blocks:
                for j, i in enumerate(range(sl.start, sl.stop)):
                    k = self._row.get(i)
                    if k is not None:
                        lo[k], hi[k] = shape.parameters[j].lower, shape.parameters[j].upper
            lo.flags.writeable = hi.flags.writeable = False
            self._domain = (lo, hi)
        return self._domain

    def expand(self, x: Sequence[float]) -> np.ndarray:
        v = self.full.copy()
        v[self.free] = x
        return v

    def _add_constraints(self, x: np.ndarray, val: float, g: np.ndarray,
                         info: np.ndarray | None) -> float:
        for k, c in self._cons:
            val += float(c.nll(x[k]))
            g[k] += float(c.gradient(x[k]))
            if info is not None:
                info[k, k] += float(c.information(x[k]))
        return val

    def _constraint_hessian(self, x: np.ndarray, hess: np.ndarray) -> None:
        for k, c in self._cons:
            hess[k, k] += float(c.hessian(x[k]))

    def _eval(self, x: Sequence[float], key: bytes | None = None) -> tuple[float, np.ndarray]:
        if key is None:
            key = np.asarray(x, dtype=float).tobytes()
        if self._last is not None and self._last[0] == key:
            return self._last[1], self._last[2]
        val, g, _ = self.value_grad_info(np.asarray(x, dtype=float), info=False)
        if self._last_value is not None and self._last_value[0] == key:
            self.ncall -= 1  # the point's value was counted already: one call a point
        if not np.isfinite(val) or not np.all(np.isfinite(g)):
            val, g = 1e300, np.zeros_like(g)
        self._last = (key, val, g)
        return val, g

    def value_only(self, x: np.ndarray) -> tuple[float, Any] | None:
        """``(NLL, expectation or None)`` at ``x`` without the gradient, the same value
        :meth:`value_grad_info` gives; None where this cost has no cheaper way."""
        return None

    def __call__(self, *x: float) -> float:
        # MIGRAD asks for the value alone at most points (its line searches; ~94% of its
        # calls in slow Crystal Ball fits): the gradient only where it asks for it
        key = np.asarray(x, dtype=float).tobytes()
        if self._last is not None and self._last[0] == key:
            return self._last[1]
        if self._last_value is not None and self._last_value[0] == key:
            return self._last_value[1]
        out = self.value_only(np.asarray(x, dtype=float))
        if out is None:
            return self._eval(x, key)[0]
        val = out[0] if np.isfinite(out[0]) else 1e300
        self._last_value = (key, val, out[1])
        return val

    def grad(self, *x: float) -> np.ndarray:
        return self._eval(x)[1]

    def value_grad_info(self, x: np.ndarray, info: bool = True):  # pragma: no cover - abstract
        raise NotImplementedError
