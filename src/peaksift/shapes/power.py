"""Power-law background families: ``powerlaw`` (x^-k) and ``powersum`` (a sum of up to
three power laws, for the background-family choice).  Guide: :mod:`.background`."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy import special

from ..errors import FitError
from ._base import Parameter
from .background_base import _Background, _CompiledRows, _rows, _stacked

__all__ = ["PowerLaw", "PowerSum"]


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

    def _terms_grad(self, x, p, window, value, grad):
        """Derivatives of the sum of the terms' ``value`` (their density or primitive),
        ``grad`` the term's own derivative, in parameter order (power_j, weight_j)."""
        out = []
        for j, (k, w) in enumerate(self._split(p)):
            out.append(w * grad(x, [k], window)[0])
            if j:
                out.append(2.0 * p[2 * j] * value(x, [k], window))
        return out

    def _density_grad(self, x, p, window):
        return self._terms_grad(x, p, window, _POWER._density, _POWER._density_grad)

    def _primitive_grad(self, x, p, window):
        return self._terms_grad(x, p, window, _POWER._primitive, _POWER._primitive_grad)

    def _compiled(self, edges, params, window, grad: bool):
        from .falling_rows import powersum_fractions

        return powersum_fractions(self, edges, params, window, grad)

    def __repr__(self) -> str:
        return f"<background shape 'powersum' terms={self.terms}>"


_POWER = PowerLaw()
