"""Cost functions of a :class:`~peaksift.likelihood.model.Model` on data, over its free parameters.

* :class:`BinnedCost`   -- :func:`~peaksift.likelihood.poisson.binned_nll` of a spectrum
  (saturated form, scaled Poisson for weighted bins, optional bin mask for blinding).
* :class:`~.unbinned_cost.UnbinnedCost` (its own module) -- :func:`~peaksift.likelihood.poisson.unbinned_nll`
  of the masses, in chunks so temporaries stay in cache.

Both answer the same questions: ``cost(*x)`` and ``cost.grad(*x)`` (iminuit's protocol,
``errordef = 0.5``), ``value_grad_info(x)`` (value, gradient, information: what the
minimiser of :mod:`.minimize` uses) and ``observed_hessian(x, steps)`` (the observed Hessian for the
covariance).  Constraint terms (:class:`~peaksift.likelihood.constraints.Constraint`) are added
to all of them once, in what every cost shares (:mod:`.cost_base`).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np

from .._jit import compiled_module
from .constraints import Constraint
from .cost_base import _Cost, _shallow_copy, _step_within
from .model import Model
from .poisson import (
    DRIVER_MODULE,
    KERNELS_MODULE,
    MU_FLOOR,
    WALL_MU,
    saturated_term,
    use_compiled,
)

__all__ = ["BinnedCost"]


class BinnedCost(_Cost):
    """Binned extended Poisson NLL (saturated form) of counts ``n`` in ``edges``.

    ``scale`` holds the scaled-Poisson factors per bin (all 1 for unweighted data); ``mask``
    selects the bins used (blinded bins are simply not used).
    """

    def __init__(self, model: Model, full: np.ndarray, free: np.ndarray,
                 constraints: Sequence[tuple[int, Constraint]], edges: np.ndarray,
                 n: np.ndarray, scale: np.ndarray, mask: np.ndarray | None = None) -> None:
        super().__init__(model, full, free, constraints)
        if isinstance(edges, np.ndarray) and edges.dtype == float and not edges.flags.writeable:
            self.edges = edges  # shared by the caller's costs (fit's starts): no copy
        else:
            self.edges = np.array(edges, float)
            self.edges.flags.writeable = False  # shapes may keep per-edges work for it
        self._data = (n, scale)  # as given: :meth:`with_mask` selects other bins of them
        (self.mask, self.s, self.unit_scale, self.counts, self.n,
         self._const) = _binned_data(n, scale, mask)
        self._plan = []
        for shape, sl, iy in model.blocks:
            rows = [self._row.get(i, -1) for i in range(sl.start, sl.stop)]
            self._plan.append((shape, sl, iy, any(r >= 0 for r in rows), rows,
                               self._row.get(iy, -1)))

        self._state: tuple | None = None
        self._buffers_at: bytes | None = None  # see buffers_hold
        self._empty: np.ndarray | None = None  # the used bins without entries
        self._problem: tuple | None = None  # the compiled minimiser's arrays, made on demand
        self._fused = _fused_path(self)
        # the numpy path's Jacobian, allocated when that path first runs
        self._jac = np.zeros((self.free.size, self.n.size)) if self._fused is None else None

    def _fractions(self, shape, p, need: bool, rows):
        fast = self._fused.fractions(shape, p) if self._fused is not None else None
        if fast is not None:
            return fast if need else (fast[0], None)
        if need:  # derivatives of the free parameters only (fixed ones are not differenced)
            f, g = shape.fractions_and_grad(self.edges, p, self.model.window,
                                            [r >= 0 for r in rows])
            if self.mask is not None:
                f, g = f[self.mask], g[:, self.mask]
            return f, g
        f = shape.bin_fractions(self.edges, p, self.model.window)
        return (f if self.mask is None else f[self.mask]), None

    def expectation(self, x: np.ndarray, jac: np.ndarray):
        """Expected counts ``mu`` at free values ``x`` and their Jacobian (filled into ``jac``)."""
        v = self.expand(x)
        mu = None
        blocks = []
        for shape, sl, iy, need, rows, ry in self._plan:
            y = float(v[iy])
            if ry < 0 and y == 0.0:  # a component fixed at zero yield contributes nothing
                continue
            p = [float(q) for q in v[sl]]
            f, g = self._fractions(shape, p, need, rows)
            for j, r in enumerate(rows):
                if r >= 0:
                    np.multiply(g[j], y, out=jac[r])
            if ry >= 0:
                jac[ry] = f
            mu = y * f if mu is None else mu + y * f
            blocks.append((shape, p, y, g, rows, ry))
        if mu is None:
            mu = np.zeros(self.n.size)
        return mu, blocks

    def value_grad_info(self, x: np.ndarray, info: bool = True):
        """NLL, gradient and expected information over the free parameters at ``x``."""
        self.ncall += 1
        x = np.asarray(x, float)
        if self._fused is not None:
            self._buffers_at = None
            out = self._fused.evaluate(self.expand(x), info)
            if out is not None:
                val, g, fisher, mu = out
                self._state = (x.tobytes(), mu, None)
                val = self._add_constraints(x, val + self._const, g, fisher)
                return val, g, fisher
        if self._jac is None:
            self._jac = np.zeros((self.free.size, self.n.size))
        jac = self._jac
        mu, blocks = self.expectation(x, jac)
        self._state = (x.tobytes(), mu, blocks)
        if mu.min(initial=0.0) < 0.0:  # a negative Poisson mean: outside the model
            k = self.free.size
            return math.inf, np.zeros(k), np.zeros((k, k)) if info else None
        mu = np.maximum(mu, MU_FLOOR)
        n, s = self.n, self.s
        # binned_nll in effective counts, with its constant precomputed (this is the hot path)
        if self.unit_scale:
            val = float(mu.sum() - n @ np.log(mu)) + self._const
            r = 1.0 - n / mu
            w = 1.0 / mu
        else:
            val = float(s @ mu - n @ np.log(mu)) + self._const
            r = s - n / mu
            w = s / mu
        g = jac @ r
        fisher = (jac * w) @ jac.T if info else None
        val = self._add_constraints(x, val, g, fisher)
        return val, g, fisher

    def at_values(self, full: np.ndarray) -> BinnedCost:
        """The same cost (data, free parameters, constraints, every derived array shared)
        with the fixed parameters at ``full``, fresh call count and buffers: the starts of
        one fit differ only there."""
        self._shape_domain()  # made once here, shared by the copies (each asks once)
        c = _shallow_copy(self)
        c.full = np.asarray(full, float).copy()
        c._last, c._last_value, c._state, c._problem, c.ncall = None, None, None, None, 0
        c._buffers_at = None
        c._fused = None if self._fused is None else self._fused.fresh()
        c._jac = None if self._jac is None else np.zeros_like(self._jac)
        return c

    def with_mask(self, mask: np.ndarray | None, full: np.ndarray) -> BinnedCost:
        """:meth:`at_values` on the bins ``mask`` selects of the same data (the sidebands
        of a background fit): the same numbers as a new cost with that mask, without making
        its kernels, layout and compiled arrays again."""
        return self._on_data(*self._data, mask, full)

    def with_counts(self, n: np.ndarray, scale: np.ndarray, full: np.ndarray,
                    saturated: float | None = None) -> BinnedCost:
        """:meth:`at_values` on other counts ``n`` (scaled-Poisson factors ``scale``) in the
        same bins (another histogram of the same binning): the same numbers as a new cost on
        them, without making its kernels, layout and compiled arrays again.  ``saturated``:
        :func:`.poisson.saturated_term` of ``n`` where the caller has it (used when ``scale``
        is this cost's own factors of 1 and every bin is used)."""
        return self._on_data(n, scale, self.mask, full, saturated)

    def _on_data(self, n: np.ndarray, scale: np.ndarray, mask: np.ndarray | None,
                 full: np.ndarray, saturated: float | None = None) -> BinnedCost:
        c = _shallow_copy(self)
        c.full = np.asarray(full, float).copy()
        c._last, c._last_value, c._state, c._problem, c._empty = None, None, None, None, None
        c.ncall, c._buffers_at = 0, None
        c._data = (n, scale)
        (c.mask, c.s, c.unit_scale, c.counts, c.n, c._const) = _binned_data(
            n, scale, mask, ones=scale is self._data[1] and self.unit_scale,
            saturated=saturated)
        c._fused = (None if self._fused is None else
                    self._fused.on_bins(c.mask, c.n, c.s, c.unit_scale))
        c._jac = np.zeros((c.free.size, c.n.size)) if c._fused is None else None
        return c

    @property
    def constant(self) -> float:
        """The NLL's constant (saturated form) added to the compiled pass's value."""
        return self._const

    def compiled_problem(self) -> tuple | None:
        """The arrays of :mod:`.driver`'s compiled minimiser for this cost, or None (a
        component without a compiled kernel, or constraint terms: the Python loop then)."""
        if self._fused is None or self._cons:
            return None
        if self._problem is None:
            self._problem = compiled_module(DRIVER_MODULE).problem_of(self._fused) or ()
        return self._problem or None

    def note_compiled_calls(self, calls: int, x_last: np.ndarray,
                            mu: np.ndarray | None = None) -> None:
        """Book ``calls`` evaluations made by the compiled minimiser, the last at
        ``x_last`` (its expectation is in the compiled buffers, or ``mu``: a copy made
        before later work wrote them)."""
        self.ncall += int(calls)
        key = np.asarray(x_last, float).tobytes()
        self._state = (key, self._fused.mu.copy() if mu is None else mu, None)
        self._buffers_at = key

    def buffers_changed(self) -> None:
        """Called before anything writes the compiled buffers (see :meth:`buffers_hold`)."""
        self._buffers_at = None

    def buffers_hold(self, x: np.ndarray) -> bool:
        """Whether the compiled buffers (CDF rows, yields, expectation, Jacobian) hold the
        compiled minimiser's complete evaluation at ``x``, its last point: the observed
        Hessian there need not evaluate it again."""
        return self._buffers_at is not None and self._buffers_at == np.asarray(
            x, float).tobytes()

    @property
    def has_empty_bins(self) -> bool:
        """Whether a used bin is empty (the minimum may then sit on the wall mu >= 0)."""
        if self._empty is None:
            self._empty = self.n == 0.0
        return bool(self._empty.any())

    def wall_terms(self, x: np.ndarray) -> tuple | None:
        """At the last evaluation, made at ``x``: ``(information with the empty bins left
        out, expectation, Jacobian)`` for the minimiser's step near the wall ``mu >= 0``
        (see :func:`.minimize.fisher_scoring`), or None when no used bin is empty.

        An empty bin's term ``s mu`` is linear in ``mu``: its curvature is 0, not the
        information ``s / mu`` that grows without bound at the wall.  A bin already at the
        wall (``mu < WALL_MU``) keeps its information, so that the step slides along the
        wall instead of being cut short by it."""
        if not self.has_empty_bins:
            return None
        st = self._state
        if st is None or st[0] != np.asarray(x, float).tobytes():
            return None
        jac = self._jac if st[2] is not None else self._fused.jac
        mu = np.maximum(np.asarray(st[1], float), MU_FLOOR)
        full = ~self._empty | (mu < WALL_MU)
        w = (1.0 if self.unit_scale else self.s[full]) / mu[full]
        jf = jac[:, full]
        info = (jf * w) @ jf.T
        self._add_constraints(np.asarray(x, float), 0.0, np.zeros(self.free.size), info)
        return info, mu, jac.copy()

    def expected_at(self, x: np.ndarray) -> np.ndarray | None:
        """The expectation of the last evaluation (or value-only one) if it was at ``x``
        (else None)."""
        key = np.asarray(x, float).tobytes()
        st = self._state
        if st is not None and st[0] == key:
            return np.asarray(st[1])
        lv = self._last_value
        if lv is not None and lv[0] == key and lv[2] is not None:
            return np.asarray(lv[2])
        return None

    def value_only(self, x: np.ndarray) -> tuple[float, Any] | None:
        """:meth:`value_grad_info`'s value without the gradient, from the same fractions
        (:meth:`peaksift.shapes.Shape.fit_fractions`) summed in the same order: the same
        bits, so MIGRAD's path is the same.  None on the compiled path (its one pass gives
        the gradient almost for free)."""
        if self._fused is not None:
            return None
        self.ncall += 1
        x = np.asarray(x, float)
        v = self.expand(x)
        mu = None
        window = self.model.window
        for shape, sl, iy, need, rows, ry in self._plan:
            y = float(v[iy])
            if ry < 0 and y == 0.0:  # as in expectation()
                continue
            p = [float(q) for q in v[sl]]
            f = (shape.fit_fractions(self.edges, p, window) if need
                 else shape.bin_fractions(self.edges, p, window))
            if self.mask is not None:
                f = f[self.mask]
            mu = y * f if mu is None else mu + y * f
        if mu is None:
            mu = np.zeros(self.n.size)
        if mu.min(initial=0.0) < 0.0:
            return math.inf, mu
        expected = mu
        mu = np.maximum(mu, MU_FLOOR)
        n, s = self.n, self.s
        if self.unit_scale:
            val = float(mu.sum() - n @ np.log(mu)) + self._const
        else:
            val = float(s @ mu - n @ np.log(mu)) + self._const
        for k, c in self._cons:  # as _add_constraints adds them
            val += float(c.nll(x[k]))
        return val, expected

    def _grad_all_bins(self, shape, q, need):
        """Derivatives of ``shape``'s fractions in the used bins at parameters ``q``."""
        fast = self._fused.fractions(shape, q) if self._fused is not None else None
        if fast is not None:
            return fast[1]
        g = shape.fractions_and_grad(self.edges, q, self.model.window, need)[1]
        return g if self.mask is None else g[:, self.mask]

    def observed_hessian(self, x: np.ndarray, steps: np.ndarray, lower: Any = None,
                upper: Any = None) -> np.ndarray:
        """Observed Hessian of the NLL at ``x``:
        sum_i n~_i/mu_i^2 dmu dmu^T + sum_i (s_i - n~_i/mu_i) d^2mu, with d^2mu exact for
        yield pairs (0) and yield-shape pairs (dF/dtheta), and by differences of the
        analytic shape gradients (step ``steps``, central where the bounds allow) for
        shape-shape pairs of one component.

        The differences stay inside ``lower``/``upper`` (bounds of the free parameters; by
        default the model's window-aware bounds): a step of a peak's mass out of the window
        would leave no probability in it and make the bin fractions 0/0."""
        x = np.asarray(x, float)
        lower, upper = self._free_bounds(lower, upper)
        if self.compiled_problem() is not None:  # the same, in one compiled call
            hess = compiled_module(DRIVER_MODULE).compiled_observed_hessian(self, x, steps, lower,
                                                                      upper)
            if hess is not None:
                return hess
        jac = np.zeros((self.free.size, self.n.size))
        mu, blocks = self.expectation(x, jac)
        mu = np.maximum(mu, MU_FLOOR)
        n = self.n
        r = (1.0 if self.unit_scale else self.s) - n / mu
        hess = (jac * (n / (mu * mu))) @ jac.T
        for shape, p, y, g, rows, ry in blocks:
            if g is None:
                continue
            need = [r >= 0 for r in rows]
            for j, rj in enumerate(rows):
                if rj < 0:
                    continue
                if ry >= 0:  # d2 mu / d yield d theta_j = dF/dtheta_j
                    t = float(r @ g[j])
                    hess[ry, rj] += t
                    hess[rj, ry] += t
                h = abs(float(steps[rj]))
                if not (np.isfinite(h) and h > 0):
                    h = 1e-6 * max(abs(p[j]), 1.0)
                h, up, dn = _step_within(p[j], h, lower[rj], upper[rj])
                q = list(p)
                if up and dn:
                    q[j] = p[j] + h
                    g2 = self._grad_all_bins(shape, q, need)
                    q[j] = p[j] - h
                    g1 = self._grad_all_bins(shape, q, need)
                    width = 2.0 * h
                else:  # one-sided next to a bound
                    q[j] = p[j] + (h if up else -h)
                    g2 = self._grad_all_bins(shape, q, need)
                    g1 = None
                    width = h if up else -h
                base = g if g1 is None else g1
                d2 = y * (g2 - base) / width  # row k: d2 F / d theta_k d theta_j
                for k, rk in enumerate(rows):
                    if rk >= 0:
                        hess[rk, rj] += float(r @ d2[k])
        self._constraint_hessian(x, hess)
        return 0.5 * (hess + hess.T)


#: the derived data of recent (counts, scale, mask) arrays, with the arrays themselves (so
#: their ids stay valid): the starts of one fit build several costs on the same data
_RECENT: list = []


def _frozen(a: Any) -> bool:
    return isinstance(a, np.ndarray) and not a.flags.writeable


def _binned_data(n: np.ndarray, scale: np.ndarray, mask: np.ndarray | None,
                 ones: bool = False, saturated: float | None = None):
    """(mask or None, scale, unit scale?, counts, effective counts, constant of the
    saturated form) of the used bins; read-only arrays, kept for the last few read-only
    inputs (the costs of one fit share them).  ``ones``: ``scale`` is known to be all 1
    (a cost's own read-only factors, found so); then ``saturated``, if given, is
    ``saturated_term(n)``."""
    for entry in _RECENT:
        if entry[0] is n and entry[1] is scale and entry[2] is mask:
            return entry[3]
    if (ones and mask is None and _frozen(n) and n.dtype == np.float64
            and _frozen(scale)):
        # every bin used, factors of 1 (read-only, so still 1): the effective counts are
        # the counts themselves (n * 1.0 is n, bit for bit), no test of the factors
        sat = float(saturated_term(n)) if saturated is None else float(saturated)
        out = (None, scale, True, n, n, sat - 0.0)
        _RECENT.insert(0, (n, scale, mask, out))
        del _RECENT[6:]
        return out
    used = None if mask is None or np.asarray(mask).all() else np.asarray(mask, bool)
    m = slice(None) if used is None else used
    s = np.asarray(scale, float)[m]
    counts = np.asarray(n, float)[m]
    eff = counts * s  # effective counts
    # constant part of the saturated form: sum(n~ ln n~ - n~) - sum(n~ ln s)
    unit = bool((s == 1.0).all())
    const = float(saturated_term(eff)) - (0.0 if unit else float(eff @ np.log(s)))
    for a in (s, counts, eff):
        a.flags.writeable = False
    out = (used, s, unit, counts, eff, const)
    # kept only for read-only inputs: an array changed in place must not find stale data
    if all(_frozen(a) for a in (n, scale)) and (mask is None or _frozen(mask)):
        _RECENT.insert(0, (n, scale, mask, out))
        del _RECENT[6:]
    return out


def _fused_path(cost: BinnedCost) -> Any:
    """The compiled evaluation of :mod:`.kernels` when every component of the cost has an
    edge kernel (else None: the numpy path); see :func:`.poisson.use_compiled`."""
    if not use_compiled():
        return None
    kern = compiled_module(KERNELS_MODULE)
    kernels = [kern.edge_kernel(shape, cost.edges, cost.model.window) for shape, _, _ in
               cost.model.blocks]
    if any(k is None for k in kernels):
        return None
    return kern.FusedBinned(kernels, cost._plan, cost.free.size, cost.edges, cost.mask, cost.n,
                       cost.s, cost.unit_scale, MU_FLOOR)
