"""Background shapes: smooth, falling (or turning-on) densities on the fit window.

Which to use
------------
* ``exppoly`` (``order=1..3``; ``exponential`` is order 1) -- exp(b1 t + b2 t^2 + b3 t^3)
  with t in [-1, 1] across the window: the first choice for a falling spectrum.
* ``bernstein`` (``degree=n``) -- non-negative polynomial of any shape on the window.
* ``powerlaw``  -- x^-power: steeply falling spectra over a wide range.
* ``powersum``  (``terms=1..3``) -- a sum of power laws, for the background-family choice.
* ``dijet``     -- p0 (1-x)^p1 / x^(p2 + p3 ln x), x = m / sqrt_s (``npar=2..4``):
  the smoothly falling family of published dijet resonance searches
  (e.g. Phys. Rev. D 79 (2009) 112002).
* ``turnon``    -- a Gaussian-CDF trigger turn-on times an exponential fall
  (:mod:`peaksift.shapes.turnon`).

Background parameter names never collide with signal names: ``b1..b3`` (exppoly),
``c1..cn`` (bernstein), ``power`` (and ``power_j``/``weight_j``, powersum), ``p1..p3`` (dijet), ``threshold``/``resolution``/``slope``
(turnon).  The overall normalisation (p0 and friends) is the fit's ``background_yield``.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy import special

from ..errors import FitError
from ._base import Parameter, Shape

__all__ = ["Bernstein", "Dijet", "ExpPoly", "Exponential", "PowerLaw", "PowerSum"]


def _t(x, window):
    lo, hi = window
    return (x - 0.5 * (lo + hi)) / (0.5 * (hi - lo))


class _Background(Shape):
    kind = "background"


class _CompiledRows(_Background):
    """A background whose bin fractions (and their derivatives) come from a compiled kernel,
    ``_compiled(edges, params, window, grad)`` -> ``(fractions, derivatives)`` or None where
    the kernel declines; then the generic path of :class:`Shape` answers."""

    def _compiled(self, edges, params, window, grad: bool):
        return None

    def bin_fractions(self, edges, params, window):
        out = self._compiled(edges, params, window, False)
        return out[0] if out is not None else super().bin_fractions(edges, params, window)

    def fractions_and_grad(self, edges, params, window, need=None):
        out = self._compiled(edges, params, window, True)
        return out if out is not None else super().fractions_and_grad(edges, params,
                                                                       window, need)


def _stacked(params, edges) -> np.ndarray | None:
    """The one parameter of a stacked call (one value per row, shape ``(B, 1)``) on 1-d
    edges, as a contiguous ``(B,)`` array; None for any other call."""
    p = params[0]
    if len(params) != 1 or np.ndim(p) != 2 or np.shape(p)[1] != 1 or np.ndim(edges) != 1:
        return None
    return np.ascontiguousarray(np.asarray(p, float)[:, 0])


def _rows(run, rows: int, nbins: int, grad: bool):
    """``(fractions (B, N), derivatives (1, B, N) or None)`` from ``run(frac, grad)``, a
    compiled row kernel of :mod:`.compiled`; None where it declines (a row near its
    series)."""
    frac = np.empty((rows, nbins))
    g = np.empty((rows, nbins) if grad else (0, 0))
    if not run(frac, g):
        return None
    return frac, (g[None] if grad else None)



def _quadrature(shape, edges, params, window, grad: bool):
    from .quadrature import shape_fractions

    return shape_fractions(shape, edges, params, window, grad)


class ExpPoly(_Background):
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
        from .compiled import exponential_rows

        _, t, dt, _, _ = self.row_inputs(edges, window)
        return _rows(lambda f, g: exponential_rows(t, dt, p, f, g), p.size, t.size - 1, grad)

    def row_inputs(self, edges: Any, window: tuple[float, float]) -> tuple | None:
        """``("exponential", t, dt, 0, 0)``: the clipped edges in the window-scaled variable
        and the bin widths in it, the inputs of :func:`.compiled.exponential_rows` for
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
        return out[0] if out is not None else super().bin_fractions(edges, params, window)

    def fractions_and_grad(self, edges, params, window, need=None):
        if np.ndim(params[0]) or self.order != 1:
            out = self._stacked_rows(edges, params, window, True)
            if out is not None:
                return out
        if self.order != 1 or np.ndim(params[0]) or abs(float(params[0])) < 1e-3:
            return super().fractions_and_grad(edges, params, window, need)
        b = float(params[0])
        lo, hi = float(window[0]), float(window[1])
        x = np.asarray(edges, dtype=float)
        if x[0] < lo or x[-1] > hi:
            x = np.clip(x, lo, hi)
        t = (x - 0.5 * (lo + hi)) * (2.0 / (hi - lo))
        e = np.exp(b * t)
        em, ep = math.exp(-b), math.exp(b)
        # P(t) = (e^{bt} - e^{-b}) / b, dP/db = e^{bt}(t/b - 1/b^2) + e^{-b}(1/b + 1/b^2)
        inv_z = b / (ep - em)  # 1 / P(1)
        c = (e - em) * (inv_z / b)
        ib, ib2 = 1.0 / b, 1.0 / (b * b)
        g0 = em * (ib + ib2)
        gx = e * (t * ib - ib2) + g0
        ghi = ep * (ib - ib2) + g0
        grad = (gx - c * ghi) * inv_z
        return c[1:] - c[:-1], (grad[1:] - grad[:-1])[None, :]

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

    def _density(self, x, p, window):
        b = self._basis(x, window)
        out = b[0]
        for i in range(1, self.degree + 1):
            out = out + p[i - 1] ** 2 * b[i]
        return out

    def _primitive(self, x, p, window):
        b = self._ibasis(x, window)
        out = b[0]
        for i in range(1, self.degree + 1):
            out = out + p[i - 1] ** 2 * b[i]
        return out

    def _density_grad(self, x, p, window):
        b = self._basis(x, window)
        return [2.0 * p[i - 1] * b[i] for i in range(1, self.degree + 1)]

    def _primitive_grad(self, x, p, window):
        b = self._ibasis(x, window)
        return [2.0 * p[i - 1] * b[i] for i in range(1, self.degree + 1)]

    def _compiled(self, edges, params, window, grad: bool):
        from .falling_rows import bernstein_fractions

        return bernstein_fractions(self, edges, params, window, grad)

    def __repr__(self) -> str:
        return f"<background shape 'bernstein' degree={self.degree}>"


