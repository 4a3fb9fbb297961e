"""Compiled per-channel passes of the joint profile (:mod:`peaksift.stats.joint`).

A compiled pass over a channel's bins per stacked row (and one more per shape parameter)
gives every sum its Newton step needs, so the gradient and Hessian of ``nu_i = s f_i + b
g_i(theta)`` cost a loop or two instead of a dozen numpy passes over ``(rows, bins)``
arrays:

* :func:`channel_nll`  -- ``sum_i nu_i - n_i ln nu_i`` per row (the extended binned Poisson
  NLL without its saturated constant, :func:`peaksift.likelihood.binned_nll`), ``inf`` for a
  row with any ``nu_i <= 0``;
* :func:`channel_sums` -- with ``w = 1 - n/nu`` and ``v = n/nu^2`` (``nu`` floored at
  1e-100): ``sum f w``, ``sum f f v``, ``sum f g v``, ``sum f dg_k v``, ``sum g w``,
  ``sum g g v``, ``sum g dg_k v``, ``sum dg_k w``, ``sum dg_k dg_l v`` and
  ``sum d2_kl w``, from which :func:`peaksift.stats.joint._grad_hess` assembles the blocks
  (one bin's yield terms in :func:`yield_sums`, shared with the compiled loop);
* for the compiled loop (:mod:`peaksift.stats.joint_driver`): :func:`row_background` (one
  row's exponential or power-law fractions in the used bins), :func:`small_step` (the
  stopping test) and :func:`model_change` (the quadratic model's NLL change); its Newton
  steps are solved by :func:`peaksift.likelihood.kernels.solve_small`, as every compiled
  fit's;
* :func:`quadratic_rows` -- each hypothesis's profiled curvature in the signal yield and
  the slope of the nuisances along it, from a channel's Hessians (with the checks of its
  fit's usability: :func:`channel_quadratic`), and :func:`moved_starts` -- the nuisances moved along that slope to the joint start
  (:mod:`peaksift.stats.joint_start`: two calls per channel instead of ~30 numpy calls).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from ..likelihood.kernels import solve_small
from ..shapes.compiled import powerlaw_rows
from ..shapes.compiled_exponential import exponential_rows

__all__ = ["channel_nll", "channel_quadratic", "channel_sums", "model_change", "moved_starts", "quadratic_rows",
           "row_background", "small_step", "sums", "yield_sums"]


@njit(cache=True, nogil=True)
def channel_nll(n, f, g, s, b, out):  # pragma: no cover - compiled
    rows, bins = f.shape
    for r in range(rows):
        acc = 0.0
        for i in range(bins):
            nu = s[r] * f[r, i] + b[r] * g[r, i]
            if not nu > 0.0:
                acc = math.inf
                break
            nu = max(nu, 1e-300)
            acc += nu - n[r, i] * math.log(nu) if n[r, i] != 0.0 else nu
        out[r] = acc


@njit(inline="always")
def yield_sums(fi, gi, ni, inv, a0, a1, a2, c0, c1):  # pragma: no cover - compiled
    """One bin's terms of the yields' sums: from ``inv = 1/nu`` (``nu`` floored by the
    caller) ``w = 1 - n/nu`` and ``v = n/nu^2``, and ``f w``, ``f f v``, ``f g v``, ``g w``,
    ``g g v`` added to the running sums; returns ``(w, v, a0, a1, a2, c0, c1)``.  One
    definition for :func:`channel_sums` and the compiled joint loop, inlined (numba IR) so
    that the sums stay in registers."""
    ratio = ni * inv
    w = 1.0 - ratio
    v = ratio * inv
    fv = fi * v
    return w, v, a0 + fi * w, a1 + fi * fv, a2 + gi * fv, c0 + gi * w, c1 + gi * gi * v


@njit(cache=True, nogil=True)
def channel_sums(n, f, g, dg, d2, s, b, fs, gs, ds, dd):  # pragma: no cover - compiled
    """``fs (R, 3 + K)``: f w, f f v, f g v, f dg_k v; ``gs (R, 2 + K)``: g w, g g v,
    g dg_k v; ``ds (R, K)``: dg_k w; ``dd (R, 2, K, K)``: dg_k dg_l v and d2_kl w.

    Local accumulators, one pass for the yields' sums (keeping w and v of every bin) and
    one per shape parameter and pair (``dd`` is symmetric): the compiler keeps them in
    registers, which an accumulation into the output arrays does not allow."""
    rows, bins = f.shape
    kk = dg.shape[1]
    wv = np.empty((2, bins))
    for r in range(rows):
        sr = s[r]
        br = b[r]
        a0 = 0.0
        a1 = 0.0
        a2 = 0.0
        c0 = 0.0
        c1 = 0.0
        for i in range(bins):
            fi = f[r, i]
            gi = g[r, i]
            inv = 1.0 / max(sr * fi + br * gi, 1e-100)
            w, v, a0, a1, a2, c0, c1 = yield_sums(fi, gi, n[r, i], inv, a0, a1, a2, c0, c1)
            wv[0, i] = w
            wv[1, i] = v
        fs[r, 0] += a0
        fs[r, 1] += a1
        fs[r, 2] += a2
        gs[r, 0] += c0
        gs[r, 1] += c1
        for k in range(kk):
            e0 = 0.0
            e1 = 0.0
            e2 = 0.0
            for i in range(bins):
                dk = dg[r, k, i]
                dv = dk * wv[1, i]
                e0 += f[r, i] * dv
                e1 += g[r, i] * dv
                e2 += dk * wv[0, i]
            fs[r, 3 + k] += e0
            gs[r, 2 + k] += e1
            ds[r, k] += e2
            for m in range(k, kk):
                h0 = 0.0
                h1 = 0.0
                h2 = 0.0
                for i in range(bins):
                    h0 += dg[r, k, i] * wv[1, i] * dg[r, m, i]
                    h1 += d2[r, k, m, i] * wv[0, i]
                    h2 += d2[r, m, k, i] * wv[0, i]
                dd[r, 0, k, m] += h0
                dd[r, 1, k, m] += h1
                if m != k:
                    dd[r, 0, m, k] += h0
                    dd[r, 1, m, k] += h2


def sums(n: np.ndarray, f: np.ndarray, g: np.ndarray, dg: np.ndarray, d2: np.ndarray,
         s: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, ...]:
    """:func:`channel_sums` with its output arrays made here."""
    rows, kk = f.shape[0], dg.shape[1]
    fs, gs = np.zeros((rows, 3 + kk)), np.zeros((rows, 2 + kk))
    ds, dd = np.zeros((rows, kk)), np.zeros((rows, 2, kk, kk))
    channel_sums(n, f, g, dg, d2, s, b, fs, gs, ds, dd)
    return fs, gs, ds, dd


@njit(cache=True, nogil=True)
def row_background(kind, e1, e2, lo, hi, theta, used, scale, frac, grad, tg, tdg, direct,
                   th):  # pragma: no cover - compiled
    """One row's background fractions and their derivative in the used bins into ``tg``
    and ``tdg`` (as :func:`peaksift.stats.joint._bkg_both`); False if the kernel declines.
    ``direct``: every bin used and unweighted, so the kernel writes ``tg`` and ``tdg``
    itself (no copy through ``frac``; the same numbers).  ``th``: a buffer of one."""
    th[0] = theta
    if direct:
        out = tg.reshape((1, tg.size))
        drv = tdg.reshape((1, tdg.size))
    else:
        out = frac
        drv = grad
    if kind == 1:
        ok = exponential_rows(e1, e2, th, out, drv)
    else:
        ok = powerlaw_rows(e1, e2, th, lo, hi, out, drv)
    if not ok:
        return False
    if not direct:
        for j in range(used.size):
            u = used[j]
            tg[j] = frac[0, u] * scale[u]
            tdg[j] = grad[0, u] * scale[u]
    return True


@njit(cache=True, nogil=True)
def small_step(step, err, step_tol):  # pragma: no cover - compiled
    """Whether every component of ``step`` is below ``step_tol`` of its error (never
    without a tolerance, ``step_tol < 0``)."""
    if step_tol < 0.0:
        return False
    for i in range(step.size):
        if not abs(step[i]) < step_tol * err[i]:
            return False
    return True


@njit(cache=True, nogil=True)
def model_change(trial, x, grad, hess):  # pragma: no cover - compiled
    """``g.d + d.H.d / 2`` for the step ``d = trial - x`` actually taken (bounds clipped)."""
    p = x.size
    out = 0.0
    for i in range(p):
        di = trial[i] - x[i]
        t = 0.0
        for j in range(p):
            t += hess[i, j] * (trial[j] - x[j])
        out += di * (grad[i] + 0.5 * t)
    return out


@njit(cache=True, nogil=True)
def quadratic_rows(h, w, slope, ok):  # pragma: no cover - compiled
    """Per row of ``h (B, P, P)`` (a Hessian over ``(s, eta)``) where ``ok`` is set: the
    slope ``-H_ee^-1 H_es`` of ``eta`` along ``s`` into ``slope (B, P-1)`` and the profiled
    curvature ``H_ss + H_se . slope`` (the Schur complement) into ``w``; ``ok`` cleared
    where ``H_ee`` is singular or the results are not finite and positive.  The solve is
    :func:`peaksift.likelihood.kernels.solve_small` (numpy's ``solve`` before: the last
    digits may differ, and this is a start only)."""
    rows, p = h.shape[0], h.shape[1]
    q = p - 1
    a = np.empty((q, q))
    g = np.empty(q)
    x = np.empty(q)
    for r in range(rows):
        if not ok[r]:
            continue
        for i in range(q):
            for j in range(q):
                a[i, j] = h[r, 1 + i, 1 + j]
            g[i] = h[r, 1 + i, 0]
        good = solve_small(a, g, x)   # x = -H_ee^-1 H_es, the slope
        if good:
            acc = 0.0
            for i in range(q):
                slope[r, i] = x[i]
                acc += h[r, 0, 1 + i] * x[i]
            acc = h[r, 0, 0] + acc
            w[r] = acc
            good = math.isfinite(acc) and acc > 0.0
        if not good:
            ok[r] = False
            w[r] = 0.0
            for i in range(q):
                slope[r, i] = 0.0


@njit(cache=True, nogil=True)
def moved_starts(eta, slope, ds, ok, lower, upper, bkg_yield, theta0, b_out,
                 th_out):  # pragma: no cover - compiled
    """Per row of ``eta (B, 1 + K)`` (a channel's fitted background yield and shape) moved
    by ``slope * ds`` to ``b_out (B,)`` and ``th_out (B, K)`` (the shape clipped to
    ``[lower, upper]``), where ``ok`` and the moved values are finite with a positive
    yield; elsewhere the background-only fit ``bkg_yield``, ``theta0``.  The numbers of
    ``eta + slope * ds[:, None]`` and ``np.clip``."""
    rows, p = eta.shape
    for r in range(rows):
        good = ok[r]
        y = eta[r, 0] + slope[r, 0] * ds[r]
        good = good and math.isfinite(y) and y > 0.0
        for j in range(1, p):
            v = eta[r, j] + slope[r, j] * ds[r]
            good = good and math.isfinite(v)
            th_out[r, j - 1] = min(max(v, lower[j - 1]), upper[j - 1])
        if good:
            b_out[r] = y
        else:
            b_out[r] = bkg_yield
            for j in range(1, p):
                th_out[r, j - 1] = theta0[j - 1]


@njit(cache=True, nogil=True)
def channel_quadratic(s, eta, h, k, w, slope, ok, sh):  # pragma: no cover - compiled
    """:func:`quadratic_rows` of one channel's fits (``s (B,)``, ``eta (B, 1 + K)``, ``h
    (B, 2 + K, 2 + K)``) on the rows where all of them are finite and ``k > 0``, into
    ``w``, ``slope`` and ``ok``; ``w`` 0 and ``sh`` (the fitted yield) 0 elsewhere."""
    rows = s.size
    for r in range(rows):
        good = math.isfinite(s[r])
        for j in range(eta.shape[1]):
            good = good and math.isfinite(eta[r, j])
        for i in range(h.shape[1]):
            for j in range(h.shape[2]):
                good = good and math.isfinite(h[r, i, j])
        ok[r] = good
    quadratic_rows(h, w, slope, ok)
    for r in range(rows):
        ok[r] = ok[r] and k[r] > 0.0
        if not ok[r]:
            w[r] = 0.0
        sh[r] = s[r] if ok[r] else 0.0
