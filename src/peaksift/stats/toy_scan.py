"""The linearised toy scan (the fast path): Newton steps on signal bands, checked against the exact profile, with the highest points of each toy refitted exactly."""

from __future__ import annotations

import numpy as np

from ..likelihood.minimize import solve_stacked
from .toy_model import (
    _BAND_EPS,
    _GROUP,
    _NEWTON_STEPS,
    _NU_FLOOR,
    _REFINE,
    ScanModel,
    _quiet,
    bkg_fractions,
    bkg_gradients,
    fit_background,
    profile_signal,
)


# ------------------------------------------------------- linearised toy scan (fast)
def _bands(fractions: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Band start and width (in used bins) holding the non-negligible signal of each mass."""
    nbin = fractions.shape[1]
    big = fractions > _BAND_EPS * fractions.max(axis=1, keepdims=True)
    first = np.argmax(big, axis=1)
    last = nbin - 1 - np.argmax(big[:, ::-1], axis=1)
    width = last - first + 1
    return first, width


def _band_groups(fractions: np.ndarray) -> list[tuple[np.ndarray, np.ndarray]]:
    """Group masses with similar band widths; each group -> (mass indices, bin index array)."""
    first, width = _bands(fractions)
    nbin = fractions.shape[1]
    order = np.argsort(width, kind="stable")
    groups = []
    for start in range(0, order.size, _GROUP):
        sel = order[start : start + _GROUP]
        w = int(width[sel].max())
        w = min(w, nbin)
        centre = first[sel] + width[sel] // 2
        lo = np.clip(centre - w // 2, 0, nbin - w)
        lo = np.minimum(lo, first[sel])
        lo = np.clip(np.maximum(lo, first[sel] + width[sel] - w), 0, nbin - w)
        groups.append((sel, lo[:, None] + np.arange(w)[None, :]))
    return groups


def _background_directions(model: ScanModel) -> np.ndarray:
    """``dB/d(eta)`` per used bin at the data's background-only fit, ``(n_used, Q)``."""
    th = model.theta[None, :]
    cols = [bkg_fractions(model, th)[0]]
    if model.theta.size:
        dg = bkg_gradients(model, th)[0]
        cols += [model.bkg_yield * dg[j] for j in range(model.theta.size)]
    return np.stack(cols, axis=-1)


def _unpack(packed: np.ndarray, p: int, pairs: list[tuple[int, int]]) -> np.ndarray:
    """``(..., K, T)`` packed upper triangles -> ``(..., T, P, P)`` symmetric matrices."""
    out = np.empty(packed.shape[:-2] + (packed.shape[-1], p, p))
    for k, (i, j) in enumerate(pairs):
        out[..., i, j] = packed[..., k, :]
        out[..., j, i] = packed[..., k, :]
    return out


def _packed_matvec(h: np.ndarray, x: np.ndarray, kidx: dict) -> np.ndarray:
    """``H x`` for symmetric ``H`` packed as ``(..., K, T)`` and ``x (..., P, T)``."""
    p = x.shape[-2]
    out = np.empty_like(x)
    for i in range(p):
        acc = h[..., kidx[(i, 0)], :] * x[..., 0, :]
        for j in range(1, p):
            acc += h[..., kidx[(i, j)], :] * x[..., j, :]
        out[..., i, :] = acc
    return out


def _solve_packed(h: np.ndarray, g: np.ndarray, kidx: dict) -> np.ndarray:
    """Solve ``H x = g`` by Cholesky for stacked small SPD matrices, packed ``(..., K, T)``.

    Written out over the (few) matrix entries so each operation runs over all toys and
    masses at once; a non-positive pivot is floored (the step then stays finite).
    """
    p = g.shape[-2]
    low: dict[tuple[int, int], np.ndarray] = {}
    for j in range(p):
        s = h[..., kidx[(j, j)], :].copy()
        for k in range(j):
            s -= low[(j, k)] ** 2
        piv = np.sqrt(np.maximum(s, 1e-300 + 1e-14 * np.abs(h[..., kidx[(j, j)], :])))
        low[(j, j)] = piv
        for i in range(j + 1, p):
            v = h[..., kidx[(i, j)], :].copy()
            for k in range(j):
                v -= low[(i, k)] * low[(j, k)]
            low[(i, j)] = v / piv
    y = []
    for i in range(p):
        v = g[..., i, :].copy()
        for k in range(i):
            v -= low[(i, k)] * y[k]
        y.append(v / low[(i, i)])
    x = [None] * p
    for i in reversed(range(p)):
        v = y[i].copy()
        for k in range(i + 1, p):
            v -= low[(k, i)] * x[k]
        x[i] = v / low[(i, i)]
    return np.stack(x, axis=-2)


@_quiet
def scan_toys_linear(model: ScanModel, n: np.ndarray,
                     directions: np.ndarray | None = None, *,
                     refine: int = _REFINE, background: tuple | None = None) -> np.ndarray:
    r"""q0 at every mass for stacked background-only toys ``n (T, n_used)`` (fast engine).

    See the module guide for the method and its approximations.  The background is
    linearised as :math:`B_i = B^0_i + \sum_k D_{ik}\,\delta\eta_k` around each toy's own
    background-only fit :math:`B^0`, with the directions ``D = dB/d(eta)`` taken at the data's
    background-only fit for every toy (they differ from a toy's own by terms of the order of
    the background parameters' statistical error, a second-order effect on q0; measured
    < 0.01 in Z).  All sums become batched matrix products over a ``(mass, bin, toy)`` layout.
    ``background``: the toys' background-only fits ``(theta, b, nll)``
    (:func:`.toy_model.fit_background` of ``n``) when the caller has them.
    Returns ``(T, n_masses)``.
    """
    n = np.atleast_2d(np.asarray(n, float))
    t = n.shape[0]
    theta, b, nll_b = fit_background(model, n) if background is None else background
    b0 = np.maximum(b[:, None] * bkg_fractions(model, theta), _NU_FLOOR)  # (T, N)
    d = _background_directions(model) if directions is None else directions  # (N, Q)
    q = d.shape[1]
    p = q + 1
    pairs = [(i, j) for i in range(p) for j in range(i, p)]
    nt_ = np.ascontiguousarray(n.T)                                      # (N, T)
    b0t = np.ascontiguousarray(b0.T)
    w1 = 1.0 - nt_ / b0t
    w2 = nt_ / (b0t * b0t)
    f = model.fractions                                                  # (M, N)
    mcount = f.shape[0]
    # Taylor coefficients at p = 0 over all bins: matrix products, packed (M, K, T)
    g_all = np.empty((mcount, p, t))
    g_all[:, 0] = f @ w1
    g_eta = d.T @ w1                                                     # (Q, T)
    g_all[:, 1:] = g_eta[None]
    h_all = np.empty((mcount, len(pairs), t))
    for k, (i, j) in enumerate(pairs):
        if i == 0:
            h_all[:, k] = (f * (f if j == 0 else d[:, j - 1])) @ w2
        else:
            h_all[:, k] = ((d[:, i - 1] * d[:, j - 1]) @ w2)[None]
    h_eta = np.einsum("nq,nr,nt->tqr", d, d, w2)
    with np.errstate(all="ignore"):
        reg = 1e-12 * np.trace(h_eta, axis1=1, axis2=2)[:, None, None] * np.eye(q)
        null_shift = -0.5 * np.einsum("qt,tq->t", g_eta,
                                      solve_stacked(h_eta + reg, g_eta.T))
    q0 = np.zeros((mcount, t))
    kidx = {pr: k for k, pr in enumerate(pairs)}
    kidx.update({(j, i): k for (i, j), k in list(kidx.items())})
    for sel, bins in _band_groups(f):
        a = np.concatenate([f[sel[:, None], bins][..., None], d[bins]], axis=-1)  # (Mg, W, P)
        at = np.ascontiguousarray(a.transpose(0, 2, 1))                  # (Mg, P, W)
        aa = np.stack([a[..., i] * a[..., j] for i, j in pairs], axis=1)  # (Mg, K, W)
        nb = nt_[bins]                                                   # (Mg, W, T)
        b0b = b0t[bins]
        r0 = nb / b0b
        g_out = g_all[sel] - at @ (1.0 - r0)                             # (Mg, P, T)
        h_out = h_all[sel] - aa @ (r0 / b0b)                             # (Mg, K, T)
        par = np.zeros((sel.size, p, t))
        par[:, 0] = np.maximum(-g_all[sel, 0] / np.maximum(h_all[sel, 0], 1e-300), 0.0)
        ssreg = 1e-9 * (aa[:, 0:1] @ (1.0 / b0b))[:, 0]                  # (Mg, T)
        for _ in range(_NEWTON_STEPS):
            nu = np.maximum(b0b + a @ par, _NU_FLOOR)                    # (Mg, W, T)
            r = nb / nu
            hess = aa @ (r / nu)
            hess += h_out
            hess[:, 0] += ssreg
            grad = at @ (1.0 - r)
            grad += g_out + _packed_matvec(h_out, par, kidx)
            step = _solve_packed(hess, grad, kidx)
            # damped step: keep every band expectation positive (halve where it is not)
            lam = np.ones((sel.size, 1, t))
            for _half in range(8):
                trial = par - lam * step
                np.maximum(trial[:, 0], 0.0, out=trial[:, 0])
                bad = np.any(b0b + a @ trial <= 0.02 * b0b, axis=1)     # (Mg, T)
                if not bad.any():
                    break
                lam[:, 0] = np.where(bad, 0.5 * lam[:, 0], lam[:, 0])
            par = trial
        nu = np.maximum(b0b + a @ par, 1e-300)
        dnll = np.sum(nu - b0b - nb * np.log(nu / b0b), axis=1) \
            + np.sum(g_out * par, axis=1) \
            + 0.5 * np.sum(par * _packed_matvec(h_out, par, kidx), axis=1)
        qq = 2.0 * (null_shift[None, :] - dnll)
        q0[sel] = np.where(par[:, 0] > 0, np.maximum(qq, 0.0), 0.0)
    q0 = np.ascontiguousarray(q0.T)
    if refine > 0:
        _refine_maxima(model, n, q0, theta, b, nll_b, refine)
    # a toy with no event in the used bins has no excess anywhere: q0 = 0 exactly
    q0[n.sum(axis=1) == 0] = 0.0
    # a toy whose fits failed (non-finite background fit or q0) is marked NaN, not -inf or 0
    bad = (~np.isfinite(nll_b)[:, None] | ~np.isfinite(q0)) & (n.sum(axis=1) > 0)[:, None]
    q0[bad] = np.nan
    return q0


@_quiet
def _refine_maxima(model: ScanModel, n: np.ndarray, q0: np.ndarray, theta: np.ndarray,
                   b: np.ndarray, nll_b: np.ndarray, count: int) -> None:
    """Replace each toy's ``count`` largest linearised q0 values by exact profile fits.

    The maximum of a toy scan is what the global p-value uses; the linearisation is least
    accurate where a large local excess pulls the background most, so the few highest
    points are refitted with :func:`profile_signal` (all toys at once), in place.
    """
    t, m = q0.shape
    count = min(count, m)
    top = np.argpartition(-q0, count - 1, axis=1)[:, :count]          # (T, count)
    rows = np.repeat(np.arange(t), count)
    cols = top.ravel()
    keep = q0[rows, cols] > 0
    rows, cols = rows[keep], cols[keep]
    if rows.size == 0:
        return
    f = model.fractions[cols]
    b0 = np.maximum(b[rows, None] * bkg_fractions(model, theta[rows]), _NU_FLOOR)
    nr = n[rows]
    s0 = np.maximum(np.sum((nr / b0 - 1.0) * f, axis=1)
                    / np.maximum(np.sum(nr * f * f / b0**2, axis=1), 1e-300), 0.0)
    r = profile_signal(model, nr, f, s_start=0.5 * s0, theta_start=theta[rows],
                       b_start=b[rows] - 0.5 * s0, steps=40)
    exact = np.where(r["s"] > 0, np.maximum(2.0 * (nll_b[rows] - r["nll"]), 0.0), 0.0)
    q0[rows, cols] = exact
