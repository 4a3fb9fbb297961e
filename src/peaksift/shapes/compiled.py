"""Compiled (numba, cached on disk) CDFs of the common shapes at many bin edges.

What is here and who uses it
----------------------------
* ``gaussian_edges``, ``powerlaw_edges``, ``exponential_edges`` -- one parameter set: the
  window-normalised CDF at every edge and its derivative in each shape parameter, as rows
  of an output array (the fit's compiled cost, :mod:`peaksift.likelihood.kernels`).
* ``powerlaw_rows``, ``exponential_rows`` -- stacked parameter sets (one per mass
  hypothesis or toy): bin fractions and their derivatives, one exponential per edge and
  row (the scan's and the toys' background, through ``PowerLaw`` / ``ExpPoly``).
* ``gaussian_rows`` -- bin fractions of a Gaussian at many trial masses (the free fit's
  coarse scan of the window for starting masses, :mod:`peaksift.likelihood.starts`).

The formulae are those of the shapes' numpy fast paths (``fractions_and_grad`` in
:mod:`.signal` and :mod:`.background`), which stay the reference; a kernel returns False
where that path switches to a series (power law near k = 1, exponential near b = 0) and the
caller then takes the numpy path.  Imported lazily: ``import peaksift.shapes`` does not load
numba.
"""

from __future__ import annotations

import math

from numba import njit

__all__ = ["exponential_edges", "exponential_rows", "gaussian_edges", "gaussian_rows",
           "powerlaw_edges", "powerlaw_rows"]

_INV_SQRT2PI = 1.0 / math.sqrt(2.0 * math.pi)
_SQRT1_2 = 1.0 / math.sqrt(2.0)
#: |z| beyond which the normal density and tail integral are exactly 0.0 in double precision
#: (as in :mod:`peaksift.shapes.signal`)
_CUT = 40.0
#: z beyond which 0.5 erfc(-z/sqrt 2) is exactly 1.0 (and -0.5 erfc(z/sqrt 2) exactly -1.0
#: for -z): erfc of -6 or less rounds to 2.0 (checked on every z in [8.3, 40] at a step of
#: 1.6e-6), so the CDF's erfc is skipped on that side of a peak: the same numbers, faster
_ONE = 8.5


@njit(cache=True, nogil=True)
def _primitive(z, upper):  # pragma: no cover - compiled
    """Phi(z), or -Phi(-z) (the upper tail) when the window lies above the peak."""
    if upper:
        return -1.0 if z < -_ONE else -0.5 * math.erfc(z * _SQRT1_2)
    return 1.0 if z > _ONE else 0.5 * math.erfc(-z * _SQRT1_2)


@njit(cache=True, nogil=True)
def gaussian_edges(x, m, s, lo, hi, out):  # pragma: no cover - compiled
    """Rows of ``out``: C(x), dC/dm, dC/dsigma of the Gaussian normalised on [lo, hi]."""
    inv_s = 1.0 / s
    zl = (lo - m) * inv_s
    zh = (hi - m) * inv_s
    fl = math.exp(-0.5 * zl * zl) * _INV_SQRT2PI * inv_s
    fh = math.exp(-0.5 * zh * zh) * _INV_SQRT2PI * inv_s
    upper = zl > 0.0  # window above the peak: the upper tail keeps every digit
    if upper:
        pl = -0.5 * math.erfc(zl * _SQRT1_2)
        ph = -0.5 * math.erfc(zh * _SQRT1_2)
    else:
        pl = 0.5 * math.erfc(-zl * _SQRT1_2)
        ph = 0.5 * math.erfc(-zh * _SQRT1_2)
    norm = ph - pl
    if not norm > 0.0:
        return False
    inv = 1.0 / norm
    am = (fl - fh) * inv
    asg = (fl * zl - fh * zh) * inv
    for i in range(x.size):
        z = (x[i] - m) * inv_s
        if z < -_CUT:
            prim = -1.0 if upper else 0.0
            f = 0.0
        elif z > _CUT:
            prim = 0.0 if upper else 1.0
            f = 0.0
        else:
            prim = _primitive(z, upper)
            f = math.exp(-0.5 * z * z) * _INV_SQRT2PI * inv_s
        c = (prim - pl) * inv
        out[0, i] = c
        out[1, i] = (fl - f) * inv - c * am
        out[2, i] = (fl * zl - f * z) * inv - c * asg
    return True


