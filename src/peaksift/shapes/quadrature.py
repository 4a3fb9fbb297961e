r"""Fast bin integrals of the numerically integrated exponential-family backgrounds.

What is here and who uses it
----------------------------
``exppoly`` of order 2-3 and ``dijet`` have no closed-form CDF.  Both are the exponential
of a linear combination of fixed basis functions of the mass,

.. math:: f(x) = \exp\Big(\sum_j p_j\,\phi_j(x)\Big),

(``exppoly``: :math:`\phi_j = t^j`; ``dijet``: :math:`\ln(1-x) - \ln(1-x_c)`,
:math:`-(\ln x - \ln x_c)`, :math:`-(\ln^2 x - \ln^2 x_c)`), so the derivative of the
density in :math:`p_j` is :math:`\phi_j f`.  :func:`exp_family_fractions` integrates
:math:`f` and :math:`\phi_j f` over every bin for stacked parameter sets (one per toy or
hypothesis) in one compiled pass, and returns the window-normalised bin fractions and their
exact parameter derivatives (:math:`\partial F_i = (J_{ij} - F_i K_j)/Z`, with
:math:`J_{ij} = \int_{bin\,i}\phi_j f`, :math:`K_j` and :math:`Z` the same over the window).
The shapes' ``bin_fractions`` / ``fractions_and_grad`` use it for stacked and single
parameter sets.  :func:`exp_family_pdf` gives the normalised density at masses and its exact
derivatives :math:`f\,(\phi_j - K_j/Z)` from the same rule on the window (the unbinned
fit's hot path, through ``pdf`` / ``pdf_and_grad`` of ``background_base._ExpFamily``);
the generic path (a cumulative table per parameter set, finite differences for the
derivatives) stays for the CDF and for stacked parameters.

The rule
--------
Each bin (and the parts of the window outside the edges) is cut into the fewest equal
panels no wider than the window / ``PANELS`` (128, as the generic path), and each panel
gets the ``ORDER`` = 10 point Gauss-Legendre rule.  Its error on a panel of width
:math:`w` is :math:`w^{21}(10!)^4 / (21\,[(20)!]^3)\,f^{(20)}(\xi)` (Abramowitz and Stegun
25.4.30); for :math:`f = e^{\beta t}` on a panel of width 2/128 in :math:`t` that is
:math:`\approx (\beta w)^{20} \cdot 10^{-25}` relative, below 1e-14 up to the bound
:math:`|\beta| = 60` of the slope parameter.  The tests check the fractions against
``scipy.integrate.quad`` to 1e-10 relative (and the derivatives against its integrals of
:math:`\phi_j f`).  The exponent is shifted by its largest value on each row before the
exponential, so steep shapes neither overflow nor lose the normalisation.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

__all__ = ["ORDER", "PANELS", "exp_family_fractions", "exp_family_pdf", "panel_nodes",
           "shape_fractions"]

#: Gauss-Legendre points per panel
ORDER = 10
#: the widest panel is the window divided by this
PANELS = 128
_GL_NODES, _GL_WEIGHTS = np.polynomial.legendre.leggauss(ORDER)


def panel_nodes(edges: np.ndarray, window: tuple[float, float]
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Quadrature nodes and weights for every bin of ``edges`` (clipped to the window) and
    the two outside parts of the window: ``(x, w, start, clipped edges)`` where the nodes
    of segment ``s`` are ``x[start[s]:start[s+1]]``; segment 0 is ``[lo, e_0]``, segments
    1..N the bins, segment N+1 ``[e_N, hi]``."""
    lo, hi = float(window[0]), float(window[1])
    e = np.clip(np.asarray(edges, float), lo, hi)
    bounds = np.concatenate([[lo], e, [hi]])
    width = np.diff(bounds)
    n_panels = np.where(width > 0, np.ceil(width / ((hi - lo) / PANELS) - 1e-9), 0)
    n_panels = n_panels.astype(np.int64)
    total = int(n_panels.sum())
    seg = np.repeat(np.arange(width.size), n_panels)
    first = np.repeat(np.cumsum(n_panels) - n_panels, n_panels)
    k = np.arange(total) - first
    pw = width[seg] / np.maximum(n_panels[seg], 1)
    a = bounds[seg] + k * pw
    half = 0.5 * pw
    x = ((a + half)[:, None] + half[:, None] * _GL_NODES[None, :]).ravel()
    w = (half[:, None] * _GL_WEIGHTS[None, :]).ravel()
    start = np.concatenate([[0], np.cumsum(n_panels * ORDER)]).astype(np.int64)
    return x, w, start, e


