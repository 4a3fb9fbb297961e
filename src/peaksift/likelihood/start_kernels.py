"""Compiled (numba, cached on disk) steps of a free fit's start finding.

* :func:`profile_widths` -- the width profile of :mod:`.start_widths` in one call: the
  window-clipped edges, each width's band of edges, the Gaussian's rows there
  (:func:`peaksift.shapes.compiled.gaussian_width_rows`) and both yields profiled
  (:func:`profile_two_yields`).  The same operations in the same order as the
  numpy glue it replaces (~10 numpy calls), so the same numbers.
* :func:`coarse_scan` -- the coarse likelihood scan of the window for candidate masses
  (:mod:`.starts`): the Gaussian's rows at every trial mass and both yields profiled;
  :func:`local_maxima` -- its separated local maxima, best first.
* :func:`profile_two_yields` -- under both: at each row of signal fractions, the signal
  yield and the background normalisation profiled (the coarse scan's numpy reference in
  :mod:`.coarse_scan` uses it too).
* :func:`narrow_rows` -- the bins where a peak narrower than a bin could gain enough to be
  a start (:func:`.narrow.narrow_candidates`'s bound from the bins' Poisson deviances).
* :func:`background_fit` -- a background-only start fit (:mod:`.start_background`) in one
  call: the used bins' effective counts and the saturated constant
  (:func:`.cost._binned_data`'s), the problem's buffers, :func:`.driver._drive` and the
  positive-definiteness test of :func:`.minimize.covariance`.  The constant is summed in
  bin order (numpy sums pairwise): it moves the NLL by rounding only.

Imported on first use (:func:`peaksift._jit.compiled_module`): importing the likelihood
loads no numba.  ``tests/test_likelihood_start_kernels.py`` checks it against scipy's
normal CDF and an iminuit fit written in the test.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from ..shapes.compiled import gaussian_width_rows
from ..shapes.compiled_math import vlog
from .driver import CONVERGED, _component, _drive
from .kernels import _SUMS, bin_counts, covariance_small

__all__ = ["BAND", "SCAN_BAND", "background_fit", "background_fit_counts", "coarse_gains",
           "coarse_rows", "coarse_scan", "local_maxima", "narrow_rows", "profile_two_yields",
           "profile_widths"]

#: the coarse scan's rows are computed within this many widths of their mass (beyond, a
#: bin holds < exp(-SCAN_BAND^2 / 2) ~ 3e-18 of the row's peak bin: below the profile's BAND)
SCAN_BAND = 9.0


#: the coarse scan treats a trial mass's signal fractions below this fraction of their
#: largest value as 0 (its far tails): those bins then hold background only, summed in
#: closed form, so a trial costs its peak's bins instead of the whole window
BAND = 1e-12


@njit(cache=True, nogil=True, fastmath=_SUMS, error_model="numpy")
def profile_two_yields(n, s, f, g, x, nll, iterations):  # pragma: no cover - compiled
    """Profile a signal yield and a background normalisation at each trial mass: row m of
    ``f`` holds the signal's bin fractions at mass m, ``g`` the background's; ``x (M, 2)``
    starts and receives the yields, ``nll (M,)`` receives the NLL (saturated term left
    out).  Damped Newton on the Fisher information (the step of
    :func:`~peaksift.likelihood.minimize.damped_step`, solved in closed form for 2 x 2),
    per mass until a step at damping <= 1e-3 gains < 1e-6, its NLL gains < 1e-6 in two
    steps running, or ``iterations`` are done.
    Bins outside a mass's band (see :data:`BAND`) enter through running sums."""
    nb = n.size
    # running sums of the background-only terms: s g, n s, n s ln(s g)
    cg = np.zeros(nb + 1)
    cn = np.zeros(nb + 1)
    cc = np.zeros(nb + 1)
    for j in range(nb):
        ns = n[j] * s[j]
        cg[j + 1] = cg[j] + s[j] * g[j]
        cn[j + 1] = cn[j] + ns
        cc[j + 1] = cc[j] + (ns * math.log(s[j] * g[j]) if ns > 0.0 else 0.0)
    for m in range(f.shape[0]):
        a0, a1, cur = _profile_row(n, s, f, g, m, 0, nb, cg, cn, cc, x[m, 0], x[m, 1],
                                   iterations)
        x[m, 0] = a0
        x[m, 1] = a1
        nll[m] = cur


