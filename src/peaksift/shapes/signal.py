"""Signal shapes: a peak at ``mass`` with a resolution ``sigma`` and/or natural ``width``.

Which to use
------------
* ``gaussian``     -- detector resolution dominates and tails are negligible.
* ``crystalball``  -- double-sided Crystal Ball: Gaussian core with independent power-law
  tails on each side (radiation, mis-measurement); analytic CDF and derivatives.
* ``breitwigner``  -- relativistic Breit-Wigner: the natural line shape when the width
  dominates the resolution; analytic CDF.
* ``voigt``        -- non-relativistic Breit-Wigner convolved with a Gaussian resolution
  when width and resolution are comparable; numerical CDF (its own module, :mod:`.voigt`).

All are normalised on the fit window and answer ``location(params)`` and ``fwhm(params)``.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
from scipy import special

from ._base import Parameter, Shape, _scalar, as_window

__all__ = ["BreitWigner", "CrystalBall", "Gaussian"]

_SQRT2PI = math.sqrt(2.0 * math.pi)
_NAN = math.nan
#: |z| beyond which exp(-z^2/2) and the normal tail integral underflow to exactly 0.0
_CUT = 40.0


def _phi(z: np.ndarray) -> np.ndarray:
    return np.exp(-0.5 * z * z) / _SQRT2PI


class _Signal(Shape):
    kind = "signal"

    def parameters_for(self, window: tuple[float, float]) -> tuple[Parameter, ...]:
        """Fill window-dependent defaults: ``mass`` in the window (start: its centre),
        ``sigma`` in [1e-4, 0.5] x window width (start 1/40), ``width`` in [1e-5, 1] x
        window width (start 1/40)."""
        lo, hi = float(window[0]), float(window[1])
        w = hi - lo
        out = []
        for p in self.parameters:
            start, lower, upper = p.start, p.lower, p.upper
            if p.name == "mass":
                lower, upper = (lo if not math.isfinite(lower) else lower,
                                hi if not math.isfinite(upper) else upper)
                if not math.isfinite(start):
                    start = 0.5 * (lo + hi)
            elif p.name == "sigma":
                lower = 1e-4 * w if not math.isfinite(lower) or lower <= 0 else lower
                upper = 0.5 * w if not math.isfinite(upper) else upper
                if not math.isfinite(start):
                    start = w / 40.0
            elif p.name == "width":
                lower = 1e-5 * w if not math.isfinite(lower) or lower <= 0 else lower
                upper = w if not math.isfinite(upper) else upper
                if not math.isfinite(start):
                    start = w / 40.0
            out.append(Parameter(p.name, start, lower, upper, p.unit))
        return tuple(out)

    def _fwhm_numeric(self, params: Sequence[Any]) -> float:
        """FWHM by root finding on the (window-independent) density around the peak."""
        p = [float(v) for v in params]
        m = self.location(p)
        w = (m - 1.0, m + 1.0)  # signal densities do not depend on the window
        fmax = float(self._density(np.array(m), p, w))
        scale = max(self._scale(p), 1e-12)

        def g(x: float) -> float:
            return float(self._density(np.array(x), p, w)) - 0.5 * fmax

        from .roots import brentq  # scipy's algorithm, without importing scipy.optimize

        sides = []
        for sign in (-1.0, 1.0):
            step = scale
            while g(m + sign * step) > 0 and step < 1e6 * scale:
                step *= 2.0
            a, b = sorted((m + sign * step / 2.0 if step > scale else m, m + sign * step))
            sides.append(brentq(g, a, b, xtol=1e-12 * scale, rtol=1e-14))
        return sides[1] - sides[0]

    def _scale(self, p: Sequence[float]) -> float:
        names = self.parameter_names
        s = [p[names.index(n)] for n in ("sigma", "width") if n in names]
        return max(s)

    def _difference_scales(self, p):
        # the mass moves the peak across its narrowest width parameter
        names = self.parameter_names
        width = None
        for n in ("sigma", "width"):
            if n in names:
                v = np.abs(p[names.index(n)])
                width = v if width is None else np.minimum(width, v)
        scales = super()._difference_scales(p)
        scales[names.index("mass")] = np.maximum(width, 1e-300)
        return scales


class Gaussian(_Signal):
    r"""Gaussian peak.

    .. math:: f(x) \propto \exp\left(-\frac{(x-m)^2}{2\sigma^2}\right),\qquad
              F(x) = \Phi\left(\frac{x-m}{\sigma}\right)

    Parameters ``mass`` (GeV), ``sigma`` (GeV).  FWHM = 2 sqrt(2 ln 2) sigma.
    Analytic derivatives of pdf and bin fractions.
    """

    name = "gaussian"
    parameters = (Parameter("mass", _NAN, unit="GeV"), Parameter("sigma", _NAN, 0.0, unit="GeV"))

    def _density(self, x, p, window):
        m, s = p
        return _phi((x - m) / s) / s

    def _primitive(self, x, p, window):
        # -Phi(-z) = Phi(z) - 1 for a window above the peak: Phi(z) rounds to 1 there, its
        # upper tail keeps every digit (a Z peak's tail in a window starting at 110 GeV)
        m, s = p
        z = (x - m) / s
        above = np.asarray(m) < window[0]
        if not above.any():
            return special.ndtr(z)
        if above.all():
            return -special.ndtr(-z)
        return np.where(above, -special.ndtr(-z), special.ndtr(z))

    def _density_grad(self, x, p, window):
        m, s = p
        z = (x - m) / s
        d = _phi(z) / s
        return [d * z / s, d * (z * z - 1.0) / s]

    def _primitive_grad(self, x, p, window):
        m, s = p
        z = (x - m) / s
        f = _phi(z) / s
        return [-f, -f * z]

    def fractions_and_grad(self, edges, params, window, need=None):
        if np.ndim(params[0]) or np.ndim(params[1]):
            return super().fractions_and_grad(edges, params, window, need)
        m, s = float(params[0]), float(params[1])
        lo, hi = float(window[0]), float(window[1])
        x = np.asarray(edges, dtype=float)
        if x[0] < lo or x[-1] > hi:
            x = np.clip(x, lo, hi)
        # Beyond 40 sigma the density and both tails of the normal CDF are exactly 0.0 (or
        # the CDF exactly 1.0) in double precision, so every bin with both edges out there
        # has fraction and derivatives exactly 0: compute only the edges in between (plus
        # one outside on each side).  A narrow peak in a wide window costs its own bins.
        k0 = max(int(np.searchsorted(x, m - _CUT * s, side="right")) - 1, 0)
        k1 = min(int(np.searchsorted(x, m + _CUT * s, side="left")) + 1, x.size)
        if k0 > 0 or k1 < x.size:
            frac = np.zeros(x.size - 1)
            grad = np.zeros((2, x.size - 1))
            if k1 - k0 >= 2:
                fr, gr = self.fractions_and_grad(x[k0:k1], params, window)
                frac[k0:k1 - 1] = fr
                grad[:, k0:k1 - 1] = gr
            return frac, grad
        inv_s = 1.0 / s
        zl, zh = (lo - m) * inv_s, (hi - m) * inv_s
        fl = math.exp(-0.5 * zl * zl) / _SQRT2PI * inv_s
        fh = math.exp(-0.5 * zh * zh) / _SQRT2PI * inv_s
        z = (x - m) * inv_s
        if zl > 0:  # window above the peak: the upper tail, as in _primitive
            pl, ph = -0.5 * math.erfc(zl / math.sqrt(2.0)), -0.5 * math.erfc(zh / math.sqrt(2.0))
            prim = -special.ndtr(-z)
        else:
            pl, ph = 0.5 * math.erfc(-zl / math.sqrt(2.0)), 0.5 * math.erfc(-zh / math.sqrt(2.0))
            prim = special.ndtr(z)
        inv = 1.0 / (ph - pl)
        c = (prim - pl) * inv
        f = np.exp(-0.5 * z * z) * (inv_s / _SQRT2PI)
        # dP/dm = -f, dP/ds = -f z at x, lo and hi
        dm = (fl - f) * inv - c * ((fl - fh) * inv)
        ds = (fl * zl - f * z) * inv - c * ((fl * zl - fh * zh) * inv)
        out = np.empty((2, x.size - 1))
        np.subtract(dm[1:], dm[:-1], out=out[0])
        np.subtract(ds[1:], ds[:-1], out=out[1])
        return c[1:] - c[:-1], out

    def pdf_and_grad(self, x, params, window, need=None):
        m, s = float(params[0]), float(params[1])
        lo, hi = float(window[0]), float(window[1])
        zl, zh = (lo - m) / s, (hi - m) / s
        z_norm = float(special.ndtr(-zl) - special.ndtr(-zh) if zl > 0 else
                       special.ndtr(zh) - special.ndtr(zl))  # the accurate tail
        pl, ph = math.exp(-0.5 * zl * zl) / _SQRT2PI, math.exp(-0.5 * zh * zh) / _SQRT2PI
        dz_m = -(ph - pl) / s / z_norm
        dz_s = -(ph * zh - pl * zl) / s / z_norm
        inv_s = 1.0 / s
        z = (x - m) * inv_s
        z2 = z * z
        pdf = np.exp(-0.5 * z2) * (inv_s / (_SQRT2PI * z_norm))
        g_m = pdf * (z * inv_s - dz_m)
        g_s = pdf * (z2 * inv_s - (inv_s + dz_s))
        return pdf, np.array([g_m, g_s])

    def fwhm(self, params):
        return 2.0 * math.sqrt(2.0 * math.log(2.0)) * float(params[1])


class CrystalBall(_Signal):
    r"""Double-sided Crystal Ball: Gaussian core, power-law tails with their own
    ``alpha``/``n`` on each side (M. Oreglia, Ph.D. thesis, 1980; J. E. Gaiser, Ph.D. thesis,
    1982; from memory).

    With :math:`z=(x-m)/\sigma`, :math:`q=n/\alpha`:

    .. math::
        f(z) \propto \begin{cases}
        e^{-\alpha_L^2/2}\,\left(\dfrac{q_L}{q_L-\alpha_L-z}\right)^{n_L} & z < -\alpha_L\\
        e^{-z^2/2} & -\alpha_L\le z\le\alpha_H\\
        e^{-\alpha_H^2/2}\,\left(\dfrac{q_H}{q_H-\alpha_H+z}\right)^{n_H} & z > \alpha_H
        \end{cases}

    continuous with a continuous first derivative.  The CDF is analytic (tails integrate
    to :math:`(q-\alpha\mp z)^{1-n}` terms, so ``n > 1``).  Parameters ``mass``,
    ``sigma``, ``alpha_low``, ``n_low``, ``alpha_high``, ``n_high``.  With ``alpha_high``
    large it is the one-sided shape of ``scipy.stats.crystalball(beta=alpha_low, m=n_low)``.
    """

    name = "crystalball"
    parameters = (
        Parameter("mass", _NAN, unit="GeV"),
        Parameter("sigma", _NAN, 0.0, unit="GeV"),
        Parameter("alpha_low", 1.5, 0.05, 10.0),
        Parameter("n_low", 5.0, 1.01, 200.0),
        Parameter("alpha_high", 1.5, 0.05, 10.0),
        Parameter("n_high", 5.0, 1.01, 200.0),
    )

    @staticmethod
    def _tail(t, a, n):
        # t = distance beyond the core edge measured outward (t >= 0 in the tail)
        q = n / a
        r = q / np.maximum(q + t, 1e-300)
        return np.exp(n * np.log(r) - 0.5 * a * a), q

    def _density(self, x, p, window):
        m, s, al, nl, ah, nh = p
        z = (x - m) / s
        left, _ = self._tail(np.maximum(-z - al, 0.0), al, nl)
        right, _ = self._tail(np.maximum(z - ah, 0.0), ah, nh)
        core = np.exp(-0.5 * z * z)
        return np.where(z < -al, left, np.where(z > ah, right, core)) / s

    def _primitive(self, x, p, window):
        m, s, al, nl, ah, nh = p
        z = (x - m) / s
        tl = np.maximum(-z - al, 0.0)
        th = np.maximum(z - ah, 0.0)
        left, ql = self._tail(tl, al, nl)
        right, qh = self._tail(th, ah, nh)
        # integral of the left tail from -inf to z, and of the right tail from z to +inf
        int_left = left * (ql + tl) / (nl - 1.0)
        int_right = right * (qh + th) / (nh - 1.0)
        pl0 = np.exp(-0.5 * al * al) * ql / (nl - 1.0)
        th0 = np.exp(-0.5 * ah * ah) * qh / (nh - 1.0)
        core = pl0 + _SQRT2PI * (special.ndtr(np.clip(z, -al, ah)) - special.ndtr(-al))
        total_core = pl0 + _SQRT2PI * (special.ndtr(ah) - special.ndtr(-al))
        return np.where(z < -al, int_left, np.where(z > ah, total_core + th0 - int_right, core))

    @staticmethod
    def _tail_grads(t, a, n):
        """At outward distance ``t`` of one tail (fixed ``z``, so dt/da = -1): ``(L, q,
        dlnL/da, dlnL/dn, P, dP/da, dP/dn)`` with ``L`` the tail's density in ``z`` and
        ``P = L (q + t) / (n - 1)`` its integral from ``t`` outward."""
        q = n / a
        qt = np.maximum(q + t, 1e-300)
        r = q / qt
        lv = np.exp(n * np.log(r) - 0.5 * a * a)
        dl_a = -n / a + n * (n / (a * a) + 1.0) / qt - a
        dl_n = np.log(r) + 1.0 - r
        pv = lv * qt / (n - 1.0)
        dp_a = lv * (dl_a * qt - n / (a * a) - 1.0) / (n - 1.0)
        dp_n = lv * (dl_n * qt + 1.0 / a) / (n - 1.0) - pv / (n - 1.0)
        return lv, q, dl_a, dl_n, pv, dp_a, dp_n

    @staticmethod
    def _edge_grads(a, n):
        """Derivatives in ``a`` and ``n`` of a tail's whole integral ``e^(-a^2/2) q/(n-1)``
        (``t = 0`` held)."""
        e = np.exp(-0.5 * a * a)
        q = n / a
        return e * (-a * q - n / (a * a)) / (n - 1.0), e * (1.0 / (a * (n - 1.0))
                                                             - q / (n - 1.0) ** 2)

    def _density_grad(self, x, p, window):
        # d/dm, d/dsigma of the core and the tails (each branch differentiated where it
        # holds: the density is C1 at the joins), d/d(alpha, n) of the tails
        m, s, al, nl, ah, nh = p
        z = (x - m) / s
        tl = np.maximum(-z - al, 0.0)
        th = np.maximum(z - ah, 0.0)
        ll, ql, la_l, ln_l = self._tail_grads(tl, al, nl)[:4]
        lh, qh, la_h, ln_h = self._tail_grads(th, ah, nh)[:4]
        left, right = z < -al, z > ah
        core = np.exp(-0.5 * z * z) / s
        dl, dh = ll / s, lh / s
        kl, kh = nl / np.maximum(ql + tl, 1e-300), nh / np.maximum(qh + th, 1e-300)
        zero = np.zeros_like(z)
        g_m = np.where(left, -dl * kl, np.where(right, dh * kh, core * z)) / s
        g_s = np.where(left, dl * (-z * kl - 1.0), np.where(right, dh * (z * kh - 1.0),
                                                            core * (z * z - 1.0))) / s
        return [g_m, g_s, np.where(left, dl * la_l, zero), np.where(left, dl * ln_l, zero),
                np.where(right, dh * la_h, zero), np.where(right, dh * ln_h, zero)]

    def _primitive_grad(self, x, p, window):
        # the primitive of _primitive (in units of z) differentiated region by region
        m, s, al, nl, ah, nh = p
        z = (x - m) / s
        tl = np.maximum(-z - al, 0.0)
        th = np.maximum(z - ah, 0.0)
        ll, _, _, _, _, pla, pln = self._tail_grads(tl, al, nl)
        lh, _, _, _, _, pha, phn = self._tail_grads(th, ah, nh)
        e0a, e0n = self._edge_grads(al, nl)
        e1a, e1n = self._edge_grads(ah, nh)
        left, right = z < -al, z > ah
        dens_z = np.where(left, ll, np.where(right, lh, np.exp(-0.5 * z * z)))
        core_al = e0a + np.exp(-0.5 * al * al)  # d/d alpha_low of the core's offset
        zero = np.zeros_like(z)
        g_m = -dens_z / s
        g_s = -dens_z * z / s
        g_al = np.where(left, pla, core_al)
        g_nl = np.where(left, pln, e0n)
        g_ah = np.where(right, np.exp(-0.5 * ah * ah) + e1a - pha, zero)
        g_nh = np.where(right, e1n - phn, zero)
        return [g_m, g_s, g_al + zero, g_nl + zero, g_ah, g_nh]

    def _compiled_rows(self, kernel, x, p):
        """Rows of a compiled kernel of :mod:`.compiled` at ``x`` for scalar parameters."""
        from . import compiled

        x = np.ascontiguousarray(x, dtype=float)
        out = np.empty((7, x.size))
        getattr(compiled, kernel)(x, *(float(v) for v in p), out)
        return out

    def _primitive_rows(self, edges, p, window):
        """``(ends, rows, 1/Z, CDF)``: the compiled primitive and its derivatives at the
        window's ends and at ``edges``, and the normalised CDF at ``edges``."""
        lo, hi = as_window(window)
        ends = self._compiled_rows("crystalball_primitive", np.array([lo, hi]), p)
        # np.clip's numbers without its wrapper (~15 us, a value-only call's sixth)
        x = np.minimum(np.maximum(np.asarray(edges, float), lo), hi)
        rows = self._compiled_rows("crystalball_primitive", x, p)
        inv = 1.0 / (ends[0, 1] - ends[0, 0])
        return ends, rows, inv, (rows[0] - ends[0, 0]) * inv

    def fractions_and_grad(self, edges, params, window, need=None):
        # one parameter set (the free fit's hot path): the compiled primitive, ~15x faster
        # than the numpy path it follows, which stays for stacked parameters
        p = self._params(params, len(self.parameters), self.name)
        if not all(_scalar(v) for v in p) or np.ndim(edges) != 1:
            return super().fractions_and_grad(edges, params, window, need)
        ends, rows, inv, c = self._primitive_rows(edges, p, window)
        grad = np.diff((rows[1:] - ends[1:, :1]) * inv
                       - c * ((ends[1:, 1:] - ends[1:, :1]) * inv), axis=-1)
        return np.maximum(np.diff(c), 0.0), grad

    def fit_fractions(self, edges, params, window):
        # the fractions of fractions_and_grad, without its six rows of derivatives
        p = self._params(params, len(self.parameters), self.name)
        if not all(_scalar(v) for v in p) or np.ndim(edges) != 1:
            return super().fit_fractions(edges, params, window)
        return np.maximum(np.diff(self._primitive_rows(edges, p, window)[3]), 0.0)

    def pdf_and_grad(self, x, params, window, need=None):
        p = self._params(params, len(self.parameters), self.name)
        if not all(_scalar(v) for v in p) or np.ndim(x) != 1:
            return super().pdf_and_grad(x, params, window, need)
        lo, hi = as_window(window)
        ends = self._compiled_rows("crystalball_primitive", np.array([lo, hi]), p)
        dens = self._compiled_rows("crystalball_density", x, p)
        z = ends[0, 1] - ends[0, 0]
        gz = ends[1:, 1] - ends[1:, 0]
        pdf = dens[0] / z
        return pdf, dens[1:] / z - pdf * (gz / z)[:, None]

    def pdf_near(self, x, params, window):
        # the compiled density and normalisation (pdf_and_grad's), ~10x faster than the
        # numpy path for one mass
        p = self._params(params, len(self.parameters), self.name)
        if not all(_scalar(v) for v in p) or np.ndim(x) != 1:
            return super().pdf_near(x, params, window)
        lo, hi = as_window(window)
        ends = self._compiled_rows("crystalball_primitive", np.array([lo, hi]), p)
        dens = self._compiled_rows("crystalball_density", x, p)
        return dens[0] / (ends[0, 1] - ends[0, 0])

    def fwhm(self, params):
        return self._fwhm_numeric(params)

    def _scale(self, p):
        return p[1]


