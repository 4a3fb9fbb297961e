"""Data for a fit: a histogram's bins in the window, or masses (and weights), binned or not.

:func:`prepare` decides binned or unbinned (and says why), checks the data, and gives the
binning used for the goodness of fit and the figure.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import FitError, InputError
from ..shapes import as_window

#: arrays with at most this many masses in the window are fitted unbinned by default
UNBINNED_LIMIT = 20000
_log = logging.getLogger("peaksift.fitting")

#: number of bins used when a large array is fitted binned by default
DEFAULT_BINS = 400


@dataclass
class FitData:
    binned: bool
    reason: str
    weighted: bool
    edges: np.ndarray | None
    n: np.ndarray | None
    n2: np.ndarray | None
    x: np.ndarray | None
    w: np.ndarray | None
    window: tuple[float, float]
    total: float
    unit: str
    # MassHistogram: the fitted bins, or the goodness-of-fit bins (unbinned); None in a
    # kept setup (:mod:`.setup`), whose arrays above are its own
    hist: Any = None
    note: str = ""  # said in the result's notes (a window snapped to the histogram's bins)


def prepare(data: Any, weights: Any, window: Any, binned: bool | None, bins: Any) -> FitData:
    from ..histogram import MassHistogram, as_spectrum

    spec = as_spectrum(data, weights, what="fit")
    if isinstance(spec, MassHistogram):
        if binned is False:
            raise FitError("an unbinned fit needs the masses themselves, not a histogram; "
                           "pass the array of masses or use binned=True")
        try:
            h = spec if window is None or _covers(spec, window) else spec.restrict(
                as_window(window))
        except InputError as exc:
            raise FitError(f"fit window: {exc}") from None
        n, n2 = h.values(), h.variances()
        total = float(n.sum())
        # a finite sum has no NaN or infinity among its terms: the element test only when
        # the sums are not finite (an overflowing sum of finite numbers passes it)
        if not (math.isfinite(total) and math.isfinite(float(n2.sum()))) and not (
                np.isfinite(n).all() and np.isfinite(n2).all()):
            raise FitError("the histogram has non-finite bin contents in the fit window")
        if (n < 0).any():
            k = int(np.flatnonzero(n < 0)[0])
            raise FitError(f"the histogram has a negative sum of weights ({n[k]:g}) in the bin "
                           f"{h.edges[k]:g}-{h.edges[k + 1]:g} GeV: a Poisson likelihood needs "
                           "non-negative contents; merge bins or fit the masses unbinned")
        note = ""
        if window is not None:
            lo, hi = as_window(window)
            if not (math.isclose(lo, h.lo, abs_tol=1e-9) and math.isclose(hi, h.hi, abs_tol=1e-9)):
                note = (f"fit window {lo:g}-{hi:g} {h.unit} snapped to the histogram's bins "
                        f"lying completely inside it: {h.lo:g}-{h.hi:g} {h.unit}")
                _log.info(note)
        return FitData(True, "data is a histogram", bool(h.is_weighted), h.edges, n, n2, None,
                       None, (h.lo, h.hi), total, h.unit, h, note)
    x, w = spec
    bad = ~np.isfinite(x)
    if bad.any():
        raise FitError(f"{int(bad.sum())} of {x.size} masses are not finite (first at index "
                       f"{int(np.flatnonzero(bad)[0])}); drop NaN/inf masses before fitting")
    if w is not None:
        if w.shape != x.shape:
            raise FitError(f"{x.size} masses but {w.size} weights; give one weight per mass")
        badw = ~np.isfinite(w)
        if badw.any():
            raise FitError(f"{int(badw.sum())} weights are not finite (first at index "
                           f"{int(np.flatnonzero(badw)[0])})")
    if window is None and binned is not False and np.ndim(bins) == 1 and len(bins) >= 2:
        window = (bins[0], bins[-1])  # given edges define the window
    if window is None:
        if x.size == 0:
            raise FitError("no masses given and no window; nothing to fit")
        lo, hi = float(x.min()), float(x.max())
        if hi <= lo:
            raise FitError("all masses are equal; give a window=(lo, hi)")
    else:
        lo, hi = as_window(window)
    sel = (x >= lo) & (x <= hi)
    x = x[sel]
    if w is not None:
        w = w[sel]
        if np.all(w == 1.0):
            w = None
    if x.size == 0:
        raise FitError(f"no masses inside the fit window ({lo:g}, {hi:g}); "
                       "check the window and the mass units (GeV)")
    weighted = w is not None
    total = float(x.size if w is None else w.sum())
    if binned is None:
        if x.size <= UNBINNED_LIMIT:
            binned, reason = False, (f"{x.size} mass{'' if x.size == 1 else 'es'} <= "
                                     f"{UNBINNED_LIMIT}: unbinned uses all the information at "
                                     "small cost")
        else:
            binned, reason = True, (f"{x.size} masses > {UNBINNED_LIMIT}: binned in "
                                    f"{DEFAULT_BINS if bins is None else bins} bins for speed")
    else:
        reason = "requested"
    if binned:
        h = MassHistogram.from_masses(x, w, edges=_edges(bins, lo, hi))
        return FitData(True, reason, weighted, h.edges, h.values(), h.variances(), None,
                       None, (lo, hi), float(h.values().sum()), "GeV", h)
    nb = int(np.clip(x.size // 20, 5, 100))
    gof = MassHistogram.from_masses(x, w, bins=nb, range=(lo, hi))
    return FitData(False, reason, weighted, None, None, None, x, w, (lo, hi), total, "GeV", gof)


def _covers(h: Any, window: Any) -> bool:
    """Whether ``window`` holds every bin of ``h`` (``restrict`` would keep them all: the
    histogram is then fitted as it is, without a copy); False for anything ``restrict``
    must look at (and judge)."""
    try:
        lo, hi = as_window(window)
    except InputError:
        return False
    tol = 1e-9 * (h.hi - h.lo)  # restrict's
    return lo - tol <= h.edges[0] and h.edges[-1] <= hi + tol


def _edges(bins: Any, lo: float, hi: float) -> np.ndarray:
    """Bin edges for a binned fit of masses in (lo, hi): a number of equal bins, or edges
    increasing strictly from lo to hi."""
    if bins is None:
        return np.linspace(lo, hi, DEFAULT_BINS + 1)
    if np.ndim(bins) == 0:
        try:
            nb = float(bins)
        except (TypeError, ValueError):
            nb = math.nan
        if not (nb >= 1 and nb == int(nb)):
            raise FitError(f"bins must be a positive whole number or an array of edges, got "
                           f"{bins!r}")
        return np.linspace(lo, hi, int(nb) + 1)
    try:
        e = np.asarray(bins, dtype=float)
    except (TypeError, ValueError):
        raise FitError(f"bins: edges must be numbers, got {bins!r}") from None
    if e.ndim != 1 or e.size < 2 or not np.all(np.isfinite(e)) or np.any(np.diff(e) <= 0):
        raise FitError("bins: edges must be a 1-d array of at least 2 finite numbers "
                       "increasing strictly")
    tol = 1e-9 * (hi - lo)
    if abs(e[0] - lo) > tol or abs(e[-1] - hi) > tol:
        raise FitError(f"bins: the edges run from {e[0]:g} to {e[-1]:g} but the fit window is "
                       f"({lo:g}, {hi:g}); give edges spanning exactly the window")
    return e


def gof_binning(d: FitData) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Edges, sums of weights and of squared weights of the goodness-of-fit bins: the fit's
    own bins (the histogram's arrays), or for unbinned data 5-100 equal bins of ~20 masses."""
    if d.binned:
        return d.edges, d.n, d.n2
    return d.hist.edges, d.hist.values(), d.hist.variances()


