"""What one minimisation found, and the test that a path has joined a minimum known before.

* :class:`Minimum` -- the result of :func:`.minimize.minimize` (free parameters only), made
  by Fisher scoring or by iminuit's MIGRAD (:mod:`.migrad`).
* :class:`NearMinimum` -- a ``stop`` test: the path of a later start has run into the best
  minimum found so far, so it has nothing new to find (the free fit then abandons it).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["Minimum", "NearMinimum"]


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
