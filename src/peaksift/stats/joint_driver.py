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
this removes ~45% of the evaluations (``docs/decisions/compiled-joint-loop.md``).  An
evaluation gives the NLL and the next step's sums in one pass over the bins, its logarithms
from :func:`peaksift.shapes.compiled_math.vlog` (within 1 ulp of the library's, so the NLL
differs from the Python loop's by rounding), and each row's error on the parameter of
interest is inverted here as the row ends.  An exponential channel on equal bins is
evaluated bin by bin only in each hypothesis's signal span, the other bins in closed form
(:mod:`peaksift.stats.joint_spans`: the same numbers to rounding, a fifth of the work).

It returns None whenever it cannot answer as the Python loop would (another background
shape, a shape factor, a row kernel declining a trial point near its series, a singular
Newton system or a step that is not finite, which the Python loop would solve by least
squares or zero; the system is solved as every compiled fit's,
:func:`peaksift.likelihood.kernels.solve_small`): the caller then runs the
Python loop, which stays the reference.  ``tests/test_joint_driver.py`` checks both paths
against iminuit fits written in the test, and against each other.
"""

from __future__ import annotations

import math
from types import SimpleNamespace
from typing import Any

import numpy as np
from numba import njit

from ..likelihood.kernels import solve_small
from ..shapes.compiled_math import vlog
from .joint_kernels import model_change, row_background, small_step, yield_sums
from .joint_spans import span_channel, span_tables
from .profile_kernels import first_error

__all__ = ["compiled_joint"]

#: background kinds of the compiled loop: fixed shape, exponential, power law
_KINDS = {"exponential": 1, "powerlaw": 2}
DONE, DECLINED = 0, 1


@njit(cache=True, nogil=True)
def _norm_factor(x, off, nj, a_norm, c):
    """Channel ``c``'s signal factor from the normalisation nuisances: exp(sum_j x_j a_cj)."""
    e = 1.0
    if nj:
        t = 0.0
        for j in range(nj):
            t += x[off + j] * a_norm[c, j]
        e = math.exp(t)
    return e


@njit(cache=True, nogil=True, error_model="numpy")
def _value(x, r, fixed, mu_fixed, off, nj, aux, a_norm, kc, first, kpar, kind, eoff, e1, e2,
           lo, hi, boff, used, woff, scale, nn, ff, gg, d2, tg, tdg, frac, grad, direct, th,
           sm, lb, fast, spans, pre, theta_ref):  # pragma: no cover - compiled
    """The summed NLL of row ``r`` at ``x`` (as the Python ``total``), the background
    fractions and derivatives there into ``tg``/``tdg``, and in the same pass over the bins
    each channel's sums for the gradient and Hessian there into ``sm (channels, 10)``
    (:func:`_grad_hess` assembles them; each sum in the order of
    :func:`peaksift.stats.joint_kernels.channel_sums`); (nll, ok).  One evaluation instead
    of a pass for the NLL and one for the sums: most rows end after one evaluation (module
    guide), whose sums the next Newton step needs.  ``lb (3, bins)``: work rows for the
    expectations, their logarithms (:func:`peaksift.shapes.compiled_math.vlog`, within 1 ulp of
    the library's) and inverses, computed in a loop that vectorises (the library's
    logarithm, one call per bin, was a third of the joint fit's time)."""
    nc = kind.size
    out = 0.0
    if nj:
        acc = 0.0
        for j in range(nj):
            d = x[off + j] - aux[r, j]
            acc += d * d
        out = 0.5 * acc
    mu = mu_fixed[r] if fixed else x[0]
    for c in range(nc):
        b0, b1 = boff[c], boff[c + 1]
        fc = ff[c]
        nc_ = nn[c]
        dc = d2[c]
        rn = r if nc_.shape[0] > 1 else 0
        rd = r if dc.shape[0] > 1 else 0
        kq = kpar[c]
        e = _norm_factor(x, off, nj, a_norm, c)
        s = mu * kc[c, r] * e
        s2 = mu * (kc[c, r] * e)     # the gradient's signal (as _grad_hess forms it)
        b = x[first[c]]
        if fast[c]:   # an exponential: bin by bin only in the signal's span (joint_spans)
            done, part = span_channel(
                e1, e2, eoff[c], x[first[c] + 1], theta_ref[c], s, s2, b, fc[r], nc_[0],
                dc[0], spans[c, r, 0], spans[c, r, 1], pre, boff[c] + c, tg, tdg, b0, lb,
                sm[c])
            if done:
                out = out + part
                continue
        if kq:
            w0, w1 = woff[c], woff[c + 1]
            ok = row_background(kind[c], e1[eoff[c]:eoff[c + 1]], e2[eoff[c]:eoff[c + 1] - 1],
                                lo[c], hi[c], x[first[c] + 1], used[b0:b1], scale[w0:w1],
                                frac, grad, tg[b0:b1], tdg[b0:b1], direct[c], th)
            if not ok:
                return 0.0, False
        else:
            for i in range(b0, b1):
                tg[i] = gg[r if gg.shape[0] > 1 else 0, i]
                tdg[i] = 0.0
        acc = 0.0
        bad = False
        a0 = a1 = a2 = c0 = c1 = q0 = q1 = q2 = h0 = h1 = 0.0
        fr_ = fc[r]
        # the expectations, their logarithms and inverses first, in a loop that vectorises
        # (vlog: within 1 ulp of the library's log); then the sums in their order
        for j in range(b1 - b0):
            nu = s * fr_[j] + b * tg[b0 + j]
            lb[0, j] = nu
            lb[1, j] = vlog(max(1e-300, nu))
            lb[2, j] = 1.0 / max(s2 * fr_[j] + b * tg[b0 + j], 1e-100)
        for i in range(b0, b1):
            fi = fr_[i - b0]
            gi = tg[i]
            ni = nc_[rn, i - b0]
            nu = lb[0, i - b0]
            if not bad:
                if not nu > 0.0:
                    bad = True
                else:
                    nu1 = max(nu, 1e-300)
                    acc += nu1 - ni * lb[1, i - b0] if ni != 0.0 else nu1
            w, v, a0, a1, a2, c0, c1 = yield_sums(fi, gi, ni, lb[2, i - b0], a0, a1, a2, c0,
                                                  c1)
            if kq:
                dk = tdg[i]
                dv = dk * v
                q0 += fi * dv
                q1 += gi * dv
                q2 += dk * w
                h0 += dk * v * dk
                h1 += dc[rd, i - b0] * w
        sm[c, 0] = a0
        sm[c, 1] = a1
        sm[c, 2] = a2
        sm[c, 3] = c0
        sm[c, 4] = c1
        sm[c, 5] = q0
        sm[c, 6] = q1
        sm[c, 7] = q2
        sm[c, 8] = h0
        sm[c, 9] = h1
        out = out + (math.inf if bad else acc)
    return out, True


@njit(cache=True, nogil=True)
def _grad_hess(x, r, fixed, mu_fixed, off, nj, aux, a_norm, kc, first, kpar, sm, grad, hess,
               pos, coef, aj):  # pragma: no cover - compiled
    """Gradient and exact Hessian of row ``r`` at ``x`` (as the Python ``_grad_hess``) from
    the channels' sums ``sm`` that :func:`_value` left there; ``pos``, ``coef``, ``aj``:
    work buffers of ``x.size``."""
    nc = kpar.size
    p = x.size
    for i in range(p):
        grad[i] = 0.0
        for j in range(p):
            hess[i, j] = 0.0
    mu = mu_fixed[r] if fixed else x[0]
    for c in range(nc):
        e = _norm_factor(x, off, nj, a_norm, c)
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
        kq = kpar[c]
        a0, a1, a2, c0, c1 = sm[c, 0], sm[c, 1], sm[c, 2], sm[c, 3], sm[c, 4]
        e0, e1, e2, h0, h1 = sm[c, 5], sm[c, 6], sm[c, 7], sm[c, 8], sm[c, 9]
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
def _drive(fixed, mu_fixed, off, nj, aux, a_norm, kc, first, kpar, kind, eoff, e1, e2, lo,
           hi, boff, used, woff, scale, nn, ff, gg, d2, x, nll, lower, upper, steps,
           step_tol, nll_tol, slack, tries, predict, hess_out, converged,
           direct, first_err, fast, spans, pre, theta_ref):  # pragma: no cover
    """The loop of :func:`peaksift.likelihood.minimize_stacked` on every row of the joint
    problem from ``x`` (its start); ``x`` and ``nll`` written in place (``gg``: the fixed
    backgrounds' fractions).  Returns DONE, or DECLINED (the caller runs Python)."""
    nb, p = x.shape
    ntot = boff[-1]
    nw = 1
    for c in range(kind.size):
        nw = max(nw, woff[c + 1] - woff[c])
    frac = np.empty((1, nw))
    gbuf = np.empty((1, nw))
    # the current point's and a trial's fractions, derivatives and sums: an accepted trial
    # becomes the current point by swapping the index ``cur``, no copy
    gb = np.empty((2, ntot))
    dgb = np.empty((2, ntot))
    sm = np.empty((2, kind.size, 10))
    lb = np.empty((3, nw))
    grad = np.empty(p)
    hess = np.empty((p, p))
    err = np.empty(p)
    a = np.empty((p, p))
    step = np.empty(p)
    trial = np.empty(p)
    th = np.empty(1)
    pos = np.empty(p, np.int64)
    coef = np.empty(p)
    aj = np.empty(p)
    for r in range(nb):
        xr = x[r].copy()
        cur = 0
        # the start (as the Python loop's caller: a free fit whose start has no finite
        # NLL starts at mu = 0 instead)
        fr, ok = _value(xr, r, fixed, mu_fixed, off, nj, aux, a_norm, kc, first, kpar, kind,
                        eoff, e1, e2, lo, hi, boff, used, woff, scale, nn, ff, gg, d2,
                        gb[cur], dgb[cur], frac, gbuf, direct, th, sm[cur], lb, fast,
                        spans, pre, theta_ref)
        if ok and not fixed and not math.isfinite(fr):
            xr[0] = 0.0
            fr, ok = _value(xr, r, fixed, mu_fixed, off, nj, aux, a_norm, kc, first, kpar,
                            kind, eoff, e1, e2, lo, hi, boff, used, woff, scale, nn, ff, gg,
                            d2, gb[cur], dgb[cur], frac, gbuf, direct, th, sm[cur], lb, fast,
                            spans, pre, theta_ref)
        if not ok:
            return DECLINED
        lam = 1e-3
        for _it in range(steps):
            _grad_hess(xr, r, fixed, mu_fixed, off, nj, aux, a_norm, kc, first, kpar,
                       sm[cur], grad, hess, pos, coef, aj)
            hess_out[r] = hess
            # numpy's 1/0 = inf (a parameter the data do not constrain: a signal whose
            # bins hold no event, its fractions elsewhere exactly 0)
            for i in range(p):
                err[i] = math.sqrt(abs(1.0 / hess[i, i])) if hess[i, i] != 0.0 else math.inf
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
                if not solve_small(a, grad, step):
                    return DECLINED
                for i in range(p):
                    trial[i] = min(max(xr[i] + step[i], lower[i]), upper[i])
                if predict and lam <= 1e-2 and small_step(step, err, step_tol):
                    # a last step this small: its NLL from the quadratic model (module guide)
                    dq = model_change(trial, xr, grad, hess)
                    if dq <= 0.0:
                        xr[:] = trial
                        fr = fr + dq
                        done_row = True
                        accepted = True
                        break
                nxt = 1 - cur
                tn, ok = _value(trial, r, fixed, mu_fixed, off, nj, aux, a_norm, kc, first,
                                kpar, kind, eoff, e1, e2, lo, hi, boff, used, woff, scale,
                                nn, ff, gg, d2, gb[nxt], dgb[nxt], frac, gbuf, direct, th,
                                sm[nxt], lb, fast, spans, pre, theta_ref)
                if not ok:
                    return DECLINED
                good = tn <= fr + slack
                done = fr - tn < nll_tol or small_step(step, err, step_tol)
                if good and done and lam <= 1e-2:
                    done_row = True
                if good:
                    xr[:] = trial
                    fr = tn
                    cur = nxt
                    lam = max(lam * 0.1, 1e-9)
                    accepted = True
                    break
                lam = lam * 10.0
            if done_row or not accepted:   # converged, or no descent at any damping
                converged[r] = True
                break
        x[r] = xr
        nll[r] = fr
        if not fixed and steps > 0:
            first_err[r] = first_error(hess_out[r], a, grad, step)
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


#: the per-model-set arrays of the compiled loop, kept for the last few sets by what they
#: are made of (a root search fits the same models tens of times; a combination's scan,
#: its limits and a repeated combine make new models of the same channels)
_STATIC: dict[tuple, tuple | None] = {}


def _static_key(models: list) -> tuple:
    """Everything :func:`_static`'s arrays depend on: per model its background's class and
    order, its number of shape parameters, window, bin edges, used bins and bin scales."""
    return tuple((type(m.background), getattr(m.background, "order", None), m.theta.size,
                  tuple(m.window), m.edges.dtype.str, m.edges.tobytes(), m.used.dtype.str,
                  m.used.tobytes(), None if m.bin_scale is None
                  else np.asarray(m.bin_scale, float).tobytes()) for m in models)


def _static(models: list) -> tuple | None:
    """(kind, eoff, e1, e2, lo, hi, boff, used, woff, scale, kpar, direct) of a set of
    channel models, or None when one has no compiled background."""
    key = _static_key(models)
    if key in _STATIC:
        return _STATIC[key]
    kin = [_inputs(m) for m in models]
    if any(v is None for v in kin):
        out = None
    else:
        sizes = [m.used.size for m in models]
        wsz = [m.edges.size - 1 for m in models]
        esz = [v[1].size for v in kin]
        out = (np.array([v[0] for v in kin], np.int64),
               np.concatenate([[0], np.cumsum(esz)]).astype(np.int64),
               np.concatenate([v[1] for v in kin]),
               np.concatenate([np.r_[v[2], 0.0][:sz] for v, sz in zip(kin, esz)]),
               np.array([v[3] for v in kin]), np.array([v[4] for v in kin]),
               np.concatenate([[0], np.cumsum(sizes)]).astype(np.int64),
               np.concatenate([np.asarray(m.used, np.int64) for m in models]),
               np.concatenate([[0], np.cumsum(wsz)]).astype(np.int64),
               np.concatenate([np.ones(w) if m.bin_scale is None else
                               np.asarray(m.bin_scale, float) for m, w in zip(models, wsz)]),
               np.array([m.theta.size for m in models], np.int64),
               # every bin used and unweighted: the row kernel writes the fractions itself
               np.array([m.used.size == w and m.bin_scale is None
                         for m, w in zip(models, wsz)], np.bool_))
    if len(_STATIC) >= 8:
        _STATIC.pop(next(iter(_STATIC)))
    _STATIC[key] = out
    return out


def _frozen(x: np.ndarray) -> np.ndarray:
    """A contiguous read-only view (a copy only when not contiguous): the channels' arrays
    go to the compiled loop as one tuple, which numba types only when all alike."""
    v = np.ascontiguousarray(x, float).view()
    v.flags.writeable = False
    return v


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
    fixed_parts = _static(models)
    if fixed_parts is None:
        return None
    kind, eoff, e1, e2, lo, hi, boff, used, woff, scale, kpar, direct = fixed_parts
    nb, p = x0.shape
    nc = len(models)
    sizes = np.diff(boff)
    shared_n = all(nb == 1 or x.strides[0] == 0 for x in n)
    nn = tuple(_frozen(x[:1] if shared_n else np.broadcast_to(x, (nb, x.shape[1])))
               for x in n)
    ff = tuple(_frozen(np.broadcast_to(x, (nb, x.shape[1]))) for x in f)
    # the fixed backgrounds' fractions (a row for all when there is none)
    gg = np.zeros((nb if any(g is not None for g in fixed_g) else 1, boff[-1]))
    for c, g in enumerate(fixed_g):
        if g is not None:
            gg[:, boff[c]:boff[c + 1]] = g
    d2c = tuple(_frozen(np.zeros((1, sz)) if v is None else
                        v[:1, 0, 0, :] if nb > 1 and v.strides[0] == 0 else v[:, 0, 0, :])
                for v, sz in zip(d2, sizes))
    kc = np.ascontiguousarray(np.stack([np.broadcast_to(np.asarray(x, float), (nb,))
                                        for x in k]))
    nj = 0 if a_norm is None else a_norm.shape[1]
    an = np.zeros((nc, 0)) if a_norm is None else np.ascontiguousarray(a_norm, float)
    aux = np.ascontiguousarray(np.broadcast_to(aux, (nb, nj)), float)
    theta_ref = np.array([float(m.theta[0]) if m.theta.size == 1 else 0.0 for m in models])
    spans = span_tables(kind, kpar, direct, e1, e2, eoff, boff, nn, ff, d2c, theta_ref)
    x = np.array(x0, float)
    out_nll = np.empty(nb)
    hess = np.zeros((nb, p, p))
    conv = np.zeros(nb, bool)
    err = np.full(nb, np.nan)
    status = _drive(bool(fixed), np.ascontiguousarray(np.broadcast_to(mu, (nb,)), float),
                    0 if fixed else 1, nj, aux, an, kc, np.asarray(first, np.int64), kpar,
                    kind, eoff, e1, e2, lo, hi, boff, used, woff, scale, nn, ff, gg,
                    d2c, x, out_nll,
                    np.asarray(lower, float), np.asarray(upper, float), int(steps),
                    -1.0 if step_tol is None else float(step_tol), float(nll_tol),
                    float(slack), int(tries), bool(predict), hess, conv, direct, err,
                    *spans, theta_ref)
    if status != DONE:
        return None
    # no state: the closed form leaves the fractions outside a span unwritten
    return SimpleNamespace(x=x, nll=out_nll, state=None, hessian=hess, converged=conv,
                           first_error=err)