class PowerLaw(_Background):
    r"""Power law :math:`f(x) \propto x^{-k}` (parameter ``power`` = k, for x > 0).

    Analytic CDF: :math:`\int (x/c)^{-k} dx = c\,\ln(x/c)\,\mathrm{exprel}((1-k)\ln(x/c))`
    (c = window centre; ``scipy.special.exprel`` keeps k = 1 exact) and analytic
    derivatives.
    """

    name = "powerlaw"
    parameters = (Parameter("power", 3.0, -20.0, 60.0),)

    def _density(self, x, p, window):
        c = 0.5 * (window[0] + window[1])
        return np.exp(-p[0] * np.log(np.maximum(x, 1e-300) / c))

    def _primitive(self, x, p, window):
        c = 0.5 * (window[0] + window[1])
        lx = np.log(np.maximum(x, 1e-300) / c)
        return c * lx * special.exprel((1.0 - p[0]) * lx)

    def _density_grad(self, x, p, window):
        c = 0.5 * (window[0] + window[1])
        lx = np.log(np.maximum(x, 1e-300) / c)
        return [-lx * np.exp(-p[0] * lx)]

    def _primitive_grad(self, x, p, window):
        # d/dk int_c^x (u/c)^-k du = -c int_0^{lx} v e^{(1-k) v} dv
        c = 0.5 * (window[0] + window[1])
        lx = np.log(np.maximum(x, 1e-300) / c)
        a = 1.0 - np.asarray(p[0], dtype=float)
        small = np.abs(a * lx) < 1e-3
        asafe = np.where(np.abs(a) < 1e-12, 1e-12, a)
        exact = (lx / asafe - 1.0 / asafe**2) * np.exp(asafe * lx) + 1.0 / asafe**2
        lx2 = lx * lx
        series = 0.5 * lx2 + a * lx2 * lx / 3.0 + a * a * lx2 * lx2 / 8.0
        return [-c * np.where(small, series, exact)]

    def fractions_and_grad(self, edges, params, window, need=None):
        r"""Fast path for one parameter set: with :math:`L = \ln(x/c)`, :math:`a = 1-k` and
        :math:`q = e^{aL}` the CDF is :math:`C = (q - q_{lo})/(q_{hi} - q_{lo})` and

        .. math:: \partial_k C = -\frac{(Lq - L_{lo}q_{lo}) - C\,(L_{hi}q_{hi} - L_{lo}q_{lo})}
                                       {q_{hi} - q_{lo}}

        (the derivative of the primitive above, its 1/a terms cancel); both are ratios of
        terms linear in q, so q is scaled by its largest value to keep steep power laws
        finite.  Near k = 1 (q nearly constant) the series of the general path is used."""
        lo, hi = float(window[0]), float(window[1])
        if np.ndim(params[0]) and lo > 0:
            out = self._stacked_rows(edges, params, window, True)
            if out is not None:
                return out
        if np.ndim(params[0]) or not lo > 0:
            return super().fractions_and_grad(edges, params, window, need)
        a = 1.0 - float(params[0])
        c = 0.5 * (lo + hi)
        l_lo, l_hi = math.log(lo / c), math.log(hi / c)
        if abs(a) * (l_hi - l_lo) < 1e-3:
            return super().fractions_and_grad(edges, params, window, need)
        lx = self._log_edges(edges, lo, hi, c)
        top = max(a * l_lo, a * l_hi)
        q = np.exp(a * lx - top)
        q_lo, q_hi = math.exp(a * l_lo - top), math.exp(a * l_hi - top)
        inv = 1.0 / (q_hi - q_lo)
        cdf = (q - q_lo) * inv
        grad = ((l_lo * q_lo - lx * q) + cdf * (l_hi * q_hi - l_lo * q_lo)) * inv
        return cdf[1:] - cdf[:-1], (grad[1:] - grad[:-1])[None, :]


    def _stacked_rows(self, edges, params, window, grad: bool):
        """Stacked parameters ``(B, 1)``: the compiled rows of :mod:`.compiled` (one
        exponential per edge and row instead of a logarithm and ``exprel``)."""
        lo = float(window[0])
        p = _stacked(params, edges) if lo > 0 else None
        if p is None:
            return None
        from .compiled import powerlaw_rows

        _, lx, dlx, l_lo, l_hi = self.row_inputs(edges, window)
        return _rows(lambda f, g: powerlaw_rows(lx, dlx, p, l_lo, l_hi, f, g), p.size,
                     lx.size - 1, grad)

    def row_inputs(self, edges: Any, window: tuple[float, float]) -> tuple | None:
        """``("powerlaw", ln(x/c), ln(x_{i+1}/x_i), ln(lo/c), ln(hi/c))`` of the clipped
        edges (c the window's centre), the inputs of :func:`.compiled.powerlaw_rows` for
        stacked powers (None for a window reaching 0 or edges that are not 1-d)."""
        lo, hi = float(window[0]), float(window[1])
        if not lo > 0 or np.ndim(edges) != 1:
            return None
        c = 0.5 * (lo + hi)
        lx, dlx = self._edge_logs(edges, lo, hi, c)
        return "powerlaw", lx, dlx, math.log(lo / c), math.log(hi / c)

    def bin_fractions(self, edges, params, window):
        out = self._stacked_rows(edges, params, window, False)
        return out[0] if out is not None else super().bin_fractions(edges, params, window)

    def _log_edges(self, edges: Any, lo: float, hi: float, c: float) -> np.ndarray:
        """ln(x/c) of the clipped edges (see :meth:`_edge_logs`)."""
        return self._edge_logs(edges, lo, hi, c)[0]

    def _edge_logs(self, edges: Any, lo: float, hi: float,
                   c: float) -> tuple[np.ndarray, np.ndarray]:
        """(ln(x/c), ln(x_{i+1}/x_i)) of the clipped edges, kept for the last read-only
        edges array seen: a fit or a scan asks for the same edges at every step."""
        key = (id(edges), lo, hi)
        hit = getattr(self, "_lx", None)
        if hit is not None and hit[0] == key and hit[1] is edges:
            return hit[2]
        x = np.asarray(edges, dtype=float)
        if x[0] < lo or x[-1] > hi:
            x = np.clip(x, lo, hi)
        lx = np.log(x * (1.0 / c))
        dlx = np.log1p(np.diff(x) / x[:-1])  # to full precision, for narrow bins
        if isinstance(edges, np.ndarray) and not edges.flags.writeable:
            self._lx = (key, edges, (lx, dlx))
        return lx, dlx


