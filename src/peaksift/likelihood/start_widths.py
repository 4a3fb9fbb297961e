"""Start widths of a Gaussian peak from profile likelihoods over its width.

Two questions of :func:`~peaksift.likelihood.starts.fit_starts`, answered for a Gaussian
signal on compiled rows (:func:`peaksift.shapes.compiled.gaussian_rows`) with the signal and
background yields profiled (:func:`.start_kernels.profile_two_yields`), the mass and the
background's shape held:

* :func:`scan_width` -- which width a fresh start at a candidate mass should take (the lowest
  profile NLL among :data:`WIDTH_FACTORS` of the start width);
* :func:`other_widths` -- whether the best minimum found so far leaves room for another
  minimum at a different width of the same peak (a narrow and a wide solution of one
  excess), and at which widths: the local minima of the profile NLL over
  :data:`OTHER_FACTORS` of its width other than its own.  A free fit then minimises from
  those widths only, instead of from every other width blindly.

Both return None for other shapes or without the compiled path: the caller then does what
it would without them.
"""

from __future__ import annotations

import math

import numpy as np

from .._jit import compiled_module
from ..shapes import Gaussian
from .poisson import START_KERNELS_MODULE, use_compiled

__all__ = ["OTHER_FACTORS", "WIDTH_FACTORS", "other_widths", "scan_width"]

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


def other_widths(shape, edges, n, scale, bexp, mass, width, signal_yield, lo_w, hi_w,
                 window, most):
    """Other minima along the width of a Gaussian peak whose best minimum so far has
    ``mass``, ``width`` and ``signal_yield`` on the background expectation ``bexp``.

    The profile NLL (both yields profiled, mass and background shape held) at ``width *
    OTHER_FACTORS`` (inside ``[lo_w, hi_w]``): its local minima (an end of the grid counts
    when the profile falls towards it) other than the one the best minimum's own width lies
    in, at most ``most``, the lowest first, as ``[(factor, signal yield, background
    total / bexp's total)]``.  An empty list: the profile has one minimum, the best one's,
    so a start at another width slides back into it.  None for other shapes or without the
    compiled path."""
    if type(shape) is not Gaussian or not use_compiled() or most <= 0:
        return None
    factors = [f for f in _OTHER_FACTORS if lo_w <= width * f <= hi_w]
    if len(factors) < 2 or 1.0 not in factors:
        return None
    out = _profiled(edges, n, scale, bexp, mass, np.array([width * f for f in factors]),
                    window, (signal_yield, None))
    if out is None:
        return None
    y, nll, btot = out
    # (on the few widths as Python floats: numpy's calls cost more than the work here)
    q = [v if math.isfinite(v) else math.inf for v in nll.tolist()]
    last = len(q) - 1
    own = factors.index(1.0)
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
    lows = [i for i in sorted(lows, key=q.__getitem__) if i != own]  # stable, as argsort's
    ys = y.tolist()
    return [(factors[i], ys[i][0], ys[i][1] / btot) for i in lows[:most]]
