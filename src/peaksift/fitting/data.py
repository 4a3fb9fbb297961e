"""Data for a fit: a histogram's bins in the window, or masses (and weights), binned or not.

:func:`prepare` decides binned or unbinned (and says why), checks the data, and gives the
binning used for the goodness of fit and the figure.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import FitError
from ..shapes import as_window

#: arrays with at most this many masses in the window are fitted unbinned by default
UNBINNED_LIMIT = 20000
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


def prepare(data: Any, weights: Any, window: Any, binned: bool | None, bins: Any) -> FitData:
    from ..histogram import MassHistogram

    if isinstance(data, MassHistogram):
        if weights is not None:
            raise FitError("weights= given with a MassHistogram; the histogram already holds them")
        if binned is False:
            raise FitError("an unbinned fit needs the masses themselves, not a MassHistogram; "
                           "pass the array of masses or use binned=True")
        e = np.asarray(data.edges, float)
        lo, hi = as_window(window) if window is not None else (e[0], e[-1])
        tol = 1e-9 * (e[-1] - e[0])
        keep = (e[:-1] >= lo - tol) & (e[1:] <= hi + tol)
        if not keep.any():
            raise FitError(f"fit window ({lo:g}, {hi:g}) contains no complete bin of the "
                           f"histogram (range {e[0]:g}-{e[-1]:g}); choose a window inside it")
        idx = np.flatnonzero(keep)
        edges = e[idx[0]: idx[-1] + 2]
        n = np.asarray(data.sumw, float)[idx[0]: idx[-1] + 1]
        n2 = np.asarray(data.sumw2, float)[idx[0]: idx[-1] + 1]
        if not (np.all(np.isfinite(n)) and np.all(np.isfinite(n2))):
            raise FitError("the histogram has non-finite bin contents in the fit window")
        if np.any(n < 0):
            k = int(np.flatnonzero(n < 0)[0])
            raise FitError(f"the histogram has a negative sum of weights ({n[k]:g}) in the bin "
                           f"{edges[k]:g}-{edges[k + 1]:g} GeV: a Poisson likelihood needs "
                           "non-negative contents; merge bins or fit the masses unbinned")
        weighted = bool(data.is_weighted)
        return FitData(True, "data is a histogram", weighted, edges, n, n2, None, None,
                     (float(edges[0]), float(edges[-1])), float(n.sum()),
                     getattr(data, "unit", "GeV"))
    if isinstance(data, tuple) and len(data) == 2 and weights is None:
        data, weights = data
    x = _masses(data, "masses")
    bad = ~np.isfinite(x)
    if bad.any():
        raise FitError(f"{int(bad.sum())} of {x.size} masses are not finite (first at index "
                       f"{int(np.flatnonzero(bad)[0])}); drop NaN/inf masses before fitting")
    w = None
    if weights is not None:
        w = _masses(weights, "weights")
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
            binned, reason = False, (f"{x.size} masses <= {UNBINNED_LIMIT}: unbinned uses all "
                                     "the information at small cost")
        else:
            binned, reason = True, (f"{x.size} masses > {UNBINNED_LIMIT}: binned in "
                                    f"{DEFAULT_BINS if bins is None else bins} bins for speed")
    else:
        reason = "requested"
    if binned:
        edges = _edges(bins, lo, hi)
        idx = np.clip(np.searchsorted(edges, x, side="right") - 1, 0, edges.size - 2)
        nb = edges.size - 1
        n = np.bincount(idx, weights=w, minlength=nb).astype(float)
        n2 = n.copy() if w is None else np.bincount(idx, weights=w * w, minlength=nb)
        return FitData(True, reason, weighted, edges, n, n2, None, None, (lo, hi), total, "GeV")
    return FitData(False, reason, weighted, None, None, None, x, w, (lo, hi), total, "GeV")


def _masses(data: Any, what: str) -> np.ndarray:
    """A flat float array of masses (or weights), or a FitError saying what was given."""
    if data is None or isinstance(data, (str, bytes)):
        raise FitError(f"{what} must be an array of numbers (or a MassHistogram), got "
                       f"{type(data).__name__}")
    try:
        a = np.asarray(data)
        if np.iscomplexobj(a):
            raise TypeError("complex")
        return a.astype(float).ravel()
    except (TypeError, ValueError):
        raise FitError(f"{what} must be an array of real numbers, got "
                       f"{type(data).__name__} with dtype {np.asarray(data).dtype}") from None


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
    """The fit's own bins, or for unbinned data 5-100 equal bins of ~20 masses."""
    if d.binned:
        return d.edges, d.n, d.n2
    nb = int(np.clip(d.x.size // 20, 5, 100))
    edges = np.linspace(d.window[0], d.window[1], nb + 1)
    idx = np.clip(np.searchsorted(edges, d.x, side="right") - 1, 0, nb - 1)
    n = np.bincount(idx, weights=d.w, minlength=nb).astype(float)
    n2 = n.copy() if d.w is None else np.bincount(idx, weights=d.w**2, minlength=nb)
    return edges, n, n2


def poisson_scale(n: np.ndarray, n2: np.ndarray) -> np.ndarray:
    """Scaled-Poisson factor sum(w)/sum(w^2) per bin (1 for unweighted bins)."""
    if np.array_equal(n, n2):
        return np.ones_like(n)
    glob = n.sum() / n2.sum() if n2.sum() > 0 else 1.0
    with np.errstate(invalid="ignore", divide="ignore"):
        s = np.where(n2 > 0, n / np.where(n2 > 0, n2, 1.0), glob)
    return np.where(s > 0, s, glob)

