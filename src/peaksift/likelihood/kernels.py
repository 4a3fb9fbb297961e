"""Compiled fast path of the binned cost for the common shapes (numba, cached on disk).

What is here and when it is used
--------------------------------
* :func:`edge_kernel` -- for a shape with a compiled CDF (``gaussian``, ``powerlaw``,
  ``exponential`` / ``exppoly`` of order 1) an evaluator that writes the window-normalised
  CDF at every bin edge and its derivative in each shape parameter into rows of an array
  (the exponential's CDF less 1 where it falls: rows exact to rounding at its far end,
  :mod:`peaksift.shapes.compiled_exponential`; only the rows' differences are used);
  None for any other shape (those keep the numpy path of :mod:`.cost`).
* :class:`FusedBinned` -- the whole ``value_grad_info`` of a
  :class:`~peaksift.likelihood.cost.BinnedCost` whose components all have an edge kernel:
  the CDF rows of every component, then one pass over the bins that forms the expected
  counts, the NLL, its gradient and the Fisher information together (no (parameters x bins)
  Jacobian is written out).  A free fit of a Gaussian on a power law in 1,350 bins costs
  ~0.1 ms per evaluation this way against ~0.3 ms through ~20 numpy operations.
* :func:`solve_small` -- the minimiser's Newton steps (:func:`solve_small_into` with work
  buffers given, :func:`solve_sized_into` of a size known where it is called);
  :func:`covariance_small` -- :func:`.minimize.covariance` for a few parameters.

The numpy path (shapes' ``fractions_and_grad`` and :func:`~peaksift.likelihood.poisson.binned_nll`)
stays the reference: the same formulae, the same floors; the edge kernels return False
where that path switches to a series (the power law near k = 1) and the cost then takes the
numpy path for that evaluation.  ``tests/test_likelihood_kernels.py``
checks both against scipy's CDFs written in the test.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from numba import njit

from ..shapes import Exponential, ExpPoly, Gaussian, PowerLaw
from ..shapes.compiled import gaussian_edges, powerlaw_edges
from ..shapes.compiled_exponential import exponential_edges
from ..shapes.compiled_math import vlog

__all__ = ["FusedBinned", "edge_kernel"]

#: floating-point reordering only (vectorised sums); no assumption about NaN or infinity,
#: so a bad parameter point still gives a non-finite NLL that the minimiser rejects
_SUMS = {"reassoc", "contract"}


@njit(cache=True, nogil=True, error_model="numpy")
def poisson_pass(cdf, value_row, yields, yield_free, drow, dcomp, dfree, bins, n, s,
                 unit, floor, info, mu_out, jac, g, fisher):  # pragma: no cover - compiled
    """Over the used ``bins``: expected counts from the CDF rows, the NLL without its
    constant, the gradient and (``info``) the Fisher information over the free parameters.
    ``value_row[k]``: CDF row of component k, ``yields[k]`` its yield and ``yield_free[k]``
    its free index (or -1); derivative rows ``drow`` of component ``dcomp`` at free index
    ``dfree``; ``jac`` (free parameters x used bins) is scratch.  Bin fractions are floored
    at 0 and the expectation at ``floor`` as in the numpy path; a negative expectation
    returns an infinite NLL (the rest of the outputs then unset).

    The NLL's terms are summed here, in bin order, outside the vectorised pass
    (:func:`_pass`; until 2026-12-05 one scalar loop formed and summed them -- its test
    for a negative expectation, a float select, kept it from vectorising: ~8 of ~16 us
    on 1,350 bins, now ~3).  A sum inside a function compiled with ``_SUMS`` is
    reordered wherever it is inlined; this one is the same in every caller."""
    terms = np.empty(bins.size)
    if not _pass(cdf, value_row, yields, yield_free, drow, dcomp, dfree, bins, n, s, unit,
                 floor, info, mu_out, jac, g, fisher, terms):
        return math.inf
    val = 0.0
    for j in range(terms.size):
        val += terms[j]
    return val


@njit(cache=True, nogil=True, fastmath=_SUMS, error_model="numpy")
def _pass(cdf, value_row, yields, yield_free, drow, dcomp, dfree, bins, n, s, unit, floor,
          info, mu_out, jac, g, fisher, terms):  # pragma: no cover - compiled
    """:func:`poisson_pass` but the NLL's sum: its terms into ``terms``; False at a
    negative expectation (the gradient and information then unset)."""
    ncomp = value_row.size
    nd = drow.size
    npar = g.size
    nb = bins.size
    contiguous = nb == cdf.shape[1] - 1  # no masked bins: plain differences
    for j in range(nb):
        mu_out[j] = 0.0
    # row by row (vectorised): bin fractions of each component into mu and the jacobian
    # (contiguous bins in loops of their own, on row views: those vectorise)
    for k in range(ncomp):
        row = cdf[value_row[k]]
        y = yields[k]
        a = yield_free[k]
        if contiguous and a >= 0:
            ja = jac[a]
            for j in range(nb):
                d = max(0.0, row[j + 1] - row[j])
                mu_out[j] += y * d
                ja[j] = d
        elif contiguous:
            for j in range(nb):
                mu_out[j] += y * max(0.0, row[j + 1] - row[j])
        else:
            for j in range(nb):
                i = bins[j]
                d = max(0.0, row[i + 1] - row[i])
                mu_out[j] += y * d
                if a >= 0:
                    jac[a, j] = d
    for q in range(nd):
        row = cdf[drow[q]]
        ja = jac[dfree[q]]
        y = yields[dcomp[q]]
        if contiguous:
            for j in range(nb):
                ja[j] = y * (row[j + 1] - row[j])
        else:
            for j in range(nb):
                i = bins[j]
                ja[j] = y * (row[i + 1] - row[i])
    negative = False
    # (numpy's error model: no zero-division checks, so the loops below vectorise; every
    # divisor is an expectation, floored above 0 here or NaN)
    for j in range(nb):
        mu = mu_out[j]
        # a negative Poisson mean (a negative yield deeper than the background under it) is
        # outside the model: rejected after the loop, not floored -- floored, an empty bin
        # would let a negative peak dig on at no cost (a flag: the loop vectorises)
        negative |= mu < 0.0
        mu = floor if mu < floor else mu  # noqa: FURB136 (max() may drop a NaN)
        mu_out[j] = mu
        sj = 1.0 if unit else s[j]
        terms[j] = sj * mu - n[j] * vlog(mu)  # vlog: this loop vectorises
    if negative:
        return False
    # residual and weight per bin, then one vectorised sum per entry
    res = np.empty(nb)
    w = np.empty(nb)
    for j in range(nb):
        sj = 1.0 if unit else s[j]
        inv = 1.0 / mu_out[j]  # one division per bin
        w[j] = sj * inv
        res[j] = sj - n[j] * inv
    for a in range(npar):
        ja = jac[a]
        acc = 0.0
        for j in range(nb):
            acc += ja[j] * res[j]
        g[a] = acc
        if info:
            for b in range(a + 1):
                jb = jac[b]
                acc = 0.0
                for j in range(nb):
                    acc += w[j] * ja[j] * jb[j]
                fisher[a, b] = acc
                fisher[b, a] = acc
    return True


class _Kernel:
    """A compiled CDF evaluator of one shape on fixed edges: ``rows`` = 1 + parameters."""

    def __init__(self, func, data: tuple, rows: int) -> None:
        self.func, self.data, self.rows = func, data, rows

    def __call__(self, p: list[float], out: np.ndarray) -> bool:
        return bool(self.func(*self.data[:1], *p, *self.data[1:], out))


#: recent edge kernels by (shape, read-only edges array, window): the starts of one fit
#: build several costs on the same edges (the entries hold their arrays, so ids stay valid)
_RECENT: dict = {}


def edge_kernel(shape: Any, edges: np.ndarray, window: tuple[float, float]) -> _Kernel | None:
    """A compiled evaluator of ``shape``'s normalised CDF and its parameter derivatives at
    ``edges`` (clipped to ``window``), or None when the shape has none (exact types only:
    a subclass may change the formula)."""
    shared = isinstance(edges, np.ndarray) and not edges.flags.writeable
    key = (id(shape), id(edges), float(window[0]), float(window[1]))
    hit = _RECENT.get(key) if shared else None
    if hit is not None and hit[0] is shape and hit[1] is edges:
        return hit[2]
    kern = _new_edge_kernel(shape, edges, window)
    if shared:
        if len(_RECENT) >= 8:
            _RECENT.pop(next(iter(_RECENT)))
        _RECENT[key] = (shape, edges, kern)
    return kern


def _new_edge_kernel(shape: Any, edges: np.ndarray,
                     window: tuple[float, float]) -> _Kernel | None:
    lo, hi = float(window[0]), float(window[1])
    x = np.minimum(np.maximum(np.asarray(edges, float), lo), hi)  # np.clip, ~5x cheaper
    kind = type(shape)
    if kind is Gaussian:
        return _Kernel(gaussian_edges, (x, lo, hi), 3)
    if kind is PowerLaw and lo > 0:
        c = 0.5 * (lo + hi)
        return _Kernel(powerlaw_edges, (np.log(x * (1.0 / c)), math.log(lo / c),
                                        math.log(hi / c)), 2)
    if kind in (ExpPoly, Exponential) and shape.order == 1:
        t = (x - 0.5 * (lo + hi)) * (2.0 / (hi - lo))
        return _Kernel(exponential_edges, (t,), 2)
    return None


class _Layout:
    """The fixed index arrays of a :class:`FusedBinned` (which rows hold which component's
    CDF and derivatives, which bins are used): made once per cost and shared by the costs
    made from it (:meth:`FusedBinned.fresh`; :meth:`FusedBinned.on_bins` replaces the bins
    only).  (A cache of layouts by their inputs' identities found nothing since the fit's
    costs are made from one another, and cost ~20 us a cost to look in.)"""

    def __init__(self, kernels: list[_Kernel], plan: list, edges: np.ndarray,
                 mask: np.ndarray | None) -> None:
        self.start = [0]
        for k in kernels:
            self.start.append(self.start[-1] + k.rows)
        self.bins = _used_bins(edges.size - 1, mask)
        drow, dcomp, dfree = [], [], []
        for k, (_, _, _, _, rows, _) in enumerate(plan):
            for j, r in enumerate(rows):
                if r >= 0:
                    drow.append(int(self.start[k]) + 1 + j)
                    dcomp.append(k)
                    dfree.append(r)
        self.drow = np.array(drow, np.int64)
        self.dcomp = np.array(dcomp, np.int64)
        self.dfree = np.array(dfree, np.int64)
        self.value_row = np.array(self.start[:-1], np.int64)
        self.yield_free = np.array([p[5] for p in plan], np.int64)
        self.driver: tuple | None = None  # the static arrays of .driver, made on demand


def _used_bins(nbins: int, mask: np.ndarray | None) -> np.ndarray:
    """The indices of the used bins (all without a mask)."""
    if mask is None:
        return np.arange(nbins, dtype=np.int64)
    return np.flatnonzero(mask).astype(np.int64, copy=False)


class FusedBinned:
    """``value_grad_info`` of a binned cost whose components all have an edge kernel.

    Built by :class:`~peaksift.likelihood.cost.BinnedCost` (which keeps the numpy path as
    reference and fallback); :meth:`evaluate` returns None when a kernel declines (the
    caller then uses the numpy path)."""

    def __init__(self, kernels: list[_Kernel], plan: list, nfree: int, edges: np.ndarray,
                 mask: np.ndarray | None, n: np.ndarray, s: np.ndarray, unit: bool,
                 floor: float) -> None:
        self.kernels = kernels
        self.plan = plan  # (shape, slice, yield index, need, free rows, yield free row)
        lay = self.layout = _Layout(kernels, plan, edges, mask)
        self.start, self.bins = lay.start, lay.bins
        self.drow, self.dcomp, self.dfree = lay.drow, lay.dcomp, lay.dfree
        self.value_row, self.yield_free = lay.value_row, lay.yield_free
        self.n, self.s, self.unit, self.floor = n, s, bool(unit), float(floor)
        self._buffers(nfree, edges.size)

    def _buffers(self, nfree: int, nedges: int) -> None:
        self.cdf = np.zeros((self.start[-1], nedges))
        self.g = np.zeros(nfree)
        self.fisher = np.zeros((nfree, nfree))
        self.mu = np.zeros(self.bins.size)
        self.jac = np.zeros((nfree, self.bins.size))
        self.yields = np.empty(len(self.plan))
        self._calls = None  # (see calls)

    @property
    def calls(self) -> list:
        """Per component: kernel, its arguments around the parameters, its rows of cdf --
        :meth:`evaluate`'s, made at its first call (the compiled minimiser, which most
        costs see only, reads the buffers without them)."""
        if self._calls is None:
            self._calls = [(kern.func, kern.data[:1], kern.data[1:],
                            self.cdf[self.start[k]:self.start[k + 1]], p[1], p[2], p[5])
                           for k, (kern, p) in enumerate(zip(self.kernels, self.plan))]
        return self._calls

    def fresh(self) -> FusedBinned:
        """The same evaluator with buffers of its own (for another cost on the same data)."""
        out = object.__new__(type(self))  # copy.copy's result, without its ~7 us of dispatch
        out.__dict__.update(self.__dict__)
        out._buffers(self.g.size, self.cdf.shape[1])
        return out

    def on_bins(self, mask: np.ndarray | None, n: np.ndarray, s: np.ndarray,
                unit: bool) -> FusedBinned:
        """The same evaluator on the bins ``mask`` selects (``n``, ``s``: their effective
        counts and factors), with buffers of its own; the layout's other arrays and the
        compiled problem's static ones (which do not depend on the bins) are shared."""
        out = object.__new__(type(self))  # copy.copy's, without its dispatch (~7 us each)
        out.__dict__.update(self.__dict__)
        if not (mask is None and self.bins.size == self.cdf.shape[1] - 1):
            lay = out.layout = object.__new__(type(self.layout))
            lay.__dict__.update(self.layout.__dict__)
            lay.bins = out.bins = _used_bins(self.cdf.shape[1] - 1, mask)
        # (else every bin, as this one's: its layout is the same, shared)
        out.n, out.s, out.unit = n, s, bool(unit)
        out._buffers(self.g.size, self.cdf.shape[1])
        return out

    def fractions(self, shape: Any, p: list[float]):
        """``(fractions, derivatives)`` of component ``shape`` in the used bins at its
        parameters ``p`` (fractions floored at 0, as ``bin_fractions``), or None."""
        for kern, plan in zip(self.kernels, self.plan):
            if plan[0] is shape:
                out = np.empty((kern.rows, self.cdf.shape[1]))
                if not kern([float(q) for q in p], out):
                    return None
                d = out[:, 1:] - out[:, :-1]
                if self.bins.size != d.shape[1]:
                    d = d[:, self.bins]
                return np.maximum(d[0], 0.0), d[1:]
        return None

    def evaluate(self, v: np.ndarray, info: bool):
        """``(nll without constant, gradient, information or None, mu)`` at the full
        parameter vector ``v``, or None when a kernel declines."""
        vals = v.tolist()
        yields = self.yields
        for k, (func, head, tail, out, sl, iy, ry) in enumerate(self.calls):
            y = vals[iy]
            yields[k] = y
            if ry < 0 and y == 0.0:  # a component fixed at zero yield contributes nothing
                out[:] = 0.0
                continue
            if not func(*head, *vals[sl], *tail, out):
                return None
        val = poisson_pass(self.cdf, self.value_row, yields, self.yield_free, self.drow,
                           self.dcomp, self.dfree, self.bins, self.n, self.s, self.unit,
                           self.floor, info, self.mu, self.jac, self.g, self.fisher)
        return (float(val), self.g.copy(), self.fisher.copy() if info else None,
                self.mu.copy())


