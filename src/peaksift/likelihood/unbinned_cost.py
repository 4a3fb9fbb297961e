"""The extended unbinned cost: :class:`UnbinnedCost`, a Model on masses over its free parameters (the questions every cost answers: :mod:`.cost`)."""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np

from .constraints import Constraint
from .cost_base import _Cost, _step_within
from .model import Model
from .poisson import MU_FLOOR, unbinned_nll

__all__ = ["NEAR_MARGIN", "UnbinnedCost"]

#: the peak check's sum from the compiled densities decides its sign alone when it is more
#: than this fraction of the sum of its terms' sizes away from 0 (they agree with pdf's to
#: ~1e-12 relative)
NEAR_MARGIN = 1e-9


class UnbinnedCost(_Cost):
    """Extended unbinned NLL of masses ``x`` (weights ``w`` or None), evaluated in chunks of
    ``CHUNK`` masses (several times faster than whole-array expressions for 1M masses)."""

    CHUNK = 32768

    def __init__(self, model: Model, full: np.ndarray, free: np.ndarray,
                 constraints: Sequence[tuple[int, Constraint]], x: np.ndarray,
                 w: np.ndarray | None) -> None:
        super().__init__(model, full, free, constraints)
        self.x = np.asarray(x, float)
        self.w = None if w is None else np.asarray(w, float)
        fr = set(self.free.tolist())
        self._need = [any(i in fr for i in range(sl.start, sl.stop)) for _, sl, _ in model.blocks]
        self._flags = [[i in fr for i in range(sl.start, sl.stop)] for _, sl, _ in model.blocks]
        self._yields = [iy for _, _, iy in model.blocks]
        # (yield index, mass index) of components with a mass: their peak is where a
        # negative yield makes the density lowest
        self._peaks = [(iy, sl.start + list(shape.parameter_names).index("mass"))
                       for shape, sl, iy in model.blocks if "mass" in shape.parameter_names]

    def _negative_density(self, v: np.ndarray) -> bool:
        """Whether the density is negative at the peak of a component with a negative yield:
        outside the model, like a negative expected count of a binned fit (checked only at
        the events, a narrow negative peak between them lowered the NLL without bound, and
        a background-only fit ran its yield to the bound in ~40,000 MIGRAD calls)."""
        lo, hi = self.model.window
        for iy, im in self._peaks:
            if v[iy] < 0.0:
                at = np.array([min(max(float(v[im]), lo), hi)])
                # first from the shapes' compiled densities (pdf_near, within ~1e-12 of
                # pdf): a sum clearly of one sign (beyond 1e-9 of the sum of the terms'
                # sizes) has that sign with pdf's numbers too; only a sum near 0 (or not
                # a number) is made again from pdf, so the answer is pdf's, ~3x sooner
                terms = [float(v[jy]) * float(shape.pdf_near(
                    at, [float(q) for q in v[sl]], self.model.window)[0])
                    for shape, sl, jy in self.model.blocks]
                total = sum(terms)
                margin = NEAR_MARGIN * sum(abs(t) for t in terms)
                if total > margin:
                    continue
                if total < -margin:
                    return True
                total = sum(float(v[jy]) * float(shape.pdf(at, [float(q) for q in v[sl]],
                                                           self.model.window)[0])
                            for shape, sl, jy in self.model.blocks)
                if not total >= 0.0:
                    return True
        return False

    def _chunks(self):
        n = self.x.size
        for a in range(0, n, self.CHUNK):
            b = min(a + self.CHUNK, n)
            yield self.x[a:b], None if self.w is None else self.w[a:b]

    def per_event(self, v: np.ndarray, x: np.ndarray):
        """Density mu(x) and, per parameter, (factor, d density) for the chunk ``x``."""
        model = self.model
        mu = None
        dens: list[Any] = [None] * v.size
        for (shape, sl, iy), need, flags in zip(model.blocks, self._need, self._flags):
            p = [float(q) for q in v[sl]]
            y = float(v[iy])
            if need:
                f, g = shape.pdf_and_grad(x, p, model.window, flags)
                for j, i in enumerate(range(sl.start, sl.stop)):
                    dens[i] = (y, g[j])
            else:
                f = shape.pdf(x, p, model.window)
            mu = y * f if mu is None else mu + y * f
            dens[iy] = (1.0, f)
        return mu, dens

    def _scores(self, dens, inv):
        if not self.free.size:  # every parameter fixed: no scores
            return np.zeros((0, inv.size))
        return np.array([np.zeros_like(inv) if dens[i] is None else (dens[i][0] * inv) * dens[i][1]
                         for i in self.free])

    def value_grad_info(self, x: np.ndarray, info: bool = True):
        """NLL, gradient and the outer-product (BHHH) information sum_j w_j s_j s_j^T,
        s_j = grad ln mu(x_j), over the free parameters at ``x``."""
        self.ncall += 1
        x = np.asarray(x, float)
        v = self.expand(x)
        if self._peaks and self._negative_density(v):
            k = self.free.size
            return math.inf, np.zeros(k), np.zeros((k, k)) if info else None
        val = float(sum(v[iy] for iy in self._yields))
        g = np.zeros(v.size)
        g[self._yields] = 1.0
        g = g[self.free]
        fisher = np.zeros((self.free.size, self.free.size))
        with np.errstate(over="ignore", invalid="ignore"):
            for xc, w in self._chunks():
                mu, dens = self.per_event(v, xc)
                np.maximum(mu, MU_FLOOR, out=mu)
                val += float(unbinned_nll(0.0, mu, w))
                sc = self._scores(dens, 1.0 / mu)
                if w is None:
                    g -= sc.sum(axis=1)
                    if info:
                        fisher += sc @ sc.T
                else:
                    g -= sc @ w
                    if info:
                        fisher += (sc * w) @ sc.T
        val = self._add_constraints(x, val, g, fisher if info else None)
        return val, g, (fisher if info else None)

    def observed_hessian(self, x: np.ndarray, steps: np.ndarray, lower: Any = None,
                upper: Any = None) -> np.ndarray:
        """Observed Hessian by differences of the analytic gradient (central where the
        bounds ``lower``/``upper`` of the free parameters allow; callers pass steps of ~1e-3
        of each parameter's error)."""
        x = np.asarray(x, float)
        n = x.size
        lower, upper = self._free_bounds(lower, upper)
        hess = np.empty((n, n))
        for i in range(n):
            h = abs(float(steps[i]))
            if not (np.isfinite(h) and h > 0):
                h = 1e-6 * max(abs(x[i]), 1.0)
            hi, lo = x.copy(), x.copy()
            h, up, dn = _step_within(x[i], h, lower[i], upper[i])
            if up and dn:
                hi[i] += h
                lo[i] -= h
                width = 2 * h
            elif up:
                hi[i] += h
                width = h
            else:
                lo[i] -= h
                width = h
            hess[:, i] = (self.value_grad_info(hi, info=False)[1]
                          - self.value_grad_info(lo, info=False)[1]) / width
        return 0.5 * (hess + hess.T)

    def score_outer(self, x: np.ndarray) -> np.ndarray:
        """D = sum_j w_j^2 grad(ln mu_j) grad(ln mu_j)^T over the free parameters (for the
        sandwich covariance of weighted unbinned fits)."""
        v = self.expand(x)
        d = np.zeros((self.free.size, self.free.size))
        for xc, w in self._chunks():
            mu, dens = self.per_event(v, xc)
            sc = self._scores(dens, (1.0 if w is None else w) / np.maximum(mu, MU_FLOOR))
            d += sc @ sc.T
        return d
