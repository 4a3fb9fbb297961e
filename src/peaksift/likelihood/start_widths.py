"""Start widths of a Gaussian peak from profile likelihoods over its width.

Two questions of :func:`~peaksift.likelihood.starts.fit_starts`, answered for a Gaussian
signal on compiled rows (:func:`peaksift.shapes.compiled.gaussian_rows`) with the signal and
background yields profiled (:func:`.start_kernels.profile_two_yields`):

* :func:`scan_width` -- which width a fresh start at a candidate mass should take (the lowest
  profile NLL among :data:`WIDTH_FACTORS` of the start width, the mass and the background's
  shape held);
* :func:`other_widths` -- whether the best minimum found so far leaves room for another
  minimum at a different width of the same peak (a narrow and a wide solution of one
  excess), and at which widths and masses: the local minima of the profile NLL over
  :data:`OTHER_FACTORS` of its width other than its own, the mass profiled too and the
  background's shape relaxed (:mod:`.width_path`).  A free fit then minimises from those
  only, instead of from every other width blindly.  (With the mass held at the best
  minimum's, the profile missed a wide solution 6 GeV away and a narrow one 0.6 GeV away,
  0.23 and 0.18 in -2 ln L below the reported minima of two 5 sigma toys.)
* :func:`lowest_width` -- whether a dip's start (a negative yield) should be wider than the
  width :func:`scan_width` picks with the mass held, and where its mass then lies: the
  lowest point of the same profile from the start, wider widths only.

Both return None for other shapes or without the compiled path: the caller then does what
it would without them.
"""

from __future__ import annotations

import math

import numpy as np

from .._jit import compiled_module
from ..errors import PeaksiftError
from ..shapes import Gaussian
from .poisson import KERNELS_MODULE, START_KERNELS_MODULE, use_compiled
from .start_background import edge_row

__all__ = ["OTHER_FACTORS", "OTHER_MARGIN", "PATH_RISE", "WIDTH_FACTORS", "WidthProfile",
           "background_rows", "lowest_width", "other_widths", "scan_width"]

WIDTH_PATH_MODULE = "peaksift.likelihood.width_path"
FUSED_MODULE = "peaksift.likelihood.start_fused"

#: numerical failures a helper fit may meet (as :mod:`.starts`'): only a worse start
_NUMERIC = (ArithmeticError, np.linalg.LinAlgError, ValueError, PeaksiftError)

#: the widths the start of a Gaussian peak is chosen among: its start width times these
#: (steps of sqrt 2 from 1/16 to 2), those below half a bin of the coarse histogram left
#: out (its bins cannot tell them apart: the narrowest would win on a bin's fluctuation)
WIDTH_FACTORS = 2.0 ** (np.arange(-8, 3) / 2)

#: the widths, as factors of the best minimum's, at which :func:`other_widths` profiles:
#: steps of sqrt 2 from 1/8 to 8 (a 5 sigma peak's minimum can be a spike of a seventh of
#: its width on top of it; blind starts at 0.4, 1.5 and 2.5 times the width reached it
#: only by the path a start at 0.4 happened to take)
OTHER_FACTORS = 2.0 ** (np.arange(-6, 7) / 2)
_OTHER_FACTORS = OTHER_FACTORS.tolist()

#: :func:`other_widths` walks away from the best minimum's width until the profile has
#: risen this much above it (and still rises): a minimum of the same excess that far up
#: the profile's walls does not come back below it; a strong peak's profile passes it
#: within a width or two, so its wide widths (most of the cost) are not computed
PATH_RISE = 25.0

#: another minimum of the profile is started from only when it lies at most this much
#: above the best minimum's own width (in NLL): only a lower minimum can replace the best,
#: and the profile's relaxed background shape is a second-order estimate (within ~10 % of
#: what the shape's freedom gains, ``tests/test_likelihood_width_path.py``).  On
#: ``scripts/check_fit_minima.py``'s set every start that ended lower came from a minimum
#: of the profile below its own width's (a margin of 0 lost none, one of 1 started 1 %
#: more cost evaluations)
OTHER_MARGIN = 0.5


#: each signal row of :func:`_profiled` is computed on the edges within this many of its
#: width from the mass (beyond, a Gaussian holds < 3e-12 of its yield: held 0)
_BAND_SIGMAS = 7.0


