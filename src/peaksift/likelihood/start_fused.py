"""Compiled (numba, cached on disk): the start finder's common steps fused into a few calls.

A free fit of a Gaussian on a background with a compiled edge kernel, its starts found
from scratch, made ~10 compiled calls and ~60 numpy operations to its first start, and as
many to its width profile; on a histogram new to the process (a toy, a search's next
channel) each costs its cold caches more than its arithmetic.  These entries do the same
steps in the same order in one call each, with the same kernels and numpy's own
summation order where numpy summed (:func:`peaksift.fitting.count_pass.pairwise_sum`),
so the same numbers:

* :func:`first_look` -- the background-only fit of the whole window and its expected
  counts (:func:`.start_kernels.background_fit_counts`), then the coarse scan's gains on
  its rows (:func:`.start_kernels.coarse_gains`): :func:`.starts._first_look`'s steps up
  to the candidate masses;
* :func:`first_start` -- the background's counts on the data's own bins and the bins a
  narrow peak could win on (:func:`.start_kernels.narrow_rows`), and the start at the best
  candidate mass: its sidebands' background fit, its excess and its width from the width
  profile (:func:`.start_kernels.profile_widths`), as :func:`.starts._one_start` makes it;
* :func:`width_path_at` -- the background's counts and derivative rows at a minimum and
  :func:`.width_path.width_path` on them (:func:`.start_widths.other_widths`' steps).

Each returns a status; on anything but OK the caller takes the general path, which then
answers exactly as before (a kernel declining, a background fit not converged, no width
scanned).  ``tests/test_likelihood_start_fused.py`` checks them against that path.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from ..fitting.count_pass import pairwise_sum
from .driver import _component
from .kernels import bin_counts
from .start_kernels import background_fit_counts, coarse_gains, narrow_rows, profile_widths
from .width_path import width_path

__all__ = ["FALLBACK", "NO_PATH", "OK", "first_look", "first_start", "width_path_at"]

#: statuses: done; the general path must answer; (width_path_at) no path to walk
OK, FALLBACK, NO_PATH = 0, 1, 2


@njit(inline="always")
def _pmax(a, b):  # pragma: no cover - compiled
    """Python's ``max(a, b)`` (``a`` unless ``b > a``: a NaN ``a`` stays)."""
    return b if b > a else a  # noqa: FURB136 (numba's max need not keep a NaN so)


@njit(inline="always")
def _pmin(a, b):  # pragma: no cover - compiled
    """Python's ``min(a, b)``."""
    return b if b < a else a  # noqa: FURB136


@njit(inline="always")
def _nmax(a, b):  # pragma: no cover - compiled
    """``numpy.maximum`` of two numbers (a NaN of either wins)."""
    if math.isnan(a) or math.isnan(b):
        return math.nan
    return a if a >= b else b  # noqa: FURB136


@njit(inline="always")
def _nmin(a, b):  # pragma: no cover - compiled
    """``numpy.minimum`` of two numbers."""
    if math.isnan(a) or math.isnan(b):
        return math.nan
    return a if a <= b else b  # noqa: FURB136


@njit(inline="always")
def _sum(a):  # pragma: no cover - compiled
    """``numpy.sum`` of a float64 vector: its identity 0.0 plus numpy's pairwise sum."""
    return 0.0 + pairwise_sum(a, 0, a.size)


@njit(cache=True, nogil=True, error_model="numpy")
def _background_fit(static, n, scale, mask, start, free, lower, upper, iys, biy, consts,
                    out, counts):  # pragma: no cover - compiled
    """:func:`.start_background.background_start_counts` on the compiled path: the
    full vector ``start`` with the signal yields ``iys`` at 0 and the yield ``biy`` (when
    free) at the counts' sum on the ``mask`` bins (empty: every bin), the free values
    clipped, :func:`.start_kernels.background_fit_counts` from there.  The vector into
    ``out``, the counts into ``counts``; False where the general path must answer (the
    loop not converged or the counts not made)."""
    for i in range(start.size):
        out[i] = start[i]
    for i in iys:
        out[i] = 0.0
    yield_free = False
    for i in free:
        yield_free = yield_free or i == biy
    if yield_free:
        if mask.size == 0:
            tot = _sum(n)
        else:
            m = 0
            for j in range(mask.size):
                m += 1 if mask[j] else 0
            kept = np.empty(m)
            m = 0
            for j in range(mask.size):
                if mask[j]:
                    kept[m] = n[j]
                    m += 1
            tot = _sum(kept)
        out[biy] = _pmax(tot, 1.0)
    k = free.size
    lo = np.empty(k)
    hi = np.empty(k)
    x0 = np.empty(k)
    for j in range(k):
        lo[j] = lower[free[j]]
        hi[j] = upper[free[j]]
        x0[j] = _nmin(_nmax(out[free[j]], lo[j]), hi[j])
    x = np.empty(k)
    ok, made = background_fit_counts(static, n, scale, mask, out, free, x0, lo, hi,
                                     int(consts[0]), consts[1], consts[2], consts[3], x, biy,
                                     counts)
    if not (ok and made):
        return False
    for j in range(k):
        out[free[j]] = x[j]
    return True


