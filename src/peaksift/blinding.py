"""The blinded region: which bins of a spectrum are hidden while a search is blind.

A blinded mass range ``(lo, hi)`` hides every bin that overlaps it, even partly, so no
count from inside the range reaches a fit, a figure or an output through a bin that
straddles its edge.  Every part that hides data uses this one rule:

* :func:`blinded_bins` -- the boolean mask of hidden bins for given bin edges;
* :func:`hidden_range` -- the mass range those bins cover (what a figure shades and a
  results file reports), which is ``(lo, hi)`` widened to the enclosing bin edges.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from numpy.typing import ArrayLike

from .errors import FitError

__all__ = ["blinded_bins", "hidden_range"]


def blinded_bins(edges: ArrayLike, blind: Sequence[float] | None) -> np.ndarray:
    """True for every bin ``[e_i, e_{i+1})`` that overlaps the blinded range.

    A bin overlaps ``(lo, hi)`` when ``e_i < hi`` and ``e_{i+1} > lo``; a bin that only
    touches the range at an edge is not hidden.

    Parameters
    ----------
    edges : array_like
        Increasing bin edges (``n + 1`` values for ``n`` bins).
    blind : (lo, hi) or None
        The blinded mass range; None hides nothing.

    Returns
    -------
    numpy.ndarray of bool, one entry per bin.

    Raises
    ------
    peaksift.errors.FitError
        When ``blind`` is not a pair of numbers with ``hi > lo``.
    """
    e = np.asarray(edges, dtype=float)
    if blind is None:
        return np.zeros(e.size - 1, bool)
    try:
        lo, hi = float(blind[0]), float(blind[1])
    except (TypeError, IndexError, ValueError):
        raise FitError(f"blind must be a mass range (lo, hi), got {blind!r}") from None
    if not hi > lo:
        raise FitError(f"blind range must have hi > lo, got ({lo:g}, {hi:g})")
    return (e[:-1] < hi) & (e[1:] > lo)


def hidden_range(edges: ArrayLike, blind: Sequence[float] | None) -> tuple[float, float] | None:
    """Mass range ``(first hidden bin's lower edge, last hidden bin's upper edge)``.

    None when no bin overlaps ``blind`` (or ``blind`` is None).  The hidden bins are
    contiguous, so this range holds exactly them.
    """
    e = np.asarray(edges, dtype=float)
    idx = np.flatnonzero(blinded_bins(e, blind))
    if idx.size == 0:
        return None
    return float(e[idx[0]]), float(e[idx[-1] + 1])
