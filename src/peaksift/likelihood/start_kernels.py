"""Compiled (numba, cached on disk) steps of a free fit's start finding.

* :func:`profile_widths` -- the width profile of :mod:`.start_widths` in one call: the
  window-clipped edges, each width's band of edges, the Gaussian's rows there
  (:func:`peaksift.shapes.compiled.gaussian_width_rows`) and both yields profiled
  (:func:`.kernels.profile_two_yields`).  The same operations in the same order as the
  numpy glue it replaces (~10 numpy calls), so the same numbers.

Imported on first use (:func:`peaksift._jit.compiled_module`): importing the likelihood
loads no numba.  ``tests/test_likelihood_start_kernels.py`` checks it against scipy's
normal CDF and an iminuit fit written in the test.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from ..shapes.compiled import gaussian_width_rows
from .kernels import profile_two_yields

__all__ = ["profile_widths"]


@njit(cache=True, nogil=True)
def profile_widths(edges, lo, hi, n, s, g, mass, widths, band, y0, y1, rows, y,
                   nll):  # pragma: no cover - compiled
    """A Gaussian at ``mass`` of each width ``widths[j]`` (rows of ``rows (K, E-1)``, on
    the edges within ``band`` widths of the mass, the rest 0) on the background fractions
    ``g``, its yield and the background total profiled from ``(y0, y1)``: yields into ``y
    (K, 2)``, NLLs (saturated term left out) into ``nll (K,)``.  False when a row cannot be
    made (no probability in the window)."""
    ne = edges.size
    x = np.empty(ne)
    for i in range(ne):
        x[i] = min(max(edges[i], lo), hi)
    k = widths.size
    i0 = np.empty(k, np.int64)
    i1 = np.empty(k, np.int64)
    for j in range(k):
        reach = band * widths[j]
        i0[j] = max(np.searchsorted(x, mass - reach) - 1, 0)
        i1[j] = min(np.searchsorted(x, mass + reach) + 1, ne - 1)
    if not gaussian_width_rows(x, mass, widths, i0, i1, lo, hi, rows):
        return False
    for j in range(k):
        y[j, 0] = y0
        y[j, 1] = y1
    profile_two_yields(n, s, rows, g, y, nll, 25)
    return True
