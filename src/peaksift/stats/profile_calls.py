"""The compiled profile's calls from Python: the inputs :mod:`.profile_kernels` fits with, made from a scan model, and its outputs as ``profile_signal`` gives them.

:func:`compiled_profile` (any stacked call) and :func:`compiled_scan_profile` (a scan's
call, its inputs and outputs made in compiled code by :func:`scan_rows`) return None
whenever the compiled loop cannot answer as the numpy path would (see
:mod:`.profile_kernels`); :func:`row_kernel` finds a background's compiled row kernel.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from numba import njit

from .profile_kernels import profile_rows

__all__ = ["compiled_profile", "compiled_scan_profile", "row_kernel", "scan_call",
           "scan_entry", "scan_rows", "scan_table"]


#: the row kernels by the name a shape's ``row_inputs`` gives (:mod:`peaksift.shapes.compiled`)
_CODES = {"powerlaw": 0, "exponential": 1}


#: row inputs by what they are made of (shape class and order, window, edges), the newest
#: last: a scan makes a new shape and a new edges array every call, so the shapes' own
#: caches (kept per instance and edges array) miss, and the edge logarithms were ~2% of a
#: 100-bin scan
_ROWS: dict[tuple, tuple | None] = {}


def row_kernel(shape: Any, edges: np.ndarray, window: tuple[float, float]) -> tuple | None:
    """``(code, e1, e2, c1, c2)`` of the compiled row kernel of a one-parameter background
    on ``edges``: the shape's own ``row_inputs`` (the arrays its stacked path passes the
    kernel), or None."""
    row = getattr(shape, "row_inputs", None)
    if row is None:
        return None
    x = np.asarray(edges)
    key = (type(shape), getattr(shape, "order", None), float(window[0]), float(window[1]),
           x.dtype.str, x.shape, x.tobytes())
    hit = _ROWS.get(key, False)
    if hit is not False:
        return hit
    ri = row(edges, window)
    out = None
    if ri is not None and ri[0] in _CODES:
        name, e1, e2, c1, c2 = ri
        # copies, read-only: kept here, and the shape's own (cached) arrays stay as they were
        out = (_CODES[name], np.array(e1, float), np.array(e2, float), float(c1), float(c2))
        for a in out[1:3]:
            a.flags.writeable = False
    if len(_ROWS) >= 8:
        _ROWS.pop(next(iter(_ROWS)))
    _ROWS[key] = out
    return out


@njit(cache=True, nogil=True)
def scan_rows(code, e1, e2, c1, c2, used, scale, n, sat, f, b0, th0, lo, hi, steps,
              tol):  # pragma: no cover - compiled
    """:func:`profile_rows` for a scan (every row from ``s = 0``, ``b = b0``, ``theta =
    th0``, the signal free) with the inputs and outputs :func:`compiled_profile` makes,
    made here: ``(status, s, s_error, b, theta, nll, converged, hessian, d2)``.  A
    100-bin scan's ~20 numpy calls around the kernel cost ~40 us with cold caches."""
    nb, nbin = f.shape
    x = np.empty((nb, 3))
    for r in range(nb):
        x[r, 0] = 0.0
        x[r, 1] = b0
        x[r, 2] = th0
    one_start = nb > 1 and not math.isnan(th0)
    lower = np.array((-math.inf, -math.inf, lo))
    upper = np.array((math.inf, math.inf, hi))
    d2 = np.empty((1 if one_start else nb, nbin))
    nll = np.empty(nb)
    conv = np.zeros(nb, np.bool_)
    hess = np.zeros((nb, 3, 3))
    s_err = np.full(nb, np.nan)
    status = profile_rows(code, e1, e2, c1, c2, used, scale, n, sat, f, x, np.zeros(nb),
                          lower, upper, steps, 12, 1e-8, tol, 1e-9, d2, nll, conv, hess,
                          s_err)
    return (status, x[:, 0].copy(), s_err, x[:, 1].copy(), x[:, 2:].copy(), nll, conv,
            hess, d2)


