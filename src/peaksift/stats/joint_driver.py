"""The joint profile's Newton loop compiled: :func:`compiled_joint`.

What is here and when it is used
--------------------------------
:func:`peaksift.stats.joint.profile_joint` minimises the channels' summed NLL for stacked
hypotheses with :func:`peaksift.likelihood.minimize_stacked` and Python callbacks that
assemble each channel's gradient and Hessian.  For the usual combination -- every
channel's background an exponential or a power law (one shape parameter, a compiled row
kernel in :mod:`peaksift.shapes.compiled`) or fixed, no signal-shape factors, any
normalisation nuisances -- :func:`compiled_joint` runs the same loop row by row inside one
numba call: the same Levenberg-Marquardt steps (damping 1e-3, tenfold down on an accepted
step to 1e-9, tenfold up on a rejected one, 12 tries), the same pinning of parameters on a
bound, the same acceptance and stopping rules, the same per-channel sums
(:func:`peaksift.stats.joint_kernels.channel_sums`' order) and the same gradient and exact
Hessian as :func:`peaksift.stats.joint._grad_hess`.

One difference, for speed: a step that would end the fit (every component below
``step_tol`` of its error, at low damping) is taken without evaluating the NLL there; its
NLL is the quadratic model's, ``f + g.d + d.H.d/2``.  The point is the one the Python loop
reaches; the NLL differs from an evaluation by the model's cubic remainder (below 1e-6 in
q0 on the benchmark's two channels, where the 0.03-error stopping rule itself leaves ~1e-5).
Each accepted point otherwise costs one background evaluation and one pass of logarithms
per channel, which is the fit's time (the Python glue was ~40% of it); most hypotheses
started from :func:`peaksift.stats.joint_start.joint_start` end on their first step, so
this removes ~45% of the evaluations (``docs/decisions/compiled-joint-loop.md``).

It returns None whenever it cannot answer as the Python loop would (another background
shape, a shape factor, a row kernel declining a trial point near its series, a singular
Newton system that the Python loop would solve by least squares): the caller then runs the
Python loop, which stays the reference.  ``tests/test_joint_driver.py`` checks both paths
against iminuit fits written in the test, and against each other.
"""

from __future__ import annotations

import itertools
import math
from types import SimpleNamespace
from typing import Any

import numpy as np
from numba import njit

from ..shapes.compiled import exponential_rows, powerlaw_rows

__all__ = ["compiled_joint"]

#: background kinds of the compiled loop: fixed shape, exponential, power law
_KINDS = {"exponential": 1, "powerlaw": 2}
DONE, DECLINED = 0, 1


@njit(cache=True, nogil=True)
def _background(kind, e1, e2, lo, hi, theta, used, scale, frac, grad, tg, tdg,
                ):  # pragma: no cover - compiled
    """One row's background fractions and their derivative in the used bins into ``tg``
    and ``tdg`` (as :func:`peaksift.stats.joint._bkg_both`); False if the kernel declines."""
    th = np.empty(1)
    th[0] = theta
    if kind == 1:
        ok = exponential_rows(e1, e2, th, frac, grad)
    else:
        ok = powerlaw_rows(e1, e2, th, lo, hi, frac, grad)
    if not ok:
        return False
    for j in range(used.size):
        u = used[j]
        tg[j] = frac[0, u] * scale[u]
        tdg[j] = grad[0, u] * scale[u]
    return True


@njit(cache=True, nogil=True)
def _lu_solve(a, g, out):  # pragma: no cover - compiled
    """``out = -a^-1 g`` by Gaussian elimination with partial pivoting (LAPACK's gesv
    algorithm); False on an exactly zero pivot (where numpy raises)."""
    n = g.size
    m = np.empty((n, n + 1))
    for i in range(n):
        for j in range(n):
            m[i, j] = a[i, j]
        m[i, n] = g[i]
    for c in range(n):
        p = c
        big = abs(m[c, c])
        for r in range(c + 1, n):
            if abs(m[r, c]) > big:
                big = abs(m[r, c])
                p = r
        if big == 0.0:
            return False
        if p != c:
            for j in range(c, n + 1):
                t = m[c, j]
                m[c, j] = m[p, j]
                m[p, j] = t
        for r in range(c + 1, n):
            f = m[r, c] / m[c, c]
            for j in range(c, n + 1):
                m[r, j] -= f * m[c, j]
    for i in range(n - 1, -1, -1):
        acc = m[i, n]
        for j in range(i + 1, n):
            acc -= m[i, j] * out[j]
        out[i] = acc / m[i, i]
    for i in range(n):
        out[i] = -out[i]
        if not math.isfinite(out[i]):
            out[i] = 0.0
    return True


