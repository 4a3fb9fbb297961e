r"""Compiled (numba, cached on disk) bin fractions of the exponential background exp(b t),
t in [-1, 1] the window-scaled mass (``exponential`` / ``exppoly`` of order 1).

What is here and who uses it
----------------------------
* :func:`exponential_edges` -- one slope: two rows at the edges whose differences are the
  bin fractions and their b derivative (the fit's compiled cost,
  :mod:`peaksift.likelihood.kernels` and :mod:`peaksift.likelihood.driver`, difference
  them as they do the other shapes' CDF rows).
* :func:`exponential_rows` / :func:`exponential_rows_into` -- stacked slopes (one per mass
  hypothesis or toy): the bin fractions and their derivatives themselves (the scan's and
  the toys' background, ``ExpPoly``'s stacked rows, the profile and joint kernels);
  :func:`exponential_bins` one row's loop on a range of bins (also the joint loop's
  signal span, :mod:`peaksift.stats.joint_spans`).
* :func:`exponential_constants` -- the constants of the joint loop's closed forms.

Why this form
-------------
Differences of the CDF from the window's lower end lose a steep fall's far bins: with b =
-25 the CDF is within e^-50 of 1 there, and a fraction of 1e-20 is the difference of two
numbers near 1 (relative error ~e^{|b|} eps; from b ~ -15 on, wrong in every digit).
Here everything is measured from the end where the density is highest: with beta = -|b|
(<= 0) and ``u`` a point's distance from that end (``t + 1`` for b <= 0, ``1 - t`` for
b > 0), a bin of width ``d`` whose dense-side edge is at ``u`` holds

.. math:: F = e^{\beta u}\,\frac{d\,\mathrm{exprel}(\beta d)}{2\,\mathrm{exprel}(2\beta)},
          \qquad \partial_\beta \ln F = u + d\,w(\beta d) - 2\,w(2\beta),

with :math:`\mathrm{exprel}(q) = \mathrm{expm1}(q)/q` and :math:`w(q) = d\ln
\mathrm{exprel}/dq = 1/(1 - e^{-q}) - 1/q` (in (0, 1/2] for q <= 0): products of factors
each exact to rounding, for either sign of b and at b = 0 (no series switch, no
overflow: every exponent is <= 0).  ``d/db = -sign(b) d/dbeta``.  The edge rows hold the
share of the window beyond each edge, away from the dense end,
:math:`S = e^{\beta u} (2-u)\,\mathrm{exprel}(\beta(2-u)) / (2\,\mathrm{exprel}(2\beta))`
(as ``-S`` for b <= 0, the CDF minus 1; as S, the CDF, for b > 0): each exact to rounding,
so their differences lose only the usual ``eps S/F`` of any CDF difference (at most
~eps/(1 - e^{-|b| d}) or eps times the number of bins; no longer e^{|b|} eps).

``ExpPoly.fractions_and_grad`` (numpy, :mod:`.polynomial`) is the reference, the same
formulae; ``tests/test_exponential_precision.py`` checks both against mpmath.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from .compiled_math import vexp, vexpm1

__all__ = ["exponential_bins", "exponential_constants", "exponential_edges",
           "exponential_rows", "exponential_rows_into", "slope_w"]

# w(q) = 1/2 + sum_k B_2k q^(2k-1) / (2k)! (Bernoulli numbers) on |q| < 1/2: terms to
# q^17 (the next below 5e-22); beyond, 1 + 1/expm1(q) - 1/q loses < 4 bits (q <= -1/2)
_W1, _W3, _W5 = 0.08333333333333333, -0.001388888888888889, 3.306878306878307e-05
_W7, _W9, _W11 = -8.267195767195768e-07, 2.08767569878681e-08, -5.284190138687493e-10
_W13, _W15, _W17 = 1.3382536530684679e-11, -3.3896802963225827e-13, 8.586062056277845e-15


@njit(inline="always", error_model="numpy")
def slope_w(q, em1):  # pragma: no cover - compiled
    """w(q) = d ln exprel(q) / dq for q <= 0 (and q within rounding above 0), given
    ``em1 = expm1(q)``.  Both branches computed, one selected (loops vectorise)."""
    q2 = q * q
    series = 0.5 + q * (_W1 + q2 * (_W3 + q2 * (_W5 + q2 * (_W7 + q2 * (_W9 + q2 * (
        _W11 + q2 * (_W13 + q2 * (_W15 + q2 * _W17))))))))
    near = q > -0.5
    qd = -1.0 if near else q
    ed = -0.5 if near else em1
    return series if near else 1.0 + 1.0 / ed - 1.0 / qd


@njit(inline="always", error_model="numpy")
def _exprel(q, em1):  # pragma: no cover - compiled
    """expm1(q) / q given ``em1 = expm1(q)``; 1 at q = 0."""
    zero = q == 0.0
    return (1.0 if zero else em1) / (1.0 if zero else q)


@njit(inline="always")
def _slope(b):  # pragma: no cover - compiled
    """``(beta, sg, k, w2)`` of slope ``b``: beta = -|b|, sg = 1 for b > 0 (else -1),
    k = 1 / (2 exprel(2 beta)) and w2 = w(2 beta)."""
    beta = -abs(b)
    q = 2.0 * beta
    em1 = math.expm1(q)
    return beta, (1.0 if b > 0.0 else -1.0), 0.5 / _exprel(q, em1), slope_w(q, em1)


@njit(cache=True, nogil=True, error_model="numpy")
def exponential_edges(t, b, out):  # pragma: no cover - compiled
    """Rows of ``out``: at every edge ``t[i]`` the window's share beyond it (-S for
    b <= 0, the CDF minus 1; the CDF for b > 0) and its b derivative, so that the rows'
    differences are the bin fractions and their derivatives (the module's guide).
    Always True (no series switch)."""
    beta, sg, k, w2 = _slope(b)
    for i in range(t.size):
        u = 1.0 - sg * t[i]       # from the dense end
        far = 1.0 + sg * t[i]     # to the far end
        q = beta * far
        em1 = vexpm1(q)
        s = vexp(beta * u) * far * _exprel(q, em1) * k
        out[0, i] = sg * s
        out[1, i] = -s * (u + far * slope_w(q, em1) - 2.0 * w2)
    return True


@njit(inline="always", error_model="numpy")
def exponential_bins(t, dt, b, a, n, frac, grad, f0, want, ev):  # pragma: no cover
    """The ``n`` bins from edge ``a`` (edges ``t[a:a + n + 1]``, widths ``dt[a:a + n]``) of
    slope ``b``: fractions into ``frac[f0:f0 + n]`` (floored at 0) and, if ``want``, d/db
    into ``grad[f0:f0 + n]``; ``ev`` a work row of ``n + 1``.

    The edges' exponentials first, in a loop that vectorises (:func:`vexp`); then per
    bin its width's factors, with one ``expm1`` only where a width differs from the
    previous bin's (equal widths, the usual binning: one call)."""
    beta, sg, k, w2 = _slope(b)
    off = 1 if b > 0.0 else 0     # a bin's dense-side edge: its upper one when b > 0
    for j in range(n + 1):
        ev[j] = vexp(beta * (1.0 - sg * t[a + j]))
    uniform = True
    for j in range(1, n):
        if dt[a + j] != dt[a]:
            uniform = False
            break
    if uniform:
        d = dt[a]
        q = beta * d
        em1 = math.expm1(q)
        m = d * _exprel(q, em1) * k
        c = d * slope_w(q, em1) - 2.0 * w2
        for j in range(n):
            frac[f0 + j] = max(0.0, ev[j + off] * m)
        if want:
            for j in range(n):
                u = 1.0 - sg * t[a + j + off]
                grad[f0 + j] = -sg * (ev[j + off] * m) * (u + c)
        return
    d_last = math.nan
    m = c = 0.0
    for j in range(n):
        d = dt[a + j]
        if d != d_last:
            d_last = d
            q = beta * d
            em1 = math.expm1(q)
            m = d * _exprel(q, em1) * k
            c = d * slope_w(q, em1) - 2.0 * w2
        f = ev[j + off] * m
        frac[f0 + j] = max(0.0, f)
        if want:
            grad[f0 + j] = -sg * f * ((1.0 - sg * t[a + j + off]) + c)


@njit(cache=True, nogil=True)
def exponential_rows(t, dt, bs, frac, grad):  # pragma: no cover - compiled
    """Bin fractions ``frac (B, E-1)`` (floored at 0) and d/db1 ``grad (B, E-1)`` (if
    ``grad.size``) of exp(b1 t) for every row's ``bs[b]``: :func:`exponential_rows_into`
    with its work row made here.  Always True (no series switch)."""
    return exponential_rows_into(t, dt, bs, frac, grad, np.empty(t.size))


@njit(cache=True, nogil=True, error_model="numpy")
def exponential_rows_into(t, dt, bs, frac, grad, ev):  # pragma: no cover - compiled
    """:func:`exponential_rows` with a work row ``ev`` of ``t.size`` (a scan's rows call it
    ~6 times each: its allocation was ~0.1 us of a call's ~0.2 us fixed cost)."""
    want = grad.size > 0
    nb = t.size - 1
    for r in range(bs.size):
        exponential_bins(t, dt, bs[r], 0, nb, frac[r], grad[r] if want else ev, 0, want, ev)
    return True


@njit(cache=True, nogil=True)
def exponential_constants(b):  # pragma: no cover - compiled
    """e^{-b}, e^b and 1 / (e^b - e^{-b}): the constants of exp(b t) on t in [-1, 1] in the
    joint loop's closed forms (:mod:`peaksift.stats.joint_spans`, which declines
    |b| < 1e-3, where the last loses digits)."""
    em = math.exp(-b)
    ep = math.exp(b)
    return em, ep, 1.0 / (ep - em)