@njit(cache=True, nogil=True, error_model="numpy")
def first_look(static, n, scale, base, free, lower, upper, iys, biy, consts, rows, dips,
               vb, bexp, index, gain):  # pragma: no cover - compiled
    """The background-only start ``vb`` and its counts ``bexp`` on the start bins, then the
    coarse scan's gains on ``rows`` (``index``, ``gain`` as
    :func:`.start_kernels.coarse_gains` fills them): ``(status, peaks, dips)``."""
    if not _background_fit(static, n, scale, np.zeros(0, np.bool_), base, free, lower,
                           upper, iys, biy, consts, vb, bexp):
        return FALLBACK, 0, 0
    k1, k2 = coarse_gains(n, scale, rows, bexp, 25, dips, index, gain)
    return OK, k1, k2


@njit(cache=True, nogil=True, error_model="numpy")
def _counts_at(kernel, v, biy, counts):  # pragma: no cover - compiled
    """:func:`.start_background.background_counts` at the full vector ``v`` from the
    background's edge kernel ``(code, data row, two constants, first parameter, rows,
    edges)`` on the compiled path: False where the kernel declines."""
    code, data, a, b, p0, nrows, ne = kernel
    cdf = np.empty((nrows, ne))
    if not _component(code, data, a, b, v, p0, cdf):
        return False
    bin_counts(cdf[0], v[biy], counts)
    return True


@njit(cache=True, nogil=True, error_model="numpy")
def first_start(static, n, scale, edges, centres, vb, base, free, lower, upper, iys, biy,
                consts, i_m, i_sig, iy, mass, total, window, factors, band,
                fine_kernel, fe, fn, fsc, stencil, least, exclude, narrow, fcounts, s):
    # pragma: no cover - compiled
    """The background's counts on the data's own bins ``fe`` at ``vb`` (floored at
    1e-300, into ``fcounts``) and the bins a narrow peak could win on
    (:func:`.start_kernels.narrow_rows` with ``stencil``, ``least`` and ``exclude``; into
    ``narrow``), then the first start at ``mass`` into
    ``s``: ``(status of the narrow rows, their number, status of the start)``.  The start
    as :func:`.starts._one_start` makes it for a Gaussian of a free width, yields and
    background not given, ``factor`` 1 and a positive sign: the background from the
    sidebands beyond 3 widths, the width the lowest of the profile at ``base``'s width
    times ``factors`` (``band``: :data:`.start_widths._BAND_SIGMAS`), the yield the
    excess.  FALLBACK where the general path must answer (a kernel declining, the
    sidebands' fit not converged, no width scanned)."""
    nf = fn.size
    n_narrow = 0
    narrow_status = FALLBACK
    if _counts_at(fine_kernel, vb, biy, fcounts):
        for j in range(nf):  # np.maximum(background, 1e-300)
            b = fcounts[j]
            fcounts[j] = b if (b > 1e-300 or math.isnan(b)) else 1e-300
        n_narrow = narrow_rows(fe, fn, fcounts, fsc, stencil, least, exclude, narrow)
        narrow_status = OK
    # the start (_one_start): mass and width clipped, the sidebands beyond 3 widths
    nb = n.size
    for i in range(vb.size):
        s[i] = vb[i]
    s[i_m] = _pmin(_pmax(mass, lower[i_m]), upper[i_m])
    s[i_sig] = _pmin(_pmax(base[i_sig] * 1.0, lower[i_sig]), upper[i_sig])
    hw = 3.0 * s[i_sig]
    mask = np.empty(nb, np.bool_)
    kept = 0
    for j in range(nb):
        mask[j] = abs(centres[j] - s[i_m]) > hw
        kept += 1 if mask[j] else 0
    bfr = np.empty(nb)
    if kept > s.size and kept < nb:
        sb = np.empty(s.size)
        if not _background_fit(static, n, scale, mask, s, free, lower, upper, iys, biy,
                               consts, sb, bfr):
            return narrow_status, n_narrow, FALLBACK
        for i in free:  # the background's parameters and yield from the sidebands' fit
            s[i] = sb[i]
    elif not _counts_at(_kernel_of(static), s, biy, bfr):
        return narrow_status, n_narrow, FALLBACK
    # the excess under the peak; a width from the profile where it is positive somewhere
    m = nb - kept
    excess = np.empty(m)
    k = 0
    positive = False
    bad = False
    for j in range(nb):
        if not mask[j]:
            excess[k] = n[j] - bfr[j]
            positive = positive or excess[k] > 0.0
            bad = bad or math.isnan(excess[k])
            k += 1
    if not positive or bad:  # (resid.sum() > 0 fails: the moment path, not here)
        return narrow_status, n_narrow, FALLBACK
    w = _scan_width(edges, n, scale, bfr, s[i_m], s[i_sig], lower[i_sig], upper[i_sig],
                    window, factors, band)
    if not w > 0.0:
        return narrow_status, n_narrow, FALLBACK
    s[i_sig] = w
    floor = 0.05 * math.sqrt(_pmax(total, 1.0)) + 1.0
    y = _pmax(_sum(excess), floor)
    s[iy] = _pmin(_pmax(y, lower[iy]), upper[iy])
    s[biy] = _pmin(_pmax(_pmax(total - s[iy], 1.0), lower[biy]), upper[biy])
    for i in range(s.size):
        s[i] = _nmin(_nmax(s[i], lower[i]), upper[i])
    return narrow_status, n_narrow, OK