def start_bins(d: FitData, most: int = 100) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``(edges, sums of weights, scaled-Poisson factors)`` of the bins the starting values
    are found on: the fit's bins merged ``k`` at a time (the last group takes what is left)
    to at most ``most`` bins."""
    h = d.hist
    k = -(-h.nbins // most)
    if k <= 1:
        return h.edges, h.values(), h.scaled_poisson_factors()
    n, n2 = h.values(), h.variances()
    # weighted (np.array_equal's test, same shapes here; an unweighted histogram has them
    # equal)
    if d.weighted and not bool((n == n2).all()):
        e = h.edges[::k]
        r = h.rebin(edges=e if e[-1] == h.edges[-1] else np.append(e, h.edges[-1]))
        return r.edges, r.values(), r.scaled_poisson_factors()
    # unweighted: MassHistogram.rebin's sums (reduceat, its last group summed anew) without
    # a histogram (its edge checks were ~40 us of a fit), and factors of 1, as that
    # histogram's scaled_poisson_factors gives for equal sums and squared sums
    keep = list(range(0, h.nbins + 1, k))  # (np.arange and np.append: ~5 us more)
    if keep[-1] != h.nbins:
        keep.append(h.nbins)
    keep = np.array(keep)
    v = np.add.reduceat(n, keep[:-1])
    v[-1] = n[keep[-2]:keep[-1]].sum()
    return h.edges[keep], v, np.ones_like(v)
