r"""Profiling the signal shape's nuisance parameters in the scan and in its toys.

Which piece when
----------------
* :func:`profile_with_nuisances` -- signal-plus-background fits of stacked hypotheses with
  the mass-scale and resolution factors of a
  :class:`~peaksift.likelihood.SignalNuisances` free and constrained (the scan calls it at
  every mass when a size is non-zero).
* :func:`run_nuisance_toy_batch` -- the toy batch of :func:`peaksift.stats.toys.run_toys`
  with the same profiling: the linearised toy scan, then every toy's highest points refitted
  with the nuisances free (``batch_function=`` of :func:`~peaksift.stats.toys.run_toys`).

The likelihood at one hypothesis (mass ``m``, resolution ``sigma(m)``) is

.. math:: \mathrm{NLL} = \sum_i [\nu_i - n_i\ln\nu_i] + \sum_j C_j(k_j),\qquad
          \nu_i = s\,f_i(m\,k_m,\ \sigma k_r) + b\,g_i(\theta)

with the constraint terms :math:`C_j` of the core (:mod:`peaksift.likelihood.nuisances`).
Under the background-only hypothesis (``s = 0``) the signal factors sit at their centres and
add nothing, so q0 = 2 (NLL_b - NLL) keeps the background-only fit of the plain scan.

Method: damped Newton (Levenberg-Marquardt, :func:`peaksift.likelihood.minimize_stacked`) on
all hypotheses at once, started from the fit with the factors at 1 (where the mass scale
reaches beyond the peak's width the callers start it also from the lowest wells of a scan
of the mass scale, :func:`peaksift.stats.scale_scan.profile_global`, and keep the lowest); the Hessian is the observed
Fisher part plus the exact yield-factor and background-curvature cross terms; the
derivatives of the signal fractions in the factors come from the shape's own parameter
derivatives (analytic where the shape has them) by the chain rule.  A step is taken only where the NLL does not rise.

Toys: the linearised engine finds each toy's scan with the factors fixed at their centres,
and the ``NUISANCE_REFINE`` highest points of each toy are refitted with the factors free
(from the scan's lowest wells of the mass scale too, as the data's scan).
The global p-value uses the maximum over the scan; a free factor raises q0 most where it was
already high, so refitting the top points gives that maximum (an approximation where a
factor lifts a lower point above the top ones, stated in the global result).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from typing import Any

import numpy as np

from ..likelihood import SignalNuisances, binned_nll, first_error, minimize_stacked
from .toys import (
    ScanModel,
    ToyBatch,
    bkg_fractions,
    bkg_gradients,
    bkg_second,
    fit_background,
    profile_signal,
    run_toy_batch,
    toy_counts,
)

__all__ = ["NUISANCE_REFINE", "profile_with_nuisances", "refine_toy_points",
           "run_nuisance_toy_batch", "top_points", "toy_data", "with_nuisances"]

#: highest points of each toy scan refitted with the signal nuisances free
NUISANCE_REFINE = 3
_FLOOR = 1e-100
#: the toys' fits stop when a step gains less than this in NLL: the Hessian lacks the
#: factors' second derivatives, so the last steps converge linearly, and a toy's q0 needs
#: ~1e-4 (measured against the 1e-8 of the data's fits: |dq0| < 3e-4 on 100 toys of scripts/bench_envelope.py)
TOY_TOLERANCE = 1e-5


def with_nuisances(model: ScanModel, signal: Any, base_params: Sequence[Any],
                   nuisances: SignalNuisances, ensemble: str = "fixed") -> ScanModel:
    """``model`` carrying what its toys need to profile the signal nuisances (in
    ``extras``): the signal shape, its parameters at each hypothesis, the sizes, and how
    toys treat the constraints' centres (``"fixed"`` at 1, or ``"sampled"`` per toy)."""
    extras = dict(model.extras)
    extras["signal_nuisances"] = {"signal": signal, "params": list(base_params),
                                  "nuisances": nuisances, "ensemble": ensemble}
    return dataclasses.replace(model, extras=extras)


