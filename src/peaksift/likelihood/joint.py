"""Several channels' costs as one: :class:`JointCost`, the product of their likelihoods.

Each channel has its own :class:`~peaksift.likelihood.cost.BinnedCost` or
:class:`~peaksift.likelihood.unbinned_cost.UnbinnedCost` (its model, data and constraints).  The joint
cost has its own free parameters ``X`` (e.g. the shared cross-section x branching fraction,
then every channel's background parameters); channel ``c`` sees its free vector as a linear
map ``x_c = A_c X`` (a signal yield ``L_c eff_c sigmaB`` is a row with ``L_c eff_c`` in the
shared column, a background parameter a row with a single 1).  Then

* value       ``sum_c nll_c(A_c X)``
* gradient    ``sum_c A_c^T g_c``
* information ``sum_c A_c^T I_c A_c``, and the same for the observed Hessian,

so :func:`peaksift.likelihood.minimize` and :func:`~peaksift.likelihood.refine` fit it like
any one-channel cost (``errordef = 0.5``, iminuit's call protocol).  The stacked scans of
many hypotheses at once are in :mod:`peaksift.stats.joint`.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

__all__ = ["JointCost"]


class JointCost:
    """The sum of channel costs over shared free parameters (see the module guide).

    Parameters
    ----------
    costs : sequence of BinnedCost / UnbinnedCost
        One per channel, each over its own free parameters.
    maps : sequence of arrays
        ``A_c`` of shape ``(n_free_c, n_joint)`` for every cost.
    """

    errordef = 0.5

    def __init__(self, costs: Sequence[Any], maps: Sequence[Any]) -> None:
        if len(costs) != len(maps) or not costs:
            raise ValueError("JointCost needs one map per cost, and at least one cost")
        self.costs = list(costs)
        self.maps = [np.atleast_2d(np.asarray(a, float)) for a in maps]
        self.size = self.maps[0].shape[1]
        for c, a in zip(self.costs, self.maps):
            if a.shape != (c.free.size, self.size):
                raise ValueError(f"map of shape {a.shape} for a cost with {c.free.size} free "
                                 f"parameters and {self.size} joint ones")
        self.ncall = 0

    def value_grad_info(self, x: np.ndarray, info: bool = True):
        """Summed NLL, gradient and information at joint values ``x``."""
        self.ncall += 1
        x = np.asarray(x, float)
        val, g = 0.0, np.zeros(self.size)
        fisher = np.zeros((self.size, self.size)) if info else None
        for c, a in zip(self.costs, self.maps):
            v, gc, ic = c.value_grad_info(a @ x, info=info)
            val += v
            g += a.T @ gc
            if info:
                fisher += a.T @ ic @ a
        return val, g, fisher

    def observed_hessian(self, x: np.ndarray, steps: np.ndarray, lower: Any = None,
                         upper: Any = None) -> np.ndarray:
        """``sum_c A_c^T H_c A_c`` with each channel's own observed Hessian (its steps the
        joint steps mapped through ``|A_c|``; its own bounds)."""
        x = np.asarray(x, float)
        out = np.zeros((self.size, self.size))
        for c, a in zip(self.costs, self.maps):
            h = c.observed_hessian(a @ x, np.abs(a) @ np.asarray(steps, float))
            out += a.T @ h @ a
        return 0.5 * (out + out.T)

    def _eval(self, x: Sequence[float]) -> tuple[float, np.ndarray]:
        val, g, _ = self.value_grad_info(np.asarray(x, float), info=False)
        if not np.isfinite(val) or not np.all(np.isfinite(g)):
            return 1e300, np.zeros(self.size)
        return val, g

    def __call__(self, *x: float) -> float:
        return self._eval(x)[0]

    def grad(self, *x: float) -> np.ndarray:
        return self._eval(x)[1]