@njit(cache=True, nogil=True)
def _segments(p, phi, w, start, grad, frac, dfrac):  # pragma: no cover - compiled
    """Per row of ``p (B, K)``: fractions of the middle segments in ``frac (B, S-2)`` and,
    with ``grad``, their derivatives in ``dfrac (K, B, S-2)``; False where a row's
    normalisation is not a positive finite number."""
    nb, kk = p.shape
    m = w.size
    ns = start.size - 1
    for b in range(nb):
        expo = np.empty(m)
        top = -np.inf
        for i in range(m):
            s = 0.0
            for j in range(kk):
                s += p[b, j] * phi[j, i]
            expo[i] = s
            top = max(top, s)
        seg_i = np.zeros(ns)
        seg_j = np.zeros((kk, ns))
        for s_ in range(ns):
            acc = 0.0
            for i in range(start[s_], start[s_ + 1]):
                f = w[i] * math.exp(expo[i] - top)
                acc += f
                if grad:
                    for j in range(kk):
                        seg_j[j, s_] += phi[j, i] * f
            seg_i[s_] = acc
        z = 0.0
        for s_ in range(ns):
            z += seg_i[s_]
        if not (z > 0.0 and z < np.inf):
            return False
        inv = 1.0 / z
        kj = np.zeros(kk)
        if grad:
            for j in range(kk):
                for s_ in range(ns):
                    kj[j] += seg_j[j, s_]
        for s_ in range(1, ns - 1):
            fr = seg_i[s_] * inv
            frac[b, s_ - 1] = fr
            if grad:
                for j in range(kk):
                    dfrac[j, b, s_ - 1] = (seg_j[j, s_] - fr * kj[j]) * inv
    return True


def exp_family_fractions(params: np.ndarray, basis, edges: np.ndarray,
                         window: tuple[float, float], grad: bool
                         ) -> tuple[np.ndarray, np.ndarray | None] | None:
    """Bin fractions ``(B, N)`` of :math:`\\exp(\\sum_j p_j \\phi_j)` on ``window`` for
    stacked ``params (B, K)`` and, with ``grad``, their derivatives ``(K, B, N)``.

    ``basis(x) -> (K, M)`` gives the basis functions at the nodes.  None where a row's
    normalisation is not finite (the caller then takes the generic path, which says why).
    """
    x, w, start, _ = panel_nodes(edges, window)
    phi = np.ascontiguousarray(np.asarray(basis(x), float).reshape(-1, x.size))
    return _fractions(params, phi, w, start, grad)


def _fractions(params, phi, w, start, grad: bool):
    """:func:`exp_family_fractions` from the rule's basis values and weights."""
    p = np.ascontiguousarray(np.asarray(params, float).reshape(-1, phi.shape[0]))
    nb, kk = p.shape
    nbins = start.size - 3
    frac = np.empty((nb, nbins))
    dfrac = np.empty((kk, nb, nbins) if grad else (0, 0, 0))
    if not _segments(p, phi, w, start, grad, frac, dfrac):
        return None
    return frac, (dfrac if grad else None)


def shape_fractions(shape, edges, params, window, grad: bool):
    """Bin fractions (and derivatives) of an exponential-family shape (its ``_basis``)
    from the compiled rule above, shaped as the generic path shapes them; None for calls
    it does not cover (2-d edges, parameters not one per row)."""
    if np.ndim(edges) != 1:
        return None
    arrs = [np.asarray(v, float) for v in params]
    if any(a.ndim > 2 or (a.ndim == 2 and a.shape[1] != 1) or a.ndim == 1 for a in arrs):
        return None
    stacked = any(a.ndim == 2 for a in arrs)
    rows = max((a.shape[0] for a in arrs if a.ndim == 2), default=1)
    p = np.stack([np.broadcast_to(a.reshape(-1), (rows,)) for a in arrs], axis=1)
    if not np.all(np.isfinite(p)):
        return None
    out = _fractions(p, *_edge_rule(shape, np.asarray(edges, float), window), grad)
    if out is None:
        return None
    frac, d = out
    if not stacked:
        return frac[0], (None if d is None else d[:, 0])
    return frac, d