@njit(cache=True, nogil=True, fastmath=_SUMS, error_model="numpy")
def _nll2_grad(n, s, f, g, m, j0, j1, a0, a1, out_g, out_n, out_c):  # pragma: no cover
    """sum(s mu - n s ln(s mu)) of mu = a0 f[m] + a1 g over all bins at ``(a0, a1)``: the
    band [j0, j1) term by term, the rest (background only) from its sums; inf when mu <= 0
    anywhere.  With it, from the same pass over the band, the gradient ``(g0, g1)`` and the
    Fisher information ``(h00, h01, h11)`` there.  (No early exit and vlog: the band's
    loop vectorises.)"""
    mu1 = max(1e-300, a1)
    # background-only bins: d/da1 = sum s g - n s / a1, information sum s g / a1
    g0 = 0.0
    g1 = out_g - out_n / mu1
    h00 = 0.0
    h01 = 0.0
    h11 = out_g / mu1
    if not a1 > 0.0 and (out_g > 0.0 or out_n > 0.0):
        return math.inf, g0, g1, h00, h01, h11
    val = a1 * out_g - out_c
    if out_n > 0.0:
        val -= out_n * math.log(a1)
    bad = 0
    band = 0.0
    for j in range(j0, j1):
        fm = f[m, j]
        gj = g[j]
        mu = a0 * fm + a1 * gj
        bad += 0 if mu > 0.0 else 1
        sj = s[j]
        smu = sj * mu
        band += smu - n[j] * sj * vlog(smu)
        w = sj / max(mu, 1e-300)
        r = sj - n[j] * w
        g0 += fm * r
        g1 += gj * r
        h00 += w * fm * fm
        h01 += w * fm * gj
        h11 += w * gj * gj
    return (math.inf if bad else val + band), g0, g1, h00, h01, h11


@njit(cache=True, nogil=True, fastmath=_SUMS, error_model="numpy")
def _profile_row(n, s, f, g, m, lo, hi, cg, cn, cc, a0, a1,
                 iterations):  # pragma: no cover - compiled
    """Row ``m`` of :func:`profile_two_yields` from the yields ``(a0, a1)``: the profiled
    yields and the NLL.  One pass over the row's band a step: the trial's NLL, gradient and
    information together (:func:`_nll2_grad`).  The row is 0 outside bins ``[lo, hi)``
    (``0, n.size``: anywhere): its band is looked for there only, the same bins as over the
    whole row (a scan of every bin cost ~3 us a row on 1,350 bins, its maximum a float
    select that does not vectorise)."""
    nb = n.size
    top = 0.0
    for j in range(lo, hi):
        top = max(top, f[m, j])
    j0 = lo
    while j0 < hi and not f[m, j0] > BAND * top:
        j0 += 1
    j1 = hi
    while j1 > j0 and not f[m, j1 - 1] > BAND * top:
        j1 -= 1
    if j0 == hi:  # no bin above the band's floor: none in the whole row either
        j0 = nb
        j1 = nb
    out_g = cg[nb] - cg[j1] + cg[j0]
    out_n = cn[nb] - cn[j1] + cn[j0]
    out_c = cc[nb] - cc[j1] + cc[j0]
    cur, g0, g1, h00, h01, h11 = _nll2_grad(n, s, f, g, m, j0, j1, a0, a1, out_g, out_n,
                                            out_c)
    lam = 1e-3
    quiet = 0
    for _ in range(iterations):
        floor = 1e-6 * 0.5 * (abs(h00) + abs(h11)) + 1e-300
        d00 = h00 + lam * (h00 + floor) + 1e-14 * floor
        d11 = h11 + lam * (h11 + floor) + 1e-14 * floor
        det = d00 * d11 - h01 * h01
        s0 = -(d11 * g0 - h01 * g1) / det
        s1 = -(d00 * g1 - h01 * g0) / det
        if not (math.isfinite(s0) and math.isfinite(s1)):
            s0 = 0.0
            s1 = 0.0
        t, t0, t1, t00, t01, t11 = _nll2_grad(n, s, f, g, m, j0, j1, a0 + s0, a1 + s1,
                                              out_g, out_n, out_c)
        gain = 0.0
        if t <= cur:
            gain = cur - t
            a0 += s0
            a1 += s1
            cur = t
            g0, g1, h00, h01, h11 = t0, t1, t00, t01, t11
            if gain < 1e-6 and lam <= 1e-3:
                break  # a nearly undamped Newton step gained < 1e-6: at the minimum
            lam = max(lam * 0.1, 1e-9)
        else:
            lam *= 10.0
        quiet = quiet + 1 if gain < 1e-6 else 0
        if quiet >= 2:
            break
    return a0, a1, cur


