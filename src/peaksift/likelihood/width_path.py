"""Compiled (numba, cached on disk): the profile likelihood along a Gaussian peak's width
with its mass free and the background's shape relaxed, for :func:`.start_widths.other_widths`.

:func:`width_path` walks the widths outwards from the best minimum's own, both ways, each
width started from the one before (its mass extrapolated along the path).  At each width:

* the mass is profiled: Newton steps on the profile over the mass (the yields profiled at
  each trial by :func:`.start_kernels._profile_row`), the first from the expected
  information (its Schur complement over the yields), later ones from the secant of the
  profile's own gradient (the expected information errs by ~30 % on a peak's mass, so its
  steps alone converge slowly), until a step would gain less than :data:`MASS_GAIN`;
* the background's shape is relaxed: one Newton step of every parameter (yields, mass and
  the background's free shape parameters through the derivative rows of its fractions),
  i.e. the profile NLL lowered by ``g^T I^-1 g / 2``.  A wider or narrower peak moves the
  background's slope under it: with the shape held (the mass profiled), the profile at a
  wide solution's width lay 1.35 in NLL above the narrow minimum's, where the true profile
  lies 0.06 below it.

Both matter: a narrow and a wide solution of one excess sit at masses up to a width apart
(a 6 GeV shift between 6 and 15 GeV widths; 0.6 GeV between 3.4 and 1.5 GeV).  Bins outside
the peak's band (:data:`.start_widths._BAND_SIGMAS` widths) enter through running sums of
their background-only terms and derivatives.

``tests/test_likelihood_width_path.py`` checks it against a profile written with
scipy and iminuit.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from ..shapes.compiled import gaussian_edges
from .kernels import _SUMS, covariance_small
from .start_kernels import _profile_row

__all__ = ["MASS_GAIN", "MASS_STEPS", "width_path"]

#: the mass at a width is profiled until the next Newton step would gain less than this in
#: the NLL (local minima of the profile that matter differ by ~0.03)
MASS_GAIN = 1e-3
#: at most this many mass trials per width (each a row of the Gaussian and its yields)
MASS_STEPS = 5
#: the yields' iterations per trial (as the width profile of :mod:`.start_kernels`)
_YIELD_ITERATIONS = 25
#: information matrices whose scaled smallest eigenvalue is below this are not inverted
_POSDEF = 1e-12


@njit(cache=True, nogil=True, fastmath=_SUMS, error_model="numpy")
def _row(x, lo, hi, m, w, band, edge, f, dm, was0, was1):  # pragma: no cover - compiled
    """The Gaussian at mass ``m``, width ``w``, on the edges within ``band`` widths of
    ``m``: bin fractions into ``f[0]`` and their mass derivatives into ``dm`` on those
    bins (the last row's bins ``[was0, was1)`` zeroed first, so the rest stays 0); its bins
    ``(i0, i1)``, ``i0 = -1`` when the window holds none of it."""
    for j in range(was0, was1):
        f[0, j] = 0.0
        dm[j] = 0.0
    ne = x.size
    i0 = max(np.searchsorted(x, m - band * w) - 1, 0)
    i1 = min(np.searchsorted(x, m + band * w) + 1, ne - 1)
    if not gaussian_edges(x[i0:i1 + 1], m, w, lo, hi, edge[:, :i1 - i0 + 1]):
        return -1, 0
    for b in range(i1 - i0):
        f[0, i0 + b] = max(0.0, edge[0, b + 1] - edge[0, b])
        dm[i0 + b] = edge[1, b + 1] - edge[1, b]
    return i0, i1


@njit(cache=True, nogil=True, fastmath=_SUMS, error_model="numpy")
def _gradient(n, s, g, dg, f, dm, i0, i1, a0, a1, out, grad, info):  # pragma: no cover
    """Gradient and expected information of the NLL in (signal yield ``a0``, background
    total ``a1``, mass, background shape parameters) at ``mu = a0 f + a1 (g + dg . c)``,
    c = 0: the band ``[i0, i1)`` bin by bin, the rest from the running sums ``out`` (see
    :func:`_outside`)."""
    k = dg.shape[0]
    mu1 = max(a1, 1e-300)
    og, on = out[0], out[1]
    g0 = 0.0
    g1 = og - on / mu1
    gm = 0.0
    h00 = 0.0
    h01 = 0.0
    h11 = og / mu1
    h0m = 0.0
    h1m = 0.0
    hmm = 0.0
    for j in range(i0, i1):
        fj = f[0, j]
        gj = g[j]
        dj = a0 * dm[j]
        sj = s[j]
        w = sj / max(a0 * fj + a1 * gj, 1e-300)
        r = sj - n[j] * w
        g0 += fj * r
        g1 += gj * r
        gm += dj * r
        h00 += w * fj * fj
        h01 += w * fj * gj
        h11 += w * gj * gj
        h0m += w * fj * dj
        h1m += w * gj * dj
        hmm += w * dj * dj
    grad[0], grad[1], grad[2] = g0, g1, gm
    info[0, 0], info[0, 1], info[1, 1] = h00, h01, h11
    info[0, 2], info[1, 2], info[2, 2] = h0m, h1m, hmm
    # the shape rows: outside the band mu = a1 g, so d/dc_q = a1 dg_q and its sums
    # (out[3 + q]: s dg_q, out[3 + k + q]: n s dg_q / g, out[3 + 2k + q k + r]: s dg_q dg_r / g)
    for q in range(k):
        gq = a1 * out[3 + q] - out[3 + k + q]
        h0q = 0.0
        h1q = out[3 + q]
        hmq = 0.0
        for j in range(i0, i1):
            sj = s[j]
            w = sj / max(a0 * f[0, j] + a1 * g[j], 1e-300)
            dq = a1 * dg[q, j]
            gq += dq * (sj - n[j] * w)
            h0q += w * f[0, j] * dq
            h1q += w * g[j] * dq
            hmq += w * a0 * dm[j] * dq
        grad[3 + q] = gq
        info[0, 3 + q], info[1, 3 + q], info[2, 3 + q] = h0q, h1q, hmq
        for r in range(q + 1):
            hqr = a1 * out[3 + 2 * k + q * k + r]
            for j in range(i0, i1):
                hqr += (s[j] / max(a0 * f[0, j] + a1 * g[j], 1e-300)
                        * (a1 * dg[q, j]) * (a1 * dg[r, j]))
            info[3 + r, 3 + q] = hqr
    p = 3 + k
    for i in range(p):
        for j in range(i):
            info[i, j] = info[j, i]


@njit(cache=True, nogil=True)
def _outside(sums, i0, i1, out):  # pragma: no cover - compiled
    """The running sums ``sums (R, B + 1)`` over the bins outside ``[i0, i1)`` into
    ``out (R,)``."""
    nb = sums.shape[1] - 1
    for r in range(sums.shape[0]):
        out[r] = sums[r, nb] - sums[r, i1] + sums[r, i0]


@njit(cache=True, nogil=True)
def _newton_gain(info, grad, p, cov, step):  # pragma: no cover - compiled
    """``g^T I^-1 g / 2`` over the first ``p`` parameters (the NLL a Newton step gains),
    the step ``-I^-1 g`` into ``step``; NaN where ``I`` is not positive definite."""
    if not covariance_small(info[:p, :p], _POSDEF, cov[:p, :p]):
        return math.nan
    gain = 0.0
    for i in range(p):
        acc = 0.0
        for j in range(p):
            acc += cov[i, j] * grad[j]
        step[i] = -acc
        gain += 0.5 * grad[i] * acc
    return gain


@njit(cache=True, nogil=True)
def width_path(x, lo, hi, n, s, g, dg, mass, lo_m, hi_m, widths, own, band, y0, y1, rise,
               out):  # pragma: no cover - compiled
    """The profile of a Gaussian peak along its widths ``widths`` (ascending; ``own`` the
    index of the best minimum's, at ``mass`` with yields ``(y0, y1)``) on the
    window-clipped edges ``x`` (window ``[lo, hi]``), counts ``n``, scaled-Poisson factors
    ``s``, background fractions ``g`` and their derivatives ``dg (K, B)`` in the
    background's free shape parameters.  Row ``j`` of ``out (W, 4)``: the profiled mass
    (in ``[lo_m, hi_m]``), signal yield, background total, and the profile NLL (saturated
    term left out) with the background's shape relaxed; NaN for widths not reached: a
    direction stops once the profile has risen more than ``rise`` above the own width's
    and still rises (beyond, no minimum of the excess can come back below it).  False when
    the own width's row cannot be made."""
    nb = n.size
    k = dg.shape[0]
    # running sums of the background-only terms: s g, n s, n s ln(s g) (as
    # start_kernels.profile_two_yields), then s dg_q, n s dg_q / g, s dg_q dg_r / g
    sums = np.zeros((3 + 2 * k + k * k, nb + 1))
    for j in range(nb):
        ns = n[j] * s[j]
        sums[0, j + 1] = sums[0, j] + s[j] * g[j]
        sums[1, j + 1] = sums[1, j] + ns
        sums[2, j + 1] = sums[2, j] + (ns * math.log(s[j] * g[j]) if ns > 0.0 else 0.0)
        for q in range(k):
            sums[3 + q, j + 1] = sums[3 + q, j] + s[j] * dg[q, j]
            sums[3 + k + q, j + 1] = sums[3 + k + q, j] + ns * dg[q, j] / g[j]
            for r in range(k):
                i = 3 + 2 * k + q * k + r
                sums[i, j + 1] = sums[i, j] + s[j] * dg[q, j] * dg[r, j] / g[j]
    p = 3 + k
    edge = np.empty((3, x.size))
    f = np.zeros((1, nb))
    dm = np.zeros(nb)
    ob = np.empty(sums.shape[0])
    grad = np.empty(p)
    info = np.empty((p, p))
    cov = np.empty((p, p))
    step_all = np.empty(p)
    band0 = 0
    band1 = 0
    out[:, :] = np.nan
    ref = math.nan
    for direction in (1, -1):
        if direction == 1:
            j, m, a0, a1, last, before = own, mass, y0, y1, math.inf, math.nan
        else:
            if math.isnan(out[own, 3]):
                break
            j, m, a0, a1, last = own - 1, out[own, 0], out[own, 1], out[own, 2], out[own, 3]
            before = out[own + 1, 0] if own + 1 < widths.size else math.nan
        while 0 <= j < widths.size:
            w = widths[j]
            if not math.isnan(before):  # the mass path extrapolated (at most half a width)
                m = min(max(m + min(max(m - before, -0.5 * w), 0.5 * w), lo_m), hi_m)
            best = math.inf
            bm, b0, b1 = m, a0, a1
            step = 0.0
            fresh = False  # grad and info hold the pass at the best trial
            sm = math.nan  # the last accepted trial's mass and profile gradient (secant)
            sg = math.nan
            for _ in range(MASS_STEPS if j != own else 1):  # (the own width: a minimum)
                band0, band1 = _row(x, lo, hi, m, w, band, edge, f, dm, band0, band1)
                fresh = False
                if band0 < 0:
                    band0, band1 = 0, 0
                    break
                a0, a1, cur = _profile_row(n, s, f, g, 0, band0, band1, sums[0], sums[1],
                                           sums[2], a0, a1, _YIELD_ITERATIONS)
                if not cur < best:  # the mass step went uphill: half of it, from the best
                    step *= 0.5
                    m, a0, a1 = bm + step, b0, b1
                    if abs(step) < 1e-4 * w:
                        break
                    continue
                best, bm, b0, b1 = cur, m, a0, a1
                _outside(sums, band0, band1, ob)
                _gradient(n, s, g, dg, f, dm, band0, band1, a0, a1, ob, grad, info)
                fresh = True
                if not _newton_gain(info, grad, 3, cov, step_all) >= 0.0:
                    break
                gm = grad[2]
                step = step_all[2]
                if not math.isnan(sm) and m != sm and (gm - sg) / (m - sm) > 0.0:
                    step = -gm * (m - sm) / (gm - sg)
                sm, sg = m, gm
                gain = 0.5 * abs(step * gm)
                step = min(max(bm + min(max(step, -0.5 * w), 0.5 * w), lo_m), hi_m) - bm
                if gain < MASS_GAIN or abs(step) < 1e-4 * w:
                    break
                m = bm + step
            if not best < math.inf:
                if j == own:
                    return False
                j += direction
                continue
            if not fresh:  # the last trial was not the best: the best's pass again
                band0, band1 = _row(x, lo, hi, bm, w, band, edge, f, dm, band0, band1)
                _outside(sums, band0, band1, ob)
                _gradient(n, s, g, dg, f, dm, band0, band1, b0, b1, ob, grad, info)
            relax = _newton_gain(info, grad, p, cov, step_all)
            value = best - relax if relax > 0.0 else best  # (NaN: not positive definite)
            before = out[j - direction, 0] if 0 <= j - direction < widths.size else math.nan
            m, a0, a1 = bm, b0, b1
            out[j, 0], out[j, 1], out[j, 2], out[j, 3] = bm, b0, b1, value
            if j == own:
                ref = value
            if value > ref + rise and value > last:
                break
            last = value
            j += direction
    return True