class PowerSum(_CompiledRows):
    r"""Sum of power laws, the "power law of n terms":

    .. math:: f(x) \propto (x/c)^{-k_1} + \sum_{j=2}^{n} w_j^2\,(x/c)^{-k_j}

    (c = window centre).  ``terms`` n = 1, 2 or 3; parameters ``power`` (k1), then
    ``power_j``, ``weight_j`` per further term (the squared weights keep every term
    non-negative).  One term is :class:`PowerLaw`; n terms nest n - 1 (``weight_n = 0``).
    Analytic CDF and derivatives, term by term as for :class:`PowerLaw`.
    """

    name = "powersum"

    def __init__(self, terms: int = 2, **options: Any) -> None:
        if terms not in (1, 2, 3):
            raise FitError(f"powersum terms must be 1, 2 or 3, got {terms!r}")
        self.terms = int(terms)
        pars = [Parameter("power", 3.0, -20.0, 60.0)]
        for j in range(2, self.terms + 1):
            pars += [Parameter(f"power_{j}", 3.0 + 3.0 * (j - 1), -20.0, 60.0),
                     Parameter(f"weight_{j}", 0.3)]
        self.parameters = tuple(pars)
        super().__init__(**options)

    def _split(self, p):
        """(power, weight) per term; the first term's weight is 1."""
        out = [(p[0], 1.0)]
        for j in range(1, self.terms):
            out.append((p[2 * j - 1], p[2 * j] ** 2))
        return out

    def _density(self, x, p, window):
        return sum(w * _POWER._density(x, [k], window) for k, w in self._split(p))

    def _primitive(self, x, p, window):
        return sum(w * _POWER._primitive(x, [k], window) for k, w in self._split(p))

    def _density_grad(self, x, p, window):
        out = []
        for j, (k, w) in enumerate(self._split(p)):
            out.append(w * _POWER._density_grad(x, [k], window)[0])
            if j:
                out.append(2.0 * p[2 * j] * _POWER._density(x, [k], window))
        return out

    def _primitive_grad(self, x, p, window):
        out = []
        for j, (k, w) in enumerate(self._split(p)):
            out.append(w * _POWER._primitive_grad(x, [k], window)[0])
            if j:
                out.append(2.0 * p[2 * j] * _POWER._primitive(x, [k], window))
        return out

    def _compiled(self, edges, params, window, grad: bool):
        from .falling_rows import powersum_fractions

        return powersum_fractions(self, edges, params, window, grad)

    def __repr__(self) -> str:
        return f"<background shape 'powersum' terms={self.terms}>"