@njit(cache=True, nogil=True)
def gaussian_rows(x, ms, s, lo, hi, frac):  # pragma: no cover - compiled
    """Bin fractions ``frac (B, E-1)`` (floored at 0) of the Gaussian of width ``s``
    normalised on [lo, hi] at every mass ``ms[b]``: the CDF of :func:`gaussian_edges`
    differenced, the edges beyond 40 sigma on either side taken as exactly 0 or 1."""
    ne = x.size
    inv_s = 1.0 / s
    for b in range(ms.size):
        m = ms[b]
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
        if not norm > 0.0:
            return False
        inv = 1.0 / norm
        c_prev = 0.0
        for i in range(ne):
            z = (x[i] - m) * inv_s
            if z < -_CUT:
                prim = -1.0 if upper else 0.0
            elif z > _CUT:
                prim = 0.0 if upper else 1.0
            else:
                prim = _primitive(z, upper)
            c = (prim - pl) * inv
            if i > 0:
                frac[b, i - 1] = max(0.0, c - c_prev)
            c_prev = c
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
        q = math.exp(a * lx[i] - top)
        c = (q - q_lo) * inv
        out[0, i] = c
        out[1, i] = ((base - lx[i] * q) + c * span) * inv
    return True


@njit(cache=True, nogil=True)
def exponential_edges(t, b, out):  # pragma: no cover - compiled
    """Rows: C, dC/db1 of exp(b1 t), t in [-1, 1] across the window (the formulae of
    ``ExpPoly.fractions_and_grad``); False for |b1| < 1e-3, where that path uses a series."""
    if abs(b) < 1e-3:
        return False
    em = math.exp(-b)
    ep = math.exp(b)
    inv_z = b / (ep - em)
    ib = 1.0 / b
    ib2 = ib * ib
    g0 = em * (ib + ib2)
    ghi = ep * (ib - ib2) + g0
    scale = inv_z * ib
    for i in range(t.size):
        e = math.exp(b * t[i])
        c = (e - em) * scale
        out[0, i] = c
        out[1, i] = (e * (t[i] * ib - ib2) + g0 - c * ghi) * inv_z
    return True


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
        q_lo = math.exp(a * l_lo - top)
        q_hi = math.exp(a * l_hi - top)
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


@njit(cache=True, nogil=True)
def exponential_rows(t, dt, bs, frac, grad):  # pragma: no cover - compiled
    """Bin fractions (floored at 0) and d/db1 (if ``grad.size``) of exp(b1 t) for every
    row's ``bs[b]``; False if a row has |b1| < 1e-3.  Fractions as
    ``e^{b t_i} expm1(b dt_i) / Z`` (full relative precision, as for the power law)."""
    ne = t.size
    want = grad.size > 0
    for r in range(bs.size):
        b = bs[r]
        if abs(b) < 1e-3:
            return False
        em = math.exp(-b)
        ep = math.exp(b)
        inv_z = b / (ep - em)
        ib = 1.0 / b
        ib2 = ib * ib
        g0 = em * (ib + ib2)
        ghi = ep * (ib - ib2) + g0
        scale = inv_z * ib
        d_prev = 0.0
        for i in range(ne):
            e = math.exp(b * t[i])
            if i + 1 < ne:
                frac[r, i] = max(0.0, e * math.expm1(b * dt[i]) * scale)
            if want:
                c = (e - em) * scale
                db = (e * (t[i] * ib - ib2) + g0 - c * ghi) * inv_z
                if i > 0:
                    grad[r, i - 1] = db - d_prev
                d_prev = db
    return True