@njit(cache=True, nogil=True)
def profile_widths(edges, lo, hi, n, s, g, mass, widths, band, y0, y1, rows, y,
                   nll):  # pragma: no cover - compiled
    """A Gaussian at ``mass`` of each width ``widths[j]`` (rows of ``rows (K, E-1)``, on
    the edges within ``band`` widths of the mass, the rest 0) on the background fractions
    ``g``, its yield and the background total profiled from ``(y0, y1)``: yields into ``y
    (K, 2)``, NLLs (saturated term left out) into ``nll (K,)``.  False when a row cannot be
    made (no probability in the window)."""
    ne = edges.size
    x = np.empty(ne)
    for i in range(ne):
        x[i] = min(max(edges[i], lo), hi)
    k = widths.size
    i0 = np.empty(k, np.int64)
    i1 = np.empty(k, np.int64)
    for j in range(k):
        reach = band * widths[j]
        i0[j] = max(np.searchsorted(x, mass - reach) - 1, 0)
        i1[j] = min(np.searchsorted(x, mass + reach) + 1, ne - 1)
    if not gaussian_width_rows(x, mass, widths, i0, i1, lo, hi, rows):
        return False
    for j in range(k):
        y[j, 0] = y0
        y[j, 1] = y1
    profile_two_yields(n, s, rows, g, y, nll, 25)
    return True


@njit(cache=True, nogil=True)
def coarse_rows(edges, lo, hi, grid, sigma, frac):  # pragma: no cover - compiled
    """The coarse scan's signal rows: a Gaussian of width ``sigma`` at every trial mass
    ``grid[m]`` (the rows of :func:`peaksift.shapes.compiled.gaussian_rows` on the
    window-clipped edges, each within :data:`SCAN_BAND` widths, the rest 0) into ``frac
    (M, E-1)``.  They do not depend on the counts (:mod:`.coarse_scan` keeps them per
    binning).  False when a row cannot be made."""
    ne = edges.size
    e = np.empty(ne)
    for i in range(ne):
        e[i] = min(max(edges[i], lo), hi)
    # each row only on the edges within SCAN_BAND widths of its mass, the rest 0: the
    # profile uses a row only where it exceeds BAND (1e-12) of its peak, which a bin
    # beyond 7.5 widths never does, and a row's fractions are computed edge by edge, so
    # the numbers are those of the whole row (gaussian_rows)
    width = np.empty(1)
    width[0] = sigma
    i0 = np.empty(1, np.int64)
    i1 = np.empty(1, np.int64)
    for b in range(grid.size):
        i0[0] = max(np.searchsorted(e, grid[b] - SCAN_BAND * sigma) - 1, 0)
        i1[0] = min(np.searchsorted(e, grid[b] + SCAN_BAND * sigma) + 1, ne - 1)
        if not gaussian_width_rows(e, grid[b], width, i0, i1, lo, hi, frac[b:b + 1]):
            return False
    return True


@njit(cache=True, nogil=True)
def coarse_scan(edges, lo, hi, grid, sigma, n, s, g, x, nll):  # pragma: no cover - compiled
    """The coarse likelihood scan of the window: the rows of :func:`coarse_rows` on the
    background fractions ``g``, the yield and the background total profiled from ``x (M,
    2)`` (:func:`profile_two_yields`): yields into ``x``, NLLs into ``nll (M,)``.  False
    when a row cannot be made."""
    frac = np.empty((grid.size, edges.size - 1))
    if not coarse_rows(edges, lo, hi, grid, sigma, frac):
        return False
    profile_two_yields(n, s, frac, g, x, nll, 25)
    return True


