"""The power sum's and the Bernstein polynomial's bin fractions from the compiled kernels of
:mod:`.compiled_falling`: the calls they cover (one parameter set, or stacked ``(B, 1)``
rows, on 1-d edges), what is computed once per edges, and the outputs shaped as the
generic path (``Shape.fractions_and_grad`` / ``Shape.bin_fractions``) shapes them.

``powersum_fractions`` / ``bernstein_fractions(shape, edges, params, window, grad)``
return ``(fractions, derivatives or None)``, or None for a call the generic path takes.
numba loads at the first call, not at import.
"""

from __future__ import annotations

import numpy as np

from ._base import _scalar, as_window

__all__ = ["bernstein_fractions", "powersum_fractions"]

_POWERS = [0, 1, 3]  # the columns of the powers among powersum's parameters
_NONE3 = np.empty((0, 0, 0))


def _row_params(params, n: int):
    """``(P (B, n), stacked)`` from parameters that are all scalars (B = 1) or all ``(B, 1)``
    arrays of one B; None for any other call (the generic path takes it)."""
    if len(params) != n or n == 0:
        return None
    if all(_scalar(v) for v in params):
        return np.array([[float(v) for v in params]]), False
    first = np.shape(params[0])
    if len(first) != 2 or first[1] != 1 or any(np.shape(v) != first for v in params):
        return None
    return np.concatenate(params, axis=1, dtype=float), True


def _per_edges(shape, edges, window, make):
    """``make(clipped edges, lo, hi)`` for these edges and window, kept for the last few
    seen (a fit or a scan asks for the same edges at every step); None for edges that are
    not 1-d."""
    if np.ndim(edges) != 1:
        return None
    lo, hi = float(window[0]), float(window[1])
    e = np.asarray(edges, dtype=float)
    key = (e.tobytes(), lo, hi)
    cache = shape.__dict__.setdefault("_edge_terms", {})
    hit = cache.get(key)
    if hit is None:
        if len(cache) >= 8:
            cache.pop(next(iter(cache)))
        hit = cache[key] = make(np.clip(e, lo, hi), lo, hi)
    return hit


def _compiled_rows(run, rows: int, nbins: int, nk: int, stacked: bool, grad: bool):
    """Fractions (and derivatives) from ``run(frac, dfrac)``, shaped as the generic path
    shapes them: ``(B, N)`` and ``(K, B, N)`` stacked, ``(N,)`` and ``(K, N)`` for one set."""
    frac = np.empty((rows, nbins))
    d = np.empty((nk, rows, nbins) if grad else (0, 0, 0))
    run(frac, d)
    if stacked:
        return frac, (d if grad else None)
    return frac[0], (d[:, 0] if grad else None)


def bernstein_fractions(shape, edges, params, window, grad: bool):
    """Fractions (and derivatives) from :func:`.compiled_falling.bernstein_rows`, the
    integrated basis at the edges computed once (None: the generic path)."""
    got = _row_params(params, shape.degree)
    if got is None:
        return None
    w = as_window(window)

    def make(x, lo, hi):
        ends = shape._ibasis(np.array([lo, hi]), w)
        return (np.ascontiguousarray(np.array(shape._ibasis(x, w))),
                np.array([v[0] for v in ends]), np.array([v[1] for v in ends]))

    terms = _per_edges(shape, edges, w, make)
    if terms is None:
        return None
    from .compiled_falling import bernstein_rows

    coef, stacked = got
    basis, blo, bhi = terms
    return _compiled_rows(
        lambda f, d: bernstein_rows(basis, blo, bhi, coef, grad, not grad, f, d),
        coef.shape[0], basis.shape[1] - 1, shape.degree, stacked, grad)


def powersum_fractions(shape, edges, params, window, grad: bool):
    """Fractions (and derivatives) from :func:`.compiled_falling.powersum_rows`, ln(x/c)
    of the edges computed once (None: the generic path)."""
    got = _row_params(params, len(shape.parameters))
    w = as_window(window)
    if got is None or not w[0] > 0:
        return None

    def make(x, lo, hi):
        c = 0.5 * (lo + hi)
        return (np.log(np.maximum(x, 1e-300) / c),
                np.log(np.maximum(np.array([lo, hi]), 1e-300) / c), c)

    terms = _per_edges(shape, edges, w, make)
    if terms is None:
        return None
    from .compiled_falling import powersum_rows

    p, stacked = got
    lx, lends, c = terms
    # the squared weights as the reference squares them: a float's ** for one set,
    # numpy's for stacked rows
    sq = (np.array([[v ** 2 for v in p[0, 2::2].tolist()]]) if not stacked
          else p[:, 2::2] ** 2)
    if grad:  # numpy's exponentials of the power law's derivative (see the kernel)
        a = 1.0 - p[:, _POWERS[: shape.terms]]
        asafe = np.where(np.abs(a) < 1e-12, 1e-12, a)[:, :, None]
        ex, exends = np.exp(asafe * lx), np.exp(asafe * lends)
    else:
        ex = exends = _NONE3
    return _compiled_rows(
        lambda f, d: powersum_rows(lx, lends, p, sq, c, ex, exends, grad, not grad, f, d),
        p.shape[0], lx.size - 1, len(shape.parameters), stacked, grad)