@njit(cache=True, nogil=True)
def _value(x, r, fixed, mu_fixed, off, nj, aux, a_norm, kc, first, kpar, kind, eoff, e1, e2,
           lo, hi, boff, used, woff, scale, nn, ff, gg, tg, tdg, frac,
           grad):  # pragma: no cover - compiled
    """The summed NLL of row ``r`` at ``x`` (as the Python ``total``), the background
    fractions and derivatives there into ``tg``/``tdg``; (nll, ok)."""
    nc = kind.size
    out = 0.0
    if nj:
        acc = 0.0
        for j in range(nj):
            d = x[off + j] - aux[r, j]
            acc += d * d
        out = 0.5 * acc
    mu = mu_fixed[r] if fixed else x[0]
    rn = r if nn.shape[0] > 1 else 0
    for c in range(nc):
        b0, b1 = boff[c], boff[c + 1]
        if kpar[c]:
            w0, w1 = woff[c], woff[c + 1]
            ok = _background(kind[c], e1[eoff[c]:eoff[c + 1]], e2[eoff[c]:eoff[c + 1] - 1],
                             lo[c], hi[c], x[first[c] + 1], used[b0:b1], scale[w0:w1],
                             frac, grad, tg[b0:b1], tdg[b0:b1])
            if not ok:
                return 0.0, False
        else:
            for i in range(b0, b1):
                tg[i] = gg[r, i]
                tdg[i] = 0.0
        e = 1.0
        if nj:
            t = 0.0
            for j in range(nj):
                t += x[off + j] * a_norm[c, j]
            e = math.exp(t)
        s = mu * kc[c, r] * e
        b = x[first[c]]
        acc = 0.0
        for i in range(b0, b1):
            nu = s * ff[r, i] + b * tg[i]
            if not nu > 0.0:
                acc = math.inf
                break
            nu = max(nu, 1e-300)
            acc += nu - nn[rn, i] * math.log(nu) if nn[rn, i] != 0.0 else nu
        out = out + acc
    return out, True


