"""The ``dijet`` background family: p0 (1-x)^p1 / x^(p2 + p3 ln x), x = m / sqrt_s, the
smoothly falling function of published dijet resonance searches.  Guide: :mod:`.background`."""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..errors import FitError
from ._base import Parameter
from .background_base import _CompiledRows, _ExpFamily, _quadrature

__all__ = ["Dijet"]


class Dijet(_ExpFamily, _CompiledRows):
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

    def _uniform_rule(self, window):
        """Whether the uniform panels serve (sqrt_s at least a window width above it; else
        the generic path's graded panels)."""
        return self._roots(window) - window[1] >= window[1] - window[0]

    def _compiled(self, edges, params, window, grad):
        """Compiled bins where the uniform panels serve; None otherwise."""
        if not self._uniform_rule(window):
            return None
        return _quadrature(self, edges, params, window, grad)

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
