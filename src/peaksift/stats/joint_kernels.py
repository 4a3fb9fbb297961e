"""Compiled per-channel passes of the joint profile (:mod:`peaksift.stats.joint`).

One pass over a channel's bins per stacked row gives every sum its Newton step needs, so the
gradient and Hessian of ``nu_i = s f_i + b g_i(theta)`` cost one loop instead of a dozen
numpy passes over ``(rows, bins)`` arrays:

* :func:`channel_nll`  -- ``sum_i nu_i - n_i ln nu_i`` per row (the extended binned Poisson
  NLL without its saturated constant, :func:`peaksift.likelihood.binned_nll`), ``inf`` for a
  row with any ``nu_i <= 0``;
* :func:`channel_sums` -- with ``w = 1 - n/nu`` and ``v = n/nu^2`` (``nu`` floored at
  1e-100): ``sum f w``, ``sum f f v``, ``sum f g v``, ``sum f dg_k v``, ``sum g w``,
  ``sum g g v``, ``sum g dg_k v``, ``sum dg_k w``, ``sum dg_k dg_l v`` and
  ``sum d2_kl w``, from which :func:`peaksift.stats.joint._grad_hess` assembles the blocks.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

__all__ = ["channel_nll", "channel_sums", "sums"]


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


@njit(cache=True, nogil=True)
def channel_sums(n, f, g, dg, d2, s, b, fs, gs, ds, dd):  # pragma: no cover - compiled
    """``fs (R, 3 + K)``: f w, f f v, f g v, f dg_k v; ``gs (R, 2 + K)``: g w, g g v,
    g dg_k v; ``ds (R, K)``: dg_k w; ``dd (R, 2, K, K)``: dg_k dg_l v and d2_kl w."""
    rows, bins = f.shape
    kk = dg.shape[1]
    for r in range(rows):
        for i in range(bins):
            nu = max(s[r] * f[r, i] + b[r] * g[r, i], 1e-100)
            ratio = n[r, i] / nu
            w = 1.0 - ratio
            v = ratio / nu
            fi = f[r, i]
            gi = g[r, i]
            fv = fi * v
            gv = gi * v
            fs[r, 0] += fi * w
            fs[r, 1] += fi * fv
            fs[r, 2] += gi * fv
            gs[r, 0] += gi * w
            gs[r, 1] += gi * gv
            for k in range(kk):
                dk = dg[r, k, i]
                fs[r, 3 + k] += dk * fv
                gs[r, 2 + k] += dk * gv
                ds[r, k] += dk * w
                dkv = dk * v
                for m in range(kk):
                    dd[r, 0, k, m] += dkv * dg[r, m, i]
                    dd[r, 1, k, m] += d2[r, k, m, i] * w


def sums(n: np.ndarray, f: np.ndarray, g: np.ndarray, dg: np.ndarray, d2: np.ndarray,
         s: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, ...]:
    """:func:`channel_sums` with its output arrays made here."""
    rows, kk = f.shape[0], dg.shape[1]
    fs, gs = np.zeros((rows, 3 + kk)), np.zeros((rows, 2 + kk))
    ds, dd = np.zeros((rows, kk)), np.zeros((rows, 2, kk, kk))
    channel_sums(n, f, g, dg, d2, s, b, fs, gs, ds, dd)
    return fs, gs, ds, dd
