"""What the background shapes share: the ``kind``, the window-scaled variable, and the
plumbing of their compiled bin integrals (stacked parameter rows, the Gauss-Legendre
quadrature of :mod:`.quadrature`).  The shapes themselves: :mod:`.background`'s guide."""

from __future__ import annotations

import numpy as np

from ._base import Shape, as_window


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


class _ExpFamily:
    """The density of an exponential-family shape (``_basis``, see :mod:`.quadrature`) from
    the compiled module's window rule, with exact derivatives, where ``_uniform_rule``
    allows (the generic table and its finite differences otherwise): what an unbinned fit
    evaluates at every step.  Mixed in before the shape's base class."""

    def _uniform_rule(self, window) -> bool:
        return True

    def _exp_pdf(self, x, params, window, grad: bool):
        if len(params) != len(self.parameters):
            return None  # the generic path says what is wrong
        window = as_window(window)
        if not self._uniform_rule(window):
            return None
        from .quadrature import exp_family_pdf

        return exp_family_pdf(self, x, params, window, grad)

    def fit_fractions(self, edges, params, window):
        # where the compiled rule gives fractions_and_grad's fractions (the uniform
        # rule), the same fractions without its derivatives (the rule computes them the
        # same way with or without): a binned fit's value-only calls
        if len(params) == len(self.parameters) and self._uniform_rule(as_window(window)):
            out = _quadrature(self, edges, params, window, False)
            if out is not None:
                return out[0]
        return super().fit_fractions(edges, params, window)

    def pdf(self, x, params, window):
        out = self._exp_pdf(x, params, window, False) if np.ndim(x) == 1 else None
        return out[0] if out is not None else super().pdf(x, params, window)

    def pdf_and_grad(self, x, params, window, need=None):
        out = self._exp_pdf(x, params, window, True)
        return out if out is not None else super().pdf_and_grad(x, params, window, need)