@njit(cache=True, nogil=True)
def solve_small(a, g, out):  # pragma: no cover - compiled
    """``out = -a^-1 g`` for a small dense ``a`` (Gaussian elimination with partial
    pivoting on the unit-diagonal scaling of ``a``, as ``minimize._solve`` does with
    ``numpy.linalg.solve``); False when singular or not finite."""
    n = g.size
    return solve_small_into(a, g, out, np.empty((n, n + 1)), np.empty(n))


@njit(cache=True, nogil=True)
def solve_small_into(a, g, out, m, d):  # pragma: no cover - compiled
    """:func:`solve_small` in the work buffers ``m (n, n + 1)`` and ``d (n,)``: a loop
    that solves many small systems allocates them once (two allocations and frees a
    solve were a tenth of a 100-bin scan's per-row cost)."""
    return solve_sized_into(a, g, out, m, d, g.size)


@njit(cache=True, nogil=True, inline="always")
def solve_sized_into(a, g, out, m, d, n):  # pragma: no cover - compiled
    """:func:`solve_small_into` of an ``n x n`` system, inlined where it is called: a
    caller that passes a constant ``n`` (the profile kernel's 3) gets the loops unrolled
    by the compiler, the same operations in the same order (a scan's rows solve ~6 of
    these each)."""
    for i in range(n):
        v = math.sqrt(abs(a[i, i]))
        d[i] = v if v > 0.0 else 1.0
    for i in range(n):
        for j in range(n):
            m[i, j] = a[i, j] / (d[i] * d[j])
        m[i, n] = g[i] / d[i]
    for c in range(n):
        p = c
        big = abs(m[c, c])
        for r in range(c + 1, n):
            if abs(m[r, c]) > big:
                big = abs(m[r, c])
                p = r
        if not big > 0.0:
            return False
        if p != c:
            for j in range(c, n + 1):
                t = m[c, j]
                m[c, j] = m[p, j]
                m[p, j] = t
        for r in range(c + 1, n):
            f = m[r, c] / m[c, c]
            if f != 0.0:
                for j in range(c, n + 1):
                    m[r, j] -= f * m[c, j]
    for i in range(n - 1, -1, -1):
        acc = m[i, n]
        for j in range(i + 1, n):
            acc -= m[i, j] * out[j]
        out[i] = acc / m[i, i]
    for i in range(n):
        out[i] = -out[i] / d[i]
        if not math.isfinite(out[i]):
            return False
    return True