def _profiled(edges, n, scale, bexp, mass, widths, window, y0):
    """``(yields (K, 2), NLL (K,), background total)`` of a Gaussian at ``mass`` of each
    width on the background expectation ``bexp``, signal yield and background
    normalisation profiled from ``y0`` (signal yield, background total or None); None where
    the rows cannot be made.  (Each row on its own band of edges, in one compiled call:
    :func:`.start_kernels.profile_widths`.)"""
    b0 = np.maximum(bexp, 1e-12)
    btot = float(b0.sum())
    k = widths.size
    if not k or not btot > 0:
        return None
    rows = np.empty((k, edges.size - 1))
    y = np.empty((k, 2))
    nll = np.empty(k)
    sc = np.ones(b0.size) if scale is None else np.ascontiguousarray(scale, float)
    if not compiled_module(START_KERNELS_MODULE).profile_widths(
            np.ascontiguousarray(edges, float), float(window[0]), float(window[1]),
            np.ascontiguousarray(n, float), sc, b0 / btot, float(mass),
            np.ascontiguousarray(widths, float), _BAND_SIGMAS, float(y0[0]),
            btot if y0[1] is None else float(y0[1]), rows, y, nll):
        return None
    return y, nll, btot


def scan_width(shape, edges, n, scale, bexp, mass, width, lo_w, hi_w, window, sign=1.0):
    """The width among ``width * WIDTH_FACTORS`` (inside ``[lo_w, hi_w]``) with the lowest
    profile NLL of a Gaussian at ``mass`` on the background expectation ``bexp`` (signal
    and background yields profiled, :func:`.start_kernels.profile_two_yields`); None for other
    shapes, without the compiled path, or without a signal of the sign ``sign`` anywhere."""
    if type(shape) is not Gaussian or not use_compiled():
        return None
    half_bin = 0.5 * (edges[-1] - edges[0]) / (edges.size - 1)  # of a mean bin
    widths = width * WIDTH_FACTORS
    widths = widths[(widths >= max(lo_w, half_bin)) & (widths <= hi_w)]
    btot = float(np.maximum(bexp, 1e-12).sum())
    out = _profiled(edges, n, scale, bexp, mass, widths, window,
                    (0.1 * math.sqrt(max(btot, 1.0)), None))
    if out is None:
        return None
    y, nll, _ = out
    # (on the few widths as Python floats: numpy's calls cost more than the work here)
    q = [v if sign * a > 0 and math.isfinite(v) else math.inf
         for a, v in zip(y[:, 0].tolist(), nll.tolist())]
    best = min(range(len(q)), key=q.__getitem__)  # the first lowest, as np.argmin
    return float(widths[best]) if math.isfinite(q[best]) else None


