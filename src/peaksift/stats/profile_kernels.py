"""Compiled (numba, cached on disk) stacked profile of the signal over mass hypotheses.

What is here and when it is used
--------------------------------
:func:`profile_rows` runs :func:`peaksift.stats.toy_model.profile_signal`'s fit -- the
same Levenberg-Marquardt rule as :func:`peaksift.likelihood.minimize_stacked` (damping, the
acceptance and convergence tests, parameters pinned at a bound, the step-size test), the same
exact Hessian (the background shape's curvature from the start) and the same small-term
Poisson NLL -- row by row inside one numba call, for backgrounds with a compiled row kernel
(``powerlaw``, ``exponential`` / ``exppoly`` of order 1, :mod:`peaksift.shapes.compiled`).

Why: the numpy path costs ~20 numpy calls per iteration whatever the size; on a scan of 100
masses x 100 bins that call overhead was ~2/3 of the scan (its cost per mass and bin 1.5x
that of 1,000 bins).  Here a row's iterations run without returning to Python.

A row whose start lies far below the counts under its signal (a background fitted badly
there) first moves its signal yield to the minimum in s alone (:func:`_signal_start`,
as the numpy path's :func:`peaksift.stats.toy_model.signal_start`): from s = 0 there the
Newton steps only double s.

Its calls from Python (:mod:`.profile_calls`) return None whenever it cannot answer as the
numpy path would (another background, a row kernel declining a point where the numpy path
switches to a series, a singular or non-finite Newton step, where numpy would take a
least-squares step or zero components): the numpy path then runs, and stays the reference (``PEAKSIFT_NUMPY_COST=1`` selects it).
``tests/test_profile_kernels.py`` checks both paths against iminuit fits written in the test;
the numbers agree with the numpy path to rounding (q0 to ~1e-9 on a 10,000-bin scan).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, types
from numba.extending import intrinsic
from numba.np.arrayobj import make_array, populate_array

from ..likelihood.kernels import solve_sized_into, solve_small_into
from ..shapes.compiled import powerlaw_rows
from ..shapes.compiled_exponential import exponential_rows_into
from ..shapes.compiled_math import vlog

__all__ = ["first_error", "profile_rows"]

#: :func:`peaksift.stats.toy_model` floors expectations here in its gradients and Hessians
NU_FLOOR = 1e-100
#: and here before a logarithm (:data:`peaksift.likelihood.MU_FLOOR`)
MU_FLOOR = 1e-300


@intrinsic
def borrowed(typingctx, arr):  # pragma: no cover - compile time
    """The array ``arr`` without its reference count (a null meminfo): numba then passes
    it to a compiled function without the two locked instructions per array and call.
    Valid only while ``arr`` itself is alive (an argument of the caller)."""
    if not isinstance(arr, types.Array):
        return None

    def codegen(context, builder, sig, args):
        src = make_array(sig.args[0])(context, builder, value=args[0])
        out = make_array(sig.return_type)(context, builder)
        populate_array(out, data=src.data, shape=src.shape, strides=src.strides,
                       itemsize=src.itemsize, meminfo=None)
        return out._getvalue()
    return arr(arr), codegen



@njit(cache=True, nogil=True, inline="always")
def _background(code, e1, e2, c1, c2, used, scale, theta, kbuf, frac, grad, gs, dgs,
                slot, ev):  # pragma: no cover - compiled
    """Used-bin background fractions ``gs[slot]`` and derivatives ``dgs[slot]`` at
    ``theta``, scaled as ``toy_model.bkg_fractions`` (``scale`` empty: unweighted), from
    the row kernel's full rows ``frac``, ``grad`` ``(1, E-1)``; False where the kernel
    declines.  Every bin used and unweighted (a scan's usual case), the kernel writes
    the slot's rows itself (a copy less per evaluation, and two rows of E-1 less that a
    10,000-bin scan kept in the processor's cache).  Rows by index where copied: the
    arrays are :func:`borrowed` (no reference counts), so the slot's one-row views are
    free.  ``ev (E,)``: the exponential's work row (its allocation per call was ~0.1 us,
    ~6 calls a row: a fixed cost per hypothesis)."""
    kbuf[0] = theta
    direct = used.size == frac.shape[1] and scale.size == 0
    out_f = gs[slot:slot + 1] if direct else frac
    out_g = dgs[slot:slot + 1] if direct else grad
    if code == 0:
        ok = powerlaw_rows(e1, e2, kbuf, c1, c2, out_f, out_g)
    else:
        ok = exponential_rows_into(e1, e2, kbuf, out_f, out_g, ev)
    if not ok:
        return False
    if direct:
        return True
    nb = gs.shape[1]
    unit = scale.size == 0
    for j in range(nb):
        i = used[j]
        sc = 1.0 if unit else scale[i]
        gs[slot, j] = frac[0, i] * sc
        dgs[slot, j] = grad[0, i] * sc
    return True


@njit(cache=True, nogil=True, error_model="numpy", inline="always")
def _nll(n, nrow, f, r, gs, slot, s, b, sat, lb):  # pragma: no cover - compiled
    """``binned_nll(n[nrow], s f[r] + b gs[slot], saturated=False, small_terms=True)``;
    inf where an expectation is not positive (``profile_signal``'s rule).  ``lb (2, N)``:
    work rows for the expectations and the logarithms ``ln(n/mu)``, computed first in a
    loop that vectorises (:func:`peaksift.shapes.compiled_math.vlog`, within 1 ulp of the
    library's): the library's logarithm, one call per filled bin, made a bin's cost
    depend on whether it held an event (a 10,000-bin scan, half its bins empty, cost
    0.85x a 1,000-bin one per bin)."""
    nb = f.shape[1]
    for j in range(nb):
        nu = s * f[r, j] + b * gs[slot, j]
        lb[0, j] = nu
        lb[1, j] = vlog(max(n[nrow, j], MU_FLOOR) / max(MU_FLOOR, nu))
    val = 0.0
    for j in range(nb):
        nu = lb[0, j]
        if nu <= 0.0:
            return math.inf
        if math.isnan(nu):
            return math.nan
        nj = n[nrow, j]
        t = max(MU_FLOOR, nu) - nj
        if nj > 0.0:
            t += nj * lb[1, j]
        val += t
    return val - sat


@njit(cache=True, nogil=True, error_model="numpy", inline="always")
def _grad_hess(n, nrow, f, r, gs, dgs, slot, d2, d2row, s, b, off, grad,
               hess):  # pragma: no cover - compiled
    """``profile_signal``'s ``grad_hess`` for one row (one background parameter): the
    gradient and exact Hessian over ``(s, b, theta)`` (``off`` = 1) or ``(b, theta)``.
    Sums in registers, in the order of the loop ``grad[a] += col[a] w``, ``hess[a, c] +=
    col[a] col[c] v`` over the columns ``(f, g, b dg)``."""
    gs_ = gb = gt = 0.0
    hss = hbs = hbb = hts = htb = htt = 0.0
    curv = 0.0
    cross = 0.0
    for j in range(f.shape[1]):
        nj = n[nrow, j]
        gj = gs[slot, j]
        dgj = dgs[slot, j]
        nu = s * f[r, j] + b * gj
        if not math.isnan(nu):  # np.maximum keeps a NaN
            nu = max(NU_FLOOR, nu)
        w = 1.0 - nj / nu
        v = nj / (nu * nu)
        cb = gj
        ct = b * dgj
        if off:
            cs = f[r, j]
            gs_ += cs * w
            hss += cs * cs * v
            hbs += cb * cs * v
            hts += ct * cs * v
        gb += cb * w
        hbb += cb * cb * v
        gt += ct * w
        htb += ct * cb * v
        htt += ct * ct * v
        curv += d2[d2row, j] * w
        cross += dgj * w
    if off:
        grad[0] = gs_
        hess[0, 0] = hss
        hess[1, 0] = hbs
        hess[0, 1] = hbs
        hess[2, 0] = hts
        hess[0, 2] = hts
    grad[off] = gb
    grad[off + 1] = gt
    hess[off, off] = hbb
    hess[off + 1, off] = htb
    hess[off, off + 1] = htb
    hess[off + 1, off + 1] = htt + b * curv
    hess[off, off + 1] += cross
    hess[off + 1, off] += cross


@njit(cache=True, nogil=True, inline="always")
def _damped_step(hess, grad, lam, h, step, sm, sd):  # pragma: no cover - compiled
    """``minimize.damped_step`` (after ``_pin_at_bounds``) for one row, solved by
    :func:`peaksift.likelihood.kernels.solve_small`; False when the system is singular or
    the step not finite (numpy then takes a least-squares step or zeroes components: the
    numpy path answers)."""
    p = grad.size
    dsum = 0.0
    for a in range(p):
        dsum += abs(hess[a, a])
    floor = 1e-6 * (dsum / p) + 1e-300
    for a in range(p):
        for c in range(p):
            h[a, c] = hess[a, c]
        h[a, a] += lam * (hess[a, a] + floor) + 1e-14 * floor
    if p == 3:   # (the size known: the solve's loops unrolled)
        return solve_sized_into(h, grad, step, sm, sd, 3)
    return solve_small_into(h, grad, step, sm, sd)


#: :func:`_signal_start`'s rule (``toy_model``'s: START_RATIO, START_STOP, START_STEPS)
START_RATIO, START_STOP, START_STEPS = 4.0, 1.01, 30
#: a row not converged after this many iterations has its background's curvature computed
#: again at its point (``toy_model.REFRESH_AT``, which says why)
REFRESH_AT = 6

#: the rows of profile_rows' fraction buffers: the current point and a trial alternate in
#: rows 0 and 1 (an accepted trial's row becomes the current one), row 2 holds the start
_START = 2


@njit(cache=True, nogil=True)
def profile_rows(code, e1, e2, c1, c2, used, scale, n, sat, f, x, s_fix, lower, upper,
                 steps, tries, nll_tol, step_tol, slack, d2, nll_out, conv_out, hess_out,
                 s_err):  # pragma: no cover - compiled
    """Fit every row of ``f (B, N)``: ``x (B, P)`` holds ``(s, b, theta)`` (``P`` = 3) or,
    with the signal fixed at ``s_fix`` (``P`` = 2), ``(b, theta)``; ``n`` and ``sat`` have
    one row or B.  Returns 0 when done, else 1 + the row where the numpy path must answer.
    ``d2 (B, N)`` receives the background's curvature at the start (``bkg_second``); with
    one row (every row starts at the same theta, as a scan's hypotheses do) it is computed
    once, at the first row, and serves all: it depends on theta alone (so do the start's
    fractions and derivatives, likewise computed once).
    ``hess_out (B, P, P)`` the Hessian at each minimum (exact: the curvature at the start,
    or where a row ran past REFRESH_AT iterations, at its point then) and ``s_err`` the
    signal yield's error from it (``minimize.first_error``).
    Arrays are indexed by row, never sliced: a view costs two atomic reference counts.
    The work buffers are made here, once, and :func:`_rows` fits with them."""
    nb = f.shape[1]
    p = x.shape[1]
    nw = e1.size
    # gs, dgs: fractions and derivatives of the current point, a trial and the start
    # (_START), rows 3-4 the curvature's work; an accepted trial's row becomes the current
    # one, so each point costs one evaluation of the background (it cost two: the trial's
    # fractions, then its derivatives again).  mats, vecs: the (P, P) and (P,) work of a
    # Newton step; the last (1, N): a row's curvature computed again (REFRESH_AT)
    return _rows(code, e1, e2, c1, c2, used, scale, n, sat, f, x, s_fix, lower, upper,
                 steps, tries, nll_tol, step_tol, slack, d2, nll_out, conv_out, hess_out,
                 s_err, np.empty(1), np.empty(nw), np.empty((1, nw - 1)), np.empty((1, nw - 1)),
                 np.empty((5, nb)), np.empty((5, nb)), np.empty((2, nb)),
                 np.empty((8, p, p)), np.empty((8, p)), np.zeros(p, np.bool_),
                 np.empty((p, p + 1)), np.empty((1, nb)))


@njit(cache=True, nogil=True, error_model="numpy")
def _rows(code, e1, e2, c1, c2, used, scale, n, sat, f, x, s_fix, lower, upper,
          steps, tries, nll_tol, step_tol, slack, d2, nll_out, conv_out, hess_out,
          s_err, kbuf, ev, frac, grad_full, gs, dgs, lb, mats, vecs, pin,
          sm, d2p):  # pragma: no cover - compiled
    """:func:`profile_rows` with its work buffers.  Every array the Newton loop hands to
    a compiled helper is :func:`borrowed` first: each helper call took and gave back a
    reference per array argument, two locked instructions each, ~60 per iteration (with
    the two allocations of each solve, ~0.4 us of a row's ~1.4 us fixed cost).  The
    helpers of an iteration (:func:`_nll`, :func:`_grad_hess`, :func:`_background`,
    :func:`_damped_step`) are inlined here (numba's ``inline="always"``: their arguments
    were ~0.5 us of a row's fixed cost), under this function's ``error_model="numpy"``:
    without it the inlined NLL's loop got a division check and lost its vectorised
    logarithm; no division here can be by zero (the expectations are floored, the solve
    tests its pivots), so the numbers are the same."""
    e1 = borrowed(e1)
    e2 = borrowed(e2)
    used = borrowed(used)
    scale = borrowed(scale)
    n = borrowed(n)
    f = borrowed(f)
    d2 = borrowed(d2)
    kbuf = borrowed(kbuf)
    ev = borrowed(ev)
    frac = borrowed(frac)
    grad_full = borrowed(grad_full)
    gs = borrowed(gs)
    dgs = borrowed(dgs)
    lb = borrowed(lb)
    pin = borrowed(pin)
    sm = borrowed(sm)
    d2p = borrowed(d2p)
    hess = borrowed(mats[0])
    hp = borrowed(mats[1])
    h = borrowed(mats[2])
    grad = borrowed(vecs[0])
    gp = borrowed(vecs[1])
    step = borrowed(vecs[3])
    xr = borrowed(vecs[4])
    trial = borrowed(vecs[5])
    sd = borrowed(vecs[6])
    nrow = f.shape[0]
    p = x.shape[1]
    off = 1 if p == 3 else 0
    fixed = off == 0
    shared_d2 = d2.shape[0] == 1
    many_n = n.shape[0] > 1
    for r in range(nrow):
        nr = r if many_n else 0
        satr = sat[r] if sat.size > 1 else sat[0]
        d2r = 0 if shared_d2 else r
        for a in range(p):
            xr[a] = x[r, a]
        if (r == 0 or not shared_d2) and not _curvature(
                code, e1, e2, c1, c2, used, scale, xr[off + 1], lower[off + 1],
                upper[off + 1], kbuf, frac, grad_full, gs, dgs, d2, d2r, ev, 0, 1):
            return r + 1
        # every row from one theta (a scan's start): its fractions and derivatives are the
        # first row's (one of a row's ~6 evaluations of the background saved; the same bits)
        if (r == 0 or not shared_d2) and not _background(
                code, e1, e2, c1, c2, used, scale, xr[off + 1], kbuf, frac, grad_full,
                gs, dgs, _START, ev):
            return r + 1
        ci = _START
        s = s_fix[r] if fixed else xr[0]
        cur = _nll(n, nr, f, r, gs, ci, s, xr[off], satr, lb)
        if not math.isfinite(cur):  # start with a positive expectation everywhere
            s = 0.0
            if fixed:
                s_fix[r] = 0.0
            else:
                xr[0] = 0.0
            cur = _nll(n, nr, f, r, gs, ci, s, xr[off], satr, lb)
        lam = 1e-3
        conv = False
        dsrc = d2
        drow = d2r
        for _it in range(steps):
            if _it == REFRESH_AT:   # (the row's curvature at its point, in its own row)
                if not _curvature(code, e1, e2, c1, c2, used, scale, xr[off + 1],
                                  lower[off + 1], upper[off + 1], kbuf, frac, grad_full,
                                  gs, dgs, d2p, 0, ev, 3, 4):
                    return r + 1
                dsrc = d2p
                drow = 0
            s = s_fix[r] if fixed else xr[0]
            _grad_hess(n, nr, f, r, gs, dgs, ci, dsrc, drow, s, xr[off], off, grad, hess)
            # far below the counts under the signal at the start: s moved there first
            # (sum f, F, summed only where G - F = -grad[0] is positive; an addition a bin
            # in _grad_hess's loop cost ~1.5 % of a 100-bin scan)
            ff = _row_sum(f, r) if _it == 0 and not fixed and grad[0] < 0.0 else 0.0
            if ff > 0.0 and -grad[0] > (START_RATIO - 1.0) * ff:
                t = _signal_start(n, nr, f, r, gs, ci, xr, upper[0], satr, lb, cur, ff,
                                  grad[0], hess[0, 0])
                if t < cur:
                    cur = t
                    s = xr[0]
                    _grad_hess(n, nr, f, r, gs, dgs, ci, dsrc, drow, s, xr[off], off,
                               grad, hess)
            # _pin_at_bounds: a parameter on a bound whose descent leaves it holds still
            anypin = False
            for a in range(p):
                pin[a] = ((xr[a] <= lower[a] and grad[a] > 0.0)
                          or (xr[a] >= upper[a] and grad[a] < 0.0))
                anypin = anypin or pin[a]
            for a in range(p):
                gp[a] = 0.0 if pin[a] else grad[a]
                for c in range(p):
                    hp[a, c] = 0.0 if (pin[a] or pin[c]) else hess[a, c]
                if anypin and pin[a]:
                    hp[a, a] += 1.0
            accepted = False
            ti = 1 if ci == 0 else 0
            for _t in range(tries):
                if not _damped_step(hp, gp, lam, h, step, sm, sd):
                    return r + 1
                for a in range(p):
                    trial[a] = min(max(xr[a] + step[a], lower[a]), upper[a])
                st = s_fix[r] if fixed else trial[0]
                if not _background(code, e1, e2, c1, c2, used, scale, trial[off + 1],
                                   kbuf, frac, grad_full, gs, dgs, ti, ev):
                    return r + 1
                tn = _nll(n, nr, f, r, gs, ti, st, trial[off], satr, lb)
                if tn <= cur + slack:
                    # converged: the NLL's gain below nll_tol or every step below step_tol
                    # of its error sqrt|1/H_aa| (the step test only where it decides)
                    if lam <= 1e-2 and (cur - tn < nll_tol
                                        or _small(step, hess, step_tol, p)):
                        conv = True
                    for a in range(p):
                        xr[a] = trial[a]
                    cur = tn
                    ci = ti
                    lam = max(lam * 0.1, 1e-9)
                    accepted = True
                    break
                lam *= 10.0
            if not accepted:  # no descent at any damping: at the minimum to rounding
                conv = True
            if conv:
                break
        for a in range(p):
            x[r, a] = xr[a]
        nll_out[r] = cur
        conv_out[r] = conv
        if not fixed:
            _grad_hess(n, nr, f, r, gs, dgs, ci, dsrc, drow, xr[0], xr[off], off, grad,
                       hess)
            for a in range(p):
                for c in range(p):
                    hess_out[r, a, c] = hess[a, c]
            s_err[r] = first_error_into(hess, h, gp, step, sm, sd)
    return 0


@njit(cache=True, nogil=True, error_model="numpy")
def _signal_start(n, nrow, f, r, gs, slot, xr, s_hi, sat, lb, cur, ff, g_s,
                  h_ss):  # pragma: no cover - compiled
    """The row's NLL with its signal yield ``xr[0]`` moved to the minimum in s alone (b,
    theta held), or ``cur`` (``xr`` unchanged) where that is not lower: ``toy_model.
    signal_start``, which says why; ``ff`` = sum f = F, ``g_s`` = F - G and ``h_ss`` the
    NLL's derivatives in s at the start.  Newton steps on 1/G - 1/F = 0 while G >
    :data:`START_STOP` F, each a pass without logarithms.  A call of its own (inlined,
    every power-law scan of 100 bins cost ~2 % more, the rows that never call it too)."""
    s0 = xr[0]
    b = xr[1]
    nb = f.shape[1]
    gg = ff - g_s
    hh = h_ss
    s1 = s0
    for _ in range(START_STEPS):
        if not hh > 0.0:
            break
        s1 = min(s1 + (gg - ff) * gg / (ff * hh), s_hi)
        gg = 0.0
        hh = 0.0
        for j in range(nb):
            fj = f[r, j]
            nu = max(NU_FLOOR, s1 * fj + b * gs[slot, j])
            v = n[nrow, j] / (nu * nu)
            gg += fj * nu * v
            hh += fj * fj * v
        if not gg > START_STOP * ff:
            break
    if s1 == s0:
        return cur
    t = _nll(n, nrow, f, r, gs, slot, s1, b, sat, lb)
    if t < cur:
        xr[0] = s1
        return t
    return cur


@njit(cache=True, nogil=True, inline="always")
def _row_sum(f, r):  # pragma: no cover - compiled
    """sum f[r] (a loop that vectorises)."""
    t = 0.0
    for j in range(f.shape[1]):
        t += f[r, j]
    return t


@njit(cache=True, nogil=True)
def _small(step, hess, step_tol, p):  # pragma: no cover - compiled
    """Whether every component of the step is below ``step_tol`` times its error
    ``sqrt|1/H_aa|`` (inf where H_aa = 0): computed only where the NLL's gain does not
    decide already (it was computed, with the errors, at every iteration: three divisions
    and square roots, a tenth of a row's fixed cost)."""
    for a in range(p):
        e = math.sqrt(abs(1.0 / hess[a, a])) if hess[a, a] != 0.0 else math.inf
        if not abs(step[a]) < step_tol * e:
            return False
    return True


@njit(cache=True, nogil=True)
def _curvature(code, e1, e2, c1, c2, used, scale, th, lo, hi, kbuf, frac, grad, gs, dgs,
               out, row, ev, w0, w1):  # pragma: no cover - compiled
    """``toy_model.bkg_second`` for one row of one parameter into ``out[row]``: central
    differences of the fractions' derivative, step 1e-5 max(|theta|, 0.1), kept inside
    the bounds (rows ``w0`` and ``w1`` of ``gs``, ``dgs`` as work rows)."""
    hstep = 1e-5 * max(abs(th), 0.1)
    up = min(th + hstep, hi)
    if not _background(code, e1, e2, c1, c2, used, scale, up, kbuf, frac, grad, gs, dgs, w0,
                       ev):
        return False
    dn = max(th - hstep, lo)
    if not _background(code, e1, e2, c1, c2, used, scale, dn, kbuf, frac, grad, gs, dgs, w1,
                       ev):
        return False
    width = up - dn if up > dn else 1.0
    for j in range(out.shape[1]):
        out[row, j] = (dgs[w0, j] - dgs[w1, j]) / width
    return True


@njit(cache=True, nogil=True)
def first_error_into(hess, a, rhs, col, m, d):  # pragma: no cover - compiled
    """:func:`first_error` with the solve's work buffers ``m (p, p + 1)``, ``d (p,)`` (it
    allocated two arrays a row)."""
    p = hess.shape[0]
    tr = 0.0
    for i in range(p):
        tr += abs(hess[i, i])
    reg = 1e-12 * tr
    for i in range(p):
        for j in range(p):
            a[i, j] = hess[i, j]
        a[i, i] += reg
        rhs[i] = 0.0
    rhs[0] = -1.0   # the solve gives -a^-1 rhs
    ok = (solve_sized_into(a, rhs, col, m, d, 3) if p == 3
          else solve_small_into(a, rhs, col, m, d))
    if not ok:
        return math.nan
    v = col[0]
    return math.sqrt(v) if v > 0.0 else math.nan


@njit(cache=True, nogil=True)
def first_error(hess, a, rhs, col):  # pragma: no cover - compiled
    """:func:`peaksift.likelihood.first_error` of one row: ``sqrt((H + 1e-12 tr|H| I)^-1_00)``
    by :func:`peaksift.likelihood.kernels.solve_small` (``a``, ``rhs``, ``col``: work
    buffers); NaN where it is not positive or the system is singular.  This kernel's and
    the joint loop's (:mod:`peaksift.stats.joint_driver`): :func:`first_error_into` with
    the solve's buffers made here."""
    p = hess.shape[0]
    return first_error_into(hess, a, rhs, col, np.empty((p, p + 1)), np.empty(p))
