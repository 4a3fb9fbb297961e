"""The Voigt signal shape: a non-relativistic Breit-Wigner convolved with a Gaussian.

Its CDF has no closed form: the base class's numerical primitive (Gauss-Legendre on panels
uniform in the arctangent of the distance to the peak, :meth:`Voigt._panels`).  Its
derivatives and those of the density are closed-form, from the Faddeeva function.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
from scipy import special

from ._base import Parameter, _scalar, as_window
from .signal import _NAN, _SQRT2PI, _Signal

__all__ = ["Voigt"]


class Voigt(_Signal):
    r"""Voigt profile: non-relativistic Breit-Wigner of FWHM ``width`` convolved with a
    Gaussian of standard deviation ``sigma`` (``scipy.special.voigt_profile(x - mass,
    sigma, width / 2)``).  Numerical CDF (Gauss-Legendre on panels uniform in
    ``arctan((x - mass)/h)``, h = half the FWHM, so core and Lorentzian tails are
    both resolved; cached per parameter set and window).  Its derivatives and those of the
    density are closed-form, from the Faddeeva function ``scipy.special.wofz``.

    FWHM: solved numerically; the Olivero-Longbothum approximation
    :math:`f_V \approx 0.5346 f_L + \sqrt{0.2166 f_L^2 + f_G^2}` (Olivero and Longbothum,
    J. Quant. Spectrosc. Radiat. Transfer 17 (1977) 233; about 0.02 % accurate) is
    available as :meth:`fwhm_approx`.
    """

    name = "voigt"
    parameters = (
        Parameter("mass", _NAN, unit="GeV"),
        Parameter("sigma", _NAN, 0.0, unit="GeV"),
        Parameter("width", _NAN, 0.0, unit="GeV"),
    )
    _has_primitive = False

    def _density(self, x, p, window):
        m, s, g = p
        return special.voigt_profile(x - m, s, 0.5 * g)

    @staticmethod
    def _faddeeva(x, p):
        """``W = w(z) / (sigma sqrt(2 pi))`` at ``z = (x - m + i gamma) / (sigma sqrt 2)``
        (Re W is the profile), ``W1 = dW/dx`` and ``z``; ``w`` is ``scipy.special.wofz``."""
        m, s, g = p
        z = (np.asarray(x, float) - m + 0.5j * g) / (s * math.sqrt(2.0))
        w = special.wofz(z)
        c = 1.0 / (s * _SQRT2PI)
        dw = -2.0 * z * w + 2j / math.sqrt(math.pi)  # w'(z)
        return c * w, c * dw / (s * math.sqrt(2.0)), z, w, dw

    def _primitive_grad(self, x, p, window):
        # closed form at every x, only the primitive itself is numerical: the profile is a
        # function of x - m (d/dm = -V); the Gaussian's width obeys the heat equation,
        # dV/dsigma = sigma d2V/dx2, so d/dsigma of the integral is sigma V'; Re w and Im w
        # are conjugate harmonic, dV/dgamma = -d(Im W)/dx, so d/dgamma of the integral is
        # -Im W; gamma = width / 2
        big_w, w1, _, _, _ = self._faddeeva(x, p)
        s = p[1]
        return [-big_w.real, s * w1.real, -0.5 * big_w.imag]

    def _density_grad(self, x, p, window):
        _, w1, z, w, dw = self._faddeeva(x, p)
        s = p[1]
        d2w = -2.0 * w - 2.0 * z * dw  # w''(z)
        w2 = d2w / (s * _SQRT2PI * 2.0 * s * s)  # d2W/dx2
        return [-w1.real, s * w2.real, -0.5 * w1.imag]

    def pdf_and_grad(self, x, params, window, need=None):
        # one Faddeeva evaluation for the density and its derivatives (the generic path
        # evaluates the profile twice and the Faddeeva function once)
        p = self._params(params, len(self.parameters), self.name)
        if not all(_scalar(v) for v in p) or np.ndim(x) != 1:
            return super().pdf_and_grad(x, params, window, need)
        w = as_window(window)
        ends = np.array(w)
        pe = self._prim(ends, p, w)
        z = float(pe[1] - pe[0])
        gz = np.array([float(g[1] - g[0]) for g in self._primitive_grad(ends, p, w)])
        big_w, w1, zz, wv, dw = self._faddeeva(x, p)
        s = p[1]
        w2 = (-2.0 * wv - 2.0 * zz * dw) / (s * _SQRT2PI * 2.0 * s * s)  # d2W/dx2
        pdf = big_w.real / z
        gd = np.array([-w1.real, s * w2.real, -0.5 * w1.imag]) / z
        return pdf, gd - pdf * (gz / z)[:, None]

    def _panels(self, p, window):
        lo, hi = window
        m = p[0]
        h = 0.5 * self.fwhm_approx(p)
        u = np.linspace(math.atan((lo - m) / h), math.atan((hi - m) / h), 161)
        e = m + h * np.tan(u)
        # Far out the arctan panels grow without limit (the last one reaches from ~50 h to
        # the window's end); a 10-node rule over a Lorentzian tail that varies by a factor
        # of ~100 across one panel lost 2e-6 of the normalisation for a peak 1e-3 of the
        # window wide.  Edges at m +- h 2^k keep every panel within a factor 2 in distance.
        d = h * 2.0 ** np.arange(0, 64)
        e = np.concatenate([e, m - d, m + d])
        return np.unique(np.concatenate([[lo], e[(e > lo) & (e < hi)], [hi]]))

    @staticmethod
    def fwhm_approx(params: Sequence[Any]) -> float:
        """Olivero-Longbothum (1977) approximation of the Voigt FWHM (~0.02 %)."""
        s, g = float(params[1]), float(params[2])
        fg = 2.0 * math.sqrt(2.0 * math.log(2.0)) * s
        return 0.5346 * g + math.sqrt(0.2166 * g * g + fg * fg)

    def fwhm(self, params):
        return self._fwhm_numeric(params)

    def _scale(self, p):
        return 0.5 * self.fwhm_approx(p)
