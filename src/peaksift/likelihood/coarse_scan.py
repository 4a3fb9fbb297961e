"""The free fit's coarse likelihood scan of the window for candidate peak masses.

:func:`peak_candidates` -- at each trial mass a Gaussian (or the signal's own fractions)
on the background held in shape, the signal yield and the background normalisation
profiled (a few stacked damped Newton steps on
:func:`~peaksift.likelihood.poisson.binned_nll`), and the separated local maxima of the
gain, best first.  :func:`coarse_gains` is what :mod:`.starts` calls: for a Gaussian in one
compiled scan and compiled local maxima (:mod:`.start_kernels`), else the stacked numpy
steps (the reference, the same numbers).
"""

from __future__ import annotations

import math

import numpy as np

from .._jit import compiled_module
from .._kept import Kept
from ..shapes import Gaussian
from .minimize import damped_step
from .poisson import (
    SHAPE_ROWS_MODULE,
    START_KERNELS_MODULE,
    binned_gradient,
    binned_information,
    binned_nll,
    use_compiled,
)

__all__ = ["coarse_gains", "coarse_rows_kept", "peak_candidates"]


def coarse_gains(shape, edges, n, scale, grid, p, window, bexp, dips):
    """``(peaks, dips)`` of the coarse scan at the trial masses ``grid`` (``p``: the
    signal's parameters with the mass column ``grid[:, None]``): ``[(mass index, 2 dNLL)]``
    for up to 3 local maxima with a positive signal, and (``dips``) 2 with a negative one."""
    found = _compiled_scan(shape, edges, n, scale, grid, p, window, bexp, dips)
    if found is not None:
        return found
    fr = _compiled_fractions(shape, edges, grid, p, window)
    if fr is None:
        fr = np.broadcast_to(shape.bin_fractions(edges, p, window),
                             (grid.size, edges.size - 1))
    profile = _coarse_profile(n, scale, fr, bexp)
    return _local_maxima(*profile, 3), (_local_maxima(*profile, 2, -1.0) if dips else [])


def peak_candidates(n: np.ndarray, scale: np.ndarray, signal_fractions: np.ndarray, background: np.ndarray,
                    most: int = 3, sign: float = 1.0) -> list[tuple[int, float]]:
    """Local maxima of a coarse profile-likelihood scan, best first.

    ``signal_fractions (M, N)`` are the signal's bin fractions at M trial masses,
    ``background (N,)`` the background expectation.  At each mass the signal yield and the
    background normalisation are profiled (a few stacked damped Newton steps on
    :func:`~peaksift.likelihood.poisson.binned_nll`); returns ``[(mass index, 2 dNLL)]`` for
    up to ``most`` separated local maxima with a positive signal (``sign=-1``: a negative
    one, the dips).
    """
    return _local_maxima(*_coarse_profile(n, scale, signal_fractions, background), most, sign)


def _coarse_profile(n, scale, signal_fractions, background):
    """(profiled yields (M, 2), NLL (M,), background-only NLL) of :func:`peak_candidates`."""
    f = np.asarray(signal_fractions, float)
    b0 = np.maximum(np.asarray(background, float), 1e-12)
    m = f.shape[0]
    btot = float(b0.sum())
    g = b0 / btot
    # differences of NLLs only: the saturated term is left out
    nll0 = binned_nll(n, btot * g, scale, saturated=False)
    x = np.empty((m, 2))
    x[:, 0] = 0.1 * math.sqrt(max(btot, 1.0))
    x[:, 1] = btot
    if use_compiled():
        profile_two_yields = compiled_module(START_KERNELS_MODULE).profile_two_yields
        nll = np.empty(m)
        if (isinstance(scale, np.ndarray) and scale.dtype == float and scale.shape == g.shape
                and scale.flags.c_contiguous and not scale.flags.writeable):
            sc = scale  # what the broadcast below gives (a fit's read-only factors)
        else:
            sc = np.broadcast_to(np.asarray(1.0 if scale is None else scale, float), g.shape)
        profile_two_yields(np.ascontiguousarray(n, float), np.ascontiguousarray(sc),
                           np.ascontiguousarray(f), g, x, nll, 25)
        return x, nll, nll0
    dmu = np.stack([f, np.broadcast_to(g, f.shape)], axis=1)  # (M, 2, N)
    lam = np.full(m, 1e-3)
    quiet = 0
    with np.errstate(all="ignore"):
        nll = binned_nll(n, x[:, :1] * f + x[:, 1:] * g, scale, saturated=False)
        for _ in range(25):
            mu = x[:, :1] * f + x[:, 1:] * g
            grad = binned_gradient(n, mu, dmu, scale)
            info = binned_information(mu, dmu, scale)
            trial = x + damped_step(info, grad, lam)
            mu_t = trial[:, :1] * f + trial[:, 1:] * g
            ok = np.all(mu_t > 0, axis=1)
            nt = np.where(ok, binned_nll(n, mu_t, scale, saturated=False), np.inf)
            better = nt <= nll
            gain = np.where(better, nll - nt, 0.0)
            x[better], nll[better] = trial[better], nt[better]
            lam = np.where(better, np.maximum(lam * 0.1, 1e-9), lam * 10.0)
            quiet = quiet + 1 if np.all(gain < 1e-6) else 0
            if quiet >= 2:
                break  # no mass gains any more (a coarse scan needs no more)
    return x, nll, nll0


