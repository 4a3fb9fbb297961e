"""The background part of a free fit's starts: background-only fits and expected counts.

* :func:`background_start` -- a background-only binned fit (of the whole window, or of the
  sidebands of a candidate peak given a bin mask) -> the full parameter vector with every
  signal yield at 0.  Where every component has a compiled edge kernel it runs
  :mod:`.driver`'s compiled Fisher scoring in one compiled call
  (:func:`.start_kernels.background_fit` on :class:`_BackgroundFit`'s arrays): the same loop
  as through a :class:`~.cost.BinnedCost` and :func:`.minimize.minimize` (a background-only
  cost's signal rows are zero and skipped there; its saturated constant summed in bin
  order, so the NLL by rounding), without building a cost, its kernels' layout, the used
  bins' arrays and a :class:`~.minimum.Minimum` around it -- ~0.2 ms of Python per fit of
  100 bins, against ~0.03 ms of arithmetic.  Whenever that loop does not converge to a positive-definite
  minimum (or the compiled path is off) the general path answers, as before (running the
  same loop again first: rare, and the result is then exactly the general path's).
* :func:`background_counts` -- the background's expected counts in given bins.
"""

from __future__ import annotations

import numpy as np

from .._jit import compiled_module
from .._kept import Kept
from .cost import BinnedCost
from .minimize import POSDEF_TOL, minimize
from .model import Model
from .poisson import DRIVER_MODULE, KERNELS_MODULE, MU_FLOOR, START_KERNELS_MODULE, use_compiled

__all__ = ["FIT_SETTINGS", "background_counts", "background_start", "background_start_counts",
           "background_static", "edge_row"]

#: the minimiser's settings of a background start (a start needs no tighter minimum)
_EDM_GOAL = 1e-2
_MAX_ITER = 60
#: (iterations, EDM goal, expectation floor, positive-definiteness tolerance) of the
#: compiled background fit, as :meth:`_BackgroundFit.minimum` passes them
FIT_SETTINGS = np.array([_MAX_ITER, _EDM_GOAL, MU_FLOOR, POSDEF_TOL])


def background_start(model: Model, edges: np.ndarray, n: np.ndarray, scale: np.ndarray,
                     mask: np.ndarray | None, bstart: np.ndarray, is_fixed: np.ndarray,
                     lower: np.ndarray, upper: np.ndarray) -> np.ndarray:
    """Background-only binned fit (on ``mask`` bins; fixed background parameters stay
    fixed) -> full parameter vector with every signal yield at 0."""
    return _background_start(model, edges, n, scale, mask, bstart, is_fixed, lower, upper,
                             False)[0]


def background_start_counts(model: Model, edges: np.ndarray, n: np.ndarray,
                            scale: np.ndarray, mask: np.ndarray | None, bstart: np.ndarray,
                            is_fixed: np.ndarray, lower: np.ndarray, upper: np.ndarray,
                            ) -> tuple[np.ndarray, np.ndarray]:
    """:func:`background_start` and the background's expected counts in every bin there
    (:func:`background_counts`: made in the fit's compiled call where it has one)."""
    out, counts = _background_start(model, edges, n, scale, mask, bstart, is_fixed, lower,
                                    upper, True)
    return out, (background_counts(model, edges, out) if counts is None else counts)


def _background_start(model, edges, n, scale, mask, bstart, is_fixed, lower, upper,
                      want_counts):
    """``(background_start's vector, its counts or None)``; the counts only with
    ``want_counts`` where the compiled fit made them."""
    v = bstart.copy()
    for _, _, iy in model.blocks[:-1]:
        v[iy] = 0.0
    _, bsl, biy = model.blocks[-1]
    free = np.array([i for i in [*range(bsl.start, bsl.stop), biy] if not is_fixed[i]], int)
    if free.size == 0:
        return v, None
    if not is_fixed[biy]:  # (every bin: n's own sum, the same as of its copy n[all])
        v[biy] = max(float(np.add.reduce(n if mask is None else n[mask])), 1.0)  # (.sum())
    lo, hi = lower[free].copy(), upper[free].copy()
    x0 = np.minimum(np.maximum(v[free], lo), hi)
    fast = _prepared(model, edges, n, scale, free)
    x, counts = fast.minimum(v, x0, lo, hi, mask, biy if want_counts else -1) if (
        fast is not None) else (None, None)
    if x is None:  # the general path (a cost, Fisher scoring, MIGRAD where it must)
        cost = _background_cost(model, v, free, edges, n, scale, mask)
        x = minimize(cost, x0, lo, hi, [model.parameter_names[i] for i in free],
                     edm_goal=_EDM_GOAL).x
    out = v.copy()
    out[free] = x
    return out, counts


#: the compiled background-only fits of recent (model, read-only data, free parameters):
#: one free fit fits the background of the whole window, then of each candidate's
#: sidebands, on the same data (the entries hold their inputs, so the ids stay valid)
_RECENT_FITS: list = []


