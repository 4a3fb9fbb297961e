r"""Compiled (numba, cached on disk) bin fractions of the ``powersum`` and ``bernstein``
backgrounds, for stacked parameter sets (one per toy, candidate start or hypothesis).

What is here and who uses it
----------------------------
* :func:`powersum_rows` -- :math:`\sum_j w_j (x/c)^{-k_j}` (:class:`.background.PowerSum`);
* :func:`bernstein_rows` -- :math:`\sum_i \beta_i b_{i,n}(u)` (:class:`.background.Bernstein`).

Both return the window-normalised bin fractions (floored at 0) and, if asked, their
derivatives in every shape parameter, the two things the background-only fits, the order
test, the spurious-signal test and the envelope's toys ask for at every step.  The shapes'
numpy paths (``Shape.fractions_and_grad`` and ``Shape.cdf`` over the shapes' primitives)
stay the reference, and the kernels follow them operation by operation, so that a search
gives the same bits with or without them:

* what does not depend on the parameters is computed once per edges by numpy exactly as
  the reference computes it and passed in: :math:`\ln(x/c)` of the clipped edges and of the
  window's ends (power sum), the integrated Bernstein basis
  :math:`(hi-lo)\,I_u(i+1, n-i+1)/(n+1)` (``scipy.special.betainc``);
* ``exprel`` is ``expm1(z)/z`` with the reference's two guards (scipy's definition; the
  same C ``expm1``); the exponentials of the power law's derivative are numpy's
  (``np.exp``, passed in: its vectorised exp may differ from the C library's by an ulp);
* sums run in the reference's order, and the value-only fractions divide by the
  normalisation where ``fractions_and_grad`` multiplies by its inverse, as the two numpy
  paths do.

``tests/test_compiled_falling.py`` checks the kernels against ``scipy.integrate.quad`` of
the densities (fractions and derivatives) and bit for bit against the numpy paths.
Imported lazily (``import peaksift.shapes`` does not load numba).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

__all__ = ["bernstein_rows", "powersum_rows"]

#: scipy's exprel returns 1 below this |z| (its DBL_EPSILON guard) and inf above 717
_EPS = 2.220446049250313e-16


@njit(cache=True, nogil=True)
def _exprel(z):  # pragma: no cover - compiled
    if abs(z) < _EPS:
        return 1.0
    if z > 717.0:
        return math.inf
    return math.expm1(z) / z


@njit(cache=True, nogil=True)
def _floor0(d):  # pragma: no cover - compiled
    """``np.maximum(d, 0.0)``: d where d >= 0 or NaN, else 0."""
    return d if (d >= 0.0 or math.isnan(d)) else 0.0


@njit(cache=True, nogil=True)
def _power_grad(lx, a, e, c):  # pragma: no cover - compiled
    """d/dk of the power law's primitive at ln(x/c) = ``lx`` (``PowerLaw._primitive_grad``),
    ``a = 1 - k``, ``e = np.exp(asafe * lx)`` from numpy."""
    asafe = 1e-12 if abs(a) < 1e-12 else a
    if abs(a * lx) < 1e-3:
        lx2 = lx * lx
        v = 0.5 * lx2 + a * lx2 * lx / 3.0 + a * a * lx2 * lx2 / 8.0
    else:
        a2 = asafe * asafe
        v = (lx / asafe - 1.0 / a2) * e + 1.0 / a2
    return -c * v


@njit(cache=True, nogil=True)
def powersum_rows(lx, lends, p, sq, c, ex, exends, grad, divide, frac, dfrac
                  ):  # pragma: no cover - compiled
    """Bin fractions ``frac (B, E-1)`` and, with ``grad``, derivatives ``dfrac (K, B, E-1)``
    of the power sum for every row of ``p (B, K)`` (the parameters in the shape's order:
    power, power_2, weight_2, power_3, weight_3).

    ``lx (E,)``: ln(x/c) of the clipped edges, ``lends (2,)``: of lo and hi; ``sq (B, T-1)``
    the squared weights; ``ex (B, T, E)`` and ``exends (B, T, 2)``: numpy's exp(asafe lx)
    of each term (read only with ``grad``).  ``divide``: the CDF as (P - P_lo) / (P_hi -
    P_lo) (``Shape.cdf``), else times the inverse (``Shape.fractions_and_grad``)."""
    nb, nk = p.shape
    nt = (nk + 1) // 2
    ne = lx.size
    cdf = np.empty(ne)
    r = np.empty((nk, ne))
    glo = np.empty(nk)
    ghi = np.empty(nk)
    for b in range(nb):
        # the primitive at the ends: the terms' w_j (c lx) exprel(a_j lx) summed in order
        plo = 0.0
        phi = 0.0
        for j in range(nt):
            q = 0 if j == 0 else 2 * j - 1
            a = 1.0 - p[b, q]
            w = 1.0 if j == 0 else sq[b, j - 1]
            plo = plo + w * (c * lends[0] * _exprel(a * lends[0]))
            phi = phi + w * (c * lends[1] * _exprel(a * lends[1]))
            if grad:
                glo[q] = w * _power_grad(lends[0], a, exends[b, j, 0], c)
                ghi[q] = w * _power_grad(lends[1], a, exends[b, j, 1], c)
                if j:
                    two = 2.0 * p[b, q + 1]
                    glo[q + 1] = two * (c * lends[0] * _exprel(a * lends[0]))
                    ghi[q + 1] = two * (c * lends[1] * _exprel(a * lends[1]))
        norm = phi - plo
        inv = 1.0 / norm
        for i in range(ne):
            v = 0.0
            for j in range(nt):
                q = 0 if j == 0 else 2 * j - 1
                a = 1.0 - p[b, q]
                w = 1.0 if j == 0 else sq[b, j - 1]
                pj = c * lx[i] * _exprel(a * lx[i])
                v = v + w * pj
                if grad:
                    r[q, i] = w * _power_grad(lx[i], a, ex[b, j, i], c)
                    if j:
                        r[q + 1, i] = 2.0 * p[b, q + 1] * pj
            cdf[i] = (v - plo) / norm if divide else (v - plo) * inv
        for i in range(ne - 1):
            frac[b, i] = _floor0(cdf[i + 1] - cdf[i])
        if grad:
            for q in range(nk):
                span = (ghi[q] - glo[q]) * inv
                for i in range(ne):
                    r[q, i] = (r[q, i] - glo[q]) * inv - cdf[i] * span
                for i in range(ne - 1):
                    dfrac[q, b, i] = r[q, i + 1] - r[q, i]
    return True


@njit(cache=True, nogil=True)
def bernstein_rows(basis, blo, bhi, coef, grad, divide, frac, dfrac
                   ):  # pragma: no cover - compiled
    """Bin fractions ``frac (B, E-1)`` and, with ``grad``, derivatives ``dfrac (n, B, E-1)``
    of the Bernstein polynomial with coefficients ``(1, c_1^2, ..., c_n^2)`` for every row
    of ``coef (B, n)``.  ``basis (n+1, E)``: the integrated basis at the clipped edges,
    ``blo``/``bhi (n+1,)`` at the window's ends; ``divide`` as in :func:`powersum_rows`."""
    nb, n = coef.shape
    ne = basis.shape[1]
    cdf = np.empty(ne)
    for b in range(nb):
        plo = blo[0]
        phi = bhi[0]
        for i in range(1, n + 1):
            sq = coef[b, i - 1] * coef[b, i - 1]
            plo = plo + sq * blo[i]
            phi = phi + sq * bhi[i]
        norm = phi - plo
        inv = 1.0 / norm
        for e in range(ne):
            p = basis[0, e]
            for i in range(1, n + 1):
                p = p + coef[b, i - 1] * coef[b, i - 1] * basis[i, e]
            cdf[e] = (p - plo) / norm if divide else (p - plo) * inv
        for e in range(ne - 1):
            frac[b, e] = _floor0(cdf[e + 1] - cdf[e])
        if grad:
            for i in range(1, n + 1):
                two = 2.0 * coef[b, i - 1]
                g_lo = two * blo[i]
                span = (two * bhi[i] - g_lo) * inv
                prev = 0.0
                for e in range(ne):
                    v = (two * basis[i, e] - g_lo) * inv - cdf[e] * span
                    if e:
                        dfrac[i - 1, b, e - 1] = v - prev
                    prev = v
    return True