def _fractions(model: ScanModel, signal: Any, base: Sequence[Any], names: Sequence[str],
               nuis: SignalNuisances, k: np.ndarray, rows: Any, grad: bool = False):
    """Signal fractions in the used bins at factors ``k (B, J)`` and, with ``grad``, their
    derivatives in the factors ``(J, B, N)`` (chain rule on the shape's own parameter
    derivatives: d/dk_m = m d/dmass, d/dk_r = sigma d/dsigma)."""
    params = [np.asarray(p)[rows] if np.ndim(p) else p for p in base]
    p = nuis.signal_parameters(signal.parameter_names, params, names, k)
    nb = k.shape[0]
    full = (nb, model.edges.size - 1)
    scale = 1.0 if model.bin_scale is None else model.bin_scale
    if not grad:
        f = np.broadcast_to(np.asarray(signal.bin_fractions(model.edges, p, model.window),
                                       float), full) * scale
        return np.ascontiguousarray(f[:, model.used])
    f, g = signal.fractions_and_grad(model.edges, p, model.window)
    f = np.broadcast_to(np.asarray(f, float), full) * scale
    pn = list(signal.parameter_names)
    target = {"mass_scale": "mass",
              "mass_resolution": "sigma" if "sigma" in pn else "width"}
    d = []
    for j, name in enumerate(names):
        i = pn.index(target[name])
        val = np.broadcast_to(np.asarray(p[i], float), (nb, 1))
        d.append((np.broadcast_to(g[i], full) * scale * (val / k[:, j : j + 1]))
                 [:, model.used])
    return np.ascontiguousarray(f[:, model.used]), np.array(d)


