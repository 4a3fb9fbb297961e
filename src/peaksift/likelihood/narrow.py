"""Narrow candidates: peaks narrower than a bin, above and below the background.

On background-only spectra the lowest minimum of a free Gaussian is often a spike on one
bin or a dip into an empty one; a fit that never starts there reports a higher minimum.
:func:`narrow_candidates` finds the few such positions worth a start in one vectorised pass
(a Gaussian of :data:`NARROW_WIDTHS` bins at every bin centre and edge, its yield profiled on
the background held fixed); :func:`peaksift.likelihood.starts.fit_starts` starts from them.
"""

from __future__ import annotations

import numpy as np

from .._jit import compiled_module
from .poisson import KERNELS_MODULE, START_KERNELS_MODULE, use_compiled

__all__ = ["NARROW_MARGIN", "NARROW_SPREAD", "NARROW_WIDTHS", "STENCIL", "narrow_candidates",
           "narrow_from_rows"]


#: the narrow peaks a binned fit also starts from: these widths in units of the local bin
#: (a Gaussian of 0.3 bin centred in a bin keeps 90 % inside it, so the fit can still narrow
#: it down to one bin or shift it to split between two; 1.2 bins spreads over about three),
#: centred on every bin and on every edge between two bins
NARROW_WIDTHS = (0.3, 0.6, 1.2)
#: bins on each side of a narrow peak's bin that its fractions are computed on
STENCIL = 3
#: narrow candidates of one sign are minimised while their gain (background held) trails
#: the best one's by at most this in -2 ln L: the free fit's refit of the background adds a
#: few units, most where the bins hold few events (an empty bin in a steep tail that gained
#: 3.8 less than the best deficit with the background held ended 2.2 below it)
NARROW_SPREAD = 6.0
#: a narrow candidate is minimised only when its gain (background held) comes within this
#: of the coarse scan's best gain: held or not, a peak narrower than a bin gains about the
#: same (its bins are few), so unlike the coarse scan's candidates it needs no wide margin
#: -- on a strong peak the narrow peak on top of it (gain 318 against 369) is not minimised
NARROW_MARGIN = 2.0 * NARROW_SPREAD


def narrow_candidates(edges: np.ndarray, n: np.ndarray, scale: np.ndarray | None,
                      background: np.ndarray, q_best: float = 0.0,
                      most: tuple[int, int] = (1, 3),
                      exclude: tuple[tuple[float, float], ...] = (),
                      ) -> list[tuple[float, float, float, float]]:
    """The best ``most[0]`` separated narrow peaks above and ``most[1]`` below the
    background (those within :data:`NARROW_SPREAD` of the best of their sign): a Gaussian of
    :data:`NARROW_WIDTHS` bins at every bin centre and bin edge, its yield profiled on the
    background expectation ``background`` held fixed (a few Newton steps on the bins within
    :data:`STENCIL` of it).  Returns ``[(mass, width, yield, gain in -2 ln L)]``, the larger
    gain first; only gains within :data:`NARROW_MARGIN` of ``q_best``, and a position
    whose nearby bins' Poisson deviances (they bound its gain) fall short of that is not
    evaluated; nor is one inside an ``exclude`` interval (``(lo, hi)`` masses)."""
    e = np.asarray(edges, float)
    nb = e.size - 1
    if scale is None:
        sc = np.ones(nb)
    elif (isinstance(scale, np.ndarray) and scale.dtype == float and scale.shape == (nb,)
          and scale.flags.c_contiguous):
        sc = scale  # what the broadcast below gives (a fit's own factors), without its call
    else:
        sc = np.broadcast_to(np.asarray(scale, float), (nb,))
    nn = np.asarray(n, float)
    bb = np.maximum(np.asarray(background, float), 1e-300)
    k = STENCIL
    if use_compiled():  # the same bound in one compiled pass (~12 numpy calls otherwise)
        rows = np.empty(nb, np.int64)
        rows = rows[:compiled_module(START_KERNELS_MODULE).narrow_rows(
            e, nn, bb, np.ascontiguousarray(sc), k, q_best - NARROW_MARGIN,
            np.array(exclude, float).reshape(-1, 2), rows)]
    else:
        with np.errstate(divide="ignore", invalid="ignore"):
            dev = 2.0 * sc * (bb - nn + np.where(
                nn > 0, nn * np.log(np.where(nn > 0, nn, 1.0) / bb), 0.0))
        dev = np.where(np.isfinite(dev), dev, 0.0)
        # k empty bins on each side (the padding below): their deviance is 0
        cdev = np.concatenate([np.zeros(k + 1), np.cumsum(dev), np.full(k, 0.0)])
        cdev[nb + k + 1:] = cdev[nb + k]
        bound = cdev[2 * k + 1:] - cdev[:nb]  # deviances of bins j-k .. j+k
        keep = (bound > 0) & (bound >= q_best - NARROW_MARGIN)
        for lo, hi in exclude:
            keep &= (e[1:] <= lo) | (e[:-1] >= hi)
        rows = np.flatnonzero(keep)
    return narrow_from_rows(e, nn, bb, sc, rows, q_best, most)


