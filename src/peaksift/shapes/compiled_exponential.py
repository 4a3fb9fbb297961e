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
  :func:`exponential_bins` one row's bins (also the joint loop's signal span,
  :mod:`peaksift.stats.joint_spans`).
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

Cost: one exponential an edge, as the CDF differences had.  Edges farther than 1/|b| from
the far end take ``S = (e^{beta u} - e^{2 beta}) / (1 - e^{2 beta})``, which keeps its
digits there; only those nearer (all of them for |b| < 1) need exprel and w, by their
series.  Bins whose widths agree to 1e-9 (any linspace binning: its edges' last digits
differ) take the first width's factors and their first-order change, a few operations a
bin; unequal widths an ``expm1`` each (``docs/performance.md``, 2026-12-05 expprec10).

``ExpPoly`` of order 1 in numpy (:mod:`.exp_slope`) is the reference, the same formulae;
``tests/test_exponential_precision.py`` checks both against mpmath.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from .compiled_math import vexp

__all__ = ["exponential_bins", "exponential_constants", "exponential_edges",
           "exponential_rows", "exponential_rows_into", "same_widths", "slope_w"]

# w(q) = 1/2 + sum_k B_2k q^(2k-1) / (2k)! (Bernoulli numbers) on |q| < 1: terms to q^21
# (the next below 2e-19); beyond, 1 + 1/expm1(q) - 1/q loses < 3 bits (q <= -1)
_W1, _W3, _W5 = 0.08333333333333333, -0.001388888888888889, 3.306878306878307e-05
_W7, _W9, _W11 = -8.267195767195768e-07, 2.08767569878681e-08, -5.284190138687493e-10
_W13, _W15, _W17 = 1.3382536530684679e-11, -3.3896802963225827e-13, 8.586062056277845e-15
_W19, _W21 = -2.174868698558062e-16, 5.5090028283602295e-18
# exprel(q) = sum_n q^n / (n + 1)! on |q| < 1: terms to q^18 (the next below 5e-19)
_E = tuple(1.0 / math.factorial(n) for n in range(2, 20))
_E2, _E3, _E4, _E5, _E6, _E7, _E8, _E9, _E10 = _E[:9]
_E11, _E12, _E13, _E14, _E15, _E16, _E17, _E18, _E19 = _E[9:]
#: widths equal to this (relative) count as one width plus a first-order correction (the
#: second-order term is below 1e-18 of a fraction): binnings made by linspace differ in
#: the last digits of their edges
_SAME_WIDTH = 1e-9


@njit(inline="always")
def _w_series(q):  # pragma: no cover - compiled
    q2 = q * q
    return 0.5 + q * (_W1 + q2 * (_W3 + q2 * (_W5 + q2 * (_W7 + q2 * (_W9 + q2 * (
        _W11 + q2 * (_W13 + q2 * (_W15 + q2 * (_W17 + q2 * (_W19 + q2 * _W21))))))))))


@njit(inline="always")
def _exprel_series(q):  # pragma: no cover - compiled
    return 1.0 + q * (_E2 + q * (_E3 + q * (_E4 + q * (_E5 + q * (_E6 + q * (_E7 + q * (
        _E8 + q * (_E9 + q * (_E10 + q * (_E11 + q * (_E12 + q * (_E13 + q * (_E14 + q * (
            _E15 + q * (_E16 + q * (_E17 + q * (_E18 + q * _E19)))))))))))))))))


@njit(inline="always", error_model="numpy")
def slope_w(q, em1):  # pragma: no cover - compiled
    """w(q) = d ln exprel(q) / dq for q <= 0 (and q within rounding above 0), given
    ``em1 = expm1(q)``.  Both branches computed, one selected (loops vectorise)."""
    near = q > -1.0
    qd = -1.0 if near else q
    ed = -0.5 if near else em1
    return _w_series(q) if near else 1.0 + 1.0 / ed - 1.0 / qd


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


@njit(inline="always", error_model="numpy")
def _edges_direct(t, beta, sg, out0, out1):  # pragma: no cover - compiled
    """Edges at least 1/|beta| from the far end: S = (e^{beta u} - e^{2 beta}) /
    (1 - e^{2 beta}) and dS/dbeta = (u e^{beta u} - 2 e^{2 beta} (1 - S)) / (1 - e^{2 beta})
    (their differences lose < 2 bits there); one exponential an edge."""
    e2 = math.exp(2.0 * beta)
    kp = -1.0 / math.expm1(2.0 * beta)
    for i in range(t.size):
        u = 1.0 - sg * t[i]
        ev = vexp(beta * u)
        s = (ev - e2) * kp
        out0[i] = sg * s
        out1[i] = -kp * (u * ev - 2.0 * e2 * (1.0 - s))


@njit(inline="always", error_model="numpy")
def _edges_near(t, beta, sg, k, w2, out0, out1):  # pragma: no cover - compiled
    """Edges within 1/|beta| of the far end (all of them for |b| <= 1/2): the module's S
    and dS/dbeta with exprel and w by their series in q = beta (2 - u), |q| < 1."""
    for i in range(t.size):
        u = 1.0 - sg * t[i]
        far = 1.0 + sg * t[i]
        q = beta * far
        s = vexp(beta * u) * far * _exprel_series(q) * k
        out0[i] = sg * s
        out1[i] = -s * (u + far * _w_series(q) - 2.0 * w2)


