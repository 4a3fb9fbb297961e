r"""Compiled Faddeeva function and the Voigt profile's numerical primitive (numba).

What is here and who uses it
----------------------------
The Voigt shape (:mod:`.voigt`) needs the Faddeeva function :math:`w(z) = e^{-z^2}
\operatorname{erfc}(-iz)` in the upper half plane: its real part is the profile, its
imaginary part and derivative give the exact parameter derivatives.  ``scipy.special.wofz``
costs ~120-230 ns a point here, and a binned Voigt fit evaluates ~4,000 points a step (the
cumulative table of 160+ panels and 10 nodes from each bin edge's panel start), so the
profile was two thirds of a binned Voigt fit.  Used by the binned fit's fractions and
their derivatives only (``Voigt.fractions_and_grad`` / ``fit_fractions``, see
:mod:`.voigt`'s guide for why the unbinned fit keeps scipy's numbers).

* :func:`faddeeva_line` -- :math:`w(t + iy)` at many points ``t`` for one ``y``, Weideman's
  rational approximation (the derivatives at the bin edges).
* :func:`voigt_density` -- the profile :math:`\mathrm{Re}\,w(z) / (\sigma\sqrt{2\pi})` at
  many points (the panels' nodes of the cumulative table, ``Voigt._compiled_prim``).
* :func:`voigt_partial` -- the primitive at many masses from that table: the table's value
  at the mass's panel start plus a 10-node Gauss-Legendre rule up to the mass, the formula
  of ``Shape._numeric_primitive_scalar`` in one compiled loop.

The approximation
-----------------
J. A. C. Weideman, "Computation of the complex error function", SIAM J. Numer. Anal. 31
(1994) 1497, eq. (3.11) with the coefficients of its eq. (3.13) computed by FFT as in the
paper's program: with :math:`L = \sqrt{N/\sqrt 2}` and :math:`Z = (L + iz)/(L - iz)`,

.. math:: w(z) \approx \frac{2\,p(Z)}{(L - iz)^2} + \frac{1}{\sqrt\pi\,(L - iz)},

:math:`p` a polynomial of degree :math:`N - 1`.  With :math:`N = 40` the error is below
:math:`2\times10^{-14}\,|w(z)|` for :math:`\mathrm{Im}\,z \ge 0` (tested against
``scipy.special.wofz`` on :math:`|\mathrm{Re}\,z| \le 10^4`, :math:`10^{-9} \le
\mathrm{Im}\,z \le 10^5`).  The error is relative to :math:`|w|`, not to
:math:`\mathrm{Re}\,w`: far out in a nearly Gaussian profile's tail (Re w << |w|) the
profile is known only to ~1e-14 of :math:`|w| \approx 1/(\sqrt\pi |z|)`, an absolute error
of the bin fractions below ~1e-14 (tested against ``scipy.integrate.quad``).  One
evaluation is ~40 complex multiply-adds; 64 points at a time (the loop over points
innermost, so the chains fill the vector lanes) ~31 ns a point against ~120-230 ns for
``scipy.special.voigt_profile`` here, and no numpy glue between the steps.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

__all__ = ["N_TERMS", "faddeeva_line", "voigt_density", "voigt_partial"]

#: terms of Weideman's expansion
N_TERMS = 40


def _weideman_coefficients(n: int) -> tuple[np.ndarray, float]:
    """Coefficients of ``p`` (highest power first) and ``L`` (Weideman 1994, the paper's
    program ``cef``: samples of exp(-t^2)(L^2 + t^2) at t = L tan(theta/2), FFT)."""
    m = 2 * n
    k = np.arange(-m + 1, m)
    lam = math.sqrt(n / math.sqrt(2.0))
    t = lam * np.tan(k * math.pi / m / 2.0)
    f = np.concatenate([[0.0], np.exp(-t * t) * (lam * lam + t * t)])
    a = np.real(np.fft.fft(np.fft.fftshift(f))) / (2 * m)
    return np.ascontiguousarray(a[1:n + 1][::-1]), lam


_A, _L = _weideman_coefficients(N_TERMS)
_INV_SQRT_PI = 1.0 / math.sqrt(math.pi)
_SQRT2 = math.sqrt(2.0)
_SQRT2PI = math.sqrt(2.0 * math.pi)
_GL_NODES, _GL_WEIGHTS = np.polynomial.legendre.leggauss(10)


_BLOCK = 64


@njit(cache=True, nogil=True)
def _w_block(t, n, y, a, lam, out_re, out_im):  # pragma: no cover - compiled
    """w(t_i + i y) for the first ``n`` (at most ``_BLOCK``) points of ``t``: Horner's rule
    with the loop over points innermost, so the points' independent chains fill the
    vector lanes (one point's chain alone is latency-bound, ~4x slower)."""
    zr = np.empty(_BLOCK)
    zi = np.empty(_BLOCK)
    pr = np.empty(_BLOCK)
    pi_ = np.empty(_BLOCK)
    # L - iz = (L + y) - i t,  L + iz = (L - y) + i t,  Z = (L + iz) / (L - iz)
    dr = lam + y
    nr = lam - y
    for i in range(n):
        ti = t[i]
        den = dr * dr + ti * ti
        zr[i] = (nr * dr - ti * ti) / den
        zi[i] = (ti * dr + nr * ti) / den
        pr[i] = a[0]
        pi_[i] = 0.0
    for k in range(1, a.size):
        ak = a[k]
        for i in range(n):
            r = pr[i] * zr[i] - pi_[i] * zi[i] + ak
            pi_[i] = pr[i] * zi[i] + pi_[i] * zr[i]
            pr[i] = r
    for i in range(n):
        ti = t[i]
        den = dr * dr + ti * ti
        ir = dr / den  # 1 / (L - iz)
        ii = ti / den
        sr = ir * ir - ii * ii
        si = 2.0 * ir * ii
        out_re[i] = 2.0 * (pr[i] * sr - pi_[i] * si) + _INV_SQRT_PI * ir
        out_im[i] = 2.0 * (pr[i] * si + pi_[i] * sr) + _INV_SQRT_PI * ii


@njit(cache=True, nogil=True)
def _line(t, y, a, lam, out_re, out_im):  # pragma: no cover - compiled
    """w(t_i + i y) at every point of ``t``, block by block."""
    tb = np.empty(_BLOCK)
    rb = np.empty(_BLOCK)
    ib = np.empty(_BLOCK)
    for b0 in range(0, t.size, _BLOCK):
        n = min(_BLOCK, t.size - b0)
        for i in range(n):
            tb[i] = t[b0 + i]
        _w_block(tb, n, y, a, lam, rb, ib)
        for i in range(n):
            out_re[b0 + i] = rb[i]
            out_im[b0 + i] = ib[i]


def faddeeva_line(t, y: float) -> np.ndarray:
    """``w(t + i y)`` (complex, the shape of ``t``) for real ``t`` and one ``y >= 0`` (the
    Voigt shape's arguments: ``t = (x - m) / (sigma sqrt 2)``, ``y = gamma / (sigma sqrt
    2) > 0``); Weideman's approximation."""
    t = np.asarray(t, float)
    flat = np.ascontiguousarray(t).ravel()
    re = np.empty(flat.size)
    im = np.empty(flat.size)
    _line(flat, float(y), _A, _L, re, im)
    return (re + 1j * im).reshape(t.shape)


@njit(cache=True, nogil=True)
def _density(x, m, s, g, a, lam, out):  # pragma: no cover - compiled
    c = 1.0 / (s * _SQRT2)
    y = 0.5 * g * c
    norm = 1.0 / (s * _SQRT2PI)
    t = np.empty(x.size)
    for i in range(x.size):
        t[i] = (x[i] - m) * c
    im = np.empty(x.size)
    _line(t, y, a, lam, out, im)
    for i in range(x.size):
        out[i] *= norm


def voigt_density(x, m: float, s: float, g: float) -> np.ndarray:
    """The Voigt profile of ``scipy.special.voigt_profile(x - m, s, g / 2)`` (FWHM ``g`` of
    the Lorentzian) at ``x`` (any shape), for scalar parameters ``s, g > 0``."""
    x = np.asarray(x, float)
    flat = np.ascontiguousarray(x).ravel()
    out = np.empty(flat.size)
    _density(flat, float(m), float(s), float(g), _A, _L, out)
    return out.reshape(x.shape)


@njit(cache=True, nogil=True)
def _partial(x, e, cum, m, s, g, a, lam, nodes, weights, out):  # pragma: no cover
    c = 1.0 / (s * _SQRT2)
    y = 0.5 * g * c
    norm = 1.0 / (s * _SQRT2PI)
    lo, hi = e[0], e[e.size - 1]
    q = nodes.size
    t = np.empty(x.size * q)
    half = np.empty(x.size)
    k = np.empty(x.size, np.int64)
    for i in range(x.size):
        xi = min(max(x[i], lo), hi)
        # the panel whose start is the last edge <= xi (the last panel at the window's end)
        ki = np.searchsorted(e, xi, side="right") - 1
        ki = min(max(ki, 0), e.size - 2)
        k[i] = ki
        h = 0.5 * (xi - e[ki])
        mid = 0.5 * (xi + e[ki])
        half[i] = h
        for j in range(q):
            t[i * q + j] = (mid + h * nodes[j] - m) * c
    re = np.empty(t.size)
    im = np.empty(t.size)
    _line(t, y, a, lam, re, im)
    for i in range(x.size):
        acc = 0.0
        for j in range(q):
            acc += re[i * q + j] * norm * weights[j]
        out[i] = cum[k[i]] + half[i] * acc


def voigt_partial(x, e: np.ndarray, cum: np.ndarray, m: float, s: float, g: float
                  ) -> np.ndarray:
    """The primitive at ``x`` (any shape) from the cumulative table ``(e, cum)`` of panel
    edges and integrals up to each edge (``Shape._table``)."""
    x = np.asarray(x, float)
    flat = np.ascontiguousarray(x).ravel()
    out = np.empty(flat.size)
    _partial(flat, np.ascontiguousarray(e, float), np.ascontiguousarray(cum, float),
             float(m), float(s), float(g), _A, _L, _GL_NODES, _GL_WEIGHTS, out)
    return out.reshape(x.shape)
