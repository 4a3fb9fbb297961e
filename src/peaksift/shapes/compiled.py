"""Compiled (numba, cached on disk) CDFs of the Gaussian and power law at many bin edges,
and the Crystal Ball's primitive and density.

What is here and who uses it
----------------------------
* ``gaussian_edges``, ``powerlaw_edges`` -- one parameter set: the window-normalised CDF at
  every edge and its derivative in each shape parameter, as rows of an output array (the
  fit's compiled cost, :mod:`peaksift.likelihood.kernels`; the exponential's rows are in
  :mod:`.compiled_exponential`).
* ``powerlaw_rows`` -- stacked parameter sets (one per mass hypothesis or toy): bin
  fractions and their derivatives, one exponential per edge and row (the scan's and the
  toys' background, through ``PowerLaw``; the exponential's: :mod:`.compiled_exponential`).
* ``gaussian_rows`` -- bin fractions of a Gaussian at many trial masses (the free fit's
  coarse scan of the window for starting masses, :mod:`peaksift.likelihood.starts`);
  ``gaussian_width_rows`` the same at one mass for many widths, each on its own band of
  edges (the width profile of :mod:`peaksift.likelihood.start_widths`);
  ``gaussian_scan_rows`` with a width per mass (the scan's signal fractions,
  :mod:`peaksift.stats.scan_inputs`).
* ``crystalball_primitive``, ``crystalball_density`` -- one parameter set: the Crystal
  Ball's primitive and its density at every edge or mass, each with its derivatives in the
  six parameters (``CrystalBall.fractions_and_grad`` / ``pdf_and_grad``, the free fit's
  binned and unbinned hot paths).

The formulae are those of the shapes' numpy fast paths (``fractions_and_grad`` in
:mod:`.signal` and :mod:`.background`), which stay the reference; a kernel returns False
where that path switches to a series (power law near k = 1) and the caller then takes the
numpy path.  The vectorising exp and log: :mod:`.compiled_math`.  Imported lazily:
``import peaksift.shapes`` does not load numba.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from .compiled_math import vexp

__all__ = ["crystalball_density", "crystalball_primitive", "gaussian_edges", "gaussian_rows",
           "gaussian_scan_rows", "gaussian_width_rows", "powerlaw_edges", "powerlaw_rows"]

_INV_SQRT2PI = 1.0 / math.sqrt(2.0 * math.pi)
_SQRT1_2 = 1.0 / math.sqrt(2.0)
#: |z| beyond which the normal density and tail integral are exactly 0.0 in double precision
#: (as in :mod:`peaksift.shapes.signal`)
_CUT = 40.0
#: z beyond which 0.5 erfc(-z/sqrt 2) is exactly 1.0 (and -0.5 erfc(z/sqrt 2) exactly -1.0
#: for -z): erfc of -6 or less rounds to 2.0 (checked on every z in [8.3, 40] at a step of
#: 1.6e-6), so the CDF's erfc is skipped on that side of a peak: the same numbers, faster
_ONE = 8.5


#: |z| beyond which the far tail Phi(-|z|) < 1.8e-33 is taken as 0 when the window holds
#: more than _HELD of the peak (so the CDF moves by < 2e-23 of its range): an erfc per edge
#: saved on the far side of a peak (most edges of a narrow peak in a wide window)
_TAIL = 12.0
_HELD = 1e-10


@njit(cache=True, nogil=True)
def _primitive(z, upper, tail):  # pragma: no cover - compiled
    """Phi(z), or -Phi(-z) (the upper tail) when the window lies above the peak; the far
    tail beyond ``tail`` standard deviations taken as 0."""
    if upper:
        if z > tail:
            return 0.0
        return -1.0 if z < -_ONE else -0.5 * math.erfc(z * _SQRT1_2)
    if z < -tail:
        return 0.0
    return 1.0 if z > _ONE else 0.5 * math.erfc(-z * _SQRT1_2)


@njit(inline="always")
def _edge_primitive(z, upper, tail):  # pragma: no cover - compiled
    """:func:`_primitive` at an edge, its constant value beyond 40 standard deviations."""
    if z < -_CUT:
        return -1.0 if upper else 0.0
    if z > _CUT:
        return 0.0 if upper else 1.0
    return _primitive(z, upper, tail)


@njit(inline="always")
def _window(m, s, lo, hi):  # pragma: no cover - compiled
    """The Gaussian's normalisation on the window [lo, hi], shared by every kernel here:
    ``(1/s, z at lo, z at hi, upper, primitive at lo, norm, tail)``.  ``upper``: the window
    lies above the peak, so the primitive is taken as -Phi(-z), whose upper tail keeps every
    digit; ``norm``: the primitive's rise over the window (not > 0: no peak in it);
    ``tail``: beyond how many standard deviations the far tail counts as 0."""
    inv_s = 1.0 / s
    zl = (lo - m) * inv_s
    zh = (hi - m) * inv_s
    upper = zl > 0.0
    if upper:
        pl = -0.5 * math.erfc(zl * _SQRT1_2)
        ph = -0.5 * math.erfc(zh * _SQRT1_2)
    else:
        pl = 0.5 * math.erfc(-zl * _SQRT1_2)
        ph = 0.5 * math.erfc(-zh * _SQRT1_2)
    norm = ph - pl
    return inv_s, zl, zh, upper, pl, norm, _TAIL if norm > _HELD else _CUT


@njit(cache=True, nogil=True)
def gaussian_edges(x, m, s, lo, hi, out):  # pragma: no cover - compiled
    """Rows of ``out``: C(x), dC/dm, dC/dsigma of the Gaussian normalised on [lo, hi]."""
    inv_s, zl, zh, upper, pl, norm, tail = _window(m, s, lo, hi)
    if not norm > 0.0:
        return False
    inv = 1.0 / norm
    fl = math.exp(-0.5 * zl * zl) * _INV_SQRT2PI * inv_s
    fh = math.exp(-0.5 * zh * zh) * _INV_SQRT2PI * inv_s
    am = (fl - fh) * inv
    asg = (fl * zl - fh * zh) * inv
    ne = x.size
    # edges beyond 40 sigma (x is sorted): density 0, CDF 0 or 1, rows constant there
    i0 = min(np.searchsorted(x, m - _CUT * s), ne)
    i1 = max(min(np.searchsorted(x, m + _CUT * s, side="right"), ne), i0)
    for i, prim in ((0, -1.0 if upper else 0.0), (i1, 0.0 if upper else 1.0)):
        c = (prim - pl) * inv
        r1 = fl * inv - c * am
        r2 = fl * zl * inv - c * asg
        for j in range(i, i0 if i == 0 else ne):
            out[0, j] = c
            out[1, j] = r1
            out[2, j] = r2
    # within them: the densities first, in a loop that vectorises (vexp); then the CDF,
    # whose erfc is a library call per edge (one per edge, not two per bin)
    fs = out[1]
    for i in range(i0, i1):
        z = (x[i] - m) * inv_s
        q = -0.5 * z * z
        # every lane computes vexp: an argument clamped above the subnormals (whose
        # arithmetic is ~100x slower) and the result selected (below 3e-308: 0)
        fs[i] = vexp(max(q, -708.0)) * _INV_SQRT2PI * inv_s if q >= -708.0 else 0.0
    for i in range(i0, i1):
        z = (x[i] - m) * inv_s
        prim = _edge_primitive(z, upper, tail)
        c = (prim - pl) * inv
        f = fs[i]
        out[0, i] = c
        out[1, i] = (fl - f) * inv - c * am
        out[2, i] = (fl * zl - f * z) * inv - c * asg
    return True


@njit(inline="always")
def _gaussian_row(x, m, s, lo, hi, frac, b):  # pragma: no cover - compiled
    """Row ``b`` of :func:`gaussian_rows`: mass ``m``, width ``s``; False when the window
    holds none of the peak."""
    ne = x.size
    inv_s, _zl, _zh, upper, pl, norm, tail = _window(m, s, lo, hi)
    if not norm > 0.0:
        return False
    inv = 1.0 / norm
    c_prev = 0.0
    for i in range(ne):
        z = (x[i] - m) * inv_s
        prim = _edge_primitive(z, upper, tail)
        c = (prim - pl) * inv
        if i > 0:
            frac[b, i - 1] = max(0.0, c - c_prev)
        c_prev = c
    return True


@njit(cache=True, nogil=True)
def gaussian_rows(x, ms, s, lo, hi, frac):  # pragma: no cover - compiled
    """Bin fractions ``frac (B, E-1)`` (floored at 0) of the Gaussian of width ``s``
    normalised on [lo, hi] at every mass ``ms[b]``: the CDF of :func:`gaussian_edges`
    differenced, the edges beyond 40 sigma on either side taken as exactly 0 or 1."""
    for b in range(ms.size):
        if not _gaussian_row(x, ms[b], s, lo, hi, frac, b):
            return False
    return True


@njit(cache=True, nogil=True)
def gaussian_scan_rows(x, ms, ss, lo, hi, frac):  # pragma: no cover - compiled
    """:func:`gaussian_rows` with a width per row, ``ss[b]`` (a scan's sigma(m)): no
    library call beyond the far tails, where most of a wide window's edges lie."""
    for b in range(ms.size):
        if not _gaussian_row(x, ms[b], ss[b], lo, hi, frac, b):
            return False
    return True


@njit(cache=True, nogil=True)
def gaussian_width_rows(x, m, widths, i0, i1, lo, hi, frac):  # pragma: no cover - compiled
    """Row ``j`` of ``frac (K, E-1)``: the bin fractions of :func:`gaussian_rows` (its
    row, :func:`_gaussian_row`) for one mass ``m`` and width ``widths[j]``, on the edges
    ``x[i0[j]:i1[j] + 1]`` only (its band; the rest of the row is set to 0).  One call
    instead of one per width (the width profile of :mod:`peaksift.likelihood.start_widths`)."""
    for j in range(widths.size):
        a, b = i0[j], i1[j]
        for i in range(a):
            frac[j, i] = 0.0
        for i in range(b, frac.shape[1]):
            frac[j, i] = 0.0
        if not _gaussian_row(x[a:b + 1], m, widths[j], lo, hi, frac[:, a:b], j):
            return False
    return True


@njit(cache=True, nogil=True)
def powerlaw_edges(lx, k, l_lo, l_hi, out):  # pragma: no cover - compiled
    """Rows: C, dC/dk of x^-k on the window, with ``lx = ln(x/c)`` (the formulae of
    ``PowerLaw.fractions_and_grad``); False near k = 1, where that path uses a series."""
    a = 1.0 - k
    if abs(a) * (l_hi - l_lo) < 1e-3:
        return False
    top = max(a * l_lo, a * l_hi)
    q_lo = math.exp(a * l_lo - top)
    q_hi = math.exp(a * l_hi - top)
    inv = 1.0 / (q_hi - q_lo)
    span = l_hi * q_hi - l_lo * q_lo
    base = l_lo * q_lo
    for i in range(lx.size):
        q = vexp(a * lx[i] - top)
        c = (q - q_lo) * inv
        out[0, i] = c
        out[1, i] = ((base - lx[i] * q) + c * span) * inv
    return True


@njit(inline="always")
def _exp0(x):  # pragma: no cover - compiled
    """math.exp(x), 1 exactly at x = +-0 without the library call: one of an evaluation's
    two fixed calls, ~5 a row of a scan (its fixed cost, which a few bins make count)."""
    return 1.0 if x == 0.0 else math.exp(x)


@njit(cache=True, nogil=True)
def powerlaw_rows(lx, dlx, k, l_lo, l_hi, frac, grad):  # pragma: no cover - compiled
    """Bin fractions ``frac (B, E-1)`` (floored at 0) and d/dk ``grad (B, E-1)`` (if
    ``grad.size``) of x^-k for every row's ``k[b]``; False if a row is near k = 1.

    A fraction is ``q_i expm1(a dlx_i) / (q_hi - q_lo)`` with ``dlx_i = ln(x_{i+1}/x_i)``,
    not a difference of two CDF values: it keeps full relative precision, so the NLL of
    10,000 narrow bins changes smoothly at the 1e-9 level the stacked fits test."""
    ne = lx.size
    want = grad.size > 0
    for b in range(k.size):
        a = 1.0 - k[b]
        if abs(a) * (l_hi - l_lo) < 1e-3:
            return False
        top = max(a * l_lo, a * l_hi)
        # one end's exponent is 0 (top is its term): the library call skipped there
        q_lo = _exp0(a * l_lo - top)
        q_hi = _exp0(a * l_hi - top)
        inv = 1.0 / (q_hi - q_lo)
        span = l_hi * q_hi - l_lo * q_lo
        base = l_lo * q_lo
        d_prev = 0.0
        for i in range(ne):
            q = math.exp(a * lx[i] - top)
            if i + 1 < ne:
                d = q * math.expm1(a * dlx[i]) * inv
                frac[b, i] = max(0.0, d)
            if want:
                c = (q - q_lo) * inv
                dk = ((base - lx[i] * q) + c * span) * inv
                if i > 0:
                    grad[b, i - 1] = dk - d_prev
                d_prev = dk
    return True


# ------------------------------------------------------------------ Crystal Ball
# The formulae of CrystalBall._tail_grads, _edge_grads, _primitive(_grad) and
# _density(_grad) in :mod:`.signal` (the numpy reference), one mass at a time.
_SQRT2PI = math.sqrt(2.0 * math.pi)


@njit(cache=True, nogil=True)
def _cb_tail(t, a, n):  # pragma: no cover - compiled
    """One tail at outward distance ``t``: (L, q + t, dlnL/da, dlnL/dn, P, dP/da, dP/dn)."""
    q = n / a
    qt = max(q + t, 1e-300)
    r = q / qt
    lr = math.log(r)
    lv = math.exp(n * lr - 0.5 * a * a)
    dl_a = -n / a + n * (n / (a * a) + 1.0) / qt - a
    dl_n = lr + 1.0 - r
    pv = lv * qt / (n - 1.0)
    dp_a = lv * (dl_a * qt - n / (a * a) - 1.0) / (n - 1.0)
    dp_n = lv * (dl_n * qt + 1.0 / a) / (n - 1.0) - pv / (n - 1.0)
    return lv, qt, dl_a, dl_n, pv, dp_a, dp_n


@njit(cache=True, nogil=True)
def crystalball_primitive(x, m, s, al, nl, ah, nh, out):  # pragma: no cover - compiled
    """Rows of ``out (7, x.size)``: the Crystal Ball's primitive in units of z (as
    ``CrystalBall._primitive``) and its derivatives in m, sigma, alpha_low, n_low,
    alpha_high, n_high (as ``_primitive_grad``)."""
    el, eh = math.exp(-0.5 * al * al), math.exp(-0.5 * ah * ah)
    ql, qh = nl / al, nh / ah
    pl0 = el * ql / (nl - 1.0)
    th0 = eh * qh / (nh - 1.0)
    ndtr_lo = 0.5 * math.erfc(al * _SQRT1_2)  # Phi(-alpha_low)
    total_core = pl0 + _SQRT2PI * (0.5 * math.erfc(-ah * _SQRT1_2) - ndtr_lo)
    e0a = el * (-al * ql - nl / (al * al)) / (nl - 1.0)
    e0n = el * (1.0 / (al * (nl - 1.0)) - ql / (nl - 1.0) ** 2)
    e1a = eh * (-ah * qh - nh / (ah * ah)) / (nh - 1.0)
    e1n = eh * (1.0 / (ah * (nh - 1.0)) - qh / (nh - 1.0) ** 2)
    for i in range(x.size):
        z = (x[i] - m) / s
        if z < -al:
            lv, _, _, _, pv, pa, pn = _cb_tail(-z - al, al, nl)
            out[0, i] = pv
            dens, g_al, g_nl, g_ah, g_nh = lv, pa, pn, 0.0, 0.0
        elif z > ah:
            lv, _, _, _, pv, pa, pn = _cb_tail(z - ah, ah, nh)
            out[0, i] = total_core + th0 - pv
            dens, g_al, g_nl, g_ah, g_nh = lv, e0a + el, e0n, eh + e1a - pa, e1n - pn
        else:
            out[0, i] = pl0 + _SQRT2PI * (0.5 * math.erfc(-z * _SQRT1_2) - ndtr_lo)
            dens, g_al, g_nl, g_ah, g_nh = math.exp(-0.5 * z * z), e0a + el, e0n, 0.0, 0.0
        out[1, i] = -dens / s
        out[2, i] = -dens * z / s
        out[3, i] = g_al
        out[4, i] = g_nl
        out[5, i] = g_ah
        out[6, i] = g_nh


@njit(cache=True, nogil=True)
def crystalball_density(x, m, s, al, nl, ah, nh, out):  # pragma: no cover - compiled
    """Rows of ``out (7, x.size)``: the unnormalised density (as ``CrystalBall._density``)
    and its derivatives in the six parameters (as ``_density_grad``)."""
    for i in range(x.size):
        z = (x[i] - m) / s
        g_al = g_nl = g_ah = g_nh = 0.0
        if z < -al:
            lv, qt, la, ln, _, _, _ = _cb_tail(-z - al, al, nl)
            d = lv / s
            k = nl / qt
            g_m = -d * k / s
            g_s = d * (-z * k - 1.0) / s
            g_al, g_nl = d * la, d * ln
        elif z > ah:
            lv, qt, la, ln, _, _, _ = _cb_tail(z - ah, ah, nh)
            d = lv / s
            k = nh / qt
            g_m = d * k / s
            g_s = d * (z * k - 1.0) / s
            g_ah, g_nh = d * la, d * ln
        else:
            d = math.exp(-0.5 * z * z) / s
            g_m = d * z / s
            g_s = d * (z * z - 1.0) / s
        out[0, i] = d
        out[1, i] = g_m
        out[2, i] = g_s
        out[3, i] = g_al
        out[4, i] = g_nl
        out[5, i] = g_ah
        out[6, i] = g_nh
