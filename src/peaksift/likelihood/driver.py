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

:func:`compiled_observed_hessian` is :meth:`.cost.BinnedCost.observed_hessian` for the same
costs, in one call: the Fisher-type term, the yield-shape terms and the differences of the
shape derivatives (same steps, same one-sided rule at a bound), instead of ~10 kernel calls
and ~40 numpy operations from Python.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from numba import njit

from ..shapes.compiled import gaussian_edges, powerlaw_edges
from ..shapes.compiled_exponential import exponential_edges
from .kernels import poisson_pass, solve_small
from .second_rows import gaussian_phi, gaussian_second, powerlaw_second
from .wall_info import to_wall, wall_info

__all__ = ["compiled_fisher_scoring", "compiled_observed_hessian", "problem_of"]

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


@njit(inline="always")
def _fill(prob, full, free, x):  # pragma: no cover - compiled
    """``(v, ok)``: the full parameters ``v`` at free values ``x``, each component's yield
    and CDF rows at them in the problem's buffers (a component held at yield 0: rows 0);
    ok is False when a kernel declines.  The set-up of :func:`_evaluate` and
    :func:`_hessian`."""
    code, edata, escal, pstart, rstart, yidx, yfree = prob[:7]
    cdf, yields = prob[16], prob[21]
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
            return v, False
    return v, True


@njit(cache=True, nogil=True)
def _evaluate(prob, full, free, x, info):  # pragma: no cover - compiled
    """(NLL without constant, ok) at free values ``x`` into the problem's buffers, as
    ``FusedBinned.evaluate``; ok is False when a kernel declines."""
    (_code, _edata, _escal, _pstart, _rstart, _yidx, yfree, value_row, drow, dcomp, dfree,
     bins, n, s, unit, floor, cdf, mu, jac, g, fisher, yields) = prob
    _, ok = _fill(prob, full, free, x)
    if not ok:
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
def _system(m, lam, held, out):  # pragma: no cover - compiled
    """``m + lam diag(m)`` with held parameters' rows and columns the identity's."""
    npar = m.shape[0]
    for i in range(npar):
        for j in range(npar):
            out[i, j] = 0.0 if held[i] or held[j] else m[i, j]
        out[i, i] = 1.0 if held[i] else m[i, i] + lam * m[i, i]


@njit(cache=True, nogil=True)
def _drive(prob, full, free, const, x0, lower, upper, max_iter, edm_goal, join, xb, fb, hb,
           join_nll, join_distance, x_out, info_out, g_out, x_last):  # pragma: no cover
    """The loop of :func:`.minimize.fisher_scoring` (parameters held at bounds, the step
    near the wall ``mu >= 0``); returns ``(status, f, calls)`` with the point in ``x_out``,
    (converged) its information in ``info_out`` and its gradient in ``g_out``, and the last
    point evaluated in ``x_last`` (the problem's ``mu`` buffer holds the expectation
    there)."""
    g_buf = prob[19]
    i_buf = prob[20]
    n = prob[12]
    npar = x0.size
    nb = n.size
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
    n_empty = 0
    for j in range(nb):
        if n[j] == 0.0:
            n_empty += 1
    has_empty = n_empty > 0
    empty = np.empty(n_empty, np.int64)  # the empty bins, ascending
    k = 0
    for j in range(nb if has_empty else 0):
        if n[j] == 0.0:
            empty[k] = j
            k += 1
    at_wall = np.empty(n_empty, np.int64)
    w_wall = np.empty(n_empty)
    d_wall = np.empty(nb if has_empty else 0)
    b = np.empty((npar, npar))
    mu_x = np.empty(nb if has_empty else 0)
    jac_x = np.empty((npar, nb if has_empty else 0))
    if has_empty:
        wall_info(prob, info, b, mu_x, jac_x, empty, at_wall, w_wall)
    lam = 0.0
    stalled = 0
    a = np.empty((npar, npar))
    a2 = np.empty((npar, npar))
    step = np.empty(npar)
    near = np.empty(npar)
    xn = np.empty(npar)
    d = np.empty(npar)
    gr = np.empty(npar)
    held = np.zeros(npar, np.bool_)
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
        for i in range(npar):
            held[i] = (x[i] <= lower[i] and g[i] > 0.0) or (x[i] >= upper[i] and g[i] < 0.0)
            gr[i] = 0.0 if held[i] else g[i]
        accepted = False
        for _t in range(14):
            _system(info, lam, held, a)
            if not solve_small(a, gr, step):
                if lam == 0.0:
                    lam = 1e-3
                    continue
                x_out[:] = x
                return NOT_CONVERGED, f, calls
            use_near = False
            if has_empty:
                _system(b, lam, held, a2)
                if solve_small(a2, gr, near):
                    alpha = to_wall(mu_x, jac_x, near, d_wall)
                    for i in range(npar):
                        near[i] *= alpha
                    use_near = True
            if lam == 0.0:
                edm = 0.0
                for i in range(npar):
                    edm += gr[i] * step[i]
                promise = 0.0
                if use_near:  # -g.s - s.A.s / 2 of the step cut at the wall
                    for i in range(npar):
                        t = 0.0
                        for j in range(npar):
                            t += a2[i, j] * near[j]
                        promise -= gr[i] * near[i] + 0.5 * near[i] * t
                if -0.5 * edm < edm_goal and promise < edm_goal:
                    x_out[:] = x
                    info_out[:, :] = info
                    g_out[:] = g
                    return CONVERGED, f, calls
            if use_near:
                step[:] = near
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
                if has_empty:
                    wall_info(prob, info, b, mu_x, jac_x, empty, at_wall, w_wall)
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