def profile_with_nuisances(model: ScanModel, n: Any, signal: Any, base_params: Sequence[Any],
                           nuisances: SignalNuisances, *, start: dict[str, np.ndarray],
                           centers: np.ndarray | None = None, steps: int = 40,
                           tol: float = 1e-8, fixed_signal: bool = False,
                           exact: bool = False) -> dict[str, np.ndarray]:
    """Signal-plus-background fits with the signal shape's factors free and constrained.

    Parameters
    ----------
    model : ScanModel
        Used bins, background shape and bounds.
    n : array (N,) or (B, N)
        Counts in the used bins.
    signal : Shape
        The signal shape; ``base_params`` its parameters per hypothesis (arrays ``(B, 1)``
        or scalars) before the factors are applied.
    nuisances : SignalNuisances
        Sizes; only the shape nuisances (mass scale, resolution) are free here.
    start : dict
        A fit with the factors at 1 (:func:`peaksift.stats.toys.profile_signal`'s result:
        ``s``, ``b``, ``theta``); an optional ``factors (B, J)`` starts the factors
        elsewhere than at 1 (a warm start).
    centers : array (B, J), optional
        Constraint centres per hypothesis (default 1).
    fixed_signal : bool
        Keep the signal yield at ``start["s"]`` (the conditional fits of the limits).
    exact : bool
        Add the factors' own second derivatives to the Hessian (from differences of the
        shape's analytic first derivatives) wherever the result is positive definite:
        without them the steps in a factor whose curvature is far below its Fisher part
        (a signal held above the data, moved along a falling background) shrink to a
        crawl, and the fit stops short of its minimum (the limits use it).

    Returns
    -------
    dict with ``s``, ``s_error``, ``b``, ``theta``, ``nll`` (constraints included),
    ``factors`` ``(B, J)``, ``names`` and ``converged``.
    """
    names = nuisances.shape_active
    s = np.array(start["s"], float)
    nb = s.size
    j_n = len(names)
    n = np.broadcast_to(np.asarray(n, float), (nb, model.used.size))
    b = np.array(start["b"], float)
    theta = np.array(start["theta"], float).reshape(nb, -1)
    kk = theta.shape[1]
    k = (np.ones((nb, j_n)) if start.get("factors") is None
         else np.array(start["factors"], float).reshape(nb, j_n))
    lo = np.array([nuisances.bounds(nm)[0] for nm in names])
    hi = np.array([nuisances.bounds(nm)[1] for nm in names])
    cen = None if centers is None else np.broadcast_to(np.asarray(centers, float), (nb, j_n))

    def cons(kv, rows):
        return nuisances.constraint_terms(names, kv, None if cen is None else cen[rows])

    def total(sv, kv, bv, g, rows):
        # a trial step may move the peak so far out of the window that its integral there
        # is 0 (0/0 fractions): that row's NLL is NaN and the minimiser refuses the step,
        # so numpy's warning would only alarm the user
        with np.errstate(invalid="ignore", divide="ignore"):
            f = _fractions(model, signal, base_params, names, nuisances, kv, rows)
        nu = sv[:, None] * f + bv[:, None] * g
        val = binned_nll(n[rows], nu, saturated=False) + cons(kv, rows)[0]
        return np.where(np.any(nu <= 0, axis=1), np.inf, val), f

    g = bkg_fractions(model, theta)
    all_rows = np.arange(nb)
    nll, _ = total(s, k, b, g, all_rows)
    d2 = bkg_second(model, theta) if kk else None
    ib = 1 + j_n  # index of the background yield

    def value(x, rows):
        tg = bkg_fractions(model, x[:, ib + 1:])
        return total(x[:, 0], x[:, 1:ib], x[:, ib], tg, rows)[0], (tg,)

    def grad_hess(x, state, rows):
        si, ki, bi, thi, gi = x[:, 0], x[:, 1:ib], x[:, ib], x[:, ib + 1:], state[0]
        fi, dfs = _fractions(model, signal, base_params, names, nuisances, ki, rows, True)
        nu = np.maximum(si[:, None] * fi + bi[:, None] * gi, _FLOOR)
        cols = [fi[:, None, :]] + [si[:, None, None] * d[:, None, :] for d in dfs]
        cols.append(gi[:, None, :])
        if kk:
            dg = bkg_gradients(model, thi)
            cols.append(bi[:, None, None] * dg)
        a = np.concatenate(cols, axis=1)                      # (B, P, N)
        w = 1.0 - n[rows] / nu
        grad = np.einsum("bpn,bn->bp", a, w)
        hess = np.einsum("bpn,bqn,bn->bpq", a, a, n[rows] / nu**2)
        _, cg, ch = cons(ki, rows)
        jj = np.arange(1, 1 + j_n)
        grad[:, jj] += cg
        hess[:, jj, jj] += ch
        for j, d in enumerate(dfs):  # d2 nu / ds dk_j = df/dk_j (exact)
            t = np.einsum("bn,bn->b", d, w)
            hess[:, 0, 1 + j] += t
            hess[:, 1 + j, 0] += t
        if kk:
            hess[:, ib + 1:, ib + 1:] += bi[:, None, None] * np.einsum("bkln,bn->bkl",
                                                                         d2[rows], w)
            cross = np.einsum("bkn,bn->bk", dg, w)
            hess[:, ib, ib + 1:] += cross
            hess[:, ib + 1:, ib] += cross
        if fixed_signal:  # the yield's row and column out: its step is 0
            grad[:, 0] = 0.0
            hess[:, 0, :] = 0.0
            hess[:, :, 0] = 0.0
            hess[:, 0, 0] = 1.0
        if exact:  # last: the definiteness is that of the problem solved (s fixed or free)
            hess = _with_factor_curvature(hess, si, ki, w, dfs, rows)
        return grad, hess

    def _with_factor_curvature(hess, si, ki, w, dfs, rows):
        # s sum_i w_i d2f_i/dk_j dk_l, the derivatives of the analytic df/dk_j forward-
        # differenced in k_l (a relative step of 1e-6: the shape's gradients are smooth)
        out = hess.copy()
        for m in range(j_n):
            h = 1e-6 * np.maximum(np.abs(ki[:, m]), 1e-3)
            kh = ki.copy()
            kh[:, m] += h
            dh = _fractions(model, signal, base_params, names, nuisances, kh, rows, True)[1]
            for j in range(j_n):
                t = si * np.einsum("bn,bn->b", (dh[j] - dfs[j]) / h[:, None], w)
                out[:, 1 + j, 1 + m] += 0.5 * t
                out[:, 1 + m, 1 + j] += 0.5 * t
        # the Fisher form where the exact Hessian is not positive definite (far from a
        # minimum, or between two): its steps always descend.  Checked on the Hessian
        # scaled to a unit diagonal: the yields' and the factors' scales differ by 1e10
        d = 1.0 / np.sqrt(np.abs(np.diagonal(out, axis1=1, axis2=2)) + 1e-300)
        scaled = out * d[:, :, None] * d[:, None, :]
        ok = np.all(np.isfinite(scaled), axis=(1, 2))   # else the Fisher form
        if ok.any():
            try:
                ok[ok] = np.linalg.eigvalsh(scaled[ok]).min(axis=1) > 0
            except np.linalg.LinAlgError:   # no eigenvalues: the Fisher form everywhere
                ok[:] = False
        return np.where(ok[:, None, None], out, hess)

    x0 = np.concatenate([s[:, None], k, b[:, None], theta], axis=1)
    free = np.full(1, np.inf)
    r = minimize_stacked(value, grad_hess, x0, np.concatenate([-free, lo, -free, model.lower]),
                         np.concatenate([free, hi, free, model.upper]), start=(nll, (g,)),
                         active=np.isfinite(nll), steps=steps, nll_tol=tol)
    x, nll, converged = r.x, r.nll, r.converged
    s, k, b, theta = x[:, 0].copy(), x[:, 1:ib].copy(), x[:, ib].copy(), x[:, ib + 1:].copy()
    s_err = first_error(r.hessian)
    return {"s": s, "s_error": s_err, "b": b, "theta": theta, "nll": nll, "factors": k,
            "names": names, "converged": converged}


