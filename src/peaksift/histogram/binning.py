"""Edges and bin indices: the edge rule every peaksift histogram follows.

The rule is ``numpy.histogram``'s: bins are ``[edge[i], edge[i+1])`` except the last, which
is closed, ``[edge[n-1], edge[n]]``.  A mass equal to the top of the range is inside the
range, as a fit window ``lo <= m <= hi`` selects it (:func:`in_range` is that test for raw
masses).  :func:`bin_index` gives the index of each value under that rule; for regular
edges it uses :func:`regular_index` (arithmetic, exact) from :data:`ARITHMETIC_INDEX_MIN_BINS`
bins up, a binary search below.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from ..errors import InputError

__all__ = ["ARITHMETIC_INDEX_MIN_BINS", "bin_index", "check_edges", "in_range", "regular_index"]

#: From this many regular bins up the arithmetic index is used.  Measured on 1e6 unsorted
#: values (scripts/bench_read.py's machine, numpy 2): the binary search and the arithmetic
#: index take the same time at 16 bins; at 32 bins the arithmetic one is 1.2x faster, at 64
#: bins 1.5x, at 256 bins 2.3x (the binary search misses the cache once per value).
ARITHMETIC_INDEX_MIN_BINS = 32


def check_edges(edges: Any) -> np.ndarray:
    """``edges`` as a read-only float array: 1-d, at least 2, finite, strictly increasing.

    Raises
    ------
    InputError
        Saying which edge is wrong and how to give edges instead.
    """
    try:
        e = np.array(edges, dtype=float)
    except (TypeError, ValueError):
        raise InputError(
            f"histogram edges must be numbers, got {edges!r:.80}; pass e.g. "
            "edges=np.linspace(60, 120, 121) or bins=120, range=(60, 120)"
        ) from None
    if e.ndim != 1 or e.size < 2:
        raise InputError(
            f"histogram edges must be a 1-d sequence of at least 2 numbers, got shape {e.shape}; "
            "pass e.g. edges=np.linspace(60, 120, 121) or bins=120, range=(60, 120)"
        )
    if not np.all(np.isfinite(e)):
        bad = int(np.flatnonzero(~np.isfinite(e))[0])
        raise InputError(
            f"histogram edge {bad} is {float(e[bad])!r}; all edges must be finite numbers"
        )
    d = np.diff(e)
    if np.any(d <= 0):
        bad = int(np.flatnonzero(d <= 0)[0])
        raise InputError(
            f"histogram edges must increase strictly, but edge {bad + 1} ({float(e[bad + 1])!r}) "
            f"is not above edge {bad} ({float(e[bad])!r}); sort the edges and remove duplicates"
        )
    e.setflags(write=False)
    return e


def is_regular(edges: np.ndarray) -> bool:
    """True when all bins have the same width (to 1e-12 relative)."""
    w = np.diff(edges)
    # np.allclose(w, w[0], rtol=1e-12, atol=0) for finite edges, without its ~0.1 ms of
    # generality (every restricted or rebinned histogram asks, e.g. twice per fit)
    return bool((np.abs(w - w[0]) <= 1e-12 * abs(w[0])).all())


def regular_index(edges: np.ndarray, values: np.ndarray) -> np.ndarray:
    """``np.searchsorted(edges, values, side="right")`` for regular edges and values without
    NaN, exactly, by arithmetic: faster for unsorted values, since a binary search over
    many edges misses the cache for every value.  The arithmetic guess is checked against
    the actual edges and moved by one bin where rounding put it on the wrong side of an edge
    (index ``j`` holds ``edges[j-1] <= v < edges[j]``; the padding -inf and NaN make the
    tests false beyond the first and last edge)."""
    n = edges.size - 1
    lo, hi = float(edges[0]), float(edges[-1])
    ext = np.concatenate([[-np.inf], edges, [np.nan]])
    t = (values - lo) * (n / (hi - lo))
    np.clip(t, -1.0, float(n), out=t)
    k = np.floor(t, out=t).astype(np.intp)  # -1: underflow, n: overflow, else the bin
    k += 1  # now the searchsorted index, 0 .. n + 1
    for _ in range(3):  # rounding moves a guess by at most one bin
        down = values < ext[k]
        up = values >= ext[k + 1]
        if not (down.any() or up.any()):
            return k
        k -= down
        k += up
    wrong = (values < ext[k]) | (values >= ext[k + 1])  # never seen; exact either way
    k[wrong] = np.searchsorted(edges, values[wrong], side="right")
    return k


def in_range(mass: ArrayLike, lo: float, hi: float) -> np.ndarray:
    """``lo <= mass <= hi`` (both ends closed): the masses a histogram on ``[lo, hi]`` puts
    in its bins, and the masses a fit window ``(lo, hi)`` uses.  NaN is outside."""
    m = np.asarray(mass, dtype=float)
    return (m >= lo) & (m <= hi)


def bin_index(edges: np.ndarray, values: np.ndarray, regular: bool) -> np.ndarray:
    """0 for underflow, ``1..n`` for the bins, ``n + 1`` for overflow, by the module's edge
    rule: ``searchsorted(side="right")`` (half-open bins), then the last edge moved into the
    last bin, which is closed.  ``values`` holds no NaN."""
    n = edges.size - 1
    if regular and n >= ARITHMETIC_INDEX_MIN_BINS:
        idx = regular_index(edges, values)
    else:
        idx = np.searchsorted(edges, values, side="right")
    idx[values == edges[-1]] = n
    return idx
