r"""The bin fractions of exp(b t) on the window (t in [-1, 1]) and their b derivative, in
numpy: the reference of :mod:`.compiled_exponential` (whose guide gives the formulae and
why), used by ``ExpPoly`` of order 1 for one slope or slopes that broadcast.

With beta = -|b| and ``u`` a bin's dense-side edge's distance from the dense end, a bin of
width ``d`` holds :math:`F = e^{\beta u} d\,\mathrm{exprel}(\beta d)\,k` with
:math:`k = 1 / (2\,\mathrm{exprel}(2\beta))`, and
:math:`\partial_\beta \ln F = u + d\,w(\beta d) - 2\,w(2\beta)`,
:math:`w(q) = d\ln\mathrm{exprel}/dq`: exact to rounding for every b.  Widths equal to
1e-9 (a linspace binning's) take the first width's factors and their first-order change,
as the kernels do.
"""

from __future__ import annotations

import math

import numpy as np

from ._base import as_window

__all__ = ["slope_fractions"]

# w(q) = 1/2 + sum_k B_2k q^(2k-1) / (2k)! on |q| < 1 (Bernoulli numbers; to q^21, the
# next term below 2e-19), highest first; beyond, 1 + 1/expm1(q) - 1/q (q <= -1)
_W_SERIES = (5.5090028283602295e-18, -2.174868698558062e-16, 8.586062056277845e-15,
             -3.3896802963225827e-13, 1.3382536530684679e-11, -5.284190138687493e-10,
             2.08767569878681e-08, -8.267195767195768e-07, 3.306878306878307e-05,
             -0.001388888888888889, 0.08333333333333333)
_SAME_WIDTH = 1e-9


def _w(q, em1):
    """w(q) for q <= 0 given ``em1 = expm1(q)`` (floats or arrays)."""
    q = np.asarray(q, dtype=float)
    q2 = q * q
    acc = np.zeros_like(q2)
    for c in _W_SERIES:
        acc = acc * q2 + c
    near = q > -1.0
    with np.errstate(divide="ignore", invalid="ignore"):
        direct = 1.0 + 1.0 / np.where(near, -0.5, em1) - 1.0 / np.where(near, -1.0, q)
    return np.where(near, 0.5 + q * acc, direct)


def _w1(q, em1):
    """:func:`_w` of one float (no numpy: the constants of one slope)."""
    if q <= -1.0:
        return 1.0 + 1.0 / em1 - 1.0 / q
    q2 = q * q
    acc = 0.0
    for c in _W_SERIES:
        acc = acc * q2 + c
    return 0.5 + q * acc


def _exprel(q, em1):
    """expm1(q) / q given ``em1``; 1 at q = 0."""
    zero = np.asarray(q) == 0.0
    return np.where(zero, 1.0, em1) / np.where(zero, 1.0, q)


def slope_fractions(edges, b, window, grad: bool):
    """``(fractions, d/db or None)`` of exp(b t) over ``edges`` (clipped to ``window``);
    ``b`` a number, or an array that broadcasts against ``edges`` (last axis: the edges)."""
    lo, hi = as_window(window)
    x = np.asarray(edges, dtype=float)
    if np.ndim(b) == 0 and x.ndim == 1:
        return _one_slope(x, float(b), lo, hi, grad)
    if x[..., 0].min() < lo or x[..., -1].max() > hi:
        x = np.clip(x, lo, hi)
    scale = 2.0 / (hi - lo)
    t = (x - 0.5 * (lo + hi)) * scale
    dt = np.diff(x, axis=-1) * scale
    bb = np.broadcast_to(np.asarray(b, dtype=float), np.broadcast_shapes(np.shape(b), t.shape))
    b = bb[..., :-1]
    beta = -np.abs(b)
    sg = np.where(b > 0.0, 1.0, -1.0)
    u = 1.0 - sg * np.where(b > 0.0, t[..., 1:], t[..., :-1])
    em2 = np.expm1(2.0 * beta)
    qd = beta * dt
    emd = np.expm1(qd)
    k = 0.5 / _exprel(2.0 * beta, em2)
    frac = np.exp(beta * u) * (dt * _exprel(qd, emd) * k)
    if not grad:
        return frac, None
    return frac, -sg * frac * (u + dt * _w(qd, emd) - 2.0 * _w(2.0 * beta, em2))


def _one_slope(x, b, lo, hi, grad):
    """:func:`slope_fractions` of one slope on 1-d edges: the constants as floats, and
    for widths equal to 1e-9 the first width's factors with their first-order change
    (m' = k e^{beta d}, c' = (1 - w)(1 + q w)) instead of an expm1 a bin."""
    if x[0] < lo or x[-1] > hi:
        x = np.clip(x, lo, hi)
    scale = 2.0 / (hi - lo)
    t = (x - 0.5 * (lo + hi)) * scale
    dt = (x[1:] - x[:-1]) * scale
    beta = -abs(b)
    up = b > 0.0
    em2 = math.expm1(2.0 * beta)
    k = 0.5 * (2.0 * beta / em2 if beta else 1.0)
    w2 = _w1(2.0 * beta, em2)
    u = 1.0 - t[1:] if up else t[:-1] + 1.0
    d0 = dt[0]
    dd = dt - d0
    if abs(dd).max() <= _SAME_WIDTH * d0:
        q0 = beta * d0
        em0 = math.expm1(q0)
        w0 = _w1(q0, em0)
        m = d0 * (em0 / q0 if q0 else 1.0) * k + (k * (em0 + 1.0)) * dd
        c = (d0 * w0 - 2.0 * w2) + ((1.0 - w0) * (1.0 + q0 * w0)) * dd if grad else None
    else:
        q = beta * dt
        em1 = np.expm1(q)
        m = dt * _exprel(q, em1) * k
        c = dt * _w(q, em1) - 2.0 * w2 if grad else None
    frac = np.exp(beta * u) * m
    if not grad:
        return frac, None
    return frac, (-frac if up else frac) * (u + c)