@njit(cache=True, nogil=True)
def covariance_small(hess, tol, out):  # pragma: no cover - compiled
    """:func:`.minimize.covariance` for a few parameters: ``out = H^-1`` if ``H`` is finite
    with a positive diagonal and its scaling to unit diagonal ``D^-1/2 H D^-1/2`` has its
    smallest eigenvalue above ``tol``.  That test needs no eigenvalues: the scaled matrix
    minus ``tol I`` has a Cholesky factor exactly then (a symmetric matrix is positive
    definite iff its Cholesky pivots are); the inverse comes from the factor of the scaled
    matrix.  Returns False when a test fails or the inverse is not finite."""
    n = hess.shape[0]
    sc = np.empty(n)
    for i in range(n):
        d = hess[i, i]
        if not (math.isfinite(d) and d > 0.0):
            return False
        sc[i] = 1.0 / math.sqrt(d)
    scaled = np.empty((n, n))
    for i in range(n):
        for j in range(n):
            v = hess[i, j] * (sc[i] * sc[j])
            if not math.isfinite(v):
                return False
            scaled[i, j] = v
    low = np.empty((n, n))
    for shift in (tol, 0.0):
        for i in range(n):
            for j in range(i + 1):
                acc = scaled[i, j] - (shift if i == j else 0.0)
                for k in range(j):
                    acc -= low[i, k] * low[j, k]
                if i == j:
                    if not acc > 0.0:
                        return False
                    low[i, i] = math.sqrt(acc)
                else:
                    low[i, j] = acc / low[j, j]
    # inverse of the factor (lower triangular), then scaled^-1 = L^-T L^-1, unscaled
    inv = np.zeros((n, n))
    for j in range(n):
        inv[j, j] = 1.0 / low[j, j]
        for i in range(j + 1, n):
            acc = 0.0
            for k in range(j, i):
                acc -= low[i, k] * inv[k, j]
            inv[i, j] = acc / low[i, i]
    for i in range(n):
        for j in range(i + 1):
            acc = 0.0
            for k in range(i, n):
                acc += inv[k, i] * inv[k, j]
            acc *= sc[i] * sc[j]
            if not math.isfinite(acc):
                return False
            out[i, j] = acc
            out[j, i] = acc
    return True