def _prepared(model: Model, edges: np.ndarray, n: np.ndarray, scale: np.ndarray,
              free: np.ndarray) -> _BackgroundFit | None:
    """The compiled background-only fit on these data, or None where it does not apply
    (compiled path off, no compiled kernel for the background)."""
    if not use_compiled():
        return None
    inputs = (model, edges, n, scale)
    key = tuple(free.tolist())
    for (m, e, c, s), k, fast in _RECENT_FITS:
        if m is model and e is edges and c is n and s is scale and k == key:
            return fast
    fast = _BackgroundFit.make(model, edges, n, scale, free)
    if fast is not None and all(isinstance(a, np.ndarray) and not a.flags.writeable
                                for a in inputs[1:]):
        _RECENT_FITS.insert(0, (inputs, key, fast))
        del _RECENT_FITS[4:]
    return fast


class _BackgroundFit:
    """The arrays of :func:`.driver._drive` for the background-only fit of one model on one
    set of bins (a full-window fit and, with :meth:`minimum`'s mask, its sidebands):
    :func:`.driver.problem_of` of the background-only :class:`~.cost.BinnedCost`, with the
    signal components left out (held at yield 0 they add exact zeros there)."""

    def __init__(self, static: tuple, free: np.ndarray, n: np.ndarray, scale: np.ndarray,
                 nfree: int) -> None:
        self.static, self.free, self._data, self.nfree = static, free, (n, scale), nfree

    @classmethod
    def make(cls, model: Model, edges: np.ndarray, n: np.ndarray, scale: np.ndarray,
             free: np.ndarray) -> _BackgroundFit | None:
        # the static arrays depend on the components' kinds, the parameter layout, the
        # window, the free parameters and the edges, not on the counts: kept by those, so
        # the next fit of the same binning (toys, a refit) skips their ~40 us
        fkey = tuple(free.tolist())
        shared = isinstance(edges, np.ndarray) and not edges.flags.writeable
        if shared:  # read-only edges: found again by identity first (a toy's start bins)
            for entry in _STATIC_SEEN:
                if entry[0] is model and entry[1] is edges and entry[2] == fkey:
                    st = entry[3]
                    return None if st is None else cls(st, free, n, scale, free.size)
        key = (tuple((type(shape), getattr(shape, "order", None), sl.start, sl.stop, iy)
                     for shape, sl, iy in model.blocks),
               float(model.window[0]), float(model.window[1]), tuple(free.tolist()),
               np.asarray(edges, float).tobytes())
        hit = _STATIC.get(key, _MISSING)
        if hit is _MISSING:
            hit = _STATIC.put(key, cls._static(model, edges, free))
        if shared:
            _STATIC_SEEN.insert(0, (model, edges, fkey, hit))
            del _STATIC_SEEN[4:]
        return None if hit is None else cls(hit, free, n, scale, free.size)

    @staticmethod
    def _static(model: Model, edges: np.ndarray, free: np.ndarray) -> tuple | None:
        """The problem's fixed arrays (None: a component without a compiled kernel)."""
        kernels, drv = compiled_module(KERNELS_MODULE), compiled_module(DRIVER_MODULE)
        codes = [None if k is None else drv._CODES.get(k.func) for k in
                 (kernels.edge_kernel(shape, edges, model.window) for shape, _, _ in
                  model.blocks)]
        if any(c is None for c in codes):
            # a component without a compiled kernel: the cost takes the numpy path, whose
            # last digits differ, and so would the start (a Crystal Ball's minimum follows)
            return None
        bshape, bsl, biy = model.blocks[-1]
        kern = kernels.edge_kernel(bshape, edges, model.window)
        code = codes[-1]
        row = {int(i): k for k, i in enumerate(free)}
        escal = np.zeros((1, 2))
        escal[0, :len(kern.data) - 1] = kern.data[1:]
        drow = [1 + j for j, i in enumerate(range(bsl.start, bsl.stop)) if i in row]
        static = (np.array([code], np.int64), np.asarray(kern.data[0], float)[None, :], escal,
                  np.array([bsl.start], np.int64), np.array([0, kern.rows], np.int64),
                  np.array([biy], np.int64), np.array([row.get(biy, -1)], np.int64),
                  np.zeros(1, np.int64), np.array(drow, np.int64),
                  np.zeros(len(drow), np.int64),
                  np.array([row[i] for i in range(bsl.start, bsl.stop) if i in row], np.int64),
                  kern.rows, edges.size)
        return static

    def minimum(self, v: np.ndarray, x0: np.ndarray, lo: np.ndarray, hi: np.ndarray,
                mask: np.ndarray | None, biy: int = -1) -> tuple:
        """``(free values, counts)``: the free values at the minimum from ``x0`` (full
        vector ``v``), or None when the compiled loop does not end at a positive-definite
        converged minimum (the general path then answers, as it would have from the
        start); given the yield's index ``biy`` (>= 0), the background's expected counts
        in every bin there from the same call (else, or where the kernel declines, None)."""
        x_out = np.empty(self.nfree)
        n, scale = self._data
        kern = compiled_module(START_KERNELS_MODULE)
        try:
            if biy < 0:
                ok = kern.background_fit(
                    self.static, n, scale, _NO_MASK if mask is None else mask,
                    np.asarray(v, float), self.free, x0, lo, hi, _MAX_ITER, _EDM_GOAL,
                    MU_FLOOR, POSDEF_TOL, x_out)
                return (x_out, None) if ok else (None, None)
            counts = np.empty(n.size)
            ok, made = kern.background_fit_counts(
                self.static, n, scale, _NO_MASK if mask is None else mask,
                np.asarray(v, float), self.free, x0, lo, hi, _MAX_ITER, _EDM_GOAL, MU_FLOOR,
                POSDEF_TOL, x_out, biy, counts)
        except (ArithmeticError, ValueError):
            return None, None
        return (x_out if ok else None), (counts if made else None)