def background_rows(model, edges: np.ndarray, v: np.ndarray,
                    is_fixed: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The background's expected counts in the bins ``edges`` at the full parameter vector
    ``v`` and their derivatives ``(K, B)`` in its K free shape parameters (the yield left
    out): from its compiled edge kernel where it has one (the rows
    :func:`.start_background.background_counts` makes and drops), else
    ``fractions_and_grad``."""
    bshape, bsl, biy = model.blocks[-1]
    p = [float(q) for q in v[bsl]]
    free = [i for i in range(bsl.stop - bsl.start) if not is_fixed[bsl.start + i]]
    total = float(v[biy])
    kern = compiled_module(KERNELS_MODULE).edge_kernel(bshape, edges, model.window)
    if kern is not None:
        out = np.empty((kern.rows, edges.size))
        if kern(p, out):
            d = out[1:][free]
            return (np.maximum(out[0, 1:] - out[0, :-1], 0.0) * total,
                    (d[:, 1:] - d[:, :-1]) * total)
    frac, grad = bshape.fractions_and_grad(edges, p, model.window)
    return frac * total, np.asarray(grad, float)[free] * total


def _path(shape, edges, n, scale, background, mass, width, signal_yield, lo_w, hi_w, lo_m,
          hi_m, window, wider=False):
    """``(factors, own index, rows, profile NLLs, background total)`` of
    :func:`.width_path.width_path` from ``mass``, ``width`` and ``signal_yield`` at
    ``width * OTHER_FACTORS`` (inside ``[lo_w, hi_w]``; only those from 1 up when
    ``wider``), the NLLs as Python floats (inf where not reached); None for other shapes,
    without the compiled path or where the path cannot be made."""
    if type(shape) is not Gaussian or not use_compiled():
        return None
    factors = [f for f in _OTHER_FACTORS if lo_w <= width * f <= hi_w
               and (f >= 1.0 or not wider)]
    if len(factors) < 2 or 1.0 not in factors:
        return None
    lo, hi = float(window[0]), float(window[1])
    own = factors.index(1.0)
    out = np.empty((len(factors), 4))
    btot = None
    if isinstance(background, _Minimum):  # the background's rows made in the path's call
        btot = background.path(edges, n, scale, lo, hi, mass, lo_m, hi_m,
                               np.array([width * f for f in factors]), own, signal_yield, out)
        if btot is _NO_PATH:
            return None
        if btot is None:  # the general path
            background = background_rows(background.model, edges, background.v,
                                         background.is_fixed)
    if btot is None:
        bexp, dg = background
        b0 = np.maximum(bexp, 1e-12)
        btot = float(b0.sum())
        if not btot > 0:
            return None
        x = np.minimum(np.maximum(np.asarray(edges, float), lo), hi)
        sc = np.ones(b0.size) if scale is None else np.ascontiguousarray(scale, float)
        if not compiled_module(WIDTH_PATH_MODULE).width_path(
                x, lo, hi, np.ascontiguousarray(n, float), sc, b0 / btot,
                np.ascontiguousarray(dg, float) / btot, float(mass), max(lo, float(lo_m)),
                min(hi, float(hi_m)), np.array([width * f for f in factors]), own,
                _BAND_SIGMAS, float(signal_yield), btot, PATH_RISE, out):
            return None
    # (on the few widths as Python floats: numpy's calls cost more than the work here)
    q = [v if math.isfinite(v) else math.inf for v in out[:, 3].tolist()]
    return factors, own, out.tolist(), q, btot


def other_widths(shape, edges, n, scale, background, mass, width, signal_yield, lo_w, hi_w,
                 lo_m, hi_m, window, most):
    """Other minima along the width of a Gaussian peak whose best minimum so far has
    ``mass``, ``width`` and ``signal_yield`` on the background ``(expected counts,
    derivatives in its free shape parameters)`` of :func:`background_rows` (or a
    :class:`_Minimum`: those made in the path's compiled call where they can be).

    The profile NLL at ``width * OTHER_FACTORS`` (inside ``[lo_w, hi_w]``) with both yields
    and the mass (inside ``[lo_m, hi_m]``) profiled and the background's shape relaxed
    (:func:`.width_path.width_path`): its local minima (an end of the grid counts when the
    profile falls towards it) other than the one the best minimum's own width lies in and
    at most :data:`OTHER_MARGIN` above that one's lowest, at most ``most``, the lowest
    first, as ``[(factor, signal yield, background total / the background's total,
    mass)]``.  An empty list: the profile has one minimum, the best
    one's, so a start at another width slides back into it.  None for other shapes or
    without the compiled path."""
    if most <= 0:
        return None
    path = _path(shape, edges, n, scale, background, mass, width, signal_yield, lo_w, hi_w,
                 lo_m, hi_m, window)
    if path is None:
        return None
    factors, own, rows, q, btot = path
    last = len(q) - 1
    while True:  # descend from the best minimum's own width: the basin it lies in
        left = q[own - 1] if own > 0 else math.inf
        right = q[own + 1] if own < last else math.inf
        if min(left, right) >= q[own]:
            break
        own = own - 1 if left < right else own + 1
    # the local minima (an end compares with its one neighbour), the lowest first
    lows = [i for i in range(len(q)) if math.isfinite(q[i])
            and q[i] < (q[i - 1] if i > 0 else math.inf)
            and q[i] <= (q[i + 1] if i < last else math.inf)]
    lows = [i for i in sorted(lows, key=q.__getitem__)  # stable, as argsort's
            if i != own and q[i] <= q[own] + OTHER_MARGIN]
    return [(factors[i], rows[i][1], rows[i][2] / btot, rows[i][0]) for i in lows[:most]]


def lowest_width(shape, edges, n, scale, background, mass, width, signal_yield, lo_w, hi_w,
                 lo_m, hi_m, window, sign):
    """The lowest point, wider than ``width``, of the profile along the width of a Gaussian
    started at ``mass``, ``width`` and ``signal_yield`` (a start, not a minimum) on the
    background of :func:`background_rows`, as :func:`other_widths` profiles it (the mass
    free, the background's shape relaxed), among the points whose signal yield has the
    sign ``sign``: ``(factor, signal yield, background total / the background's total,
    mass)``; None for other shapes, without the compiled path, or where no such point lies
    below the start's own width.

    A dip's start width comes from :func:`scan_width`, with the mass held: at a window's
    edge it picks a narrow deficit of a bin or two, whose minimum can lie 2 above a wide
    deficit reaching over the edge, which a free mass finds.  (Wider only: a narrower
    deficit at the same mass is what the scan and the narrow candidates start from; moved
    to narrower lowest points too, dip starts ended on other flat, unconverged spikes, 0.03
    and 0.10 higher in two fits of ``check_fit_minima``'s set.)"""
    path = _path(shape, edges, n, scale, background, mass, width, signal_yield, lo_w, hi_w,
                 lo_m, hi_m, window, wider=True)
    if path is None:
        return None
    factors, own, rows, q, btot = path
    best = min((i for i in range(len(q)) if i != own and sign * rows[i][1] > 0),
               key=q.__getitem__, default=own)  # (the first lowest, as np.argmin)
    if not q[best] < q[own]:
        return None
    r = rows[best]
    return factors[best], r[1], r[2] / btot, r[0]


#: :meth:`_Minimum.path`'s answer where there is no path to walk
_NO_PATH = object()


class _Minimum:
    """The background of :func:`background_rows` at the full vector ``v``, for
    :func:`_path` to make in its compiled call (:func:`.start_fused.width_path_at`: the
    same rows, sums and path, ~15 numpy and compiled calls fewer) where it can."""

    def __init__(self, model, v: np.ndarray, is_fixed: np.ndarray) -> None:
        self.model, self.v, self.is_fixed = model, v, is_fixed

    def path(self, edges, n, scale, lo, hi, mass, lo_m, hi_m, widths, own, signal_yield,
             out):
        """The background's total after :func:`.width_path.width_path` filled ``out``;
        :data:`_NO_PATH` (no path: :func:`_path` gives None) or None (the general path
        must answer)."""
        model, v = self.model, self.v
        row = edge_row(model, edges)
        if row is None or not (_plain(edges) and _plain(n) and _plain(scale)
                               and _plain(v)):
            return None
        _, bsl, biy = model.blocks[-1]
        free = np.array([i for i in range(bsl.stop - bsl.start)
                         if not self.is_fixed[bsl.start + i]], np.int64)
        status, btot = compiled_module(FUSED_MODULE).width_path_at(
            row, v, free, biy, _clipped(edges, lo, hi), lo, hi, n, scale, float(mass),
            float(lo_m), float(hi_m), widths, own, _BAND_SIGMAS, float(signal_yield),
            PATH_RISE, out)
        if status == 1:
            return None
        return btot if status == 0 else _NO_PATH


def _plain(a) -> bool:
    return type(a) is np.ndarray and a.dtype == np.float64 and a.flags.c_contiguous


def _clipped(edges: np.ndarray, lo: float, hi: float) -> np.ndarray:
    """The edges clipped to the window, kept for the last read-only edges array."""
    seen = _CLIPPED[0]
    if seen is not None and seen[0] is edges and seen[1] == (lo, hi):
        return seen[2]
    x = np.minimum(np.maximum(edges, lo), hi)
    if not edges.flags.writeable:
        _CLIPPED[0] = (edges, (lo, hi), x)
    return x


#: [(read-only edges, window, clipped edges)] of the last call
_CLIPPED: list = [None]


class WidthProfile:
    """``profile(near)``: :func:`.start_widths.other_widths` at the minimum ``near`` (a full
    vector) on the data's own bins, computed once per minimum; None where it does not
    apply (an unbinned fit, several signals, a width other than one Gaussian sigma, a
    yield held), and the other widths are then minimised from as they are."""

    def __init__(self, model, fine, i_m, free_widths, is_fixed, lower, upper, most):
        blocks = model.blocks
        shape, sl, iy = blocks[0]
        ok = (fine is not None and len(blocks) == 2 and type(shape) is Gaussian
              and len(free_widths) == 1
              and free_widths[0] == sl.start + shape.parameter_names.index("sigma")
              and not is_fixed[i_m] and not is_fixed[iy] and not is_fixed[blocks[-1][2]])
        self._args = (model, fine, i_m, free_widths[0], lower, upper, most, is_fixed) if ok \
            else None
        self._seen: dict = {}
        self._taken: dict = {}

    def take(self, near: np.ndarray):
        """The next of the profile's minima at ``near`` not yet started from (``()`` when
        none is left; None where the profile does not apply).  Counted per minimum: when a
        start replaces the best minimum, the next start takes the new profile's lowest,
        not its second (which skipped a minimum 0.07 lower in a demo fit)."""
        key = np.asarray(near, float).tobytes()
        found = self(near, key)
        if found is None:
            return None
        k = self._taken.get(key, 0)
        self._taken[key] = k + 1
        return found[k] if k < len(found) else ()

    def __call__(self, near: np.ndarray, key: bytes | None = None):
        if self._args is None:
            return None
        if key is None:
            key = np.asarray(near, float).tobytes()
        if key not in self._seen:
            model, (fe, fn, fsc), i_m, i_w, lower, upper, most, is_fixed = self._args
            shape, _, iy = model.blocks[0]
            try:
                with np.errstate(all="ignore"):
                    self._seen[key] = other_widths(
                        shape, fe, fn, fsc, _Minimum(model, np.asarray(near, float), is_fixed),
                        float(near[i_m]), float(near[i_w]), float(near[iy]), lower[i_w],
                        upper[i_w], lower[i_m], upper[i_m], model.window, most)
            except _NUMERIC:
                self._seen[key] = None
        return self._seen[key]