@njit(cache=True, nogil=True)
def _grad_hess(x, r, fixed, mu_fixed, off, nj, aux, a_norm, kc, first, kpar, boff, nn, ff,
               g, dg, d2, wv, grad, hess):  # pragma: no cover - compiled
    """Gradient and exact Hessian of row ``r`` at ``x`` (as the Python ``_grad_hess``)."""
    nc = kpar.size
    p = x.size
    for i in range(p):
        grad[i] = 0.0
        for j in range(p):
            hess[i, j] = 0.0
    mu = mu_fixed[r] if fixed else x[0]
    rn = r if nn.shape[0] > 1 else 0
    rd = r if d2.shape[0] > 1 else 0
    pos = np.empty(p, np.int64)
    coef = np.empty(p)
    aj = np.empty(p)
    for c in range(nc):
        b0, b1 = boff[c], boff[c + 1]
        e = 1.0
        if nj:
            t = 0.0
            for j in range(nj):
                t += x[off + j] * a_norm[c, j]
            e = math.exp(t)
        kk = kc[c, r] * e
        s = mu * kk
        br = x[first[c]]
        nsig = 0
        if not fixed:
            coef[0] = kk
            pos[0] = 0
            nsig = 1
        na = 0
        for j in range(nj):
            if a_norm[c, j] != 0.0:
                coef[nsig] = a_norm[c, j] * s
                pos[nsig] = off + j
                aj[na] = a_norm[c, j]
                nsig += 1
                na += 1
        # the sums of channel_sums, in its order
        a0 = 0.0
        a1 = 0.0
        a2 = 0.0
        c0 = 0.0
        c1 = 0.0
        for i in range(b0, b1):
            fi = ff[r, i]
            gi = g[i]
            inv = 1.0 / max(s * fi + br * gi, 1e-100)
            ratio = nn[rn, i] * inv
            w = 1.0 - ratio
            v = ratio * inv
            wv[0, i] = w
            wv[1, i] = v
            fv = fi * v
            a0 += fi * w
            a1 += fi * fv
            a2 += gi * fv
            c0 += gi * w
            c1 += gi * gi * v
        kq = kpar[c]
        e0 = 0.0
        e1 = 0.0
        e2 = 0.0
        h0 = 0.0
        h1 = 0.0
        if kq:
            for i in range(b0, b1):
                dk = dg[i]
                dv = dk * wv[1, i]
                e0 += ff[r, i] * dv
                e1 += g[i] * dv
                e2 += dk * wv[0, i]
            for i in range(b0, b1):
                h0 += dg[i] * wv[1, i] * dg[i]
                h1 += d2[rd, i] * wv[0, i]
        # the channel's block over (signal columns, b, theta), scattered into the row's
        bi = first[c]
        for q in range(nsig):
            grad[pos[q]] += coef[q] * a0
            for u in range(nsig):
                hess[pos[q], pos[u]] += coef[q] * coef[u] * a1
            hess[pos[q], bi] += coef[q] * a2
            hess[bi, pos[q]] += coef[q] * a2
            if kq:
                fdb = coef[q] * (br * e0)
                hess[pos[q], bi + 1] += fdb
                hess[bi + 1, pos[q]] += fdb
        grad[bi] += c0
        hess[bi, bi] += c1
        if kq:
            grad[bi + 1] += br * e2
            cross = br * e1 + e2
            hess[bi, bi + 1] += cross
            hess[bi + 1, bi] += cross
            hess[bi + 1, bi + 1] += (br * br) * h0 + br * h1
        if na:
            # the norms' second derivatives of the signal term (_norm_second)
            o = 0 if fixed else 1
            ws = a0 * s
            for q in range(na):
                for u in range(na):
                    hess[pos[o + q], pos[o + u]] += ws * (aj[q] * aj[u])
            if not fixed:
                wk = a0 * kk
                for q in range(na):
                    hess[0, pos[1 + q]] += wk * aj[q]
                    hess[pos[1 + q], 0] += wk * aj[q]
    for j in range(nj):
        grad[off + j] += x[off + j] - aux[r, j]
        hess[off + j, off + j] += 1.0


@njit(cache=True, nogil=True)
def _small(step, err, step_tol):  # pragma: no cover - compiled
    """Whether every component of ``step`` is below ``step_tol`` of its error (never
    without a tolerance, ``step_tol < 0``)."""
    if step_tol < 0.0:
        return False
    for i in range(step.size):
        if not abs(step[i]) < step_tol * err[i]:
            return False
    return True