@njit(cache=True, nogil=True)
def _shape_rows(prob, k, v, out):  # pragma: no cover - compiled
    """Component ``k``'s CDF rows at the full parameters ``v`` into ``out``."""
    edata, escal, pstart = prob[1], prob[2], prob[3]
    return _component(prob[0][k], edata[k], escal[k, 0], escal[k, 1], v, pstart[k], out)


#: the Hessian's sums over bins may be reordered (vectorised): its last digits move, ~1e-16
#: of each entry, nothing an error reports (every divisor is an expectation floored > 0)
@njit(cache=True, nogil=True, fastmath={"reassoc", "contract"}, error_model="numpy")
def _hessian(prob, full, free, x, steps, lower, upper, hess,
             evaluated):  # pragma: no cover - compiled
    """The observed Hessian of :meth:`.cost.BinnedCost.observed_hessian` into ``hess``;
    False where a kernel declines (the Python path then answers).  ``evaluated``: the
    problem's buffers hold the evaluation at ``x`` already (the minimiser's last point),
    which is then not made again (the same numbers)."""
    (code, edata, escal, pstart, rstart, _yidx, yfree, value_row, drow, dcomp, dfree, bins,
     n, s, unit, floor, cdf, mu, jac, g, fisher, yields) = prob
    if evaluated:
        v = full.copy()
        for i in range(free.size):
            v[free[i]] = x[i]
    else:
        v, ok = _fill(prob, full, free, x)
        if not ok:
            return False
        if not math.isfinite(poisson_pass(cdf, value_row, yields, yfree, drow, dcomp, dfree,
                                          bins, n, s, unit, floor, False, mu, jac, g, fisher)):
            return False  # a negative expectation: outside the model
    npar = free.size
    nb = bins.size
    contiguous = nb == cdf.shape[1] - 1
    r = np.empty(nb)
    w = np.empty(nb)
    for j in range(nb):
        r[j] = (1.0 if unit else s[j]) - n[j] / mu[j]
        w[j] = n[j] / (mu[j] * mu[j])
    for a in range(npar):  # (symmetric: each pair once, on row views that vectorise)
        ja = jac[a]
        for b in range(a + 1):
            jb = jac[b]
            acc = 0.0
            for j in range(nb):
                acc += ja[j] * w[j] * jb[j]
            hess[a, b] = acc
            hess[b, a] = acc
    ne = cdf.shape[1]
    second = np.empty(ne)
    phi = np.empty(ne)
    hi_rows = np.empty((cdf.shape[0], ne))
    lo_rows = np.empty((cdf.shape[0], ne))
    for q in range(drow.size):
        k = dcomp[q]
        y = yields[k]
        if yfree[k] < 0 and y == 0.0:
            continue  # a component fixed at zero yield: no terms (as the Python path)
        rj = dfree[q]
        row = drow[q]
        ip = pstart[k] + (row - rstart[k] - 1)  # the parameter's index in v
        if yfree[k] >= 0:  # d2 mu / d yield d theta = dF/dtheta
            t = 0.0
            for j in range(nb):
                i = j if contiguous else bins[j]
                t += r[j] * (cdf[row, i + 1] - cdf[row, i])
            hess[yfree[k], rj] += t
            hess[rj, yfree[k]] += t
        if code[k] <= 1:  # a Gaussian or a power law: exact second derivatives
            r0 = rstart[k]
            pa = row - r0 - 1
            if code[k] == 0:
                gaussian_phi(edata[k], v[pstart[k]], v[pstart[k] + 1], phi)
            for q2 in range(drow.size):  # each pair of the component's free shape
                pb = drow[q2] - r0 - 1      # parameters once (symmetrised below)
                if dcomp[q2] != k or pb < pa:
                    continue
                if code[k] == 0:
                    ok = gaussian_second(edata[k], v[pstart[k]], v[pstart[k] + 1], escal[k, 0],
                                         escal[k, 1], cdf[r0], cdf[r0 + 1 + pa],
                                         cdf[r0 + 1 + pb], pa, pb, phi, second)
                else:
                    ok = powerlaw_second(edata[k], v[pstart[k]], escal[k, 0], escal[k, 1],
                                         cdf[r0], cdf[r0 + 1], second)
                if not ok:
                    return False
                acc = 0.0
                for j in range(nb):
                    i = j if contiguous else bins[j]
                    acc += r[j] * (y * (second[i + 1] - second[i]))
                hess[dfree[q2], rj] += acc
                if pb != pa:
                    hess[rj, dfree[q2]] += acc
            continue
        p = v[ip]
        h = abs(steps[rj])
        if not (math.isfinite(h) and h > 0.0):
            h = 1e-6 * max(abs(p), 1.0)
        up = p + h <= upper[rj]
        dn = p - h >= lower[rj]
        if not (up or dn):
            h = 0.5 * max(upper[rj] - p, p - lower[rj])
            up = p + h <= upper[rj]
            dn = p - h >= lower[rj]
        vq = v.copy()
        r0, r1 = rstart[k], rstart[k + 1]
        central = up and dn
        if central:
            width = 2.0 * h
        else:  # one-sided next to a bound
            width = h if up else -h
            lo_rows[r0:r1] = cdf[r0:r1]
        for side in range(2 if central else 1):  # one call site: one copy of the kernels
            vq[ip] = (p + h if up else p - h) if side == 0 else p - h  # (central: up)
            if not _shape_rows(prob, k, vq, (hi_rows if side == 0 else lo_rows)[r0:r1]):
                return False
        for q2 in range(drow.size):  # every free shape parameter of the same component
            if dcomp[q2] != k:
                continue
            row2 = drow[q2]
            acc = 0.0
            for j in range(nb):
                i = j if contiguous else bins[j]
                d2 = y * ((hi_rows[row2, i + 1] - hi_rows[row2, i])
                          - (lo_rows[row2, i + 1] - lo_rows[row2, i])) / width
                acc += r[j] * d2
            hess[dfree[q2], rj] += acc
    for a in range(npar):
        for b in range(a):
            t = 0.5 * (hess[a, b] + hess[b, a])
            hess[a, b] = t
            hess[b, a] = t
    return True


