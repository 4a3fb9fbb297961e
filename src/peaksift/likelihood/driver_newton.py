"""The final Newton stage of :func:`.refine.refine` in one compiled call, for the costs
:mod:`.driver` minimises (binned, every component with a compiled edge kernel, no
constraint term).

:func:`compiled_newton` runs the loop of :func:`.refine._newton` -- exact-Hessian Newton
steps held at the bounds, each taken while it raises the NLL by no more than the allowed
rise, until the next step is below a fraction of every error -- with the evaluations of
:func:`.driver._evaluate` (value and gradient only) inside the call.  In Python the stage's
glue (the step, the hold at the bounds, the cost's wrapper around its evaluation) cost
about twice its one evaluation.  It returns None when it cannot answer as the Python loop
would (a kernel declining a point, a numerical exception); the Python loop stays the
reference (``PEAKSIFT_NUMPY_COST=1`` runs it), ``tests/test_fit_tight_minimum.py`` checks
both against iminuit.

:func:`compiled_minimum` is :func:`.driver.compiled_fisher_scoring` and, at a converged
minimum worth refining, the whole of :func:`.refine.refine` after it (the information's
covariance, the observed Hessian, its covariance, the Newton stage, the Hessian made again
where the stage moved) in the same call: the same kernels in the same order, so the same
numbers, without the ~0.1 ms of Python between them (two more calls unboxing the problem's
22 arrays, the covariances, the Minimum, the step sizes, the warning filters).  Where a
kernel declines after the minimiser it hands the minimum back unrefined and
:func:`.refine.refine` answers as before.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from numba import njit

from .driver import (
    CONVERGED,
    DECLINED,
    _drive,
    _evaluate,
    _hessian,
    _system,
    join_arguments,
)
from .kernels import covariance_small, solve_small
from .minimize import POSDEF_TOL
from .refine import NEWTON_RISE, NEWTON_STEP, NEWTON_STEPS, REHESSE

__all__ = ["compiled_minimum", "compiled_newton"]

#: outcomes of :func:`_newton`
_ENDED, _CONVERGED, _DECLINED = 0, 1, 2


@njit(cache=True, nogil=True)
def _newton(prob, full, free, const, x0, f0, g0, hess, cov, lower, upper, step_tol, rise,
            max_steps, x_out, g_out, x_last):  # pragma: no cover - compiled
    """``(status, f, calls)`` of the Newton stage from ``(x0, f0, g0)``; the point in
    ``x_out``, its gradient in ``g_out``, the last point evaluated in ``x_last`` (the
    problem's buffers hold its expectation)."""
    g_buf = prob[19]
    npar = x0.size
    x = x0.copy()
    g = g0.copy()
    f = f0
    errs = np.empty(npar)
    for i in range(npar):
        errs[i] = math.sqrt(cov[i, i])
    held = np.zeros(npar, np.bool_)
    gr = np.empty(npar)
    a = np.empty((npar, npar))
    step = np.empty(npar)
    xn = np.empty(npar)
    calls = 0
    status = _ENDED
    for k in range(max_steps + 1):
        anyheld = False
        for i in range(npar):
            held[i] = (x[i] <= lower[i] and g[i] > 0.0) or (x[i] >= upper[i] and g[i] < 0.0)
            anyheld = anyheld or held[i]
            gr[i] = 0.0 if held[i] else g[i]
        if anyheld:
            _system(hess, 0.0, held, a)
            if not solve_small(a, gr, step):
                break
        else:
            for i in range(npar):
                t = 0.0
                for j in range(npar):
                    t += cov[i, j] * g[j]
                step[i] = -t
        small = True
        for i in range(npar):
            if not abs(step[i]) <= step_tol * errs[i]:
                small = False
        if small:
            status = _CONVERGED
            break
        if k == max_steps:
            break
        for i in range(npar):
            xn[i] = min(max(x[i] + step[i], lower[i]), upper[i])
        calls += 1
        x_last[:] = xn
        val, ok = _evaluate(prob, full, free, xn, False)
        if not ok:
            return _DECLINED, f, calls
        fn = val + const
        finite = math.isfinite(fn)
        for i in range(npar):
            finite = finite and math.isfinite(g_buf[i])
        if not (finite and fn <= f + rise):
            break
        x[:] = xn
        g[:] = g_buf
        f = fn
    x_out[:] = x
    g_out[:] = g
    return status, f, calls


def compiled_newton(cost: Any, x: np.ndarray, f: float, g: np.ndarray, hess: np.ndarray,
                    cov: np.ndarray, lower: np.ndarray, upper: np.ndarray, step_tol: float,
                    rise: float, max_steps: int):
    """:func:`.refine._newton` in one compiled call: ``(x, f, gradient, converged)``, or
    None when the Python loop must answer (no compiled problem, a kernel declining)."""
    prob = cost.compiled_problem()
    if prob is None:
        return None
    npar = int(cost.free.size)
    x_out = np.empty(npar)
    g_out = np.empty(npar)
    x_last = np.empty(npar)
    held_before = cost.buffers_hold(x)
    cost.buffers_changed()
    try:
        status, fn, calls = _newton(prob, cost.full, cost.free, float(cost.constant),
                                    np.asarray(x, float), float(f), np.asarray(g, float),
                                    np.ascontiguousarray(hess, float),
                                    np.ascontiguousarray(cov, float), np.asarray(lower, float),
                                    np.asarray(upper, float), float(step_tol), float(rise),
                                    int(max_steps), x_out, g_out, x_last)
    except (ArithmeticError, ValueError):
        return None
    if status == _DECLINED:
        return None
    if calls:
        cost.note_compiled_calls(calls, x_last)
    elif held_before:  # nothing evaluated: the buffers still hold the point
        cost.note_compiled_calls(0, x)
    return x_out, float(fn), g_out, status == _CONVERGED


#: how far :func:`_minimum` went: the minimiser only (its outcome as
#: :func:`.driver.compiled_fisher_scoring`'s), refined, or a kernel declined after it
DRIVEN, REFINED, HANDED_BACK = 0, 1, 2


@njit(cache=True, nogil=True)
def _same(a, b):  # pragma: no cover - compiled
    """Whether two vectors are bit for bit the same (as their ``tobytes()``)."""
    for i in range(a.size):
        if not (a[i] == b[i] and math.copysign(1.0, a[i]) == math.copysign(1.0, b[i])):
            return False
    return True


@njit(cache=True, nogil=True)
def _minimum(prob, full, free, const, x0, lower, upper, max_iter, edm_goal, join, xb, fb,
             hb, join_nll, join_distance, refine_below, h_lower, h_upper, posdef_tol,
             step_tol, rise, max_steps, rehesse, x_out, info_out, g_out, x_last, inv, hess,
             cov, x_fin, g_fin, x_last2, mu_drive, mu_kept):  # pragma: no cover - compiled
    """:func:`.driver._drive`, then, at a converged minimum whose information is positive
    definite and whose NLL is below ``refine_below``, :func:`.refine.refine`'s steps for a
    Fisher-scoring minimum: returns ``(stage, status, f, calls, information positive
    definite, f_fin, posdef, newton calls, Hessian made again, mu_drive written)``.
    ``inv``: the information's inverse; ``hess``/``cov``: the observed Hessian and its
    inverse at the end; ``x_fin``, ``g_fin``: the refined point and its gradient;
    ``x_last2``, ``mu_kept``: the Newton stage's last point evaluated and its expectation;
    ``mu_drive``: the minimiser's last expectation, copied before the work after it writes
    the buffers (written where the last entry says so)."""
    status, f, calls = _drive(prob, full, free, const, x0, lower, upper, max_iter, edm_goal,
                              join, xb, fb, hb, join_nll, join_distance, x_out, info_out,
                              g_out, x_last)
    if status != CONVERGED:
        return DRIVEN, status, f, calls, False, 0.0, False, 0, False, False
    if not covariance_small(info_out, posdef_tol, inv):
        return DRIVEN, status, f, calls, False, 0.0, False, 0, False, False
    if not f < refine_below:
        return DRIVEN, status, f, calls, True, 0.0, False, 0, False, False
    npar = x_out.size
    steps = np.empty(npar)
    for i in range(npar):
        e = math.sqrt(max(inv[i, i], 0.0))
        steps[i] = 1e-3 * e if (math.isfinite(e) and e > 0.0) else 1e-6 * max(abs(x_out[i]),
                                                                              1.0)
    mu_drive[:] = prob[17]  # (the cost keeps the minimiser's last expectation)
    if not _hessian(prob, full, free, x_out, steps, h_lower, h_upper, hess,
                    _same(x_last, x_out)):
        return HANDED_BACK, status, f, calls, True, 0.0, False, 0, False, True
    posdef = covariance_small(hess, posdef_tol, cov)
    if not (posdef and math.isfinite(f)):
        x_fin[:] = x_out
        return REFINED, status, f, calls, True, f, posdef, 0, False, True
    stage, f1, ncalls = _newton(prob, full, free, const, x_out, f, g_out, hess, cov, lower,
                                upper, step_tol, rise, max_steps, x_fin, g_fin, x_last2)
    if stage == _DECLINED:
        return HANDED_BACK, status, f, calls, True, 0.0, False, 0, False, True
    if ncalls:
        mu_kept[:] = prob[17]
    moved = 0.0
    for i in range(npar):
        r = abs(x_fin[i] - x_out[i]) / math.sqrt(cov[i, i])
        if math.isnan(r):  # (np.max: a NaN wins, and compares False below)
            moved = r
            break
        moved = max(moved, r)
    if moved > rehesse:
        if not _hessian(prob, full, free, x_fin, steps, h_lower, h_upper, hess,
                        ncalls > 0 and _same(x_last2, x_fin)):
            return HANDED_BACK, status, f, calls, True, 0.0, False, 0, False, True
        posdef = covariance_small(hess, posdef_tol, cov)
        return REFINED, status, f, calls, True, f1, posdef, ncalls, True, True
    return REFINED, status, f, calls, True, f1, posdef, ncalls, False, True


def compiled_minimum(cost: Any, x0: np.ndarray, lower: np.ndarray, upper: np.ndarray,
                     max_iter: int, edm_goal: float, near: Any, refine_below: float):
    """:func:`.driver.compiled_fisher_scoring`'s ``(status, x, f, info, gradient)`` (None:
    the Python loop must answer) and two more entries: the information's inverse where it
    is positive definite (else None), and ``(x, f, covariance, positive definite)`` of
    :func:`.refine.refine` at a converged minimum with ``f < refine_below``, made in the
    same compiled call (else None: the caller refines, as before).  The cost's call count
    and buffers are left as the calls one by one leave them.  False after a numerical
    exception: the caller then makes the calls one by one (each answers it as before)."""
    prob = cost.compiled_problem()
    if prob is None:
        return None
    npar = int(cost.free.size)
    x_out, x_last, g_out = np.empty(npar), np.empty(npar), np.empty(npar)
    info_out, inv = np.empty((npar, npar)), np.empty((npar, npar))
    hess, cov = np.empty((npar, npar)), np.empty((npar, npar))
    x_fin, g_fin, x_last2 = np.empty(npar), np.empty(npar), np.empty(npar)
    mu_drive, mu_kept = np.empty(prob[17].size), np.empty(prob[17].size)
    join, xb, fb, hb, jn, jd = join_arguments(near, x_out, info_out)
    lower, upper = np.asarray(lower, float), np.asarray(upper, float)
    h_lower, h_upper = cost.hessian_bounds(lower, upper)
    cost.buffers_changed()
    try:
        (stage, status, f, calls, info_posdef, f1, posdef, ncalls, again,
         drive_mu) = _minimum(
            prob, cost.full, cost.free, float(cost.constant), np.asarray(x0, float), lower,
            upper, int(max_iter), float(edm_goal), join, xb, fb, hb, jn, jd,
            float(refine_below), h_lower, h_upper, POSDEF_TOL, NEWTON_STEP, NEWTON_RISE,
            NEWTON_STEPS, REHESSE, x_out, info_out, g_out, x_last, inv, hess, cov, x_fin,
            g_fin, x_last2, mu_drive, mu_kept)
    except (ArithmeticError, ValueError):
        return False
    if status == DECLINED:
        return None
    cost.note_compiled_calls(calls, x_last, mu_drive if drive_mu else None)
    if status != CONVERGED:
        return status, x_out, float(f), None, None, None, None
    if stage != REFINED:
        if stage == HANDED_BACK:  # refine makes its Hessian again (the same numbers)
            cost.buffers_changed()
        return status, x_out, float(f), info_out, g_out, inv if info_posdef else None, None
    # as compiled_observed_hessian and compiled_newton leave the cost
    cost.buffers_changed()
    if ncalls:
        cost.note_compiled_calls(ncalls, x_last2, mu_kept)
    if again:
        cost.buffers_changed()
    if not posdef:
        cov = np.full((npar, npar), np.nan)
    return (status, x_out, float(f), info_out, g_out, inv,
            (x_fin, float(f1), cov, bool(posdef)))