@njit(cache=True, nogil=True)
def _model_change(trial, x, grad, hess):  # pragma: no cover - compiled
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
def _drive(fixed, mu_fixed, off, nj, aux, a_norm, kc, first, kpar, kind, eoff, e1, e2, lo,
           hi, boff, used, woff, scale, nn, ff, gg, dgg, d2, x, nll, lower, upper, steps,
           step_tol, nll_tol, slack, tries, predict, hess_out, converged):  # pragma: no cover
    """The loop of :func:`peaksift.likelihood.minimize_stacked` on every row of the joint
    problem from ``x`` (its start); ``x``, ``nll`` and ``gg``/``dgg`` (the state:
    background fractions and derivatives; ``gg`` holds the fixed backgrounds' fractions on
    entry) written in place.  Returns DONE, or DECLINED (the caller runs Python)."""
    nb, p = x.shape
    ntot = ff.shape[1]
    nw = 1
    for c in range(kind.size):
        nw = max(nw, woff[c + 1] - woff[c])
    frac = np.empty((1, nw))
    gbuf = np.empty((1, nw))
    tg = np.empty(ntot)
    tdg = np.empty(ntot)
    wv = np.empty((2, ntot))
    grad = np.empty(p)
    hess = np.empty((p, p))
    err = np.empty(p)
    a = np.empty((p, p))
    step = np.empty(p)
    trial = np.empty(p)
    for r in range(nb):
        xr = x[r].copy()
        # the start (as the Python loop's caller: a free fit whose start has no finite
        # NLL starts at mu = 0 instead)
        fr, ok = _value(xr, r, fixed, mu_fixed, off, nj, aux, a_norm, kc, first, kpar, kind,
                        eoff, e1, e2, lo, hi, boff, used, woff, scale, nn, ff, gg, tg, tdg,
                        frac, gbuf)
        if ok and not fixed and not math.isfinite(fr):
            xr[0] = 0.0
            fr, ok = _value(xr, r, fixed, mu_fixed, off, nj, aux, a_norm, kc, first, kpar,
                            kind, eoff, e1, e2, lo, hi, boff, used, woff, scale, nn, ff, gg,
                            tg, tdg, frac, gbuf)
        if not ok:
            return DECLINED
        g = tg.copy()
        dg = tdg.copy()
        lam = 1e-3
        for _it in range(steps):
            _grad_hess(xr, r, fixed, mu_fixed, off, nj, aux, a_norm, kc, first, kpar, boff,
                       nn, ff, g, dg, d2, wv, grad, hess)
            hess_out[r] = hess
            for i in range(p):
                err[i] = math.sqrt(abs(1.0 / hess[i, i]))
            # a parameter on a bound whose descent leaves it is held there (_pin_at_bounds)
            for i in range(p):
                if (xr[i] <= lower[i] and grad[i] > 0) or (xr[i] >= upper[i] and grad[i] < 0):
                    for j in range(p):
                        hess[i, j] = 0.0
                        hess[j, i] = 0.0
                    hess[i, i] = 1.0
                    grad[i] = 0.0
            dsum = 0.0
            for i in range(p):
                dsum += abs(hess[i, i])
            floor = 1e-6 * (dsum / p) + 1e-300
            accepted = False
            done_row = False
            for _t in range(tries):
                for i in range(p):
                    for j in range(p):
                        a[i, j] = hess[i, j]
                    a[i, i] += lam * (hess[i, i] + floor) + 1e-14 * floor
                if not _lu_solve(a, grad, step):
                    return DECLINED
                for i in range(p):
                    trial[i] = min(max(xr[i] + step[i], lower[i]), upper[i])
                if predict and lam <= 1e-2 and _small(step, err, step_tol):
                    # a last step this small: its NLL from the quadratic model (module guide)
                    dq = _model_change(trial, xr, grad, hess)
                    if dq <= 0.0:
                        xr[:] = trial
                        fr = fr + dq
                        done_row = True
                        accepted = True
                        break
                tn, ok = _value(trial, r, fixed, mu_fixed, off, nj, aux, a_norm, kc, first,
                                kpar, kind, eoff, e1, e2, lo, hi, boff, used, woff, scale,
                                nn, ff, gg, tg, tdg, frac, gbuf)
                if not ok:
                    return DECLINED
                good = tn <= fr + slack
                done = fr - tn < nll_tol or _small(step, err, step_tol)
                if good and done and lam <= 1e-2:
                    done_row = True
                if good:
                    xr[:] = trial
                    fr = tn
                    g[:] = tg
                    dg[:] = tdg
                    lam = max(lam * 0.1, 1e-9)
                    accepted = True
                    break
                lam = lam * 10.0
            if done_row or not accepted:   # converged, or no descent at any damping
                converged[r] = True
                break
        x[r] = xr
        nll[r] = fr
        gg[r] = g
        dgg[r] = dg
    return DONE


def _inputs(model: Any) -> tuple | None:
    """(kind, e1, e2, lo, hi) of one channel's background for the compiled loop; None when
    it has none (more than one shape parameter, or a shape without a row kernel)."""
    k = model.theta.size
    if k == 0:
        return 0, np.zeros(2), np.zeros(1), 0.0, 0.0
    row = getattr(model.background, "row_inputs", None)
    ri = None if k != 1 or row is None else row(model.edges, model.window)
    if ri is None or ri[0] not in _KINDS:
        return None
    name, e1, e2, lo, hi = ri
    return _KINDS[name], np.asarray(e1, float), np.asarray(e2, float), float(lo), float(hi)


def _rows_of(x: np.ndarray, nb: int) -> np.ndarray:
    """A stacked ``(B, ...)`` array as contiguous rows: one row when every row is the same
    view (shared counts, one curvature for all)."""
    return np.ascontiguousarray(x[:1] if nb > 1 and x.strides[0] == 0 else x)