def top_points(q0: np.ndarray, count: int) -> tuple[np.ndarray, np.ndarray]:
    """(toy, mass) indices of each toy's ``count`` highest points with q0 > 0."""
    count = min(count, q0.shape[1])
    qs = np.nan_to_num(q0, nan=-1.0)
    top = np.argpartition(-qs, count - 1, axis=1)[:, :count]
    rows = np.repeat(np.arange(q0.shape[0]), count)
    cols = top.ravel()
    keep = qs[rows, cols] > 0
    return rows[keep], cols[keep]


def refine_toy_points(spec: ToyBatch, q0: np.ndarray, rows: np.ndarray, cols: np.ndarray,
                      n: np.ndarray, background: tuple) -> None:
    """Exact q0 of toys ``rows`` at masses ``cols`` with the signal nuisances free (or the
    plain exact fit without them), written into ``q0`` in place.  ``n`` are the toys'
    counts and ``background`` their background-only fits ``(theta, b, nll)``."""
    if rows.size == 0:
        return
    model = spec.model
    theta, b, nll_b = background
    info = model.extras.get("signal_nuisances")
    nr = n[rows]
    with np.errstate(all="ignore"):
        # start: the one-step yield estimate at the toy's background-only fit, then the
        # exact fit with the factors at 1, then (with nuisances) the joint Newton
        f = model.fractions[cols]
        b0 = np.maximum(b[rows, None] * bkg_fractions(model, theta[rows]), _FLOOR)
        s0 = np.maximum(np.sum((nr / b0 - 1.0) * f, axis=1)
                        / np.maximum(np.sum(nr * f * f / b0**2, axis=1), 1e-300), 0.0)
        r = profile_signal(model, nr, f, s_start=s0, theta_start=theta[rows],
                           b_start=b[rows] - s0)
        if info is not None and info["nuisances"].shape_active:
            nuis: SignalNuisances = info["nuisances"]
            names = nuis.shape_active
            centers = None
            if info["ensemble"] == "sampled":
                centers = np.empty((spec.count, len(names)))
                for j in range(spec.count):  # each toy's own stream, apart from its counts'
                    ss = np.random.SeedSequence(spec.seed, spawn_key=(spec.first + j, 1))
                    centers[j] = nuis.sample_centers(names, np.random.default_rng(ss), 1)[0]
                centers = centers[rows]
            base = [np.asarray(p)[cols] if np.ndim(p) else p for p in info["params"]]
            # the lowest well of the mass scale where it reaches beyond the peak's width,
            # as in the data's scan (the toys' maxima are those of the same statistic)
            from .scale_scan import profile_global  # it builds on this module

            rn = profile_global(model, nr, info["signal"], base, nuis, start=r,
                                centers=centers, tol=TOY_TOLERANCE)
            # started at the exact fit with the factors at 1: never worse, to rounding
            better = rn["nll"] <= r["nll"]
            r = {k: np.where(better, rn[k], r[k]) for k in ("s", "nll")}
    # the NLL with the constraints included is the profiled one; the null's constraints
    # vanish (factors at their centres)
    exact = np.where(r["s"] > 0, np.maximum(2.0 * (nll_b[rows] - r["nll"]), 0.0), 0.0)
    ok = np.isfinite(exact)
    q0[rows[ok], cols[ok]] = exact[ok]


def toy_data(spec: ToyBatch) -> tuple[np.ndarray, tuple]:
    """The counts of the toys of ``spec`` and their background-only fits."""
    model = spec.model
    expected = model.expected_background if spec.expected is None else spec.expected
    n = toy_counts(expected, spec.seed, spec.first, spec.count)
    with np.errstate(all="ignore"):
        return n, fit_background(model, n)


def run_nuisance_toy_batch(spec: ToyBatch) -> np.ndarray:
    """:func:`peaksift.stats.toys.run_toy_batch` with the signal nuisances profiled at each
    toy's ``NUISANCE_REFINE`` highest points (see the module guide).  Pure and picklable."""
    q0 = run_toy_batch(spec)
    info = spec.model.extras.get("signal_nuisances")
    if info is None or not info["nuisances"].shape_active:
        return q0
    n, fits = toy_data(spec)
    rows, cols = top_points(q0, NUISANCE_REFINE)
    refine_toy_points(spec, q0, rows, cols, n, fits)
    return q0
