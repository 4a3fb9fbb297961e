"""The Voigt signal shape: a non-relativistic Breit-Wigner convolved with a Gaussian.

Its CDF has no closed form: the base class's numerical primitive (Gauss-Legendre on panels
uniform in the arctangent of the distance to the peak, :meth:`Voigt._panels`).  Its
derivatives and those of the density are closed-form, from the Faddeeva function.

Two evaluations of the same formulae
------------------------------------
* ``scipy.special`` (``voigt_profile``, ``wofz``) and the base class's numpy quadrature:
  ``pdf``, ``cdf``, ``bin_fractions``, ``pdf_and_grad`` (the unbinned fit), stacked
  parameters;
* the compiled Faddeeva function of :mod:`.faddeeva` (Weideman's approximation, ~7x
  faster than ``voigt_profile``) with the same panels and nodes in one compiled loop:
  ``fractions_and_grad`` and ``fit_fractions`` for one parameter set, the binned fit's
  every step (two thirds of a binned Voigt fit was the profile and its numpy glue).

The two agree to ~1e-14 of the profile's scale.  The unbinned fit keeps scipy's numbers:
on invalid unbinned fits whose MIGRAD did not converge or crawled along a flat direction,
the compiled numbers at the events moved the end point by up to 1e-3 in NLL (either way),
where the binned fits' minima stayed within 1e-7 (``docs/performance.md``, 2026-12-04).
"""

from __future__ import annotations

import contextlib
import math
from collections import OrderedDict
from collections.abc import Sequence
from typing import Any

import numpy as np
from scipy import special

from ._base import _CACHE_SIZE, _GL_NODES, _GL_WEIGHTS, Parameter, _scalar, as_window
from .signal import _NAN, _SQRT2PI, _fractions_from_primitive, _Signal

__all__ = ["Voigt"]

_SQRT2 = math.sqrt(2.0)


def _compiled_ok(p) -> bool:
    """Scalar, finite parameters with sigma > 0 and width >= 0: the compiled Faddeeva
    function's domain (Im z >= 0); anything else goes to ``scipy.special``, which says
    what it makes of it (NaN)."""
    m, s, g = p
    return (_scalar(m) and _scalar(s) and _scalar(g) and math.isfinite(m)
            and math.isfinite(s) and math.isfinite(g) and s > 0.0 and g >= 0.0)


class Voigt(_Signal):
    r"""Voigt profile: non-relativistic Breit-Wigner of FWHM ``width`` convolved with a
    Gaussian of standard deviation ``sigma`` (``scipy.special.voigt_profile(x - mass,
    sigma, width / 2)``).  Numerical CDF (Gauss-Legendre on panels uniform in
    ``arctan((x - mass)/h)``, h = half the FWHM, so core and Lorentzian tails are
    both resolved; cached per parameter set and window).  Its derivatives and those of the
    density are closed-form, from the Faddeeva function ``scipy.special.wofz`` (the
    binned fit's fractions: :mod:`.faddeeva`'s, see the module guide).

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

    def _compiled_prim(self, x, p, window):
        """The primitive at ``x`` by the base class's rule (the same panels, nodes and table
        of panel integrals, kept per parameter set and window) with the compiled profile."""
        from .faddeeva import voigt_density, voigt_partial

        key = (p, window)
        cache = self.__dict__.setdefault("_compiled_tables", OrderedDict())
        hit = cache.get(key)
        if hit is None:
            e = self._panels(p, window)
            a, b = e[:-1], e[1:]
            half = 0.5 * (b - a)
            nodes = (0.5 * (a + b))[:, None] + half[:, None] * _GL_NODES[None, :]
            panel = half * (voigt_density(nodes, *p) @ _GL_WEIGHTS)
            hit = cache[key] = (e, np.concatenate([[0.0], np.cumsum(panel)]))
            if len(cache) > _CACHE_SIZE:
                with contextlib.suppress(KeyError):  # (another thread's fit: the table
                    cache.popitem(last=False)  # is shared, its order only advisory)
        else:
            with contextlib.suppress(KeyError):
                cache.move_to_end(key)
        return voigt_partial(x, hit[0], hit[1], *p)

    @staticmethod
    def _faddeeva(x, p, compiled=False):
        """``W = w(z) / (sigma sqrt(2 pi))`` at ``z = (x - m + i gamma) / (sigma sqrt 2)``
        (Re W is the profile), ``W1 = dW/dx`` and ``z``; ``w`` is ``scipy.special.wofz``,
        with ``compiled`` :mod:`.faddeeva`'s."""
        m, s, g = p
        if compiled:
            from .faddeeva import faddeeva_line
            t = (np.asarray(x, float) - m) / (s * _SQRT2)
            y = 0.5 * g / (s * _SQRT2)
            z = t + 1j * y
            w = faddeeva_line(t, y)
        else:
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
        return self._primitive_grad_of(self._faddeeva(x, p), p)

    @staticmethod
    def _primitive_grad_of(fad, p):
        big_w, w1 = fad[0], fad[1]
        s = p[1]
        return [-big_w.real, s * w1.real, -0.5 * big_w.imag]

    def _density_grad(self, x, p, window):
        _, w1, z, w, dw = self._faddeeva(x, p)
        s = p[1]
        d2w = -2.0 * w - 2.0 * z * dw  # w''(z)
        w2 = d2w / (s * _SQRT2PI * 2.0 * s * s)  # d2W/dx2
        return [-w1.real, s * w2.real, -0.5 * w1.imag]

    def _compiled_call(self, edges, params, window):
        """``(p, window, ends, clipped edges)`` for the compiled path, None for calls it
        does not take (stacked parameters, 2-d edges, parameters outside its domain)."""
        p = self._params(params, len(self.parameters), self.name)
        if not _compiled_ok(p) or np.ndim(edges) != 1:
            return None
        lo, hi = as_window(window)
        p = tuple(float(v) for v in p)
        return p, (lo, hi), np.array([lo, hi]), np.clip(np.asarray(edges, float), lo, hi)

    def fractions_and_grad(self, edges, params, window, need=None):
        # Shape.fractions_and_grad's operations for one parameter set, its primitive and
        # derivatives from the compiled Faddeeva function (module guide)
        call = self._compiled_call(edges, params, window)
        if call is None:
            return super().fractions_and_grad(edges, params, window, need)
        p, w, ends, x = call
        pe = self._compiled_prim(ends, p, w)
        ge = self._primitive_grad_of(self._faddeeva(ends, p, True), p)
        px = self._compiled_prim(x, p, w)
        gx = self._primitive_grad_of(self._faddeeva(x, p, True), p)
        return _fractions_from_primitive(pe, ge, px, gx)

    def fit_fractions(self, edges, params, window):
        # the fractions above (the same operations, so the same numbers) without the
        # Faddeeva function at every edge for the derivatives
        call = self._compiled_call(edges, params, window)
        if call is None:
            return super().fit_fractions(edges, params, window)
        p, w, ends, x = call
        pe = self._compiled_prim(ends, p, w)
        c = (self._compiled_prim(x, p, w) - pe[0]) * (1.0 / (pe[1] - pe[0]))
        return np.maximum(np.diff(c, axis=-1), 0.0)

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
