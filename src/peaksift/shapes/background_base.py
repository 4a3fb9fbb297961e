"""What the background shapes share: the ``kind``, the window-scaled variable, and the
plumbing of their compiled bin integrals (stacked parameter rows, the Gauss-Legendre
quadrature of :mod:`.quadrature`).  The shapes themselves: :mod:`.background`'s guide."""

from __future__ import annotations

import numpy as np

from ._base import Shape


def _t(x, window):
    lo, hi = window
    return (x - 0.5 * (lo + hi)) / (0.5 * (hi - lo))


class _Background(Shape):
    kind = "background"


class _CompiledRows(_Background):
    """A background whose bin fractions (and their derivatives) come from a compiled kernel,
    ``_compiled(edges, params, window, grad)`` -> ``(fractions, derivatives)`` or None where
    the kernel declines; then the generic path of :class:`Shape` answers."""

    def _compiled(self, edges, params, window, grad: bool):
        return None

    def bin_fractions(self, edges, params, window):
        out = self._compiled(edges, params, window, False)
        return out[0] if out is not None else super().bin_fractions(edges, params, window)

    def fractions_and_grad(self, edges, params, window, need=None):
        out = self._compiled(edges, params, window, True)
        return out if out is not None else super().fractions_and_grad(edges, params,
                                                                       window, need)


def _stacked(params, edges) -> np.ndarray | None:
    """The one parameter of a stacked call (one value per row, shape ``(B, 1)``) on 1-d
    edges, as a contiguous ``(B,)`` array; None for any other call."""
    p = params[0]
    if len(params) != 1 or np.ndim(p) != 2 or np.shape(p)[1] != 1 or np.ndim(edges) != 1:
        return None
    return np.ascontiguousarray(np.asarray(p, float)[:, 0])


def _rows(run, rows: int, nbins: int, grad: bool):
    """``(fractions (B, N), derivatives (1, B, N) or None)`` from ``run(frac, grad)``, a
    compiled row kernel of :mod:`.compiled`; None where it declines (a row near its
    series)."""
    frac = np.empty((rows, nbins))
    g = np.empty((rows, nbins) if grad else (0, 0))
    if not run(frac, g):
        return None
    return frac, (g[None] if grad else None)



def _quadrature(shape, edges, params, window, grad: bool):
    from .quadrature import shape_fractions

    return shape_fractions(shape, edges, params, window, grad)
