"""Exact second derivatives of the compiled shapes' normalised CDFs for the observed Hessian
(:func:`.driver._hessian`), instead of differences of their first-derivative rows.

A shape normalised on the window has ``C(x) = A(x) / N`` with ``A(x) = F(x) - F(lo)`` and
``N = F(hi) - F(lo)``; then (quotient rule twice)

    C_ab = (A_ab - C_a N_b - C_b N_a - C N_ab) / N,

where ``C``, ``C_a`` are the rows the kernels already made at the point (the evaluation the
Hessian is taken at) and ``F_ab`` is elementary:

* Gaussian, ``z = (x - m) / s``, ``phi`` the standard normal density:
  ``F_mm = -z phi / s^2``, ``F_ms = phi (1 - z^2) / s^2``, ``F_ss = z phi (2 - z^2) / s^2``
  (``F_m = -phi / s``, ``F_s = -z phi / s``);
* power law ``x^-k``, ``q = (x/c)^(1-k)``: ``F_k = -ln(x/c) q``, ``F_kk = ln(x/c)^2 q``, with
  ``q`` recovered from the row ``C`` itself (``q = C N + q_lo``).

One exponential per edge for the Gaussian, none for the power law, where the differences
made two calls of each kernel (every edge's erfc and exponentials) per shape parameter.  The
exponential background keeps the differences (its kernel is cheap).  Checked against the
differences and against iminuit's HESSE on an NLL written with scipy in
``tests/test_fit_tight_minimum.py``.
"""

from __future__ import annotations

import math

from numba import njit

from ..shapes.compiled_math import vexp

__all__ = ["gaussian_phi", "gaussian_second", "powerlaw_second"]

_INV_SQRT2PI = 1.0 / math.sqrt(2.0 * math.pi)
_SQRT1_2 = 1.0 / math.sqrt(2.0)


@njit(inline="always")
def _gauss_f(z, phi, which):  # pragma: no cover - compiled
    """s^2 F_ab at z (density phi there): which 0 (mm), 1 (ms), 2 (ss)."""
    if which == 0:
        return -z * phi
    if which == 1:
        return phi * (1.0 - z * z)
    return z * phi * (2.0 - z * z)


@njit(inline="always")
def _phi(z):  # pragma: no cover - compiled
    return math.exp(-0.5 * z * z) * _INV_SQRT2PI if abs(z) < 38.0 else 0.0


@njit(cache=True, nogil=True, error_model="numpy")
def gaussian_phi(x, m, s, out):  # pragma: no cover - compiled
    """The standard normal density at ``z = (x - m) / s`` of every edge into ``out`` (0
    beyond 38 widths), in a loop that vectorises (:func:`~peaksift.shapes.compiled_math.vexp`)."""
    inv_s = 1.0 / s
    for i in range(x.size):
        z = (x[i] - m) * inv_s
        q = -0.5 * z * z
        out[i] = vexp(max(q, -708.0)) * _INV_SQRT2PI if q > -722.0 else 0.0


@njit(cache=True, nogil=True, error_model="numpy")
def gaussian_second(x, m, s, lo, hi, c, ca, cb, a, b, phi, out):  # pragma: no cover
    """``C_ab`` of the Gaussian normalised on ``[lo, hi]`` at the (window-clipped) edges
    ``x`` into ``out``: ``a``, ``b`` in {0: m, 1: s}; ``c``, ``ca``, ``cb`` the rows C, C_a,
    C_b there, ``phi`` the density there (:func:`gaussian_phi`).  False when the window
    holds no probability."""
    inv_s = 1.0 / s
    zl = (lo - m) * inv_s
    zh = (hi - m) * inv_s
    if zl > 0.0:  # the window above the peak: upper tails keep the digits
        n = 0.5 * (math.erfc(zl * _SQRT1_2) - math.erfc(zh * _SQRT1_2))
    else:
        n = 0.5 * (math.erfc(-zh * _SQRT1_2) - math.erfc(-zl * _SQRT1_2))
    if not n > 0.0:
        return False
    phl = _phi(zl)
    phh = _phi(zh)
    # first derivatives of N: F_m = -phi / s, F_s = -z phi / s
    n_m = (phl - phh) * inv_s
    n_s = (zl * phl - zh * phh) * inv_s
    n_a = n_m if a == 0 else n_s
    n_b = n_m if b == 0 else n_s
    which = a + b
    s2 = inv_s * inv_s
    f_lo = _gauss_f(zl, phl, which) * s2
    n_ab = _gauss_f(zh, phh, which) * s2 - f_lo
    inv_n = 1.0 / n
    for i in range(x.size):
        z = (x[i] - m) * inv_s
        a_ab = _gauss_f(z, phi[i], which) * s2 - f_lo
        out[i] = (a_ab - ca[i] * n_b - cb[i] * n_a - c[i] * n_ab) * inv_n
    return True


@njit(cache=True, nogil=True)
def powerlaw_second(lx, k, l_lo, l_hi, c, ck, out):  # pragma: no cover - compiled
    """``C_kk`` of ``x^-k`` normalised on the window at edges ``lx = ln(x/c)`` into ``out``
    (``c``, ``ck`` the rows C, C_k there); False near k = 1 (as the kernel)."""
    a = 1.0 - k
    if abs(a) * (l_hi - l_lo) < 1e-3:
        return False
    top = max(a * l_lo, a * l_hi)  # a common scale of q: it cancels in C and its derivatives
    q_lo = math.exp(a * l_lo - top)
    q_hi = math.exp(a * l_hi - top)
    n = q_hi - q_lo
    n_k = -(l_hi * q_hi - l_lo * q_lo)
    f_lo = l_lo * l_lo * q_lo
    n_kk = l_hi * l_hi * q_hi - f_lo
    inv_n = 1.0 / n
    for i in range(lx.size):
        q = c[i] * n + q_lo
        out[i] = (lx[i] * lx[i] * q - f_lo - 2.0 * ck[i] * n_k - c[i] * n_kk) * inv_n
    return True
