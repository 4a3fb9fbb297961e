"""Restricting a :class:`~peaksift.histogram.MassHistogram` to a window and merging its
bins: the new histogram's bins and the contents that move to the under- or overflow, so no
weight is lost.  The methods ``restrict`` and ``rebin`` document the rules."""

from __future__ import annotations

from typing import Any

import numpy as np

from ..errors import InputError
from .binning import check_edges


def restrict(cls: Any, hist: Any, window: tuple[float, float]) -> Any:
    """``MassHistogram.restrict``: the bins completely inside ``window`` (a ``cls``)."""
    try:
        lo, hi = (float(v) for v in window)
    except (TypeError, ValueError):
        raise InputError(f"window must be two numbers (lo, hi) in {hist.unit}, got "
                         f"{window!r:.80}") from None
    if not (np.isfinite(lo) and np.isfinite(hi) and hi > lo):
        raise InputError(f"window must be finite with lo < hi, got ({lo!r}, {hi!r})")
    e = hist.edges
    tol = 1e-9 * (hist.hi - hist.lo)
    keep = np.flatnonzero((e[:-1] >= lo - tol) & (e[1:] <= hi + tol))
    if keep.size == 0:
        i = int(np.clip(np.searchsorted(e, lo, side="left"), 0, hist.nbins - 1))
        raise InputError(
            f"window ({lo:g}, {hi:g}) contains no complete bin of the histogram ({hist.nbins} "
            f"bins on [{hist.lo:g}, {hist.hi:g}] {hist.unit}); choose a window spanning "
            f"at least one whole bin, e.g. ({e[i]:g}, {e[i + 1]:g}), or refill the masses "
            "with finer bins")
    i0, i1 = int(keep[0]), int(keep[-1]) + 1
    # a run of checked edges: still valid (and regular when they were)
    h = cls._on_checked_edges(e[i0 : i1 + 1], hist.unit, hist.label,
                              True if hist.is_regular else None)
    h._values = hist._values[i0:i1].copy()
    h._variances = hist._variances[i0:i1].copy()
    h.underflow = hist.underflow + float(hist._values[:i0].sum())
    h.underflow_variance = hist.underflow_variance + float(hist._variances[:i0].sum())
    h.overflow = hist.overflow + float(hist._values[i1:].sum())
    h.overflow_variance = hist.overflow_variance + float(hist._variances[i1:].sum())
    h.n_nan = hist.n_nan
    return h


def _subset(old: np.ndarray, edges: Any) -> np.ndarray | None:
    """The indices of ``edges`` among ``old`` when ``edges`` is a float array of current
    edges, each exactly one of them and increasing (a fit's coarser start bins); None for
    anything else, which the checked path then judges."""
    if not (isinstance(edges, np.ndarray) and edges.dtype == float and edges.ndim == 1
            and edges.size >= 2):
        return None
    idx = np.searchsorted(old, edges)
    if idx[-1] >= old.size or not (old[idx] == edges).all() or not (
            idx[1:] > idx[:-1]).all():
        return None
    return idx


def rebin(cls: Any, hist: Any, factor: int | None, edges: Any) -> Any:
    """``MassHistogram.rebin``: bins merged by ``factor`` or onto ``edges`` (a ``cls``)."""
    if (factor is None) == (edges is None):
        raise InputError("rebin needs exactly one of factor=N or edges=[...]")
    if factor is not None:
        if int(factor) != factor or factor < 1:
            raise InputError(f"rebin factor must be a positive integer, got {factor!r}")
        factor = int(factor)
        if hist.nbins % factor:
            raise InputError(
                f"rebin factor {factor} does not divide the {hist.nbins} bins; "
                "choose a divisor or pass edges=[...]"
            )
        keep = np.arange(0, hist.nbins + 1, factor)
    else:
        keep = _subset(hist.edges, edges)
    if keep is None:
        new = check_edges(edges)
        # nearest current edge to each new one; it must agree to rounding
        top = hist.edges.size - 1
        right = np.minimum(np.searchsorted(hist.edges, new), top)  # (0 at least)
        left = np.maximum(right - 1, 0)
        closer_left = np.abs(hist.edges[left] - new) < np.abs(hist.edges[right] - new)
        keep = np.where(closer_left, left, right)
        # np.isclose(.., rtol=1e-12, atol=1e-12) for finite edges, without its overhead
        ok = np.abs(hist.edges[keep] - new) <= 1e-12 + 1e-12 * np.abs(new)
        if not ok.all():
            bad = new[~ok][0]
            raise InputError(
                f"rebin edge {float(bad)!r} is not one of the current edges; new edges must be a "
                "subset of the old ones"
            )
    # a subset of checked edges (keep increases strictly: the new edges were checked)
    h = cls._on_checked_edges(hist.edges[keep], hist.unit, hist.label)
    # exact per-group sums; reduceat's last group runs to the array end, so redo it
    starts = keep[:-1]
    h._values = np.add.reduceat(hist._values, starts)
    h._variances = np.add.reduceat(hist._variances, starts)
    h._values[-1] = hist._values[keep[-2] : keep[-1]].sum()
    h._variances[-1] = hist._variances[keep[-2] : keep[-1]].sum()
    h.underflow = hist.underflow + float(hist._values[: keep[0]].sum())
    h.underflow_variance = hist.underflow_variance + float(hist._variances[: keep[0]].sum())
    h.overflow = hist.overflow + float(hist._values[keep[-1] :].sum())
    h.overflow_variance = hist.overflow_variance + float(hist._variances[keep[-1] :].sum())
    h.n_nan = hist.n_nan
    return h