_POWER = PowerLaw()


class Dijet(_Background):
    r"""The smoothly falling family of dijet searches (e.g. Phys. Rev. D 79 (2009) 112002):

    .. math:: f(x) = p_0 \frac{(1-x)^{p_1}}{x^{p_2 + p_3 \ln x}}, \qquad x = m/\sqrt{s}

    ``npar`` counts p0 as in the literature: 2 -> (p1), 3 -> (p1, p2), 4 -> (p1, p2, p3)
    free shape parameters; p0 is the fit's ``background_yield``.  ``sqrt_s`` (GeV) must
    exceed the window; by default it is twice the window's upper edge.  Numerical CDF
    (Gauss-Legendre panels, graded towards sqrt_s when it lies close to the window).
    """

    name = "dijet"

    def __init__(self, npar: int = 4, sqrt_s: float | None = None, **options: Any) -> None:
        if npar not in (2, 3, 4):
            raise FitError(f"dijet npar must be 2, 3 or 4 (p0 included), got {npar!r}")
        self.npar = int(npar)
        self.sqrt_s = None if sqrt_s is None else float(sqrt_s)
        starts = {"p1": 5.0, "p2": 4.0, "p3": 0.0}
        names = ["p1", "p2", "p3"][: self.npar - 1]
        self.parameters = tuple(Parameter(n, starts[n], -50.0, 200.0 if n == "p1" else 50.0)
                                for n in names)
        super().__init__(**options)

    _has_primitive = False

    def _roots(self, window):
        rs = self.sqrt_s if self.sqrt_s is not None else 2.0 * window[1]
        if rs <= window[1]:
            raise FitError(f"dijet sqrt_s={rs} must exceed the window's upper edge {window[1]}")
        return rs

    def _panels(self, p, window):
        """Uniform panels, or, when sqrt_s lies within a window width of the upper edge
        (where (1-x)^p1 varies fastest), panels geometric in the distance from sqrt_s."""
        lo, hi = window
        rs = self._roots(window)
        if rs - hi >= hi - lo:
            return super()._panels(p, window)
        e = rs - np.geomspace(rs - lo, rs - hi, 129)
        e[0], e[-1] = lo, hi
        return e

    def _basis(self, x, window):
        """The exponent's basis functions (see :mod:`.quadrature`): ``_density`` is
        exp(sum_j p_j basis_j)."""
        rs = self._roots(window)
        xc = 0.5 * (window[0] + window[1]) / rs
        x = np.clip(np.asarray(x, float) / rs, 1e-12, 1.0 - 1e-12)
        lx, lxc = np.log(x), math.log(xc)
        out = [np.log1p(-x) - math.log1p(-xc), -(lx - lxc), -(lx * lx - lxc * lxc)]
        return np.stack(out[: self.npar - 1])

    def _fast(self, edges, params, window, grad):
        """Compiled bins where the uniform panels serve (sqrt_s at least a window width
        above it); None otherwise (the generic path's graded panels)."""
        rs = self._roots(window)
        if rs - window[1] < window[1] - window[0]:
            return None
        return _quadrature(self, edges, params, window, grad)

    def bin_fractions(self, edges, params, window):
        out = self._fast(edges, params, window, False)
        return out[0] if out is not None else super().bin_fractions(edges, params, window)

    def fractions_and_grad(self, edges, params, window, need=None):
        out = self._fast(edges, params, window, True)
        return out if out is not None else super().fractions_and_grad(edges, params,
                                                                       window, need)

    def _density(self, x, p, window):
        rs = self._roots(window)
        xc = 0.5 * (window[0] + window[1]) / rs
        x = np.clip(x / rs, 1e-12, 1.0 - 1e-12)
        lx, lxc = np.log(x), math.log(xc)
        p1 = p[0]
        p2 = p[1] if self.npar >= 3 else 0.0
        p3 = p[2] if self.npar >= 4 else 0.0
        e = (p1 * (np.log1p(-x) - math.log1p(-xc)) - p2 * (lx - lxc) - p3 * (lx * lx - lxc * lxc))
        return np.exp(e)

    def __repr__(self) -> str:
        return f"<background shape 'dijet' npar={self.npar} sqrt_s={self.sqrt_s}>"
