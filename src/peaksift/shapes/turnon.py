"""The trigger turn-on background: a Gaussian-CDF turn-on times an exponential fall.

Its own module because its CDF (integration by parts, kept free of cancellation far from
the turn-on) is a concept of its own; the falling families are listed in
:mod:`peaksift.shapes.background`.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import special

from ._base import Parameter
from .background_base import _Background

_INV_SQRT2PI = 1.0 / math.sqrt(2.0 * math.pi)


def _phi(u):
    return _INV_SQRT2PI * np.exp(-0.5 * u * u)

__all__ = ["TurnOn"]


class TurnOn(_Background):
    r"""Trigger turn-on times an exponential fall:

    .. math:: f(x) \propto \Phi\left(\frac{x - x_0}{r}\right) e^{-k (x - c)}

    parameters ``threshold`` (x0, GeV), ``resolution`` (r, GeV) and ``slope`` (k, 1/GeV;
    c = window centre).  Analytic CDF by parts, with
    :math:`\int \phi((x-x_0)/r)\, e^{-kx} dx/r = e^{-k x_0 + k^2 r^2/2}\,\Phi((x-x_0)/r + k r)`,
    taken as the integral from x to infinity (both terms positive, so nothing cancels even
    when the turn-on sits far outside the window or the fall is steep):

    .. math:: S(x) = \int_x^\infty f = \frac{1}{k}\left[e^{-k(x_0 - c) + k^2r^2/2}\,
              \Phi(-(u + kr)) + e^{-k(x-c)}\Phi(u)\right], \quad u = (x-x_0)/r,

    the first term evaluated as :math:`e^{-k(x-c) - u^2/2}\,\mathrm{erfcx}((u+kr)/\sqrt2)/2`
    for :math:`u + kr > 0` and with ``scipy.special.log_ndtr`` otherwise; the CDF is
    :math:`(S(lo) - S(x)) / (S(lo) - S(hi))`.
    """

    name = "turnon"
    parameters = (
        Parameter("threshold", math.nan, unit="GeV"),
        Parameter("resolution", math.nan, unit="GeV"),
        Parameter("slope", math.nan, 1e-6, math.inf, unit="1/GeV"),
    )

    def parameters_for(self, window):
        """Threshold in the window (start at 15 %), resolution in [1e-3, 1] x window width
        (start 5 %), slope in [1e-6, 100/width] (start 3/width)."""
        lo, hi = window
        w = hi - lo
        d = {"threshold": (lo + 0.15 * w, lo - 0.5 * w, hi),
             "resolution": (0.05 * w, 1e-3 * w, w),
             "slope": (3.0 / w, 1e-6 / w, 100.0 / w)}
        out = []
        for p in self.parameters:
            s, a, b = d[p.name]
            out.append(Parameter(p.name, p.start if math.isfinite(p.start) else s, a, b, p.unit))
        return tuple(out)

    def _difference_scales(self, p):  # (finite differences: stacked parameter sets only)
        # the threshold moves the turn-on across its resolution
        scales = super()._difference_scales(p)
        scales[0] = np.abs(p[1])
        return scales

    def _density(self, x, p, window):
        t, r, k = p
        c = 0.5 * (window[0] + window[1])
        return special.ndtr((x - t) / r) * np.exp(-k * (x - c))

    def _primitive(self, x, p, window):
        # -S(x), S = integral from x to infinity (see the class docstring)
        t, r, k = p
        c = 0.5 * (window[0] + window[1])
        u = (x - t) / r
        with np.errstate(over="ignore", invalid="ignore", under="ignore"):
            first = self._first(x, p, window)
        return -(first + np.exp(-k * (x - c)) * special.ndtr(u)) / k

    @staticmethod
    def _first(x, p, window):
        """The first term of S (class docstring), free of cancellation on both sides."""
        t, r, k = p
        c = 0.5 * (window[0] + window[1])
        u = (x - t) / r
        q = k * r
        v = u + q
        upper = 0.5 * special.erfcx(v * (1.0 / math.sqrt(2.0))) * np.exp(-k * (x - c)
                                                                            - 0.5 * u * u)
        lower = np.exp(-k * (t - c) + 0.5 * q * q + special.log_ndtr(-v))
        return np.where(v > 0, upper, lower)

    def _density_grad(self, x, p, window):
        # d/dt and d/dr through Phi(u), u = (x - t)/r; d/dk through the exponential
        t, r, k = p
        c = 0.5 * (window[0] + window[1])
        u = (x - t) / r
        e = np.exp(-k * (x - c))
        pe = _phi(u) * e
        return [-pe / r, -pe * u / r, -(x - c) * special.ndtr(u) * e]

    def _primitive_grad(self, x, p, window):
        # -dS/d(t, r, k) with S = (A + E Phi(u)) / k, A the first term of _primitive, E =
        # e^{-k(x-c)}: dS/dt = -A, dS/dr = -(phi(u) E - k r A) (by parts, u phi = -phi'),
        # dS/dk = -S/k + (A (k r^2 - (t - c)) - r phi(u) E - (x - c) E Phi(u)) / k (using
        # e^{-k(t-c) + k^2 r^2/2} phi(u + k r) = phi(u) E)
        t, r, k = p
        c = 0.5 * (window[0] + window[1])
        u = (x - t) / r
        with np.errstate(over="ignore", invalid="ignore", under="ignore"):
            a = self._first(x, p, window)
            e = np.exp(-k * (x - c))
            pe = _phi(u) * e
            ee = e * special.ndtr(u)
            s = (a + ee) / k
            ds_k = -s / k + (a * (k * r * r - (t - c)) - r * pe - (x - c) * ee) / k
        return [a, pe - k * r * a, -ds_k]