def compiled_scan_profile(model: Any, n: np.ndarray, f: np.ndarray, sat: Any, steps: int,
                          tol: float) -> dict | None:
    """:func:`compiled_profile` of a scan's call (one spectrum ``n (N,)``, float64, every
    row from the background-only fit, the signal free) through :func:`scan_rows`: the same
    numbers, or None (the numpy path must run)."""
    rk = row_kernel(model.background, model.edges, model.window)
    theta = model.theta
    if rk is None or theta.shape != (1,):
        return None
    code, e1, e2, c1, c2 = rk
    scale = (_EMPTY if model.bin_scale is None
             else np.ascontiguousarray(model.bin_scale, float))
    out = scan_rows(code, e1, e2, c1, c2, np.ascontiguousarray(model.used, np.int64), scale,
                    np.ascontiguousarray(n.reshape(1, -1)), np.ascontiguousarray(sat, float),
                    np.ascontiguousarray(f), float(model.bkg_yield), float(theta[0]),
                    float(model.lower[0]), float(model.upper[0]), int(steps), float(tol))
    status, s, s_err, b, th, nll, conv, hess, d2 = out
    if status:
        return None
    nb, nbin = f.shape
    one_start = nb > 1 and bool(theta[0] == theta[0])  # (not NaN: scan_rows' rule)
    # d2 as (B, 1, 1, N) rows, one shared by all with a zero stride (compiled_profile's)
    curvature = np.ndarray((nb, 1, 1, nbin), float, d2, 0,
                           (0 if one_start else d2.strides[0], 0, 0, d2.strides[1]))
    curvature.flags.writeable = False
    return {"s": s, "s_error": s_err, "b": b, "theta": th, "nll": nll, "converged": conv,
            "hessian": hess, "curvature": curvature}


#: the unweighted scale, no element (writable, as the kernels were specialised on; with
#: no element nothing is ever written into it)
_EMPTY = np.empty(0)


def scan_call(model: Any, sat: np.ndarray) -> tuple | None:
    """The arguments of :func:`scan_table` but ``steps`` and ``tol`` for a scan of
    ``model`` (its counts and fractions, every row from its background-only fit), or None
    where ``profile_signal`` would not take the compiled scan call (:func:`scan_rows`).
    The arrays are the call's own (copies of the model's writable ones), so one tuple
    serves every scan of one prepared model (``scan_prepared``'s kept entry); ``sat``:
    the counts' saturated term."""
    n, f, theta = model.counts, model.fractions, model.theta
    if not (type(n) is np.ndarray and n.ndim == 1 and n.dtype == np.float64
            and type(f) is np.ndarray and f.ndim == 2 and f.dtype == np.float64
            and f.shape[1] == n.size and theta.shape == (1,)):
        return None
    rk = row_kernel(model.background, model.edges, model.window)
    if rk is None:
        return None
    code, e1, e2, c1, c2 = rk
    scale = (_EMPTY if model.bin_scale is None
             else np.array(model.bin_scale, float, order="C"))
    return (code, e1, e2, c1, c2, np.array(model.used, np.int64, order="C"), scale,
            np.array(n.reshape(1, -1), order="C"), np.array(sat, float, ndmin=1),
            np.ascontiguousarray(f), float(model.bkg_yield), float(theta[0]),
            float(model.lower[0]), float(model.upper[0]), float(model.nll_background))


@njit(cache=True, nogil=True)
def scan_table(code, e1, e2, c1, c2, used, scale, n, sat, f, b0, th0, lo, hi, nll_b, steps,
               tol):  # pragma: no cover - compiled
    """:func:`scan_rows`' fits and the scan's table from them, in one call: ``(status, s,
    s_error, b, nll, converged, unconverged, q0, z, -z, best, plain)``.  q0 = 2 (nll_b -
    nll) where s > 0 and that is positive, else 0 (``scan_prepared``'s np.where and
    np.maximum, the same operations), Z = sqrt(q0), ``best`` the first largest q0 (argmax).
    ``plain`` False when a row's 2 (nll_b - nll) with s > 0 is zero, NaN or infinite,
    where numpy's rules for signed zeros and NaN decide: the caller computes q0 as before.
    The ~12 numpy calls of the table cost ~40 us of a 100-bin scan with cold caches."""
    status, s, s_err, b, _, nll, conv, _, _ = scan_rows(
        code, e1, e2, c1, c2, used, scale, n, sat, f, b0, th0, lo, hi, steps, tol)
    nb = s.size
    q0 = np.empty(nb)
    z = np.empty(nb)
    neg = np.empty(nb)
    plain = True
    best = 0
    top = -math.inf
    unconverged = 0
    for r in range(nb):
        if not conv[r]:
            unconverged += 1
        q = 0.0
        if s[r] > 0.0:
            t = 2.0 * (nll_b - nll[r])
            if not (t > 0.0 or t < 0.0) or not math.isfinite(t):
                plain = False
            if t > 0.0:
                q = t
        q0[r] = q
        z[r] = math.sqrt(q)
        neg[r] = -z[r]
        if q > top:
            top = q
            best = r
    return status, s, s_err, b, nll, conv, unconverged, q0, z, neg, best, plain


