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
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from numba import njit

from .driver import _evaluate, _system
from .kernels import solve_small

__all__ = ["compiled_newton"]

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
