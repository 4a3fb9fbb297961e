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
blocks scattered into one matrix over ``(mu, nu_1..nu_J, b_1, theta_1, b_2, theta_2,
...)``), on the exact NLL, as the one-channel :func:`~peaksift.stats.toys.profile_signal`
does.  Each trial point evaluates every channel's background fractions and their
gradients in one shape call (the driver's state), so an accepted step costs one shape
evaluation per channel; rows that start at the same shape parameters are evaluated once.  A channel with
``k_c = 0`` adds its background-only fit and nothing to the parameter of interest.

Normalisation nuisances (``norms``): constrained parameters :math:`\nu_j` (unit Gaussian
constraint :math:`\nu_j^2/2` in the NLL, auxiliary measurement at 0) that scale channel
``c``'s signal by :math:`\exp(\sum_j a_{cj}\nu_j)`, i.e. each factor log-normal with
:math:`a = \ln(1 + \delta)` for a relative uncertainty :math:`\delta`.  A luminosity
shared by several channels is one column with entries in each of them (fully
correlated); an efficiency is a column of its own channel.  They are parameters of the same
Newton steps, with their exact derivatives.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from ..likelihood import first_error, minimize_stacked
from .joint_kernels import channel_nll, sums
from .toys import ScanModel, bkg_fractions, bkg_second

__all__ = ["profile_joint"]

_NU_FLOOR = 1e-100


def profile_joint(models: Sequence[ScanModel], counts: Sequence[np.ndarray],
                  fractions: Sequence[np.ndarray], conv: Sequence[np.ndarray], *,
                  mu_fixed: Any = None, mu_start: Any = None,
                  theta_start: Sequence[np.ndarray] | None = None,
                  b_start: Sequence[np.ndarray] | None = None,
                  steps: int = 60, tol: float = 1e-6, norms: Any = None,
                  nu_start: Any = None, nu_aux: Any = None) -> dict[str, Any]:
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
    norms : array, optional
        ``(n_channels, J)``: the log-normal scales ``a_cj`` of J normalisation nuisances
        (see the module guide); ``nu_start`` ``(B, J)`` their starting values (default 0);
        ``nu_aux`` ``(B, J)`` their auxiliary measurements (default 0: the constraint is
        ``(nu - aux)^2 / 2``; toys draw them).

    Returns
    -------
    dict with ``mu``, ``mu_error`` (free fits: from the inverse exact Hessian), ``b`` and
    ``theta`` (lists per channel), ``nu`` ``(B, J)``, ``nll`` (summed, without the saturated
    constant; with the constraints) and ``converged``.
    """
    a = None if norms is None else np.asarray(norms, float).reshape(len(models), -1)
    if a is not None and a.shape[1] == 0:
        a = None   # no nuisances
    with np.errstate(all="ignore"):
        return _profile(models, counts, fractions, conv, mu_fixed, mu_start, theta_start,
                        b_start, steps, tol, a, nu_start, nu_aux)


def _profile(models, counts, fractions, conv, mu_fixed, mu_start, theta_start, b_start,
             steps, tol, a_norm, nu_start, nu_aux):
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
    ks = [m.theta.size for m in models]
    off = 0 if fixed else 1
    nj = 0 if a_norm is None else a_norm.shape[1]
    nu = np.array(np.broadcast_to(0.0 if nu_start is None else nu_start, (nb, nj)), float)
    aux = np.broadcast_to(np.asarray(0.0 if nu_aux is None else nu_aux, float), (nb, nj))
    first = []  # index of b_c in the parameter vector: (mu), nu_1..nu_J, b_1, theta_1, ...
    p = off + nj
    for kc in ks:
        first.append(p)
        p += 1 + kc
    # fractions and their gradients together: a trial's gradients are the next Newton
    # step's, so each accepted point costs one shape evaluation per channel
    gd = [_per_row(_bkg_both, m, th) for m, th in zip(models, theta)]
    g0 = [x[0] for x in gd]
    dg0 = [x[1] for x in gd]

    def total(mu_, nu_, b_, g_, rows):
        out = np.zeros(rows.size) if a_norm is None else 0.5 * np.sum(
            (nu_ - aux[rows]) ** 2, axis=1)
        every = rows.size == nb
        for c in range(nc):
            s = np.ascontiguousarray(mu_ * k[c][rows] * _scale(a_norm, c, nu_), float)
            part = np.empty(rows.size)
            channel_nll(n[c] if every else n[c][rows], f[c] if every else f[c][rows],
                        g_[c], s, np.ascontiguousarray(b_[c], float), part)
            out = out + part
        return out

    all_rows = np.arange(nb)
    nll = total(mu, nu, b, g0, all_rows)
    if np.any(~np.isfinite(nll)) and not fixed:
        mu = np.where(np.isfinite(nll), mu, 0.0)
        nll = total(mu, nu, b, g0, all_rows)
    d2 = [_per_row(bkg_second, m, th, view=True) if kc else None
          for m, th, kc in zip(models, theta, ks)]

    def unpack(x, rows):
        mu_ = mu[rows] if fixed else x[:, 0]
        return (mu_, x[:, off:off + nj], [x[:, j] for j in first],
                [x[:, j + 1:j + 1 + kc] for j, kc in zip(first, ks)])

    def value(x, rows):
        tmu, tnu, tb, tth = unpack(x, rows)
        both = [_bkg_both(m, th) if kc else (g0[c][rows], dg0[c][rows])
                for c, (m, th, kc) in enumerate(zip(models, tth, ks))]
        tg = tuple(x[0] for x in both)
        return total(tmu, tnu, tb, tg, rows), tg + tuple(x[1] for x in both)

    def grad_hess(x, state, rows):
        xmu, xnu, xb, _ = unpack(x, rows)
        return _grad_hess(models, n, f, k, xmu, xnu - aux[rows], a_norm, xb,
                          state[nc:], state[:nc], d2, rows, fixed, first, p, xnu)

    free = [] if fixed else [mu[:, None]]
    x0 = np.concatenate(free + [nu] + [a for c in range(nc) for a in (b[c][:, None],
                                                                       theta[c])], axis=1)
    # a normalisation nuisance beyond 10 sigma is no fit (and exp() stays finite)
    lower = np.concatenate([np.full(off, -np.inf), np.full(nj, -10.0)]
                           + [np.r_[-np.inf, m.lower] for m in models])
    upper = np.concatenate([np.full(off, np.inf), np.full(nj, 10.0)]
                           + [np.r_[np.inf, m.upper] for m in models])
    r = minimize_stacked(value, grad_hess, x0, lower, upper,
                         start=(nll, tuple(g0) + tuple(dg0)), steps=steps, nll_tol=1e-8,
                         step_tol=tol)
    mu, nu, b, theta = unpack(r.x, all_rows)
    mu, nu = mu.copy(), nu.copy()
    b, theta = [v.copy() for v in b], [v.copy() for v in theta]
    g, dg = list(r.state[:nc]), list(r.state[nc:])
    mu_err = np.full(nb, np.nan)
    if not fixed:
        # the exact Hessian (the background shapes' curvature from the start, as
        # profile_signal does) where each fit took its last step: that step moved a
        # converged fit by < tol errors, so it is the Hessian at the minimum to that order;
        # rows without one get theirs here
        h = np.array(r.hessian) if r.hessian.shape[1:] == (p, p) else np.zeros((nb, p, p))
        redo = np.flatnonzero(~np.any(h, axis=(1, 2)))
        if redo.size:
            h[redo] = _grad_hess(models, n, f, k, mu[redo], nu[redo] - aux[redo], a_norm,
                                 [v[redo] for v in b], [v[redo] for v in dg],
                                 [v[redo] for v in g], d2, redo, fixed, first, p,
                                 nu[redo])[1]
        mu_err = first_error(h)
    return {"mu": mu, "mu_error": mu_err, "b": b, "theta": theta, "nu": nu, "nll": r.nll,
            "converged": r.converged}


def _scale(a_norm: Any, c: int, nu: np.ndarray) -> Any:
    """Channel ``c``'s signal factor ``exp(sum_j a_cj nu_j)`` per row (1 without norms)."""
    return 1.0 if a_norm is None else np.exp(nu @ a_norm[c])


def _per_row(func: Any, model: ScanModel, theta: np.ndarray, view: bool = False) -> Any:
    """``func(model, theta)`` (an array or a tuple of arrays) for stacked ``theta (B, K)``,
    evaluated once when every row is the same (the usual start: each channel's
    background-only fit for every hypothesis)."""
    if theta.shape[0] > 1 and np.all(theta == theta[:1]):
        one = func(model, theta[:1])
        rows = theta.shape[0]

        def spread(x):
            out = np.broadcast_to(x, (rows,) + x.shape[1:])   # read-only, one row's memory
            return out if view else np.ascontiguousarray(out)
        return tuple(spread(x) for x in one) if isinstance(one, tuple) else spread(one)
    return func(model, theta)


def _bkg_both(model: ScanModel, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Used-bin background fractions ``(B, n_used)`` and their derivatives ``(B, K,
    n_used)`` from one shape evaluation (as :func:`~peaksift.stats.toys.bkg_fractions` and
    :func:`~peaksift.stats.toys.bkg_gradients`)."""
    nb, k = theta.shape
    if k == 0:
        return bkg_fractions(model, theta), np.zeros((nb, 0, model.used.size))
    params = [theta[:, j:j + 1] for j in range(k)]
    fr, dfr = model.background.fractions_and_grad(model.edges, params, model.window)
    nw = model.edges.size - 1
    fr = np.maximum(np.broadcast_to(fr, (nb, nw)), 0.0)  # as bin_fractions: never negative
    dfr = np.broadcast_to(dfr, (k, nb, nw))
    if model.bin_scale is not None:
        fr, dfr = fr * model.bin_scale, dfr * model.bin_scale
    if model.used.size < nw:
        fr, dfr = fr[:, model.used], dfr[:, :, model.used]
    return np.ascontiguousarray(fr), np.ascontiguousarray(np.moveaxis(dfr, 0, 1))


def _grad_hess(models, n, f, k, mu, pull, a_norm, b, dg, g, d2, idx, fixed, first, p,
               nu=None):
    """Gradient ``(R, P)`` and exact Hessian ``(R, P, P)`` of the summed NLL at rows ``idx``
    (``mu``, ``pull = nu - aux``, ``nu``, ``b``, ``dg``, ``g`` are already those rows';
    ``n``, ``f``, ``k``, ``d2`` are indexed here): per channel the blocks of
    :func:`~peaksift.stats.toys.profile_signal`, with the signal column ``k_c e_c f_c`` on the
    shared parameter of interest and ``a_cj s_c f_c`` on each normalisation nuisance of the
    channel (``e_c`` its signal factor, ``s_c = mu k_c e_c``), plus the constraints.  The
    sums over bins come from one compiled pass per channel
    (:func:`peaksift.stats.joint_kernels.channel_sums`)."""
    nb = idx.size
    every = nb == f[0].shape[0]

    def take(x):
        # all rows, or rows that are one row repeated (shared counts, the start's shape
        # curvature): views instead of copies
        if every:
            return x
        if x.strides[0] == 0:
            return np.broadcast_to(x[0], (nb,) + x.shape[1:])
        return x[idx]

    grad = np.zeros((nb, p))
    hess = np.zeros((nb, p, p))
    off = 0 if fixed else 1
    for c, m in enumerate(models):
        kc = m.theta.size
        bi = np.ascontiguousarray(b[c], float)
        kk = take(k[c]) * _scale(a_norm, c, nu)   # signal events per unit of mu
        s = np.ascontiguousarray(mu * kk, float)
        d2c = take(d2[c]) if kc else np.zeros((nb, 0, 0, 1))
        fs, gs, ds, dd = sums(take(n[c]), take(f[c]), g[c], dg[c], d2c, s, bi)
        js = [] if a_norm is None else [j for j in range(a_norm.shape[1]) if a_norm[c, j]]
        # the signal columns: d nu / d mu = k e f, d nu / d nu_j = a_j s f
        coef = ([] if fixed else [kk]) + [a_norm[c, j] * s for j in js]
        pos_s = ([] if fixed else [0]) + [off + j for j in js]
        pos_b = list(range(first[c], first[c] + 1 + kc))
        pos = np.asarray(pos_s + pos_b)
        ns = len(coef)
        q = ns + 1 + kc
        gc = np.zeros((nb, q))
        hc = np.zeros((nb, q, q))
        cf = np.stack(coef, axis=1) if coef else np.zeros((nb, 0))
        gc[:, :ns] = cf * fs[:, :1]
        gc[:, ns] = gs[:, 0]
        gc[:, ns + 1:] = bi[:, None] * ds
        hc[:, :ns, :ns] = cf[:, :, None] * cf[:, None, :] * fs[:, 1, None, None]
        hc[:, :ns, ns] = hc[:, ns, :ns] = cf * fs[:, 2:3]
        fdb = cf[:, :, None] * (bi[:, None] * fs[:, 3:])[:, None, :]
        hc[:, :ns, ns + 1:] = fdb
        hc[:, ns + 1:, :ns] = fdb.transpose(0, 2, 1)
        hc[:, ns, ns] = gs[:, 1]
        cross = bi[:, None] * gs[:, 2:] + ds
        hc[:, ns, ns + 1:] = hc[:, ns + 1:, ns] = cross
        hc[:, ns + 1:, ns + 1:] = ((bi * bi)[:, None, None] * dd[:, 0]
                                   + bi[:, None, None] * dd[:, 1])
        if js:
            # second derivatives of the signal term times w: d2(s f)/dmu dnu_j = a_j k e f,
            # d2(s f)/dnu_j dnu_l = a_j a_l s f
            wf = fs[:, 0]
            aj = a_norm[c, js]
            o = 0 if fixed else 1
            hc[:, o:ns, o:ns] += (wf * s)[:, None, None] * np.outer(aj, aj)
            if not fixed:
                hc[:, 0, 1:ns] += (wf * kk)[:, None] * aj
                hc[:, 1:ns, 0] += (wf * kk)[:, None] * aj
        grad[:, pos] += gc
        hess[:, pos[:, None], pos[None, :]] += hc
    if a_norm is not None:
        nj = a_norm.shape[1]
        grad[:, off:off + nj] += pull
        hess[:, np.arange(off, off + nj), np.arange(off, off + nj)] += 1.0
    return grad, hess