def _fractions_from_primitive(pe, ge, px, gx):
    """Bin fractions of the window and their parameter derivatives from the primitive
    ``pe``/``px`` and its gradients ``ge``/``gx`` at the window's ends and at the edges."""
    plo, phi = pe[0], pe[1]
    inv = 1.0 / (phi - plo)
    c = (px - plo) * inv
    out = [np.diff((gc - g[0]) * inv - c * ((g[1] - g[0]) * inv), axis=-1)
           for g, gc in zip(ge, gx)]
    frac = np.maximum(np.diff(c, axis=-1), 0.0)
    return frac, np.array(np.broadcast_arrays(frac, *out)[1:])


class BreitWigner(_Signal):
    r"""Relativistic Breit-Wigner (fixed width), PDG Review of Particle Physics,
    "Resonances" review:

    .. math:: f(x) \propto \frac{1}{(x^2 - M^2)^2 + M^2\Gamma^2}

    Parameters ``mass`` (M, GeV) and ``width`` (Gamma, GeV).  Analytic CDF by partial
    fractions: with :math:`a=\sqrt{M^2 + iM\Gamma}`,

    .. math:: F(x) = \frac{1}{M\Gamma}\,
              \mathrm{Im}\left[\frac{\ln(x-a) - \ln(x+a)}{2a}\right]

    (continuous for real x since Im(x-a) < 0 < Im(x+a); derivation checked against
    ``scipy.integrate.quad`` in the tests).  FWHM = sqrt(M^2+M Gamma) - sqrt(M^2-M Gamma).
    """

    name = "breitwigner"
    parameters = (Parameter("mass", _NAN, unit="GeV"), Parameter("width", _NAN, 0.0, unit="GeV"))

    def _density(self, x, p, window):
        m, g = p
        return 1.0 / ((x * x - m * m) ** 2 + (m * g) ** 2)

    def _primitive(self, x, p, window):
        m, g = p
        m = np.asarray(m, dtype=complex)
        a = np.sqrt(m * m + 1j * m * g)
        val = (np.log(x - a) - np.log(x + a)) / (2.0 * a)
        return val.imag / (np.real(m) * g)

    def _density_grad(self, x, p, window):
        m, g = p
        d = self._density(x, p, window)
        d2 = d * d
        return [-d2 * (2.0 * m * g * g - 4.0 * m * (x * x - m * m)), -d2 * (2.0 * m * m * g)]

    def _primitive_grad(self, x, p, window):
        return self._primitive_and_grad(x, p)[1]

    @staticmethod
    def _primitive_and_grad(x, p):
        """The primitive and its derivatives from one pair of complex logarithms (the
        primitive's numbers are those of :meth:`_primitive`: the same operations)."""
        # P = Im[L/(2a)] / (m g), L = ln(x - a) - ln(x + a), a^2 = m^2 + i m g:
        # d(L/2a)/da = -x / (a (x^2 - a^2)) - L / (2 a^2), da/dm = (2m + i g)/(2a),
        # da/dg = i m / (2a); then the quotient rule for 1/(m g)
        m, g = p
        mc = np.asarray(m, dtype=complex)
        a = np.sqrt(mc * mc + 1j * mc * g)
        lg = np.log(x - a) - np.log(x + a)
        dq = -x / (a * (x * x - a * a)) - lg / (2.0 * a * a)
        prim = (lg / (2.0 * a)).imag / (m * g)
        dm = (dq * (2.0 * mc + 1j * g) / (2.0 * a)).imag / (m * g) - prim / m
        dg = (dq * (1j * mc) / (2.0 * a)).imag / (m * g) - prim / g
        return prim, [dm, dg]

    def fractions_and_grad(self, edges, params, window, need=None):
        # Shape.fractions_and_grad's operations for one parameter set, the primitive and
        # its derivatives at each point from one pair of logarithms (there: two)
        p = self._params(params, 2, self.name)
        if not all(_scalar(v) for v in p) or np.ndim(edges) != 1:
            return super().fractions_and_grad(edges, params, window, need)
        lo, hi = as_window(window)
        pe, ge = self._primitive_and_grad(np.array([lo, hi]), p)
        px, gx = self._primitive_and_grad(np.clip(np.asarray(edges, float), lo, hi), p)
        return _fractions_from_primitive(pe, ge, px, gx)

    def fit_fractions(self, edges, params, window):
        # the fractions above without the derivatives (the same numbers)
        p = self._params(params, 2, self.name)
        if not all(_scalar(v) for v in p) or np.ndim(edges) != 1:
            return super().fit_fractions(edges, params, window)
        lo, hi = as_window(window)
        pe = self._primitive(np.array([lo, hi]), p, (lo, hi))
        px = self._primitive(np.clip(np.asarray(edges, float), lo, hi), p, (lo, hi))
        c = (px - pe[0]) * (1.0 / (pe[1] - pe[0]))
        return np.maximum(np.diff(c, axis=-1), 0.0)

    def fwhm(self, params):
        m, g = float(params[0]), float(params[1])
        return math.sqrt(m * m + m * g) - math.sqrt(max(m * m - m * g, 0.0))