@njit(cache=True, nogil=True, error_model="numpy")
def profile_one_yield(n, b, s, f, steps, y_out, gain_out):  # pragma: no cover - compiled
    """:func:`.narrow._profile_one_yield` row by row (the narrow candidates' yields): per
    row of ``f (R, K)``, ``steps`` Newton steps of the yield of ``b + y f`` on the Fisher
    information, each step halved (at most 30 times) while a bin's expectation would drop
    below 1 % of its background; then the gain 2 dNLL against ``b``.  The same arithmetic
    per row as the numpy path, without its (R, K) temporaries."""
    rows, k = f.shape
    for r in range(rows):
        y = 0.0
        for _ in range(steps):
            grad = 0.0
            info = 0.0
            for j in range(k):
                mu = b[r, j] + y * f[r, j]
                sf = s[r, j] * f[r, j]
                grad += sf * (1.0 - n[r, j] / mu)
                info += sf * f[r, j] / mu
            step = -grad / info if info > 0.0 else 0.0
            for _h in range(30):
                low = False
                for j in range(k):
                    if b[r, j] + (y + step) * f[r, j] < 0.01 * b[r, j]:
                        low = True
                if not low:
                    break
                step = 0.5 * step
            if math.isfinite(step):
                y = y + step
        gain = 0.0
        for j in range(k):
            mu = b[r, j] + y * f[r, j]
            lr = n[r, j] * math.log(mu / b[r, j]) if n[r, j] > 0.0 else 0.0
            gain += s[r, j] * (lr - (mu - b[r, j]))
        gain *= 2.0
        y_out[r] = y
        gain_out[r] = gain if math.isfinite(gain) else 0.0


@njit(cache=True, nogil=True)
def bin_counts(cdf, y, out):  # pragma: no cover - compiled
    """``numpy.maximum(cdf[1:] - cdf[:-1], 0.0) * y`` into ``out`` (a component's expected
    counts from its CDF row at the edges): the same operations, with numpy's maximum --
    the difference where it is above 0 or NaN, else the 0 (so -0.0 gives +0.0, as numpy's
    does)."""
    for i in range(out.size):
        d = cdf[i + 1] - cdf[i]
        out[i] = (d if (d > 0.0 or math.isnan(d)) else 0.0) * y
