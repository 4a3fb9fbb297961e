"""Background families polynomial on the window: ``exppoly`` (the exponential of a
polynomial in the window-scaled variable; ``exponential`` is its order 1) and ``bernstein``
(a non-negative Bernstein polynomial).  Guide: :mod:`.background`."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy import special

from ..errors import FitError
from ._base import Parameter
from .background_base import (
    _Background,
    _CompiledRows,
    _ExpFamily,
    _quadrature,
    _rows,
    _stacked,
    _t,
)
from .exp_slope import slope_fractions

__all__ = ["Bernstein", "ExpPoly", "Exponential"]


class ExpPoly(_ExpFamily, _Background):
    r"""Exponential of a polynomial on the window-scaled variable
    :math:`t = (x - c)/h \in [-1, 1]` (c, h: window centre and half-width):

    .. math:: f(x) \propto \exp\left(\sum_{j=1}^{k} b_j t^j\right)

    ``order`` k = 1, 2 or 3; parameters ``b1..bk`` (dimensionless, because t is; for
    order 1 the slope in 1/GeV is b1/h).  Order 1 has an analytic CDF and analytic
    derivatives; orders 2-3 integrate numerically.
    """

    name = "exppoly"

    def __init__(self, order: int = 1, **options: Any) -> None:
        if order not in (1, 2, 3):
            raise FitError(f"exppoly order must be 1, 2 or 3, got {order!r}")
        self.order = int(order)
        self.parameters = tuple(
            Parameter(f"b{j}", -1.0 if j == 1 else 0.0, -60.0, 60.0) for j in range(1, order + 1)
        )
        self._has_primitive = self.order == 1
        if self.order != 1:
            self._primitive_grad = None
            self._density_grad = None
        super().__init__(**options)

    def _density(self, x, p, window):
        t = _t(x, window)
        e = p[0] * t
        if self.order >= 2:
            e = e + p[1] * t * t
        if self.order >= 3:
            e = e + p[2] * t * t * t
        return np.exp(e)

    # order 1 only
    def _primitive(self, x, p, window):
        h = 0.5 * (window[1] - window[0])
        t = _t(x, window) + 1.0  # antiderivative shifted to vanish at the window start
        b = p[0]
        return h * np.exp(-b) * t * special.exprel(b * t)

    def _density_grad(self, x, p, window):
        if self.order != 1:
            raise NotImplementedError
        t = _t(x, window)
        return [t * np.exp(p[0] * t)]

    def _primitive_grad(self, x, p, window):
        # d/db of h * int_{-1}^{t} exp(b u) du = h * int_{-1}^{t} u exp(b u) du
        h = 0.5 * (window[1] - window[0])
        t = _t(x, window)
        b = np.asarray(p[0], dtype=float)
        if b.ndim == 0 and abs(float(b)) >= 1e-3:  # the common case: no series needed
            bf = float(b)
            return [h * ((t / bf - 1.0 / bf**2) * np.exp(bf * t)
                         + (1.0 / bf + 1.0 / bf**2) * math.exp(-bf))]
        small = np.abs(b) < 1e-3
        bs = np.where(small, 1.0, b)
        exact = ((t / bs - 1.0 / bs**2) * np.exp(bs * t)
                 - (-1.0 / bs - 1.0 / bs**2) * np.exp(-bs))
        t2 = t * t
        series = 0.5 * (t2 - 1.0) + b * (t2 * t + 1.0) / 3.0 + b * b * (t2 * t2 - 1.0) / 8.0
        return [h * np.where(small, series, exact)]

    def _uniform_rule(self, window):
        return self.order != 1  # order 1: closed form

    def _basis(self, x, window):
        """The exponent's basis functions t^j (see :mod:`.quadrature`)."""
        t = _t(x, window)
        return np.stack([t**j for j in range(1, self.order + 1)])

    def _stacked_rows(self, edges, params, window, grad: bool):
        if self.order != 1:  # compiled Gauss-Legendre bins (the fits' and toys' hot path)
            return _quadrature(self, edges, params, window, grad)
        p = _stacked(params, edges)
        if p is None:
            return None
        from .compiled_exponential import exponential_rows

        _, t, dt, _, _ = self.row_inputs(edges, window)
        return _rows(lambda f, g: exponential_rows(t, dt, p, f, g), p.size, t.size - 1, grad)

    def row_inputs(self, edges: Any, window: tuple[float, float]) -> tuple | None:
        """``("exponential", t, dt, 0, 0)``: the clipped edges in the window-scaled variable
        and the bin widths in it, the inputs of :func:`.compiled_exponential.exponential_rows` for
        stacked slopes (None for order > 1 or edges that are not 1-d)."""
        if self.order != 1 or np.ndim(edges) != 1:
            return None
        lo, hi = float(window[0]), float(window[1])
        x = np.clip(np.asarray(edges, dtype=float), lo, hi)
        t = (x - 0.5 * (lo + hi)) * (2.0 / (hi - lo))
        dt = np.diff(x) * (2.0 / (hi - lo))
        return "exponential", t, dt, 0.0, 0.0

    def bin_fractions(self, edges, params, window):
        out = self._stacked_rows(edges, params, window, False)
        if out is not None:
            return out[0]
        if self.order == 1 and len(params) == 1:
            return slope_fractions(edges, params[0], window, False)[0]
        return super().bin_fractions(edges, params, window)

    def fractions_and_grad(self, edges, params, window, need=None):
        if np.ndim(params[0]) or self.order != 1:
            out = self._stacked_rows(edges, params, window, True)
            if out is not None:
                return out
        if self.order != 1 or len(params) != 1:
            return super().fractions_and_grad(edges, params, window, need)
        frac, grad = slope_fractions(edges, params[0], window, True)
        return frac, grad[None]

    def pdf_and_grad(self, x, params, window, need=None):
        if self.order != 1:
            return super().pdf_and_grad(x, params, window, need)
        b = float(params[0])
        ends = np.array([float(window[0]), float(window[1])])
        pe = self._primitive(ends, [b], window)
        z = float(pe[1] - pe[0])
        gz = self._primitive_grad(ends, [b], window)[0]
        dz = float(gz[1] - gz[0]) / z
        t = _t(x, window)
        pdf = np.exp(b * t) * (1.0 / z)
        return pdf, (pdf * (t - dz))[None, :]

    def __repr__(self) -> str:
        return f"<background shape 'exppoly' order={self.order}>"


