r"""An exponential channel of the compiled joint loop evaluated bin by bin only where its
signal is: the other bins in closed form.

Why
---
Almost all of a combination's joint fit is the evaluation of each channel at each
hypothesis's start (``docs/performance.md``, 2026-12-03 joint3): per bin one exponential
(the background's edges), one logarithm, one division and ten sums.  Outside the signal's
span -- bins where ``s f_i`` is below the rounding of ``b g_i`` -- a bin's expectation is
``b g_i(theta)`` alone, and for the exponential on equal bins, with ``t_i`` a bin's lower
edge in the window-scaled variable (:meth:`peaksift.shapes.Exponential.row_inputs`),

.. math:: g_i = e^{\theta t_i}\,\mathrm{expm1}(\theta\,\Delta t)\,c(\theta),\qquad
          c = 1/(e^{\theta} - e^{-\theta}),\qquad
          \partial_\theta \ln g_i = t_i + \lambda(\theta),

so every sum the Newton step needs over those bins is a function of ``b``, ``theta`` and a
few moments of the counts: ``N = sum n_i``, ``T = sum n_i t_i``, ``T2 = sum n_i t_i^2``
(``sum g_i`` telescopes to the edges' exponentials at the span's ends).  The one sum that is
not, ``sum d2_i n_i / g_i`` (``d2`` the background's curvature held at the start, as
:func:`~peaksift.stats.toys.profile_signal` holds it), is a series in
``theta - theta_ref`` over the moments ``M_k = sum n_i d2_i e^{-theta_ref t_i} t_i^k``.
All moments are prefix sums over the bins, made once per call (:func:`span_tables`), so a
row costs its span's bins (~10 sigma below the mass to 8 above: a fifth of the benchmark's
bins) and a few dozen operations.

Same numbers to rounding: the span's bins are computed exactly as
:func:`peaksift.shapes.compiled_exponential.exponential_rows` and the joint loop compute them; outside
it the neglected signal is below 2^-60 of the background in every bin (checked at every
evaluation: else the bin-by-bin path answers) and the closed forms differ from the bin
sums by rounding only (``tests/test_joint_spans.py``).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from ..shapes.compiled_exponential import exponential_bins, exponential_constants
from ..shapes.compiled_math import vexp, vlog
from .joint_kernels import yield_sums

__all__ = ["prefix_moments", "row_spans", "span_channel", "span_tables"]

#: a bin is in a row's signal span where its fraction (of a signal normalised to 1)
#: exceeds this (a Gaussian: from ~10 sigma below its mass; exactly 0 beyond ~8.3 above)
_SPAN_CUT = 1e-22
#: terms of the series in theta - theta_ref, and its largest |theta - theta_ref|
#: (0.5^20 / 20! ~ 4e-25 of the moments)
_TERMS = 20
_MAX_SHIFT = 0.5
#: the neglected signal's largest share of a bin's background (2^-60)
_NEGLECT = 2.0 ** -60
_MOMENTS = 4 + _TERMS   # N, T, T2, sum d2, then M_0..M_{TERMS-1}


def span_tables(kind: np.ndarray, kpar: np.ndarray, direct: np.ndarray, e1: np.ndarray,
                e2: np.ndarray, eoff: np.ndarray, boff: np.ndarray, nn: tuple, ff: tuple,
                d2c: tuple, theta_ref: np.ndarray) -> tuple:
    """``(fast, spans, pre)`` of the compiled joint loop's channels.

    ``fast (C,)``: the channel takes the closed form (an exponential on equal bins, all
    used and unweighted, counts and curvature shared by every row, ``|theta_ref| <= 50``);
    ``spans (C, B, 2)``: each row's signal span ``[i0, i1)`` (empty: none; the signal
    fractions outside it are within 1e-22 of 0); ``pre (MOMENTS, bins + C)``: per channel (columns ``boff[c] + c`` on) the prefix sums of the moments."""
    nc = kind.size
    nb = ff[0].shape[0]
    fast = np.zeros(nc, np.bool_)
    spans = np.zeros((nc, nb, 2), np.int64)
    pre = np.zeros((_MOMENTS, int(boff[-1]) + nc))
    for c in range(nc):
        t = e1[eoff[c]:eoff[c + 1]]
        dt = e2[eoff[c]:eoff[c + 1] - 1]
        n = nn[c]
        if not (kind[c] == 1 and kpar[c] == 1 and direct[c] and n.shape[0] == 1
                and d2c[c].shape[0] == 1 and abs(theta_ref[c]) <= 50.0 and dt.size
                and abs(dt.max() / dt[0] - 1.0) <= 1e-13
                and abs(dt.min() / dt[0] - 1.0) <= 1e-13):
            continue
        row_spans(ff[c], _SPAN_CUT, spans[c])
        at = int(boff[c]) + c
        prefix_moments(t, n[0], d2c[c][0], theta_ref[c], pre[:, at:at + t.size])
        fast[c] = True
    return fast, spans, pre


@njit(cache=True, nogil=True)
def prefix_moments(t, n, d2, theta_ref, out):  # pragma: no cover - compiled
    """``out (MOMENTS, bins + 1)``: the prefix sums (column ``j``: bins below ``j``) of
    ``n``, ``n t``, ``n t^2``, ``d2`` and ``n d2 e^{-theta_ref t} t^k`` (``t`` the lower
    edges), k = 0..TERMS-1."""
    nm = out.shape[0]
    acc = np.zeros(nm)
    for k in range(nm):
        out[k, 0] = 0.0
    for i in range(t.size - 1):
        ti = t[i]
        ni = n[i]
        acc[0] += ni
        acc[1] += ni * ti
        acc[2] += ni * ti * ti
        acc[3] += d2[i]
        rk = ni * d2[i] * math.exp(-theta_ref * ti)
        for k in range(4, nm):
            acc[k] += rk
            rk = rk * ti
        for k in range(nm):
            out[k, i + 1] = acc[k]


@njit(cache=True, nogil=True)
def row_spans(f, cut, spans):  # pragma: no cover - compiled
    """Per row of ``f (B, bins)`` its span ``[i0, i1)``: the first to the last bin whose
    fraction is not within ``cut`` of 0 (NaN is in); a span of every bin, or of none, is
    left empty (0, 0).  Only the bins outside the span are read."""
    rows, nbin = f.shape
    for r in range(rows):
        i0 = 0
        while i0 < nbin and abs(f[r, i0]) <= cut:
            i0 += 1
        i1 = nbin
        while i1 > i0 and abs(f[r, i1 - 1]) <= cut:
            i1 -= 1
        if i1 <= i0 or (i0 == 0 and i1 == nbin):
            i0 = i1 = 0
        spans[r, 0] = i0
        spans[r, 1] = i1


@njit(cache=True, nogil=True, error_model="numpy")
def span_channel(e1, e2, eo, theta, theta_ref, s, s2, b, fr_, n, d2, i0, i1, pre, po, tg,
                 tdg, bo, lb, sm):  # pragma: no cover - compiled
    """One exponential channel's NLL and its ten sums (``sm``, as the joint loop's
    ``_value`` leaves them) at one trial point, the span ``[i0, i1)`` bin by bin and the
    rest in closed form; ``tg``/``tdg`` written in the span only.  The channel's edges
    ``t``, widths ``dt``, prefix moments and fractions start at offsets ``eo`` (in ``e1``,
    ``e2``), ``po`` (columns of ``pre``) and ``bo`` (in ``tg``, ``tdg``): whole arrays, not
    slices, so that the loops vectorise.  Returns ``(done, nll)``: ``done`` False (nothing
    written) where the closed form does not apply at this point (the caller then evaluates
    every bin)."""
    nbin = fr_.size
    t0, tn, dt0 = e1[eo], e1[eo + nbin], e2[eo]   # the first and last edges, the width
    if i1 <= i0 or not b > 0.0 or abs(theta) < 1e-3 or abs(theta - theta_ref) > _MAX_SHIFT:
        return False, 0.0
    # the closed forms' constants
    em, ep, scale = exponential_constants(theta)
    m1 = math.expm1(theta * dt0)
    e_first = math.exp(theta * t0)
    e_last = math.exp(theta * tn)
    # the smallest bin's fraction (g_i grows or falls with i; t_{n-1} = t_n - dt)
    gmin = min(e_first, e_last / (m1 + 1.0)) * m1 * scale
    if not (gmin > 0.0 and max(abs(s), abs(s2)) * _SPAN_CUT <= _NEGLECT * b * gmin):
        return False, 0.0
    # the span's fractions and derivatives: exponential_rows' numbers (its loop); the
    # span's end exponentials for the closed forms below
    ns = i1 - i0
    exponential_bins(e1[eo + i0:eo + i1 + 1], e2[eo + i0:eo + i1], theta,
                     tg[bo + i0:bo + i1], tdg[bo + i0:bo + i1], True, lb[0])
    e_lo = vexp(theta * e1[eo + i0])
    e_hi = vexp(theta * e1[eo + i1])
    # the span bin by bin, as the joint loop's _value
    for j in range(ns):
        i = i0 + j
        nu = s * fr_[i] + b * tg[bo + i]
        lb[0, j] = nu
        lb[1, j] = vlog(max(1e-300, nu))
        lb[2, j] = 1.0 / max(s2 * fr_[i] + b * tg[bo + i], 1e-100)
    acc = 0.0
    bad = False
    a0 = a1 = a2 = c0 = c1 = q0 = q1 = q2 = h0 = h1 = 0.0
    for j in range(ns):
        i = i0 + j
        fi = fr_[i]
        gi = tg[bo + i]
        ni = n[i]
        nu = lb[0, j]
        if not bad:
            if not nu > 0.0:
                bad = True
            else:
                nu1 = max(nu, 1e-300)
                acc += nu1 - ni * lb[1, j] if ni != 0.0 else nu1
        w, v, a0, a1, a2, c0, c1 = yield_sums(fi, gi, ni, lb[2, j], a0, a1, a2, c0, c1)
        dk = tdg[bo + i]
        dv = dk * v
        q0 += fi * dv
        q1 += gi * dv
        q2 += dk * w
        h0 += dk * v * dk
        h1 += d2[i] * w
    # the bins outside the span: their moments below i0 and from i1 on (prefix sums)
    cnt = pre[0, po + i0] + (pre[0, po + nbin] - pre[0, po + i1])
    tt = pre[1, po + i0] + (pre[1, po + nbin] - pre[1, po + i1])
    tt2 = pre[2, po + i0] + (pre[2, po + nbin] - pre[2, po + i1])
    dd = pre[3, po + i0] + (pre[3, po + nbin] - pre[3, po + i1])
    # sum g outside the span (it telescopes to the edges' exponentials) and d/d theta
    # (an empty side adds nothing: e_lo is vexp's, e_first the library's exponential)
    below = e_lo - e_first if i0 > 0 else 0.0
    above = e_last - e_hi if i1 < nbin else 0.0
    out_e = below + above
    big = scale * out_e
    dbig = -(ep + em) * scale * scale * out_e + scale * (
        (e1[eo + i0] * e_lo - t0 * e_first if i0 > 0 else 0.0)
        + (tn * e_last - e1[eo + i1] * e_hi if i1 < nbin else 0.0))
    lam = dt0 * (m1 + 1.0) / m1 - (ep + em) * scale   # d ln g_i / d theta - t_i
    ib_ = 1.0 / b
    tl = tt + lam * cnt                              # sum n d ln g / d theta outside
    # sum n d2 / g outside: e^{-theta t} = e^{-theta_ref t} e^{-(theta - theta_ref) t}
    sh = theta_ref - theta
    ser = 0.0
    fac = 1.0
    for k in range(_TERMS):
        ser += fac * (pre[4 + k, po + i0] + (pre[4 + k, po + nbin] - pre[4 + k, po + i1]))
        fac = fac * sh / (k + 1)
    lnb = math.log(b)
    outside = b * big - cnt * lnb - (theta * tt + cnt * math.log(m1 * scale))
    c0 += big - cnt * ib_
    c1 += cnt * ib_ * ib_
    q1 += tl * ib_ * ib_
    q2 += dbig - tl * ib_
    h0 += (tt2 + 2.0 * lam * tt + lam * lam * cnt) * ib_ * ib_
    h1 += dd - ser * ib_ / (m1 * scale)
    sm[0] = a0
    sm[1] = a1
    sm[2] = a2
    sm[3] = c0
    sm[4] = c1
    sm[5] = q0
    sm[6] = q1
    sm[7] = q2
    sm[8] = h0
    sm[9] = h1
    return True, (math.inf if bad else acc + outside)