def _edge_rule(shape, edges: np.ndarray, window) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The basis at the nodes of :func:`panel_nodes` for ``edges``, the weights and the
    segment starts, kept on the shape for the last few edge arrays (a fit asks for the
    same edges at every step; the nodes and the basis were a fifth of a binned
    Crystal Ball on exppoly fit).  Found by value, never by identity, as
    :func:`_event_basis`."""
    memo = shape.__dict__.setdefault("_edge_rules", [])
    key = (float(window[0]), float(window[1]), edges.shape)
    for k, es, rule in memo:
        if k == key and np.array_equal(es, edges):
            return rule
    x, w, start, _ = panel_nodes(edges, window)
    phi = np.ascontiguousarray(np.asarray(shape._basis(x, window), float).reshape(-1, x.size))
    for a in (phi, w, start):
        a.flags.writeable = False
    rule = (phi, w, start)
    memo.insert(0, (key, edges.copy(), rule))
    del memo[4:]
    return rule


def _window_rule(shape, window) -> tuple[np.ndarray, np.ndarray]:
    """The basis at the window's quadrature nodes and the weights (the rule above on the
    window alone, the generic path's normalisation table: 128 panels of 10 points), kept
    on the shape per window."""
    key = (float(window[0]), float(window[1]))
    memo = shape.__dict__.setdefault("_window_rules", {})
    hit = memo.get(key)
    if hit is None:
        x, w, _, _ = panel_nodes(np.array(key), key)
        phi = np.ascontiguousarray(np.asarray(shape._basis(x, key), float).reshape(-1, x.size))
        if len(memo) >= 8:
            memo.clear()
        hit = memo[key] = (phi, w)
    return hit


def _event_basis(shape, x: np.ndarray, window) -> np.ndarray:
    """The basis at the masses ``x``, kept on the shape for the last few mass arrays (an
    unbinned fit asks for the same masses at every step; the logarithms of the dijet basis
    were half of an evaluation).  Found by value (``array_equal``), never by identity, so
    an array changed in place or a new one at the same address cannot find a stale
    basis."""
    if x.size <= 16:
        # a few masses (the unbinned cost's check of the density at a peak, each step at a
        # new mass) are not kept: they pushed the events' basis out of the memo, which
        # was then made again at every step of a fit with a negative signal yield
        return np.asarray(shape._basis(x, window), float).reshape(-1, x.size)
    memo = shape.__dict__.setdefault("_event_bases", [])
    key = (float(window[0]), float(window[1]), x.size)
    for k, xs, px in memo:
        if k == key and np.array_equal(xs, x):
            return px
    px = np.asarray(shape._basis(x, window), float).reshape(-1, x.size)
    px.flags.writeable = False
    memo.insert(0, (key, x.copy(), px))
    del memo[4:]
    return px


def exp_family_pdf(shape, x, params, window, grad: bool):
    r"""The window-normalised density of an exponential-family shape at masses ``x`` (1-d,
    scalar parameters) and, with ``grad``, its exact parameter derivatives
    :math:`\partial_j f = f\,(\phi_j(x) - K_j/Z)` (:math:`Z = \int f`, :math:`K_j = \int
    \phi_j f` over the window by the rule above): ``(pdf, derivatives (K, N) or None)``,
    0 outside the window; None for calls it does not cover or a normalisation that is not
    a positive finite number (the generic path then answers and says why).

    The unbinned fit's hot path: the generic path builds a cumulative table for every
    parameter set and differentiates it numerically (one table per parameter and side),
    ~2 ms an evaluation on 5,000 masses against ~0.2 ms here."""
    if np.ndim(x) != 1 or any(np.ndim(v) for v in params):
        return None
    p = np.array([float(v) for v in params])
    if not np.all(np.isfinite(p)):
        return None
    phi, w = _window_rule(shape, window)
    e = p @ phi
    top = float(e.max())
    f = w * np.exp(e - top)
    z = float(f.sum())
    if not (z > 0.0 and math.isfinite(z)):
        return None
    x = np.asarray(x, float)
    lo, hi = float(window[0]), float(window[1])
    px = _event_basis(shape, x, window)
    pdf = np.exp(p @ px - top) * (1.0 / z)
    inside = (x >= lo) & (x <= hi)
    if not inside.all():
        pdf = np.where(inside, pdf, 0.0)
    if not grad:
        return pdf, None
    k = (phi @ f) * (1.0 / z)
    return pdf, pdf * (px - k[:, None])