def background_static(model: Model, edges: np.ndarray, free: np.ndarray) -> tuple | None:
    """The fixed arrays of the compiled background-only fit of ``model`` on ``edges`` with
    the ``free`` parameters (:func:`.start_kernels.background_fit`'s ``static``, kept as
    :class:`_BackgroundFit` keeps them); None where there is none."""
    if not use_compiled():
        return None
    fast = _BackgroundFit.make(model, edges, _NO_MASK, _NO_MASK, free)
    return None if fast is None else fast.static


def edge_row(model: Model, edges: np.ndarray) -> tuple | None:
    """The background's compiled edge kernel on ``edges`` as the compiled start steps
    take it, ``(code, data row, two constants, first parameter, rows, edges)`` (what
    :func:`background_counts` calls, in :func:`.driver._component`'s terms); None where
    it has none.  Kept for the last read-only edges array of a model."""
    seen = _EDGE_ROW[0]
    if seen is not None and seen[0] is model and seen[1] is edges:
        return seen[2]
    if not use_compiled():
        return None
    bshape, bsl, _ = model.blocks[-1]
    kern = compiled_module(KERNELS_MODULE).edge_kernel(bshape, edges, model.window)
    code = None if kern is None else compiled_module(DRIVER_MODULE)._CODES.get(kern.func)
    row = None
    if code is not None:
        c = [float(a) for a in kern.data[1:]] + [0.0, 0.0]
        row = (code, np.asarray(kern.data[0], float), c[0], c[1], bsl.start, kern.rows,
               edges.size)
    if isinstance(edges, np.ndarray) and not edges.flags.writeable:
        _EDGE_ROW[0] = (model, edges, row)
    return row


#: [(model, read-only edges, :func:`edge_row`)] of the last call (holds both)
_EDGE_ROW: list = [None]


#: the static arrays of :class:`_BackgroundFit` by what they are made of (see ``make``),
#: newest last; None kept too (no compiled kernel for a component)
_STATIC = Kept(8)
_MISSING = object()
#: the same by (model, read-only edges array, free parameters) identity, newest first (the
#: entries hold the model and the edges, so the identities stay valid)
_STATIC_SEEN: list = []

#: every bin (:func:`.start_kernels.background_fit`)
_NO_MASK = np.zeros(0, bool)


#: the background-only cost of recent (model, free parameters, read-only data): one fit
#: fits the background of the whole window and then of each candidate's sidebands, on
#: the same data and kernels (the entries hold their inputs, so the ids stay valid)
_BACKGROUND_COSTS: list = []


def _background_cost(model, v, free, edges, n, scale, mask) -> BinnedCost:
    """``BinnedCost(model, v, free, [], edges, n, scale, mask)``, from a recent one on the
    same read-only data where there is one (:meth:`.cost.BinnedCost.with_mask`)."""
    inputs = (model, edges, n, scale)
    key = tuple(free.tolist())
    for entry in _BACKGROUND_COSTS:
        if entry[1] == key and all(a is b for a, b in zip(entry[0], inputs)):
            return entry[2].with_mask(mask, v)
    cost = BinnedCost(model, v, free, [], edges, n, scale, mask)
    if all(isinstance(a, np.ndarray) and not a.flags.writeable for a in inputs[1:]):
        _BACKGROUND_COSTS.insert(0, (inputs, key, cost))
        del _BACKGROUND_COSTS[4:]
    return cost


def background_counts(model: Model, edges: np.ndarray, v: np.ndarray) -> np.ndarray:
    """The background's expected counts in the bins ``edges`` at the full parameter vector
    ``v``: from its compiled edge kernel where it has one (cached per read-only edges
    array; ~5x faster than ``bin_fractions`` in numpy, equal within a few ulp), else
    ``bin_fractions``."""
    bshape, bsl, biy = model.blocks[-1]
    p = v[bsl].tolist()  # (Python floats, as float() of each)
    if use_compiled():
        kernels = compiled_module(KERNELS_MODULE)
        kern = kernels.edge_kernel(bshape, edges, model.window)
        if kern is not None:
            out = np.empty((kern.rows, edges.size))
            if kern(p, out):  # max(difference, 0) * yield, as numpy's calls made it
                counts = np.empty(edges.size - 1)
                kernels.bin_counts(out[0], float(v[biy]), counts)
                return counts
    return bshape.bin_fractions(edges, p, model.window) * v[biy]
