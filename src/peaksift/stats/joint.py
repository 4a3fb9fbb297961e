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
from ..likelihood.poisson import use_compiled
from .joint_driver import compiled_joint
from .joint_kernels import channel_nll, sums
from .shape_profile import _fractions
from .toys import ScanModel, bkg_fractions, bkg_second

__all__ = ["profile_joint"]

_NU_FLOOR = 1e-100


def profile_joint(models: Sequence[ScanModel], counts: Sequence[np.ndarray],
                  fractions: Sequence[np.ndarray], conv: Sequence[np.ndarray], *,
                  mu_fixed: Any = None, mu_start: Any = None,
                  theta_start: Sequence[np.ndarray] | None = None,
                  b_start: Sequence[np.ndarray] | None = None,
                  steps: int = 60, tol: float = 1e-6, norms: Any = None,
                  nu_start: Any = None, nu_aux: Any = None,
                  shapes: Sequence[Any] | None = None,
                  curvature: Sequence[np.ndarray] | None = None,
                  shape_centers: Sequence[Any] | None = None,
                  factors_start: Sequence[Any] | None = None) -> dict[str, Any]:
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
    shapes : sequence, optional
        Per channel None or ``(signal, base_params, nuisances)``: the channel's signal shape,
        its parameters at each hypothesis (arrays ``(B, 1)`` or scalars) and a
        :class:`~peaksift.likelihood.SignalNuisances` whose shape factors (mass scale,
        resolution) are profiled with their constraints; the channel's fractions are then
        recomputed at every trial point (``fractions`` is not used for it).
    curvature : sequence of arrays, optional
        Per channel the background parameters ``(K,)`` at which the shape's second
        derivatives enter the Hessian (default: each row's start); one set for all rows
        (e.g. the background-only fit, as :func:`~peaksift.stats.toys.profile_signal`
        takes it) costs one evaluation instead of one per row; or those derivatives
        themselves, ``(B or 1, K, K, n_used)`` (``profile_signal``'s ``curvature``).
    shape_centers : sequence, optional
        Per channel None or ``(B, J_c)``: the centres of its shape factors' constraints
        (their auxiliary measurements; default 1; toys of an unconditional ensemble draw
        them).
    factors_start : sequence, optional
        Per channel None or ``(B, J_c)``: where its shape factors start (default 1).

    Returns
    -------
    dict with ``mu``, ``mu_error`` (free fits: from the inverse exact Hessian), ``b`` and
    ``theta`` (lists per channel), ``nu`` ``(B, J)``, ``nll`` (summed, without the saturated
    constant; with the constraints), ``factors`` (list per channel, ``(B, J_c)``) and
    ``converged``.
    """
    a = None if norms is None else np.asarray(norms, float).reshape(len(models), -1)
    if a is not None and a.shape[1] == 0:
        a = None   # no nuisances
    with np.errstate(all="ignore"):
        return _profile(models, counts, fractions, conv, mu_fixed, mu_start, theta_start,
                        b_start, steps, tol, a, nu_start, nu_aux,
                        [None] * len(models) if shapes is None else list(shapes),
                        curvature, shape_centers, factors_start)


def _profile(models, counts, fractions, conv, mu_fixed, mu_start, theta_start, b_start,
             steps, tol, a_norm, nu_start, nu_aux, specs, curvature=None, centers=None,
             factors_start=None):
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
    names = [() if sp is None else tuple(sp[2].shape_active) for sp in specs]
    kfirst = []  # index of channel c's first shape factor: after mu and the norms
    p = off + nj
    for nm in names:
        kfirst.append(p)
        p += len(nm)
    nk = p - off - nj
    kap = np.ones((nb, nk))
    for c in range(nc):
        if names[c] and factors_start is not None and factors_start[c] is not None:
            j0 = kfirst[c] - off - nj
            kap[:, j0:j0 + len(names[c])] = np.broadcast_to(
                np.asarray(factors_start[c], float), (nb, len(names[c])))
    shaped = [c for c in range(nc) if names[c]]
    first = []  # index of b_c: (mu), nu_1..nu_J, factors, b_1, theta_1, b_2, ...
    for kc in ks:
        first.append(p)
        p += 1 + kc
    d2 = []
    for c, (m, th, kc) in enumerate(zip(models, theta, ks)):
        cv = None if curvature is None else curvature[c]
        if not kc:
            d2.append(None)
        elif cv is not None and np.ndim(cv) == 4:   # the second derivatives themselves
            d2.append(np.broadcast_to(cv, (nb,) + np.shape(cv)[1:]))
        else:
            d2.append(_per_row(bkg_second, m, th if cv is None else np.broadcast_to(
                np.asarray(cv, float), th.shape), view=True))

    def unpack(x, rows):
        mu_ = mu[rows] if fixed else x[:, 0]
        return (mu_, x[:, off:off + nj], x[:, off + nj:off + nj + nk],
                [x[:, j] for j in first], [x[:, j + 1:j + 1 + kc] for j, kc in zip(first, ks)])

    # a normalisation nuisance beyond 10 sigma is no fit (and exp() stays finite)
    klo = [specs[c][2].bounds(nm)[0] for c in shaped for nm in names[c]]
    khi = [specs[c][2].bounds(nm)[1] for c in shaped for nm in names[c]]
    lower = np.concatenate([np.full(off, -np.inf), np.full(nj, -10.0), klo]
                           + [a for m in models for a in ([-np.inf], m.lower)])
    upper = np.concatenate([np.full(off, np.inf), np.full(nj, 10.0), khi]
                           + [a for m in models for a in ([np.inf], m.upper)])
    g0: list = []   # per channel its background fractions and derivatives at the start
    dg0: list = []

    def pack(mu_):
        free = [] if fixed else [mu_[:, None]]
        return np.concatenate(free + [nu, kap] + [a for c in range(nc)
                                                  for a in (b[c][:, None], theta[c])], axis=1)

    def signal_fractions(kap_, rows):
        """Per channel the signal fractions of ``rows`` and, for the shaped channels,
        their derivatives in the factors ``(R, J_c, N)``."""
        fr, dfr = [], []
        for c, m in enumerate(models):
            if names[c]:
                sig, base, nuis = specs[c]
                fc, dfc = _fractions(m, sig, base, names[c], nuis,
                                     kap_[:, kfirst[c] - off - nj:][:, :len(names[c])], rows,
                                     grad=True)
                fr.append(fc)
                dfr.append(np.ascontiguousarray(np.moveaxis(dfc, 0, 1)))
            else:
                fr.append(_take(f[c], rows, nb))
        return fr, dfr

    def factor_terms(kap_, rows):
        val, grads, hesss = 0.0, [], []
        for c in shaped:
            kc_ = kap_[:, kfirst[c] - off - nj:][:, :len(names[c])]
            cen = None if centers is None or centers[c] is None else np.asarray(
                centers[c], float)[rows]
            v, gr, he = specs[c][2].constraint_terms(names[c], kc_, cen)
            val = val + v
            grads.append(gr)
            hesss.append(he)
        return val, grads, hesss

    def total(mu_, nu_, kap_, b_, g_, fr, rows):
        out = np.zeros(rows.size) if a_norm is None else 0.5 * np.sum(
            (nu_ - aux[rows]) ** 2, axis=1)
        if shaped:
            out = out + factor_terms(kap_, rows)[0]
        for c in range(nc):
            s = np.ascontiguousarray(mu_ * k[c][rows] * _scale(a_norm, c, nu_), float)
            part = np.empty(rows.size)
            channel_nll(_take(n[c], rows, nb), fr[c], g_[c], s,
                        np.ascontiguousarray(b_[c], float), part)
            out = out + part
        return out

    ns = len(shaped)

    def value(x, rows):
        tmu, tnu, tkap, tb, tth = unpack(x, rows)
        both = [_bkg_both(m, th) if kc else (g0[c][rows], dg0[c][rows])
                for c, (m, th, kc) in enumerate(zip(models, tth, ks))]
        tg = tuple(x[0] for x in both)
        fr, dfr = signal_fractions(tkap, rows) if shaped else ([None] * nc, [])
        if not shaped:
            fr = [_take(f[c], rows, nb) for c in range(nc)]
        state = tg + tuple(x[1] for x in both) + tuple(fr[c] for c in shaped) + tuple(dfr)
        return total(tmu, tnu, tkap, tb, tg, fr, rows), state

    def grad_hess(x, state, rows):
        xmu, xnu, xkap, xb, _ = unpack(x, rows)
        fr = [_take(f[c], rows, nb) for c in range(nc)]
        dfr = [None] * nc
        for j, c in enumerate(shaped):
            fr[c], dfr[c] = state[2 * nc + j], state[2 * nc + ns + j]
        gr, he = _grad_hess(models, n, fr, k, xmu, xnu - aux[rows], a_norm, xb,
                            state[nc:2 * nc], state[:nc], d2, rows, fixed, first, p, xnu,
                            dfr, kfirst)
        if shaped:
            _, cg, ch = factor_terms(xkap, rows)
            for c, gc_, hc_ in zip(shaped, cg, ch):
                at = np.arange(kfirst[c], kfirst[c] + len(names[c]))
                gr[:, at] += gc_
                he[:, at, at] += hc_
        return gr, he

    def python_loop(mu):
        """The Python loop of :func:`~peaksift.likelihood.minimize_stacked` (the reference)."""
        # fractions and their gradients together: a trial's gradients are the next Newton
        # step's, so each accepted point costs one shape evaluation per channel
        gd = [_per_row(_bkg_both, m, th) for m, th in zip(models, theta)]
        g0[:] = [x[0] for x in gd]
        dg0[:] = [x[1] for x in gd]
        fr0, dfr0 = signal_fractions(kap, all_rows)
        nll = total(mu, nu, kap, b, g0, fr0, all_rows)
        if np.any(~np.isfinite(nll)) and not fixed:
            mu = np.where(np.isfinite(nll), mu, 0.0)
            nll = total(mu, nu, kap, b, g0, fr0, all_rows)
        x0 = pack(mu)
        start_state = (tuple(g0) + tuple(dg0) + tuple(fr0[c] for c in shaped) + tuple(dfr0))
        return minimize_stacked(value, grad_hess, x0, lower, upper, start=(nll, start_state),
                                steps=steps, nll_tol=1e-8, step_tol=tol)

    all_rows = np.arange(nb)
    # the same loop compiled when every channel allows it (joint_driver), else in Python
    r = None
    if not shaped and steps > 0 and use_compiled():
        r = compiled_joint(models, n, f, k, fixed, mu, pack(mu), aux, a_norm, d2,
                           [None if kc else _per_row(bkg_fractions, m, th)
                            for m, th, kc in zip(models, theta, ks)],
                           first, lower, upper, steps, tol)
    if r is None:
        r = python_loop(mu)
    mu, nu, kap, b, theta = unpack(r.x, all_rows)
    mu, nu, kap = mu.copy(), nu.copy(), kap.copy()
    b, theta = [v.copy() for v in b], [v.copy() for v in theta]
    mu_err = np.full(nb, np.nan)
    if not fixed:
        # the exact Hessian (the background shapes' curvature from the start, as
        # profile_signal does) where each fit took its last step: that step moved a
        # converged fit by < tol errors, so it is the Hessian at the minimum to that order;
        # rows without one get theirs here
        h = np.array(r.hessian) if r.hessian.shape[1:] == (p, p) else np.zeros((nb, p, p))
        redo = np.flatnonzero(~np.any(h, axis=(1, 2)))
        if redo.size:
            xr = np.concatenate(([] if fixed else [mu[redo, None]]) + [nu[redo], kap[redo]]
                                + [a for c in range(nc) for a in (b[c][redo, None],
                                                                  theta[c][redo])], axis=1)
            if r.state is None:   # the compiled loop keeps none: the backgrounds here
                both = [_bkg_both(m, th[redo]) for m, th in zip(models, theta)]
                st = tuple(v[0] for v in both) + tuple(v[1] for v in both)
            else:
                st = tuple(a[redo] for a in r.state)
            h[redo] = grad_hess(xr, st, redo)[1]
        # the compiled loop inverts each row's Hessian as it ends (joint_driver)
        done = getattr(r, "first_error", None)
        if done is None:
            mu_err = first_error(h)
        else:
            mu_err = np.array(done)
            if redo.size:
                mu_err[redo] = first_error(h[redo])
    factors = [kap[:, kfirst[c] - off - nj:][:, :len(names[c])] for c in range(nc)]
    return {"mu": mu, "mu_error": mu_err, "b": b, "theta": theta, "nu": nu, "nll": r.nll,
            "factors": factors, "converged": r.converged}


def _take(x: np.ndarray, rows: np.ndarray, nb: int) -> np.ndarray:
    """Rows ``rows`` of a stacked array: a view for all rows or for one row repeated
    (shared counts, the start's shape curvature), else a copy."""
    if rows.size == nb:
        return x
    if x.strides[0] == 0:
        return np.broadcast_to(x[0], (rows.size,) + x.shape[1:])
    return x[rows]


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


def _grad_hess(models, n, fr, k, mu, pull, a_norm, b, dg, g, d2, idx, fixed, first, p,
               nu=None, dfr=None, kfirst=None):
    """Gradient ``(R, P)`` and exact Hessian ``(R, P, P)`` of the summed NLL at rows ``idx``
    (``mu``, ``pull = nu - aux``, ``nu``, ``b``, ``dg``, ``g``, the signal fractions ``fr``
    and their factor derivatives ``dfr`` are already those rows'; ``n``, ``k``, ``d2`` are
    indexed here): per channel the blocks of :func:`~peaksift.stats.toys.profile_signal`,
    with the signal column ``k_c e_c f_c`` on the shared parameter of interest, ``a_cj s_c
    f_c`` on each normalisation nuisance of the channel and ``s_c df_c/dk`` on each shape
    factor (``e_c`` its signal factor, ``s_c = mu k_c e_c``), plus the norms' constraints
    (the shape factors' are added by the caller).  Channels without shape factors take
    their sums over bins from one compiled pass
    (:func:`peaksift.stats.joint_kernels.channel_sums`)."""
    nb = idx.size
    ntot = k[0].shape[0]
    grad = np.zeros((nb, p))
    hess = np.zeros((nb, p, p))
    off = 0 if fixed else 1
    dfr = [None] * len(models) if dfr is None else dfr
    for c, m in enumerate(models):
        kc = m.theta.size
        bi = np.ascontiguousarray(b[c], float)
        kk = _take(k[c], idx, ntot) * _scale(a_norm, c, nu)   # signal events per unit of mu
        s = np.ascontiguousarray(mu * kk, float)
        js = [] if a_norm is None else [j for j in range(a_norm.shape[1]) if a_norm[c, j]]
        coef = ([] if fixed else [kk]) + [a_norm[c, j] * s for j in js]
        pos_s = ([] if fixed else [0]) + [off + j for j in js]
        nsig = len(coef)
        if dfr[c] is not None:
            gc, hc, pos_k = _shaped_block(n[c], fr[c], dfr[c], g[c], dg[c], d2[c], idx, ntot,
                                          s, bi, kk, coef, js, a_norm, c, fixed, kfirst[c])
            pos = np.asarray(pos_s + pos_k + list(range(first[c], first[c] + 1 + kc)))
            grad[:, pos] += gc
            hess[:, pos[:, None], pos[None, :]] += hc
            continue
        d2c = _take(d2[c], idx, ntot) if kc else np.zeros((nb, 0, 0, 1))
        fs, gs, ds, dd = sums(_take(n[c], idx, ntot), fr[c], g[c], dg[c], d2c, s, bi)
        pos = np.asarray(pos_s + list(range(first[c], first[c] + 1 + kc)))
        q = nsig + 1 + kc
        gc = np.zeros((nb, q))
        hc = np.zeros((nb, q, q))
        cf = np.stack(coef, axis=1) if coef else np.zeros((nb, 0))
        gc[:, :nsig] = cf * fs[:, :1]
        gc[:, nsig] = gs[:, 0]
        gc[:, nsig + 1:] = bi[:, None] * ds
        hc[:, :nsig, :nsig] = cf[:, :, None] * cf[:, None, :] * fs[:, 1, None, None]
        hc[:, :nsig, nsig] = hc[:, nsig, :nsig] = cf * fs[:, 2:3]
        fdb = cf[:, :, None] * (bi[:, None] * fs[:, 3:])[:, None, :]
        hc[:, :nsig, nsig + 1:] = fdb
        hc[:, nsig + 1:, :nsig] = fdb.transpose(0, 2, 1)
        hc[:, nsig, nsig] = gs[:, 1]
        cross = bi[:, None] * gs[:, 2:] + ds
        hc[:, nsig, nsig + 1:] = hc[:, nsig + 1:, nsig] = cross
        hc[:, nsig + 1:, nsig + 1:] = ((bi * bi)[:, None, None] * dd[:, 0]
                                       + bi[:, None, None] * dd[:, 1])
        if js:
            _norm_second(hc, fs[:, 0], s, kk, a_norm[c, js], fixed, nsig)
        grad[:, pos] += gc
        hess[:, pos[:, None], pos[None, :]] += hc
    if a_norm is not None:
        nj = a_norm.shape[1]
        grad[:, off:off + nj] += pull
        hess[:, np.arange(off, off + nj), np.arange(off, off + nj)] += 1.0
    return grad, hess


def _norm_second(hc, wf, s, kk, aj, fixed, nsig):
    """The normalisation nuisances' second derivatives of the signal term times w (``wf =
    sum w f``): d2(s f)/dmu dnu_j = a_j k e f, d2(s f)/dnu_j dnu_l = a_j a_l s f."""
    o = 0 if fixed else 1
    hc[:, o:nsig, o:nsig] += (wf * s)[:, None, None] * np.outer(aj, aj)
    if not fixed:
        hc[:, 0, 1:nsig] += (wf * kk)[:, None] * aj
        hc[:, 1:nsig, 0] += (wf * kk)[:, None] * aj


def _shaped_block(n, fi, dfi, gi, dgc, d2, idx, ntot, s, bi, kk, coef, js, a_norm, c, fixed,
                  kfirst_c):
    """One channel's gradient and Hessian blocks with shape factors (numpy): columns
    ``(signal: mu, norms), (factors), b, theta``; the factors' second derivatives of the
    fractions are left out (the Fisher-type term of :func:`peaksift.stats.shape_profile`),
    their mixed ones with mu and the norms are exact."""
    kc = dgc.shape[1]
    jn = dfi.shape[1]
    nsig = len(coef)
    cols = [cq[:, None, None] * fi[:, None, :] for cq in coef]
    cols += [s[:, None, None] * dfi, gi[:, None, :]]
    if kc:
        cols.append(bi[:, None, None] * dgc)
    a = np.concatenate(cols, axis=1)
    nn = _take(n, idx, ntot)
    nu_c = np.maximum(s[:, None] * fi + bi[:, None] * gi, _NU_FLOOR)
    r = nn / nu_c
    w = 1.0 - r
    gc = np.matmul(a, w[:, :, None])[:, :, 0]
    hc = np.matmul(a * (r / nu_c)[:, None, :], a.transpose(0, 2, 1))
    sb = nsig + jn          # row of b_c
    if kc:
        hc[:, sb + 1:, sb + 1:] += bi[:, None, None] * np.matmul(
            _take(d2, idx, ntot), w[:, None, :, None])[..., 0]
        cross = np.matmul(dgc, w[:, :, None])[:, :, 0]
        hc[:, sb, sb + 1:] += cross
        hc[:, sb + 1:, sb] += cross
    if js:
        _norm_second(hc, np.einsum("bn,bn->b", w, fi), s, kk, a_norm[c, js], fixed, nsig)
    wdf = np.matmul(dfi, w[:, :, None])[:, :, 0]          # sum w df/dk_j
    # d2(s f)/dmu dk_j = k e df_j; d2(s f)/dnu_i dk_j = a_i s df_j
    mixed = [kk] if not fixed else []
    mixed += [a_norm[c, j] * s for j in js]
    for q, cq in enumerate(mixed):
        hc[:, q, nsig:nsig + jn] += cq[:, None] * wdf
        hc[:, nsig:nsig + jn, q] += cq[:, None] * wdf
    return gc, hc, list(range(kfirst_c, kfirst_c + jn))