@njit(cache=True, nogil=True)
def local_maxima(signal, nll, nll0, most, sign, index, gain):  # pragma: no cover - compiled
    """The separated local maxima of the coarse scan's gain ``q = 2 (nll0 - nll)`` (0 where
    the yield ``signal`` has not the sign ``sign`` or the NLL is not finite): positive, not
    below either neighbour (the ends compare with their one neighbour), the largest first
    (ties in index order); up to ``most`` of them into ``index`` and ``gain``, their number
    returned."""
    m = nll.size
    q = np.empty(m)
    for i in range(m):
        ok = sign * signal[i] > 0.0 and math.isfinite(nll[i])
        q[i] = 2.0 * (nll0 - nll[i]) if ok else 0.0
    peaks = np.empty(m, np.int64)
    k = 0
    for i in range(m):
        left = q[i - 1] if i > 0 else -math.inf
        right = q[i + 1] if i + 1 < m else -math.inf
        if q[i] > 0.0 and q[i] >= left and q[i] >= right:
            # insertion into the list ordered by decreasing q, after its equals (stable)
            j = k
            while j > 0 and q[peaks[j - 1]] < q[i]:
                peaks[j] = peaks[j - 1]
                j -= 1
            peaks[j] = i
            k += 1
    k = min(k, most)
    for j in range(k):
        index[j] = peaks[j]
        gain[j] = q[peaks[j]]
    return k


@njit(cache=True, nogil=True, error_model="numpy")
def narrow_rows(e, n, b, s, k, least, exclude, rows):  # pragma: no cover - compiled
    """The bins ``j`` whose ``2k + 1`` bins around them (bins beyond the ends count 0) hold
    a Poisson deviance ``2 s (b - n + n ln(n / b))`` (0 where not finite) above 0 and at
    least ``least``, and which lie outside every ``exclude[i] = (lo, hi)`` mass interval:
    into ``rows``, their number returned."""
    nb = n.size
    cdev = np.zeros(nb + 2 * k + 1)
    acc = 0.0
    for j in range(nb):  # the running sum in bin order, as numpy's cumsum
        t = n[j] * math.log(n[j] / b[j]) if n[j] > 0.0 else 0.0
        d = 2.0 * s[j] * (b[j] - n[j] + t)
        acc += d if math.isfinite(d) else 0.0
        cdev[k + 1 + j] = acc
    for i in range(nb + k + 1, nb + 2 * k + 1):
        cdev[i] = acc
    m = 0
    for j in range(nb):
        bound = cdev[j + 2 * k + 1] - cdev[j]
        if not (bound > 0.0 and bound >= least):
            continue
        outside = True
        for i in range(exclude.shape[0]):
            if not (e[j + 1] <= exclude[i, 0] or e[j] >= exclude[i, 1]):
                outside = False
                break
        if outside:
            rows[m] = j
            m += 1
    return m


@njit(cache=True, nogil=True)
def background_fit(static, n, scale, mask, full, free, x0, lower, upper, max_iter, edm_goal,
                   floor, posdef_tol, x_out):  # pragma: no cover - compiled
    """Fisher scoring (:func:`.driver._drive`) of a background-only binned cost from
    ``x0`` on the bins ``mask`` selects (empty: every bin), ``static`` the problem's fixed
    arrays (:class:`.start_background._BackgroundFit`): True with the minimum in ``x_out``
    when it converged to a point whose information is positive definite (scaled, above
    ``posdef_tol``), else False (the caller's general path then answers)."""
    (code, edata, escal, pstart, rstart, yidx, yfree, value_row, drow, dcomp, dfree, rows,
     nedges) = static
    nall = n.size
    m = nall
    if mask.size:
        m = 0
        for j in range(nall):
            if mask[j]:
                m += 1
    bins = np.empty(m, np.int64)
    k = 0
    for j in range(nall):
        if mask.size == 0 or mask[j]:
            bins[k] = j
            k += 1
    s = np.empty(m)
    eff = np.empty(m)
    unit = True
    for i in range(m):
        s[i] = scale[bins[i]]
        eff[i] = n[bins[i]] * s[i]
        unit = unit and s[i] == 1.0
    # the saturated constant sum(n~ ln n~ - n~) - sum(n~ ln s), as _binned_data's
    const = 0.0
    for i in range(m):
        t = eff[i]
        const += t * math.log(t if t > 0.0 else 1.0) - t
    if not unit:
        c2 = 0.0
        for i in range(m):
            c2 += eff[i] * math.log(s[i])
        const -= c2
    npar = x0.size
    prob = (code, edata, escal, pstart, rstart, yidx, yfree, value_row, drow, dcomp, dfree,
            bins, eff, s, unit, floor, np.zeros((rows, nedges)), np.zeros(m),
            np.zeros((npar, m)), np.zeros(npar), np.zeros((npar, npar)), np.empty(1))
    info = np.empty((npar, npar))
    x_last = np.empty(npar)
    status, _, _ = _drive(prob, full, free, const, x0, lower, upper, max_iter, edm_goal,
                          False, x_out, 0.0, info, 0.0, 0.0, x_out, info, np.empty(npar),
                          x_last)
    if status != CONVERGED:
        return False
    return covariance_small(info, posdef_tol, np.empty((npar, npar)))