@njit(inline="always")
def _kernel_of(static):  # pragma: no cover - compiled
    """The background's edge kernel in a background fit's ``static`` arrays (the form
    :func:`_counts_at` takes)."""
    return (static[0][0], static[1][0], static[2][0, 0], static[2][0, 1], static[3][0],
            static[11], static[12])


@njit(cache=True, nogil=True, error_model="numpy")
def _scan_width(edges, n, scale, bexp, mass, width, lo_w, hi_w, window, factors, band):
    # pragma: no cover - compiled
    """:func:`.start_widths.scan_width` with a positive sign: the width among ``width *
    factors`` inside ``[max(lo_w, half a mean bin), hi_w]`` with the lowest profile NLL;
    NaN where none has a positive signal (or no row can be made)."""
    ne = edges.size
    half_bin = 0.5 * (edges[ne - 1] - edges[0]) / (ne - 1)
    low = _pmax(lo_w, half_bin)
    k = 0
    widths = np.empty(factors.size)
    for f in factors:
        w = width * f
        if w >= low and w <= hi_w:
            widths[k] = w
            k += 1
    widths = widths[:k]
    nb = n.size
    b0 = np.empty(nb)
    for j in range(nb):
        b = bexp[j]
        b0[j] = b if (b > 1e-12 or math.isnan(b)) else 1e-12
    btot = _sum(b0)
    if k == 0 or not btot > 0.0:
        return math.nan
    g = b0 / btot
    rows = np.empty((k, nb))
    y = np.empty((k, 2))
    nll = np.empty(k)
    if not profile_widths(edges, window[0], window[1], n, scale, g, mass, widths, band,
                          0.1 * math.sqrt(_pmax(btot, 1.0)), btot, rows, y, nll):
        return math.nan
    best = -1
    q_best = math.inf
    for j in range(k):  # the first lowest, as np.argmin
        q = nll[j] if (y[j, 0] > 0.0 and math.isfinite(nll[j])) else math.inf
        if best < 0 or q < q_best:
            best, q_best = j, q
    return widths[best] if math.isfinite(q_best) else math.nan


@njit(cache=True, nogil=True, error_model="numpy")
def width_path_at(kernel, v, shape_free, biy, x, lo, hi, n, s, mass, lo_m, hi_m, widths,
                  own, band, y0, rise, out):  # pragma: no cover - compiled
    """:func:`.width_path.width_path` on the background at the full vector ``v``: its
    counts and their derivatives in its free shape parameters (rows ``1 + shape_free`` of
    its edge kernel ``kernel``, see :func:`_counts_at`) on the window-clipped edges ``x``,
    as :func:`.start_widths.background_rows` and :func:`.start_widths._path` make them.
    ``(status, the background's total)``: OK, FALLBACK (the kernel declines: the general
    path) or NO_PATH (no background, or the own width's row cannot be made: no path)."""
    code, data, a, b, p0, nrows, ne = kernel
    cdf = np.empty((nrows, ne))
    if not _component(code, data, a, b, v, p0, cdf):
        return FALLBACK, 0.0
    nb = ne - 1
    total = v[biy]
    b0 = np.empty(nb)
    for j in range(nb):
        d = cdf[0, j + 1] - cdf[0, j]
        c = (d if (d > 0.0 or math.isnan(d)) else 0.0) * total
        b0[j] = c if (c > 1e-12 or math.isnan(c)) else 1e-12
    btot = _sum(b0)
    if not btot > 0.0:
        return NO_PATH, btot
    k = shape_free.size
    dg = np.empty((k, nb))
    for q in range(k):
        r = 1 + shape_free[q]
        for j in range(nb):
            dg[q, j] = (cdf[r, j + 1] - cdf[r, j]) * total / btot
    g = b0 / btot
    if not width_path(x, lo, hi, n, s, g, dg, mass, _pmax(lo, lo_m), _pmin(hi, hi_m),
                      widths, own, band, y0, btot, rise, out):
        return NO_PATH, btot
    return OK, btot