class Exponential(ExpPoly):
    """``exppoly`` of order 1: exp(b1 t), analytic CDF and derivatives."""

    name = "exponential"

    def __init__(self, **options: Any) -> None:
        super().__init__(order=1, **options)


class Bernstein(_CompiledRows):
    r"""Bernstein polynomial of degree n on the window, non-negative by construction:

    .. math:: f(x) \propto \sum_{i=0}^{n} \beta_i \binom{n}{i} u^i (1-u)^{n-i},
              \quad u = \frac{x-lo}{hi-lo},\quad \beta_0 = 1,\ \beta_i = c_i^2

    Parameters ``c1..cn`` (unbounded; their squares are the coefficients, so the
    density can never go negative and no bound is ever hit).  Analytic CDF via
    :math:`\int_0^u b_{i,n} = I_u(i+1, n-i+1)/(n+1)` (regularised incomplete beta,
    ``scipy.special.betainc``) and analytic derivatives.
    """

    name = "bernstein"

    def __init__(self, degree: int = 3, **options: Any) -> None:
        if int(degree) != degree or not 1 <= degree <= 12:
            raise FitError(f"bernstein degree must be an integer 1..12, got {degree!r}")
        self.degree = int(degree)
        self.parameters = tuple(Parameter(f"c{i}", 1.0) for i in range(1, self.degree + 1))
        super().__init__(**options)

    def _basis(self, x, window):
        lo, hi = window
        u = np.clip((x - lo) / (hi - lo), 0.0, 1.0)
        n = self.degree
        v = 1.0 - u
        up = [np.ones_like(u)]
        vp = [np.ones_like(u)]
        for _ in range(n):
            up.append(up[-1] * u)
            vp.append(vp[-1] * v)
        return [special.comb(n, i) * up[i] * vp[n - i] for i in range(n + 1)]

    def _ibasis(self, x, window):
        lo, hi = window
        u = np.clip((x - lo) / (hi - lo), 0.0, 1.0)
        n = self.degree
        return [(hi - lo) * special.betainc(i + 1, n - i + 1, u) / (n + 1) for i in range(n + 1)]

    def _sum(self, b, p):
        """The polynomial on basis ``b`` (the basis polynomials or their integrals)."""
        out = b[0]
        for i in range(1, self.degree + 1):
            out = out + p[i - 1] ** 2 * b[i]
        return out

    def _sum_grad(self, b, p):
        return [2.0 * p[i - 1] * b[i] for i in range(1, self.degree + 1)]

    def _density(self, x, p, window):
        return self._sum(self._basis(x, window), p)

    def _primitive(self, x, p, window):
        return self._sum(self._ibasis(x, window), p)

    def _density_grad(self, x, p, window):
        return self._sum_grad(self._basis(x, window), p)

    def _primitive_grad(self, x, p, window):
        return self._sum_grad(self._ibasis(x, window), p)

    def _compiled(self, edges, params, window, grad: bool):
        from .falling_rows import bernstein_fractions

        return bernstein_fractions(self, edges, params, window, grad)

    def __repr__(self) -> str:
        return f"<background shape 'bernstein' degree={self.degree}>"