@njit(cache=True, nogil=True)
def background_fit_counts(static, n, scale, mask, full, free, x0, lower, upper, max_iter,
                          edm_goal, floor, posdef_tol, x_out, biy,
                          counts):  # pragma: no cover - compiled
    """:func:`background_fit`, then, where it converged, the background's expected counts
    in every bin at its minimum (``full`` with the free values ``x_out``) into ``counts``:
    the CDF row of its edge kernel and :func:`.kernels.bin_counts` at the yield ``biy``,
    as :func:`.start_background.background_counts` makes them (the same kernel on the same
    edges).  Returns ``(converged, counts made)``."""
    if not background_fit(static, n, scale, mask, full, free, x0, lower, upper, max_iter,
                          edm_goal, floor, posdef_tol, x_out):
        return False, False
    code, edata, escal, pstart = static[0], static[1], static[2], static[3]
    v = full.copy()
    for i in range(free.size):
        v[free[i]] = x_out[i]
    cdf = np.empty((static[11], static[12]))
    if not _component(code[0], edata[0], escal[0, 0], escal[0, 1], v, pstart[0], cdf):
        return True, False
    bin_counts(cdf[0], v[biy], counts)
    return True, True


@njit(cache=True, nogil=True, error_model="numpy")
def coarse_gains(n, s, f, bexp, iterations, dips, index, gain):  # pragma: no cover
    """The coarse scan of :func:`.coarse_scan._compiled_scan` on its rows ``f`` in one
    call: the background's shape (``bexp`` floored at 1e-12, normalised), its NLL alone
    ``sum(s mu - n s ln(s mu))`` (summed in bin order, where numpy's sum is pairwise: the
    gains move by rounding), both yields profiled at every trial mass from 0.1 sqrt(total)
    and the total (:func:`profile_two_yields`) and the local maxima (:func:`local_maxima`):
    up to 3 with a positive signal into ``index[:3]``, ``gain[:3]`` and, with ``dips``, up
    to 2 with a negative one into ``index[3:5]``, ``gain[3:5]``.  Returns their numbers."""
    nb = n.size
    g = np.empty(nb)
    btot = 0.0
    for j in range(nb):
        b = bexp[j]
        g[j] = b if (b > 1e-12 or math.isnan(b)) else 1e-12  # np.maximum
        btot += g[j]
    nll0 = 0.0
    for j in range(nb):
        g[j] = g[j] / btot
        mu = btot * g[j]
        mu = mu if (mu > 1e-300 or math.isnan(mu)) else 1e-300  # binned_nll's floor
        smu = s[j] * mu
        nll0 += smu - n[j] * s[j] * math.log(smu)
    m = f.shape[0]
    x = np.empty((m, 2))
    a0 = 0.1 * math.sqrt(max(btot, 1.0))
    for i in range(m):
        x[i, 0] = a0
        x[i, 1] = btot
    nll = np.empty(m)
    profile_two_yields(n, s, f, g, x, nll, iterations)
    k1 = local_maxima(x[:, 0], nll, nll0, 3, 1.0, index[:3], gain[:3])
    k2 = local_maxima(x[:, 0], nll, nll0, 2, -1.0, index[3:], gain[3:]) if dips else 0
    return k1, k2