def _local_maxima(x: np.ndarray, nll: np.ndarray, nll0: float, most: int, sign: float = 1.0):
    q = np.where((sign * x[:, 0] > 0) & np.isfinite(nll), 2.0 * (nll0 - nll), 0.0)
    # q[i] > 0, not below either neighbour (the ends compare with their one neighbour)
    pad = np.concatenate([[-np.inf], q, [-np.inf]])
    peaks = np.flatnonzero((q > 0) & (q >= pad[:-2]) & (q >= pad[2:]))
    peaks = peaks[np.argsort(-q[peaks], kind="stable")]
    return [(int(i), float(q[i])) for i in peaks[:most]]


def _compiled_scan(shape, edges, n, scale, grid, p, window, bexp, dips):
    """``(peaks, dips)`` of the coarse scan of a Gaussian, as :func:`_local_maxima` lists
    them, from the compiled rows (:func:`.start_kernels.coarse_rows`, kept per binning by
    :func:`coarse_rows_kept`) and one compiled call for the rest
    (:func:`.start_kernels.coarse_gains`): the same steps as :func:`_compiled_fractions`,
    :func:`_coarse_profile` and :func:`_local_maxima` (the same numbers but the sums' order,
    in the gains' last digits) without their ~20 numpy calls; None where those must answer
    (another shape, the compiled path off, no row)."""
    if type(shape) is not Gaussian or not use_compiled():
        return None
    sigma = float(p[shape.parameter_names.index("sigma")])
    if not sigma > 0:
        return None
    nb = edges.size - 1
    if (isinstance(scale, np.ndarray) and scale.dtype == float and scale.shape == (nb,)
            and scale.flags.c_contiguous):
        sc = scale
    else:
        sc = np.ascontiguousarray(np.broadcast_to(
            np.asarray(1.0 if scale is None else scale, float), (nb,)))
    kern = compiled_module(START_KERNELS_MODULE)
    frac = coarse_rows_kept(kern, np.ascontiguousarray(edges, float), float(window[0]),
                      float(window[1]), np.ascontiguousarray(grid, float), sigma)
    if frac is None:
        return None
    # the background's shape, its NLL alone, the profile and the local maxima in one call
    index, gain = np.empty(5, np.int64), np.empty(5)
    k1, k2 = kern.coarse_gains(np.ascontiguousarray(n, float), sc, frac,
                               np.ascontiguousarray(bexp, float), 25, bool(dips), index, gain)
    return (list(zip(index[:k1].tolist(), gain[:k1].tolist())),
            list(zip(index[3:3 + k2].tolist(), gain[3:3 + k2].tolist())))


#: the coarse scan's rows by binning, window, trial masses and width, newest last: they do
#: not depend on the counts, and a window fitted again (toys, a search's stages, the same
#: histogram refitted) needs the same rows (~50 of a scan's ~140 us on 97 bins x 80 masses)
_ROWS = Kept(8)
#: rows kept only up to this many cells (a scan of 400 masses x 100 bins has 40,000)
_ROWS_CELLS = 50_000


def coarse_rows_kept(kern, edges, lo, hi, grid, sigma):
    """:func:`.start_kernels.coarse_rows` of these inputs, kept per key (the same
    numbers); None where a row cannot be made.  The last rows of read-only edges and grid
    arrays are found again by identity first (a toy's start bins and kept grid: no key
    of their bytes to make)."""
    seen = _LAST_ROWS[0]
    if (seen is not None and seen[0] is edges and seen[1] is grid
            and seen[2] == (lo, hi, sigma)):
        return seen[3]
    key = b"".join((edges.tobytes(), grid.tobytes(),
                    np.array([lo, hi, sigma, edges.size, grid.size], float).tobytes()))
    frac = _ROWS.get(key)
    if frac is None:
        frac = np.empty((grid.size, edges.size - 1))
        if not kern.coarse_rows(edges, lo, hi, grid, sigma, frac):
            return None
        if frac.size > _ROWS_CELLS:
            return frac
        _ROWS.put(key, frac)
    if not (edges.flags.writeable or grid.flags.writeable):
        _LAST_ROWS[0] = (edges, grid, (lo, hi, sigma), frac)
    return frac


#: [(read-only edges, read-only grid, (window, width), rows)] of the last kept rows
_LAST_ROWS: list = [None]


def _compiled_fractions(shape, edges, grid, p, window) -> np.ndarray | None:
    """The coarse scan's Gaussian bin fractions at every trial mass in one compiled call
    (:func:`peaksift.shapes.compiled.gaussian_rows`; the numpy path costs ~15x more); None
    for other shapes."""
    if type(shape) is not Gaussian or not use_compiled():
        return None
    gaussian_rows = compiled_module(SHAPE_ROWS_MODULE).gaussian_rows
    sigma = float(p[shape.parameter_names.index("sigma")])
    lo, hi = float(window[0]), float(window[1])
    x = np.clip(np.asarray(edges, float), lo, hi)
    out = np.empty((grid.size, x.size - 1))
    if not (sigma > 0 and gaussian_rows(x, np.ascontiguousarray(grid, float), sigma, lo, hi,
                                        out)):
        return None
    return out