def scan_entry(call: tuple) -> Any:
    """:func:`scan_table`'s compiled entry for the argument types of ``call``
    (:func:`scan_call`'s, then ``steps`` and ``tol``), once it has been compiled for them:
    the function the dispatcher would run, called without its type dispatch (17 arguments
    typed at each call, ~6 us of a kept 100-bin scan with cold caches); else
    :func:`scan_table` itself.  For a caller that keeps ``call``'s arrays unchanged (the
    kept scan's slot: the types cannot change)."""
    try:
        sig = tuple(scan_table.typeof_pyval(a) for a in (*call, 100, 1e-6))
        done = scan_table.overloads.get(sig)
    except (AttributeError, TypeError, ValueError):   # (another numba: the dispatcher)
        done = None
    entry = getattr(done, "entry_point", None)
    return entry if callable(entry) else scan_table


def compiled_profile(model: Any, n: np.ndarray, f: np.ndarray, s: Any, b: Any,
                     theta: np.ndarray, fixed: bool, sat: np.ndarray, steps: int,
                     tol: float) -> dict | None:
    """``profile_signal``'s result for every row from one compiled call, or None (the
    numpy path must run).  ``n`` is ``(N,)`` or ``(B, N)``; ``s``, ``b`` a value per row or
    one for all; ``theta`` ``(B, 1)``, or ``(1,)``: one start for every row; ``sat`` the
    rows' saturated terms."""
    rk = row_kernel(model.background, model.edges, model.window)
    if rk is None or theta.shape[-1] != 1:
        return None
    code, e1, e2, c1, c2 = rk
    nb, nbin = f.shape
    off = 0 if fixed else 1
    p = off + 2
    x = np.empty((nb, p))
    if not fixed:
        x[:, 0] = s
    x[:, off] = b
    # every row from one theta (a scan's start): one curvature for all (profile_rows)
    if theta.ndim == 1:
        x[:, off + 1] = theta[0]
        one_start = nb > 1 and bool(theta[0] == theta[0])  # (not NaN, as below)
    else:
        x[:, off + 1] = theta[:, 0]
        one_start = nb > 1 and bool((theta[:, 0] == theta[0, 0]).all())
    lower = np.array((-math.inf,) * (p - 1) + (float(model.lower[0]),))
    upper = np.array((math.inf,) * (p - 1) + (float(model.upper[0]),))
    scale = (np.empty(0) if model.bin_scale is None
             else np.ascontiguousarray(model.bin_scale, float))
    s_fix = np.array(s, float) if fixed else np.zeros(nb)
    d2 = np.empty((1 if one_start else nb, nbin))
    nll = np.empty(nb)
    conv = np.zeros(nb, np.bool_)
    hess = np.zeros((nb, p, p))
    s_err = np.full(nb, np.nan)
    status = profile_rows(code, e1, e2, c1, c2,
                          np.ascontiguousarray(model.used, np.int64), scale,
                          np.ascontiguousarray(n if n.ndim == 2 else n.reshape(1, -1), float),
                          np.ascontiguousarray(sat, float),   # (at least 1-d)
                          np.ascontiguousarray(f, float), x, s_fix, lower, upper, int(steps),
                          12, 1e-8, float(tol), 1e-9, d2, nll, conv, hess, s_err)
    if status:
        return None
    # d2 as (B, 1, 1, N) rows, one shared by all with a zero stride: the view
    # broadcast_to makes, without its ~10 us (a 100-bin scan's 0.5%)
    curvature = np.ndarray((nb, 1, 1, nbin), float, d2, 0,
                           (0 if one_start else d2.strides[0], 0, 0, d2.strides[1]))
    curvature.flags.writeable = False
    return {"s": s_fix if fixed else x[:, 0].copy(), "s_error": s_err, "b": x[:, off].copy(),
            "theta": x[:, off + 1:].copy(), "nll": nll, "converged": conv,
            "hessian": None if fixed else hess, "curvature": curvature}
