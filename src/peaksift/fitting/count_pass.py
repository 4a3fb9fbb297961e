"""A new histogram's bins checked and merged in one compiled pass (numba, cached on disk).

A fit of a histogram new to it in the bins of a kept setup (:mod:`.setup_kept`: a toy, a
Poisson-fluctuated copy) used to check and sum its contents in ~15 numpy calls -- the
finiteness and sign tests of :func:`.data.prepare`, the weighted test, the total, the
start finding's merged bins of :func:`.data.start_bins` -- each a pass over the bins with
a few microseconds of call overhead, felt most when the processor's caches are cold.
:func:`check_and_merge` makes them one pass, with numpy's own summation order (pairwise
sums in blocks of 8, as ``numpy.add.reduce`` and ``numpy.add.reduceat`` add float64
arrays), so every number is the same bits as the numpy calls gave; :func:`saturated_sum`
then makes the cost's saturated constant from numpy's logarithms of the counts.
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["OK", "REFUSED", "WEIGHTED", "check_and_merge", "pairwise_sum", "saturated_sum"]

#: :func:`check_and_merge`'s verdicts: the contents are usable unweighted bins; a bin is
#: not finite or negative (the general path says which, as a FitError); a bin's sum of
#: squared weights differs from its sum of weights (weighted: the general path)
OK, REFUSED, WEIGHTED = 0, 1, 2

#: numpy's block size of pairwise summation (``PW_BLOCKSIZE`` in its loops)
_BLOCK = 128


@njit(cache=True, nogil=True)
def _block(a, lo, n):  # pragma: no cover - compiled
    """numpy's pairwise sum of at most 128 terms ``a[lo:lo + n]``: fewer than 8 in order
    from 0, else in 8 running sums combined as a tree and the rest in order."""
    if n < 8:
        res = 0.0
        for i in range(lo, lo + n):
            res += a[i]
        return res
    r0, r1, r2, r3 = a[lo], a[lo + 1], a[lo + 2], a[lo + 3]
    r4, r5, r6, r7 = a[lo + 4], a[lo + 5], a[lo + 6], a[lo + 7]
    i = 8
    m = n - n % 8
    while i < m:
        j = lo + i
        r0 += a[j]
        r1 += a[j + 1]
        r2 += a[j + 2]
        r3 += a[j + 3]
        r4 += a[j + 4]
        r5 += a[j + 5]
        r6 += a[j + 6]
        r7 += a[j + 7]
        i += 8
    res = ((r0 + r1) + (r2 + r3)) + ((r4 + r5) + (r6 + r7))
    while i < n:
        res += a[lo + i]
        i += 1
    return res


@njit(cache=True, nogil=True)
def pairwise_sum(a, lo, n):  # pragma: no cover - compiled
    """``a[lo:lo + n]`` summed as numpy's pairwise summation does it for float64: blocks of
    at most 128 terms (:func:`_block`), longer runs split in two halves (the first a
    multiple of 8) summed the same way and added -- the same bits as its loops.  The
    halving runs on an explicit stack (numba's disk cache does not take a recursive
    function)."""
    if n <= _BLOCK:
        return _block(a, lo, n)
    los = np.empty(64, np.int64)  # a frame per halving: depth log2(n / 128) < 64
    ns = np.empty(64, np.int64)
    stage = np.empty(64, np.int64)
    left = np.empty(64)
    sp = 0
    los[0], ns[0], stage[0] = lo, n, 0
    ret = 0.0
    while sp >= 0:
        m = ns[sp]
        if m <= _BLOCK:  # a block: its sum goes back to the frame below
            ret = _block(a, los[sp], m)
            sp -= 1
            continue
        half = m // 2
        half -= half % 8
        if stage[sp] == 0:  # first half
            stage[sp] = 1
            sp += 1
            los[sp], ns[sp], stage[sp] = los[sp - 1], half, 0
        elif stage[sp] == 1:  # first half summed (ret): the second half
            left[sp] = ret
            stage[sp] = 2
            sp += 1
            los[sp], ns[sp], stage[sp] = los[sp - 1] + half, m - half, 0
        else:  # both summed
            ret = left[sp] + ret
            sp -= 1
    return ret


@njit(cache=True, nogil=True)
def check_and_merge(n, n2, k, merged, safe, counts):  # pragma: no cover - compiled
    """``(verdict, total)`` of the bins' sums of weights ``n`` and of squared weights
    ``n2``: the verdict :data:`OK` (every bin finite, none negative, ``n == n2``: unweighted),
    :data:`REFUSED` or :data:`WEIGHTED`; the total ``n.sum()``; and, for :data:`OK`,
    ``counts`` a copy of ``n`` (the fit's own: the caller's histogram may change), ``safe``
    the counts with 1 in empty bins (for :func:`saturated_sum`'s logarithms) and, with
    ``k > 1``, ``merged`` the sums of ``k`` bins at a time, the last group what is left
    (``numpy.add.reduceat`` at every ``k``-th bin, the last group's ``sum()`` anew, as
    :func:`.data.start_bins` makes them)."""
    nb = n.size
    for i in range(nb):
        a, b = n[i], n2[i]
        if not (np.isfinite(a) and np.isfinite(b)) or a < 0.0:
            return REFUSED, 0.0
    for i in range(nb):
        if n[i] != n2[i]:
            return WEIGHTED, 0.0
    for i in range(nb):
        a = n[i]
        counts[i] = a
        safe[i] = a if a > 0.0 else 1.0
    total = 0.0 + pairwise_sum(n, 0, nb)  # add.reduce: its identity, then the pairwise sum
    if k > 1:
        g = merged.size
        for j in range(g - 1):  # reduceat: the group's first bin, then the others' sum
            lo = j * k
            merged[j] = n[lo] + pairwise_sum(n, lo + 1, k - 1)
        lo = (g - 1) * k
        merged[g - 1] = 0.0 + pairwise_sum(n, lo, nb - lo)
    return OK, total


@njit(cache=True, nogil=True)
def saturated_sum(n, logs):  # pragma: no cover - compiled
    """:func:`peaksift.likelihood.poisson.saturated_term` of unweighted counts ``n >= 0``
    from ``logs`` (numpy's logarithms of :func:`check_and_merge`'s ``safe``: log 1 = 0 in
    an empty bin, as that function's masked logarithm leaves it), the same steps -- ``n *
    log``, minus ``n``, numpy's pairwise sum -- in one pass; ``logs`` is overwritten."""
    for i in range(n.size):
        t = n[i] * logs[i]
        logs[i] = t - n[i]
    return 0.0 + pairwise_sum(logs, 0, n.size)
