"""Derived parameters: a parameter computed from another inside the cost.

:class:`Tie` says ``target = func(source)`` (e.g. the Gaussian ``sigma`` of a peak equal to
the detector resolution at the peak's ``mass``).  :class:`TiedCost` wraps a cost of
:mod:`.cost` in which the target is an ordinary parameter and presents it over the other
parameters only: at every evaluation the target is recomputed from the current source, and
the chain rule carries it into the derivatives,

.. math:: \\frac{\\partial \\mathrm{NLL}}{\\partial m} =
          \\left.\\frac{\\partial \\mathrm{NLL}}{\\partial m}\\right|_\\sigma
          + \\frac{d\\sigma}{dm}\\,\\frac{\\partial \\mathrm{NLL}}{\\partial \\sigma},

so the tie holds exactly at the minimum (not at the starting mass).  The information and
the observed Hessian transform as :math:`J^T H J` with the Jacobian ``J`` of the inner
parameters in the outer ones, plus :math:`g_\\sigma\\,\\sigma''(m)` on the source's diagonal.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["Tie", "TiedCost", "resolution_tie"]


def _zero(_: float) -> float:
    return 0.0


@dataclass(frozen=True)
class Tie:
    """``target = func(source)`` with ``slope = dfunc/dsource`` and ``curvature`` its
    second derivative (0 for linear and piecewise-linear functions)."""

    target: str
    source: str
    func: Callable[[float], float]
    slope: Callable[[float], float]
    curvature: Callable[[float], float] = _zero
    description: str = ""


def resolution_tie(resolution: Any, target: str = "sigma") -> Tie:
    """``target`` tied to ``resolution`` (a :class:`peaksift.Resolution`: its ``sigma``,
    ``slope`` and ``curvature`` in the mass) at the fitted ``mass``."""
    return Tie(target, "mass", resolution.sigma, resolution.slope, resolution.curvature,
               description=f"the resolution at the mass ({resolution.describe()})")


class TiedCost:
    """A cost over the free parameters of ``inner`` less the tied targets (see the module
    guide); ``ties`` are ``(target row, source row, Tie)`` in ``inner``'s free vector.

    Answers what the minimiser and the fit ask of a cost: ``cost(*x)``, ``grad``,
    ``value_grad_info``, ``observed_hessian``, ``expected_at``, ``score_outer``, ``expand``.
    """

    errordef = 0.5

    def __init__(self, inner: Any, ties: list[tuple[int, int, Tie]]) -> None:
        self.inner = inner
        targets = {t for t, _, _ in ties}
        if any(s in targets for _, s, _ in ties):
            raise ValueError("a tied parameter cannot be the source of another tie")
        self._n_in = int(inner.free.size)
        self.keep = np.array([k for k in range(self._n_in) if k not in targets], int)
        pos = {int(k): j for j, k in enumerate(self.keep)}
        self.ties = [(t, pos[s], tie) for t, s, tie in ties]
        self.free = np.asarray(inner.free)[self.keep]
        self.model = inner.model

    @property
    def ncall(self) -> int:
        return self.inner.ncall

    def inner_x(self, x: Any) -> np.ndarray:
        """The inner free vector at outer ``x``: the targets recomputed from their sources."""
        x = np.asarray(x, float)
        xin = np.empty(self._n_in)
        xin[self.keep] = x
        for t, s, tie in self.ties:
            xin[t] = tie.func(float(x[s]))
        return xin

    def jacobian(self, x: Any) -> np.ndarray:
        """d inner / d outer, ``(n_inner, n_outer)``."""
        jac = np.zeros((self._n_in, self.keep.size))
        jac[self.keep, np.arange(self.keep.size)] = 1.0
        for t, s, tie in self.ties:
            jac[t, s] = tie.slope(float(x[s]))
        return jac

    def expand(self, x: Any) -> np.ndarray:
        return self.inner.expand(self.inner_x(x))

    def value_grad_info(self, x: Any, info: bool = True):
        x = np.asarray(x, float)
        val, g, fisher = self.inner.value_grad_info(self.inner_x(x), info)
        jac = self.jacobian(x)
        return val, jac.T @ g, (None if fisher is None else jac.T @ fisher @ jac)

    def _eval(self, x: Any) -> tuple[float, np.ndarray]:
        with np.errstate(all="ignore"):
            val, g, _ = self.value_grad_info(np.asarray(x, float), info=False)
        if not np.isfinite(val) or not np.all(np.isfinite(g)):
            return 1e300, np.zeros(self.keep.size)
        return float(val), g

    def __call__(self, *x: float) -> float:
        return self._eval(x)[0]

    def grad(self, *x: float) -> np.ndarray:
        return self._eval(x)[1]

    def observed_hessian(self, x: Any, steps: Any, lower: Any = None,
                         upper: Any = None) -> np.ndarray:
        x = np.asarray(x, float)
        xin = self.inner_x(x)
        jac = self.jacobian(x)
        steps = np.asarray(steps, float)
        h_in = np.empty(self._n_in)
        h_in[self.keep] = steps
        lo_in, hi_in = self.inner._free_bounds(None, None)
        if lower is not None:
            lo_in[self.keep] = np.asarray(lower, float)
        if upper is not None:
            hi_in[self.keep] = np.asarray(upper, float)
        for t, s, _ in self.ties:  # the target moves with its source
            h_in[t] = abs(jac[t, s]) * steps[s] or 1e-6 * max(abs(xin[t]), 1.0)
        hess = jac.T @ self.inner.observed_hessian(xin, h_in, lo_in, hi_in) @ jac
        g_in = self.inner.value_grad_info(xin, info=False)[1]
        for t, s, tie in self.ties:
            hess[s, s] += float(g_in[t]) * tie.curvature(float(x[s]))
        return hess

    def expected_at(self, x: Any) -> np.ndarray | None:
        fn = getattr(self.inner, "expected_at", None)
        return None if fn is None else fn(self.inner_x(x))

    def score_outer(self, x: Any) -> np.ndarray:
        jac = self.jacobian(x)
        return jac.T @ self.inner.score_outer(self.inner_x(x)) @ jac