@njit(cache=True, nogil=True, error_model="numpy")
def exponential_edges(t, b, out):  # pragma: no cover - compiled
    """Rows of ``out``: at every edge ``t[i]`` (sorted) the window's share beyond it (-S
    for b <= 0, the CDF minus 1; the CDF for b > 0) and its b derivative, so that the
    rows' differences are the bin fractions and their derivatives (the module's guide).
    Each row exact to rounding; one exponential an edge (the far end's edges a series
    more).  Always True (no series switch)."""
    beta, sg, k, w2 = _slope(b)
    ne = t.size
    # the edges within 1/|beta| of the far end: the last ones for b <= 0, the first for
    # b > 0 (all of them at b = 0; NaN: all, giving NaN)
    if b > 0.0:
        cut = np.searchsorted(t, -1.0 + 1.0 / b)
        d0, d1, n0, n1 = cut, ne, 0, cut
    elif beta < 0.0:
        cut = np.searchsorted(t, 1.0 + 1.0 / beta, side="right")
        d0, d1, n0, n1 = 0, cut, cut, ne
    else:
        d0, d1, n0, n1 = 0, 0, 0, ne
    # (on slices: loops from 0, which vectorise; from a runtime start they did not)
    if d1 > d0:
        _edges_direct(t[d0:d1], beta, sg, out[0, d0:d1], out[1, d0:d1])
    if n1 > n0:
        _edges_near(t[n0:n1], beta, sg, k, w2, out[0, n0:n1], out[1, n0:n1])
    return True


@njit(inline="always")
def same_widths(dt):  # pragma: no cover - compiled
    """Whether every width is within :data:`_SAME_WIDTH` of the first."""
    d0 = dt[0]
    for i in range(dt.size):
        if not abs(dt[i] - d0) <= _SAME_WIDTH * d0:
            return False
    return True


@njit(inline="always", error_model="numpy")
def _bins_same(t, dt, b, fr, gr, want, ev):  # pragma: no cover - compiled
    """:func:`exponential_bins` where :func:`same_widths`: the width factors at the first
    width and their first-order change (m' = k e^{beta d}, c' = (1 - w)(1 + q w)); a
    few operations a bin, in loops that vectorise."""
    beta, sg, k, w2 = _slope(b)
    off = 1 if b > 0.0 else 0     # a bin's dense-side edge: its upper one when b > 0
    nb = dt.size
    for j in range(nb + 1):
        ev[j] = vexp(beta * (1.0 - sg * t[j]))
    d0 = dt[0]
    q = beta * d0
    em1 = math.expm1(q)
    w0 = slope_w(q, em1)
    m0 = d0 * _exprel(q, em1) * k
    m1 = k * (em1 + 1.0)
    c0 = d0 * w0 - 2.0 * w2
    c1 = (1.0 - w0) * (1.0 + q * w0)
    for j in range(nb):
        fr[j] = max(0.0, ev[j + off] * (m0 + m1 * (dt[j] - d0)))
    if want:
        for j in range(nb):
            dd = dt[j] - d0
            u = 1.0 - sg * t[j + off]
            gr[j] = -sg * (ev[j + off] * (m0 + m1 * dd)) * (u + (c0 + c1 * dd))


@njit(inline="always", error_model="numpy")
def _bins_ragged(t, dt, b, fr, gr, want, ev):  # pragma: no cover - compiled
    """:func:`exponential_bins` for unequal widths: a width's factors (one ``expm1``)
    where it differs from the previous bin's."""
    beta, sg, k, w2 = _slope(b)
    off = 1 if b > 0.0 else 0
    nb = dt.size
    for j in range(nb + 1):
        ev[j] = vexp(beta * (1.0 - sg * t[j]))
    d_last = math.nan
    m = c = 0.0
    for j in range(nb):
        d = dt[j]
        if d != d_last:
            d_last = d
            q = beta * d
            em1 = math.expm1(q)
            m = d * _exprel(q, em1) * k
            c = d * slope_w(q, em1) - 2.0 * w2
        f = ev[j + off] * m
        fr[j] = max(0.0, f)
        if want:
            gr[j] = -sg * f * ((1.0 - sg * t[j + off]) + c)


@njit(inline="always", error_model="numpy")
def exponential_bins(t, dt, b, fr, gr, want, ev):  # pragma: no cover - compiled
    """The bins of edges ``t`` (``dt.size + 1`` of them) and widths ``dt`` at slope ``b``:
    fractions into ``fr`` (floored at 0) and, if ``want``, d/db into ``gr``; ``ev`` a work
    row of ``t.size``.  The edges' exponentials in a loop that vectorises
    (:func:`vexp`), then the bins (:func:`_bins_same` or :func:`_bins_ragged`)."""
    if same_widths(dt):
        _bins_same(t, dt, b, fr, gr, want, ev)
    else:
        _bins_ragged(t, dt, b, fr, gr, want, ev)


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
    same = same_widths(dt)
    for r in range(bs.size):
        gr = grad[r] if want else ev
        if same:
            _bins_same(t, dt, bs[r], frac[r], gr, want, ev)
        else:
            _bins_ragged(t, dt, bs[r], frac[r], gr, want, ev)
    return True


@njit(cache=True, nogil=True)
def exponential_constants(b):  # pragma: no cover - compiled
    """e^{-b}, e^b and 1 / (e^b - e^{-b}): the constants of exp(b t) on t in [-1, 1] in the
    joint loop's closed forms (:mod:`peaksift.stats.joint_spans`, which declines
    |b| < 1e-3, where the last loses digits)."""
    em = math.exp(-b)
    ep = math.exp(b)
    return em, ep, 1.0 / (ep - em)