def compiled_observed_hessian(cost: Any, x: np.ndarray, steps: np.ndarray,
                              lower: np.ndarray, upper: np.ndarray) -> np.ndarray | None:
    """:meth:`.cost.BinnedCost.observed_hessian` at ``x`` in one compiled call (``lower``,
    ``upper``: the free parameters' bounds, already met with the shapes' domains), or None
    when the Python path must answer."""
    prob = cost.compiled_problem()
    if prob is None:
        return None
    npar = int(cost.free.size)
    hess = np.empty((npar, npar))
    x = np.asarray(x, float)
    evaluated = cost.buffers_hold(x)
    cost.buffers_changed()
    try:
        ok = _hessian(prob, cost.full, cost.free, x, np.asarray(steps, float),
                      np.asarray(lower, float), np.asarray(upper, float), hess, evaluated)
    except (ArithmeticError, ValueError):
        return None
    return hess if ok else None


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


def join_arguments(near: Any, x_out: np.ndarray, info_out: np.ndarray) -> tuple:
    """The compiled loop's ``(join, x, nll, hessian, nll margin, distance)`` of the best
    minimum so far ``near`` (a :class:`NearMinimum` or None: then unused placeholders, the
    loop's own buffers)."""
    if near is None:
        return False, x_out, 0.0, info_out, 0.0, 0.0
    return (True, np.asarray(near.x, float), float(near.nll), np.asarray(near.hessian, float),
            float(near.nll_margin), float(near.distance))


def compiled_fisher_scoring(cost: Any, x0: np.ndarray, lower: np.ndarray, upper: np.ndarray,
                            max_iter: int, edm_goal: float, near: Any = None):
    """:func:`.minimize.fisher_scoring` on ``cost`` in one compiled call.

    Returns ``(status, x, f, info or None, gradient or None)`` -- status one of ``NOT_CONVERGED``,
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
    g_out = np.empty(npar)
    join, xb, fb, hb, jn, jd = join_arguments(near, x_out, info_out)
    cost.buffers_changed()
    try:
        status, f, calls = _drive(prob, cost.full, cost.free, float(cost.constant),
                                  np.asarray(x0, float), np.asarray(lower, float),
                                  np.asarray(upper, float), int(max_iter), float(edm_goal),
                                  join, xb, fb, hb, jn, jd, x_out, info_out, g_out, x_last)
    except (ArithmeticError, ValueError):
        return None
    if status == DECLINED:
        return None
    cost.note_compiled_calls(calls, x_last)
    if status != CONVERGED:
        return status, x_out, float(f), None, None
    return status, x_out, float(f), info_out, g_out