def compiled_joint(models: list, n: list, f: list, k: list, fixed: bool, mu: np.ndarray,
                   x0: np.ndarray, aux: np.ndarray, a_norm: Any, d2: list, fixed_g: list,
                   first: list, lower: np.ndarray, upper: np.ndarray, steps: int,
                   step_tol: float | None, nll_tol: float = 1e-8, slack: float = 1e-9,
                   tries: int = 12, predict: bool = True) -> Any:
    """:func:`peaksift.likelihood.minimize_stacked` of the joint problem from ``x0``, its
    start included, in one compiled call (the arguments as
    :func:`peaksift.stats.joint._profile` holds them; ``fixed_g`` per channel None or the
    fractions of a background without shape parameters); a namespace with ``x``, ``nll``,
    ``state``, ``hessian`` and ``converged``, or None when the Python loop must answer
    (module guide)."""
    kin = [_inputs(m) for m in models]
    if any(v is None for v in kin):
        return None
    nb, p = x0.shape
    nc = len(models)
    sizes = [m.used.size for m in models]
    boff = np.concatenate([[0], np.cumsum(sizes)]).astype(np.int64)
    wsz = [m.edges.size - 1 for m in models]
    woff = np.concatenate([[0], np.cumsum(wsz)]).astype(np.int64)
    esz = [v[1].size for v in kin]
    eoff = np.concatenate([[0], np.cumsum(esz)]).astype(np.int64)
    e1 = np.concatenate([v[1] for v in kin])
    e2 = np.concatenate([np.r_[v[2], 0.0][:sz] for v, sz in zip(kin, esz)])
    scale = np.concatenate([np.ones(w) if m.bin_scale is None else
                            np.asarray(m.bin_scale, float) for m, w in zip(models, wsz)])
    used = np.concatenate([np.asarray(m.used, np.int64) for m in models])
    kpar = np.array([m.theta.size for m in models], np.int64)
    shared_n = all(nb == 1 or x.strides[0] == 0 for x in n)
    nn = np.concatenate([x[:1] if shared_n else np.broadcast_to(x, (nb, x.shape[1]))
                         for x in n], axis=1)
    ff = np.concatenate([np.broadcast_to(x, (nb, x.shape[1])) for x in f], axis=1)
    gg = np.concatenate([np.zeros((nb, sz)) if g is None else np.broadcast_to(g, (nb, sz))
                         for g, sz in zip(fixed_g, sizes)], axis=1)
    dgg = np.zeros((nb, boff[-1]))
    d2r = [None if v is None else v[:, 0, 0, :] for v in d2]
    shared_d = all(v is None or nb == 1 or v.strides[0] == 0 for v in d2r)
    rows_d = 1 if shared_d else nb
    d2c = np.concatenate([np.zeros((rows_d, s)) if v is None else
                          np.broadcast_to(v[:1] if shared_d else v, (rows_d, s))
                          for v, s in zip(d2r, sizes)], axis=1)
    kc = np.ascontiguousarray(np.stack([np.broadcast_to(np.asarray(x, float), (nb,))
                                        for x in k]))
    nj = 0 if a_norm is None else a_norm.shape[1]
    an = np.zeros((nc, 0)) if a_norm is None else np.ascontiguousarray(a_norm, float)
    aux = np.ascontiguousarray(np.broadcast_to(aux, (nb, nj)), float)
    x = np.array(x0, float)
    out_nll = np.empty(nb)
    hess = np.zeros((nb, p, p))
    conv = np.zeros(nb, bool)
    status = _drive(bool(fixed), np.ascontiguousarray(np.broadcast_to(mu, (nb,)), float),
                    0 if fixed else 1, nj, aux, an, kc, np.asarray(first, np.int64), kpar,
                    np.array([v[0] for v in kin], np.int64), eoff, e1, e2,
                    np.array([v[3] for v in kin]), np.array([v[4] for v in kin]), boff, used,
                    woff, scale, np.ascontiguousarray(nn, float), np.ascontiguousarray(ff),
                    gg, dgg, np.ascontiguousarray(d2c), x, out_nll,
                    np.asarray(lower, float), np.asarray(upper, float), int(steps),
                    -1.0 if step_tol is None else float(step_tol), float(nll_tol),
                    float(slack), int(tries), bool(predict), hess, conv)
    if status != DONE:
        return None
    spans = list(itertools.pairwise(boff))
    state = tuple(gg[:, a:b] for a, b in spans) + tuple(
        dgg[:, a:b][:, None, :] if kq else np.zeros((nb, 0, b - a))
        for (a, b), kq in zip(spans, kpar))
    return SimpleNamespace(x=x, nll=out_nll, state=state, hessian=hess, converged=conv)
