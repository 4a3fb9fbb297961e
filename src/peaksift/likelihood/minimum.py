"""What one minimisation found, and the test that a path has joined a minimum known before.

* :class:`Minimum` -- the result of :func:`.minimize.minimize` (free parameters only), made
  by Fisher scoring or by iminuit's MIGRAD (:mod:`.migrad`).
* :class:`NearMinimum` -- a ``stop`` test: the path of a later start has run into the best
  minimum found so far, so it has nothing new to find (the free fit then abandons it).
* :func:`bound_tolerance`, :func:`distance_to_bound` -- when a parameter counts as "at a
  bound" (the free fit's verdict, and the polish of :func:`.minimize.refine`, which must not
  change it for nothing).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["Minimum", "NearMinimum", "at_bounds", "bound_tolerance", "distance_to_bound"]


@dataclass
class Minimum:
    """What a minimisation found (free parameters only)."""

    x: np.ndarray
    fval: float
    converged: bool
    call_limit: bool
    errors: np.ndarray
    method: str
    minuit: Any = None  # the Minuit object when MIGRAD ran
    #: stopped early because ``stop`` said the path had joined a minimum found before
    joined: bool = False
    #: the gradient at ``x`` when the minimiser has it (the compiled Fisher scoring): the
    #: final Newton stage of :func:`.refine.refine` then needs no evaluation at ``x``
    grad: np.ndarray | None = None
    #: ``(lower, upper, (x, nll, covariance, positive definite))``: :func:`.refine.refine`
    #: of this minimum within those bounds, made with it in one compiled call
    #: (:func:`.minimize.minimize`'s ``refine_below``)
    refined: tuple | None = None


@dataclass(frozen=True)
class NearMinimum:
    """A ``stop`` test for :func:`.minimize.minimize`: the path has joined a known minimum
    when its NLL is at most ``nll_margin`` above ``nll`` and its squared distance from ``x``
    in the metric ``hessian``, ``d^T H d``, is below ``distance``.  As data (not a closure)
    it also stops the compiled loop of :mod:`.driver`."""

    x: np.ndarray
    nll: float
    hessian: np.ndarray
    nll_margin: float
    distance: float

    def __call__(self, x: np.ndarray, f: float) -> bool:
        if not f <= self.nll + self.nll_margin:
            return False
        d = x - self.x
        return float(d @ self.hessian @ d) < self.distance


def bound_tolerance(x: float, lo: float, hi: float) -> float:
    """How close to a bound a value counts as on it: 1e-4 of a finite range, else 1e-8 of
    the value (at least 1e-8)."""
    span = hi - lo
    return 1e-4 * span if math.isfinite(span) else 1e-8 * max(abs(x), 1.0)


def distance_to_bound(x: float, lo: float, hi: float) -> tuple[float, float]:
    """(distance to the nearer finite bound, that bound)."""
    dl = x - lo if math.isfinite(lo) else math.inf
    du = hi - x if math.isfinite(hi) else math.inf
    return (dl, lo) if dl <= du else (du, hi)


def at_bounds(x: np.ndarray, lower: np.ndarray, upper: np.ndarray) -> np.ndarray:
    """Which parameters are at a bound (within :func:`bound_tolerance`)."""
    return np.array([distance_to_bound(float(v), float(a), float(b))[0]
                     <= bound_tolerance(float(v), float(a), float(b))
                     for v, a, b in zip(x, lower, upper)], bool)
