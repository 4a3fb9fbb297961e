r"""The simultaneous binned likelihood of several channels with one parameter of interest.

Channel ``c`` (a prepared :class:`~peaksift.stats.toys.ScanModel`: its used bins, its
background shape and background-only fit, its signal fractions at every hypothesis) expects

.. math:: \nu_{ci} = \mu\,k_c(m)\,f_{ci}(m) + b_c\,g_{ci}(\theta_c),

with :math:`\mu` the shared parameter of interest (cross-section x branching fraction),
:math:`k_c(m) = L_c\,\varepsilon_c(m)` the events per unit of :math:`\mu`, and its own
background yield and shape.  The NLL is the sum of the channels' extended binned Poisson
NLLs (:func:`peaksift.likelihood.binned_nll`): the likelihood is the product of the
channels'.

:func:`profile_joint` fits that likelihood for stacked hypotheses (masses, or toys x masses)
at once: :func:`peaksift.likelihood.minimize_stacked` with the exact Hessian (the channels'
blocks scattered into one matrix over ``(mu, b_1, theta_1, b_2, theta_2, ...)``), on the
exact NLL, as the one-channel :func:`~peaksift.stats.toys.profile_signal` does.  A channel with
``k_c = 0`` adds its background-only fit and nothing to the parameter of interest.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from ..likelihood import binned_nll, first_error, minimize_stacked
from .toys import ScanModel, bkg_fractions, bkg_gradients, bkg_second

__all__ = ["profile_joint"]

_NU_FLOOR = 1e-100


def _channel_nll(n: np.ndarray, nu: np.ndarray) -> np.ndarray:
    bad = np.any(nu <= 0, axis=1)
    return np.where(bad, np.inf, binned_nll(n, nu, saturated=False))


def profile_joint(models: Sequence[ScanModel], counts: Sequence[np.ndarray],
                  fractions: Sequence[np.ndarray], conv: Sequence[np.ndarray], *,
                  mu_fixed: Any = None, mu_start: Any = None,
                  theta_start: Sequence[np.ndarray] | None = None,
                  b_start: Sequence[np.ndarray] | None = None,
                  steps: int = 60, tol: float = 1e-6) -> dict[str, Any]:
    """Joint signal-plus-background fits of several channels for stacked hypotheses.

    Parameters
    ----------
    models : sequence of ScanModel
        One per channel.
    counts : sequence of arrays
        Per channel ``(n_used,)`` (shared) or ``(B, n_used)``.
    fractions : sequence of arrays
        Per channel the signal fractions ``(B, n_used)`` of every hypothesis.
    conv : sequence of arrays
        Per channel ``(B,)``: expected signal events per unit of the parameter of interest.
    mu_fixed : array, optional
        ``(B,)``: fit at this parameter of interest (else it is free and may go negative
        while every expectation stays positive).
    mu_start, theta_start, b_start :
        Starting values (default 0 and each channel's background-only fit to its data).

    Returns
    -------
    dict with ``mu``, ``mu_error`` (free fits: from the inverse exact Hessian), ``b`` and
    ``theta`` (lists per channel), ``nll`` (summed, without the saturated constant) and
    ``converged``.
    """
    with np.errstate(all="ignore"):
        return _profile(models, counts, fractions, conv, mu_fixed, mu_start, theta_start,
                        b_start, steps, tol)


def _profile(models, counts, fractions, conv, mu_fixed, mu_start, theta_start, b_start,
             steps, tol):
    nc = len(models)
    f = [np.atleast_2d(np.asarray(x, float)) for x in fractions]
    nb = f[0].shape[0]
    n = [np.broadcast_to(np.asarray(c, float), fc.shape) for c, fc in zip(counts, f)]
    k = [np.broadcast_to(np.asarray(c, float), (nb,)) for c in conv]
    fixed = mu_fixed is not None
    mu = np.array(np.broadcast_to(mu_fixed if fixed else (0.0 if mu_start is None
                                                          else mu_start), (nb,)), float)
    theta = [np.array(np.broadcast_to(m.theta if theta_start is None else theta_start[c],
                                      (nb, m.theta.size)), float)
             for c, m in enumerate(models)]
    b = [np.array(np.broadcast_to(m.bkg_yield if b_start is None else b_start[c], (nb,)),
                  float) for c, m in enumerate(models)]
    g = [bkg_fractions(m, th) for m, th in zip(models, theta)]
    ks = [m.theta.size for m in models]
    off = 0 if fixed else 1
    first = []  # index of b_c in the parameter vector
    p = off
    for kc in ks:
        first.append(p)
        p += 1 + kc

    def total(mu_, b_, g_, rows):
        out = 0.0
        for c in range(nc):
            nu = (mu_ * k[c][rows])[:, None] * f[c][rows] + b_[c][:, None] * g_[c]
            out = out + _channel_nll(n[c][rows], nu)
        return out

    all_rows = np.arange(nb)
    nll = total(mu, b, g, all_rows)
    if np.any(~np.isfinite(nll)) and not fixed:
        mu = np.where(np.isfinite(nll), mu, 0.0)
        nll = total(mu, b, g, all_rows)
    d2 = [bkg_second(m, th) if kc else None for m, th, kc in zip(models, theta, ks)]
    g0 = g

    def unpack(x, rows):
        mu_ = mu[rows] if fixed else x[:, 0]
        return (mu_, [x[:, j] for j in first],
                [x[:, j + 1:j + 1 + kc] for j, kc in zip(first, ks)])

    def value(x, rows):
        tmu, tb, tth = unpack(x, rows)
        tg = tuple(bkg_fractions(m, th) if kc else g0[c][rows]
                   for c, (m, th, kc) in enumerate(zip(models, tth, ks)))
        return total(tmu, tb, tg, rows), tg

    def grad_hess(x, state, rows):
        xmu, xb, xth = unpack(x, rows)
        return _grad_hess(models, n, f, k, xmu, xb, xth, state, d2, rows, fixed, first, p)

    free = [] if fixed else [mu[:, None]]
    x0 = np.concatenate(free + [a for c in range(nc) for a in (b[c][:, None], theta[c])],
                        axis=1)
    lower = np.concatenate([np.full(off, -np.inf)]
                           + [np.r_[-np.inf, m.lower] for m in models])
    upper = np.concatenate([np.full(off, np.inf)] + [np.r_[np.inf, m.upper] for m in models])
    r = minimize_stacked(value, grad_hess, x0, lower, upper, start=(nll, tuple(g)),
                         steps=steps, nll_tol=1e-8, step_tol=tol)
    mu, b, theta = unpack(r.x, all_rows)
    mu, b, theta = mu.copy(), [v.copy() for v in b], [v.copy() for v in theta]
    g, nll, converged = list(r.state), r.nll, r.converged
    mu_err = np.full(nb, np.nan)
    if not fixed:
        # the curvature of the background shapes from the start, as profile_signal does
        mu_err = first_error(_grad_hess(models, n, f, k, mu, b, theta, g, d2, all_rows, fixed,
                                        first, p)[1])
    return {"mu": mu, "mu_error": mu_err, "b": b, "theta": theta, "nll": nll,
            "converged": converged}


def _grad_hess(models, n, f, k, mu, b, theta, g, d2, idx, fixed, first, p):
    """Gradient ``(B, P)`` and exact Hessian ``(B, P, P)`` of the summed NLL at rows ``idx``
    (``mu``, ``b``, ``theta``, ``g`` are already those rows'): per channel the blocks of
    :func:`~peaksift.stats.toys.profile_signal`, with the signal column ``k_c f_c`` on the
    shared parameter of interest."""
    nb = idx.size
    grad = np.zeros((nb, p))
    hess = np.zeros((nb, p, p))
    for c, m in enumerate(models):
        kc = m.theta.size
        bi, gi, fi = b[c], g[c], f[c][idx]
        sig = (mu * k[c][idx])[:, None] * fi
        nu = np.maximum(sig + bi[:, None] * gi, _NU_FLOOR)
        cols = [gi[:, None, :]]
        if kc:
            dg = bkg_gradients(m, theta[c])
            cols.append(bi[:, None, None] * dg)
        pos = list(range(first[c], first[c] + 1 + kc))
        if not fixed:
            cols.insert(0, (k[c][idx][:, None] * fi)[:, None, :])
            pos.insert(0, 0)
        a = np.concatenate(cols, axis=1)
        nn = n[c][idx]
        w = 1.0 - nn / nu
        gc = np.einsum("bpn,bn->bp", a, w)
        hc = np.einsum("bpn,bqn,bn->bpq", a, a, nn / nu**2)
        if kc:
            j = 0 if fixed else 1   # position of b_c within this channel's block
            hc[:, j + 1:, j + 1:] += bi[:, None, None] * np.einsum("bkln,bn->bkl",
                                                                     d2[c][idx], w)
            cross = np.einsum("bkn,bn->bk", dg, w)
            hc[:, j, j + 1:] += cross
            hc[:, j + 1:, j] += cross
        pos = np.asarray(pos)
        grad[:, pos] += gc
        hess[:, pos[:, None], pos[None, :]] += hc
    return grad, hess