def narrow_from_rows(e: np.ndarray, nn: np.ndarray, bb: np.ndarray, sc: np.ndarray,
                     rows: np.ndarray, q_best: float = 0.0,
                     most: tuple[int, int] = (1, 3)) -> list[tuple[float, float, float, float]]:
    """:func:`narrow_candidates` at the bins ``rows`` its bound keeps, from its float
    edges ``e``, counts ``nn``, background ``bb`` (floored at 1e-300) and factors ``sc``
    (what :func:`.start_fused.first_start` gives too)."""
    k = STENCIL
    if rows.size == 0:  # (on a clear peak, usually: nothing near the best gain)
        return []
    from scipy.special import ndtr

    # padding: k empty bins of zero width on each side
    ep = np.concatenate([np.full(k, e[0]), e, np.full(k, e[-1])])
    npd = np.concatenate([np.zeros(k), nn, np.zeros(k)])
    bpd = np.concatenate([np.ones(k), bb, np.ones(k)])
    spd = np.concatenate([np.zeros(k), sc, np.zeros(k)])
    width = np.diff(e)[rows]
    centre = 0.5 * (e[rows] + e[rows + 1])
    # every (position, width) variant of every row in one stack: (variants x rows) rows
    var = len(NARROW_WIDTHS)
    pos = np.concatenate([centre] * var + [e[rows]] * var)  # centred in bin j, on its edge
    w = np.concatenate([f_w * width for f_w in NARROW_WIDTHS] * 2)
    tile = np.tile(rows, 2 * var)
    sel = tile[:, None] + np.arange(2 * k + 1)  # padded bins j-k .. j+k
    xe = ep[tile[:, None] + np.arange(2 * k + 2)]
    f = np.diff(ndtr((xe - pos[:, None]) / w[:, None]), axis=1)
    y, gain = _profile_one_yield(npd[sel], bpd[sel], spd[sel], f)
    best = []
    for sign, k_most in zip((1.0, -1.0), most):
        g = np.where((sign * y > 0) & (pos >= e[0]) & (pos <= e[-1]), gain, -1.0)
        order = np.argsort(-g, kind="stable")
        taken: list[int] = []
        for i in order[:8 * k_most]:
            if (g[i] <= 0 or g[i] < q_best - NARROW_MARGIN
                    or (taken and g[i] < g[taken[0]] - NARROW_SPREAD)):
                break
            if all(abs(pos[i] - pos[t]) > 2.0 * (w[i] + w[t]) for t in taken):
                taken.append(int(i))
                if len(taken) == k_most:
                    break
        for i in taken:
            j = int(rows[i % rows.size])
            best.append((float(pos[i]), float(w[i]), float(y[i]), float(g[i])))
            if sign < 0 and nn[j] == 0 and pos[i] == centre[i % rows.size]:
                # an empty bin: a dip's lowest point may be an expectation of 0 there, on
                # the model's edge, which a minimiser reaches slowly from a wider peak (one
                # stopped at 0.3 bin, 0.6 above it) -- or one reaching into the next bin
                # (from all inside the bin, 0.4 above it): both are started
                best.append((float(pos[i]), 0.1 * float(width[i % rows.size]),
                             -0.98 * float(bb[j]), float(g[i])))
    return sorted(best, key=lambda t: -t[3])


def _profile_one_yield(n, b, s, f, steps: int = 8):
    """(yield, gain 2 dNLL) of ``b + y f`` against ``b`` per row, the yield by Newton steps
    on the Fisher information, each step halved while any bin's expectation would drop below
    1 % of its background (an empty bin's optimum is an expectation of 0)."""
    if use_compiled():  # the same steps row by row, compiled (~2 ms of numpy per fit)
        profile_one_yield = compiled_module(KERNELS_MODULE).profile_one_yield
        y, gain = np.empty(n.shape[0]), np.empty(n.shape[0])
        profile_one_yield(*(np.ascontiguousarray(a, float) for a in (n, b, s, f)), steps, y,
                          gain)  # (rows, bins) each
        return y, gain
    y = np.zeros(n.shape[0])
    with np.errstate(divide="ignore", invalid="ignore"):
        for _ in range(steps):
            mu = b + y[:, None] * f
            grad = (s * f * (1.0 - n / mu)).sum(1)
            info = (s * f * f / mu).sum(1)
            step = np.where(info > 0, -grad / info, 0.0)
            for _ in range(30):
                low = (b + (y + step)[:, None] * f < 0.01 * b).any(1)
                if not low.any():
                    break
                step = np.where(low, 0.5 * step, step)
            y = np.where(np.isfinite(step), y + step, y)
        mu = b + y[:, None] * f
        lr = np.where(n > 0, n * np.log(mu / b), 0.0)
        gain = 2.0 * (s * (lr - (mu - b))).sum(1)
    return y, np.where(np.isfinite(gain), gain, 0.0)
