"""Compiled Fisher scoring for binned costs whose every component has a compiled kernel.

What is here and when it is used
--------------------------------
:func:`compiled_fisher_scoring` runs :func:`.minimize.fisher_scoring` -- the same damped
steps, acceptance rule, convergence test (EDM), stall rule and early stop at a known minimum
-- inside one numba call, on a :class:`~peaksift.likelihood.cost.BinnedCost` whose
components all have an edge kernel (:mod:`.kernels`) and which carries no constraint term.
A free fit's Newton loop in Python spends ~3x more time in glue (the parameter vector
expanded, copied, clipped, the kernels called one by one) than in the likelihood itself;
here the loop, the kernels and the Poisson pass run without returning to Python.

It returns None whenever it cannot answer exactly as the Python loop would (another shape,
a constraint, a kernel declining a point where the numpy path switches to a series, a
numerical exception): :func:`.minimize.minimize` then runs the Python loop, which stays the
reference.  ``tests/test_likelihood_driver.py`` checks both against iminuit fits written in
the test.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from numba import njit

from ..shapes.compiled import exponential_edges, gaussian_edges, powerlaw_edges
from .kernels import poisson_pass, solve_small

__all__ = ["compiled_fisher_scoring", "problem_of"]

#: component codes of the dispatch in :func:`_component`
_CODES = {gaussian_edges: 0, powerlaw_edges: 1, exponential_edges: 2}

#: outcomes of :func:`_drive`
NOT_CONVERGED, CONVERGED, JOINED, DECLINED = 0, 1, 2, 3


@njit(cache=True, nogil=True)
def _component(code, e, a, b, v, p0, out):  # pragma: no cover - compiled
    """The edge kernel of component ``code`` at its parameters ``v[p0:]`` into ``out``."""
    if code == 0:
        return gaussian_edges(e, v[p0], v[p0 + 1], a, b, out)
    if code == 1:
        return powerlaw_edges(e, v[p0], a, b, out)
    return exponential_edges(e, v[p0], out)


@njit(cache=True, nogil=True)
def _evaluate(prob, full, free, x, info):  # pragma: no cover - compiled
    """(NLL without constant, ok) at free values ``x`` into the problem's buffers, as
    ``FusedBinned.evaluate``; ok is False when a kernel declines."""
    (code, edata, escal, pstart, rstart, yidx, yfree, value_row, drow, dcomp, dfree, bins,
     n, s, unit, floor, cdf, mu, jac, g, fisher, yields) = prob
    v = full.copy()
    for i in range(free.size):
        v[free[i]] = x[i]
    for k in range(code.size):
        y = v[yidx[k]]
        yields[k] = y
        out = cdf[rstart[k]:rstart[k + 1]]
        if yfree[k] < 0 and y == 0.0:
            out[:] = 0.0
            continue
        if not _component(code[k], edata[k], escal[k, 0], escal[k, 1], v, pstart[k], out):
            return 0.0, False
    val = poisson_pass(cdf, value_row, yields, yfree, drow, dcomp, dfree, bins, n, s, unit,
                       floor, info, mu, jac, g, fisher)
    return val, True


@njit(cache=True, nogil=True)
def _finite_sum(a):  # pragma: no cover - compiled
    t = 0.0
    for v in a.ravel():
        t += v
    return math.isfinite(t)


@njit(cache=True, nogil=True)
def _drive(prob, full, free, const, x0, lower, upper, max_iter, edm_goal, join, xb, fb, hb,
           join_nll, join_distance, x_out, info_out, x_last):  # pragma: no cover - compiled
    """The loop of :func:`.minimize.fisher_scoring`; returns ``(status, f, calls)`` with
    the point in ``x_out``, its information in ``info_out`` and the last point evaluated in
    ``x_last`` (the problem's ``mu`` buffer holds the expectation there)."""
    g_buf = prob[19]
    i_buf = prob[20]
    npar = x0.size
    x = np.empty(npar)
    for i in range(npar):
        x[i] = min(max(x0[i], lower[i]), upper[i])
    x_last[:] = x
    calls = 1
    val, ok = _evaluate(prob, full, free, x, True)
    if not ok:
        return DECLINED, 0.0, calls
    f = val + const
    g = g_buf.copy()
    info = i_buf.copy()
    x_out[:] = x
    if not (math.isfinite(f) and _finite_sum(g) and _finite_sum(info)):
        return NOT_CONVERGED, f, calls
    lam = 0.0
    stalled = 0
    a = np.empty((npar, npar))
    step = np.empty(npar)
    xn = np.empty(npar)
    d = np.empty(npar)
    for _ in range(max_iter):
        if join and f <= fb + join_nll:
            for i in range(npar):
                d[i] = x[i] - xb[i]
            q = 0.0
            for i in range(npar):
                t = 0.0
                for j in range(npar):
                    t += d[j] * hb[j, i]
                q += t * d[i]
            if q < join_distance:
                x_out[:] = x
                return JOINED, f, calls
        accepted = False
        for _t in range(14):
            for i in range(npar):
                for j in range(npar):
                    a[i, j] = info[i, j]
                if lam != 0.0:
                    a[i, i] = info[i, i] + lam * info[i, i]
            if not solve_small(a, g, step):
                if lam == 0.0:
                    lam = 1e-3
                    continue
                x_out[:] = x
                return NOT_CONVERGED, f, calls
            if lam == 0.0:
                edm = 0.0
                for i in range(npar):
                    edm += g[i] * step[i]
                if -0.5 * edm < edm_goal:
                    x_out[:] = x
                    info_out[:, :] = info
                    return CONVERGED, f, calls
            for i in range(npar):
                xn[i] = min(max(x[i] + step[i], lower[i]), upper[i])
            x_last[:] = xn
            calls += 1
            val, ok = _evaluate(prob, full, free, xn, True)
            if not ok:
                return DECLINED, 0.0, calls
            fn = val + const
            if (math.isfinite(fn) and fn <= f + 1e-12 * abs(f) and _finite_sum(g_buf)
                    and _finite_sum(i_buf)):
                stalled = stalled + 1 if f - fn < 1e-10 * max(1.0, abs(f)) else 0
                x[:] = xn
                f = fn
                g[:] = g_buf
                info[:, :] = i_buf
                lam = 0.0 if lam <= 1e-3 else lam / 10.0
                accepted = True
                break
            lam = 1e-3 if lam == 0.0 else lam * 10.0
        if not accepted:
            x_out[:] = x
            return NOT_CONVERGED, f, calls
        if stalled >= 3:
            x_out[:] = x
            return NOT_CONVERGED, f, calls
    x_out[:] = x
    return NOT_CONVERGED, f, calls


def problem_of(fused: Any) -> tuple | None:
    """The arrays :func:`_drive` works on, for one
    :class:`~peaksift.likelihood.kernels.FusedBinned` (None when a kernel has no code); the
    fixed ones are kept with its layout, shared by the costs of one fit's starts."""
    lay = fused.layout
    if lay.driver is None:
        codes = [_CODES.get(k.func) for k in fused.kernels]
        if any(c is None for c in codes):
            lay.driver = ()
        else:
            ne = fused.cdf.shape[1]
            edata = np.empty((len(codes), ne))
            escal = np.zeros((len(codes), 2))
            for k, kern in enumerate(fused.kernels):
                edata[k] = kern.data[0]
                escal[k, :len(kern.data) - 1] = kern.data[1:]
            lay.driver = (np.array(codes, np.int64), edata, escal,
                          np.array([p[1].start for p in fused.plan], np.int64),
                          np.array(lay.start, np.int64),
                          np.array([p[2] for p in fused.plan], np.int64))
    if not lay.driver:
        return None
    return (*lay.driver, fused.yield_free, fused.value_row, fused.drow, fused.dcomp,
            fused.dfree, fused.bins, np.asarray(fused.n, float), np.asarray(fused.s, float),
            fused.unit, fused.floor, fused.cdf, fused.mu, fused.jac, fused.g, fused.fisher,
            fused.yields)


def compiled_fisher_scoring(cost: Any, x0: np.ndarray, lower: np.ndarray, upper: np.ndarray,
                            max_iter: int, edm_goal: float, near: Any = None):
    """:func:`.minimize.fisher_scoring` on ``cost`` in one compiled call.

    Returns ``(status, x, f, info or None)`` -- status one of ``NOT_CONVERGED``,
    ``CONVERGED`` (EDM below the goal; the caller tests the information for positive
    definiteness), ``JOINED`` (``near``, a :class:`.minimize.NearMinimum`, was reached) --
    or None when the Python loop must answer instead."""
    prob = cost.compiled_problem()
    if prob is None:
        return None
    npar = int(cost.free.size)
    x_out = np.empty(npar)
    info_out = np.empty((npar, npar))
    x_last = np.empty(npar)
    if near is None:
        join, xb, fb, hb, jn, jd = False, x_out, 0.0, info_out, 0.0, 0.0
    else:
        join, xb, fb = True, np.asarray(near.x, float), float(near.nll)
        hb, jn, jd = np.asarray(near.hessian, float), float(near.nll_margin), float(
            near.distance)
    try:
        status, f, calls = _drive(prob, cost.full, cost.free, float(cost.constant),
                                  np.asarray(x0, float), np.asarray(lower, float),
                                  np.asarray(upper, float), int(max_iter), float(edm_goal),
                                  join, xb, fb, hb, jn, jd, x_out, info_out, x_last)
    except (ArithmeticError, ValueError):
        return None
    if status == DECLINED:
        return None
    cost.note_compiled_calls(calls, x_last)
    return status, x_out, float(f), info_out if status == CONVERGED else None


@njit(cache=True, nogil=True)
def _step_within(x, h, lo, hi):  # pragma: no cover - compiled
    """As ``cost._step_within``: a difference step and which sides stay in bounds."""
    up = x + h <= hi
    dn = x - h >= lo
    if not (up or dn):
        h = 0.5 * max(hi - x, x - lo)
        up = x + h <= hi
        dn = x - h >= lo
    return h, up, dn


@njit(cache=True, nogil=True)
def _diff_rows(out, bins, contiguous, k, jb):  # pragma: no cover - compiled
    i = jb if contiguous else bins[jb]
    return out[k, i + 1] - out[k, i]


@njit(cache=True, nogil=True)
def _hessian(prob, full, free, x, steps, lower, upper, hess):  # pragma: no cover
    """``BinnedCost.observed_hessian`` (the same terms, steps and bounds) into ``hess``;
    False when a kernel declines (the caller then takes the Python path)."""
    code, edata, escal, pstart, rstart, yidx, yfree = prob[:7]
    bins, n, s, unit, floor, cdf = prob[11:17]
    npar = free.size
    nb = bins.size
    contiguous = nb == cdf.shape[1] - 1
    v = full.copy()
    rowof = np.full(full.size, -1, np.int64)
    for i in range(npar):
        v[free[i]] = x[i]
        rowof[free[i]] = i
    jm = np.zeros((npar, nb))
    m = np.zeros(nb)
    for k in range(code.size):
        y = v[yidx[k]]
        ry = yfree[k]
        if ry < 0 and y == 0.0:
            continue
        out = cdf[rstart[k]:rstart[k + 1]]
        if not _component(code[k], edata[k], escal[k, 0], escal[k, 1], v, pstart[k], out):
            return False
        for jb in range(nb):
            f = max(_diff_rows(out, bins, contiguous, 0, jb), 0.0)
            for j in range(out.shape[0] - 1):
                r = rowof[pstart[k] + j]
                if r >= 0:
                    jm[r, jb] = _diff_rows(out, bins, contiguous, j + 1, jb) * y
            if ry >= 0:
                jm[ry, jb] = f
            m[jb] = m[jb] + y * f
    res = np.empty(nb)
    w = np.empty(nb)
    for jb in range(nb):
        mm = max(m[jb], floor)
        res[jb] = (1.0 if unit else s[jb]) - n[jb] / mm
        w[jb] = n[jb] / (mm * mm)
    for a in range(npar):
        for b in range(npar):
            acc = 0.0
            for jb in range(nb):
                acc += jm[a, jb] * w[jb] * jm[b, jb]
            hess[a, b] = acc
    for k in range(code.size):
        y = v[yidx[k]]
        ry = yfree[k]
        nrow = rstart[k + 1] - rstart[k]
        if ry < 0 and y == 0.0:
            continue
        free_shape = False
        for j in range(nrow - 1):
            free_shape = free_shape or rowof[pstart[k] + j] >= 0
        if not free_shape:
            continue
        out = cdf[rstart[k]:rstart[k + 1]]
        if not _component(code[k], edata[k], escal[k, 0], escal[k, 1], v, pstart[k], out):
            return False
        base = out.copy()
        hi_q = np.empty_like(out)
        lo_q = np.empty_like(out)
        for j in range(nrow - 1):
            rj = rowof[pstart[k] + j]
            if rj < 0:
                continue
            if ry >= 0:  # d2 mu / d yield d theta_j = dF/dtheta_j
                t = 0.0
                for jb in range(nb):
                    t += res[jb] * _diff_rows(base, bins, contiguous, j + 1, jb)
                hess[ry, rj] += t
                hess[rj, ry] += t
            p = v[pstart[k] + j]
            h = abs(steps[rj])
            if not (math.isfinite(h) and h > 0.0):
                h = 1e-6 * max(abs(p), 1.0)
            h, up, dn = _step_within(p, h, lower[rj], upper[rj])
            vq = v.copy()
            central = up and dn
            if central:
                vq[pstart[k] + j] = p + h
                ok2 = _component(code[k], edata[k], escal[k, 0], escal[k, 1], vq, pstart[k],
                                 hi_q)
                vq[pstart[k] + j] = p - h
                ok1 = _component(code[k], edata[k], escal[k, 0], escal[k, 1], vq, pstart[k],
                                 lo_q)
                if not (ok1 and ok2):
                    return False
                width = 2.0 * h
                low = lo_q
            else:  # one-sided next to a bound
                vq[pstart[k] + j] = p + (h if up else -h)
                if not _component(code[k], edata[k], escal[k, 0], escal[k, 1], vq, pstart[k],
                                  hi_q):
                    return False
                width = h if up else -h
                low = base
            for kk in range(nrow - 1):
                rk = rowof[pstart[k] + kk]
                if rk < 0:
                    continue
                t = 0.0
                for jb in range(nb):
                    d2 = (y * (_diff_rows(hi_q, bins, contiguous, kk + 1, jb)
                               - _diff_rows(low, bins, contiguous, kk + 1, jb))) / width
                    t += res[jb] * d2
                hess[rk, rj] += t
    for a in range(npar):
        for b in range(a):
            t = 0.5 * (hess[a, b] + hess[b, a])
            hess[a, b] = t
            hess[b, a] = t
    return True


def compiled_hessian(cost: Any, x: np.ndarray, steps: np.ndarray, lower: np.ndarray,
                     upper: np.ndarray) -> np.ndarray | None:
    """``cost.observed_hessian`` in one compiled call, or None (the Python path then)."""
    prob = cost.compiled_problem()
    if prob is None:
        return None
    npar = int(cost.free.size)
    hess = np.zeros((npar, npar))
    try:
        ok = _hessian(prob, cost.full, cost.free, np.asarray(x, float),
                      np.asarray(steps, float), np.asarray(lower, float),
                      np.asarray(upper, float), hess)
    except (ArithmeticError, ValueError):
        return None
    return hess if ok else None


@njit(cache=True, nogil=True)
def _covariance(hess, tol, cov):  # pragma: no cover - compiled
    """``minimize.covariance``: the test on the Hessian scaled to unit diagonal, then its
    inverse, into ``cov``; False when not positive definite (or not finite)."""
    n = hess.shape[0]
    for v in hess.ravel():
        if not math.isfinite(v):
            return False
    sc = np.empty(n)
    for i in range(n):
        if not hess[i, i] > 0.0:
            return False
        sc[i] = 1.0 / math.sqrt(hess[i, i])
    scaled = np.empty((n, n))
    for i in range(n):
        for j in range(n):
            scaled[i, j] = hess[i, j] * (sc[i] * sc[j])
            if not math.isfinite(scaled[i, j]):
                return False
    if np.linalg.eigvalsh(scaled).min() <= tol:
        return False
    inv = np.linalg.inv(scaled)
    for i in range(n):
        for j in range(n):
            cov[i, j] = inv[i, j] * (sc[i] * sc[j])
            if not math.isfinite(cov[i, j]):
                return False
    return True


def compiled_covariance(hess: np.ndarray, tol: float) -> tuple[np.ndarray, bool] | None:
    """``minimize.covariance`` in one compiled call (None: let numpy answer)."""
    n = hess.shape[0]
    cov = np.empty((n, n))
    try:
        ok = _covariance(np.ascontiguousarray(hess, float), float(tol), cov)
    except (ArithmeticError, ValueError, np.linalg.LinAlgError):
        return None
    return (cov, True) if ok else (np.full((n, n), np.nan), False)
