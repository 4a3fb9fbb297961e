"""The stacked scan model the toys and the scan share: background fractions and their derivatives, the stacked background-only fit, and the exact profile of the signal over masses."""

from __future__ import annotations

import functools
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..likelihood import binned_nll, first_error, minimize_stacked, saturated_term
from ..likelihood.poisson import use_compiled

_BAND_EPS = 3e-3       # signal band: bins with f > eps * max f
_GROUP = 16            # masses per band group in the toy scan
_SUB_BATCH = 256       # toys processed together (memory/cache)
_NEWTON_STEPS = 5      # Newton iterations of the linearised toy scan
_TOYS_PER_BATCH = 500  # toys per ToyBatch handed to a worker
_REFINE = 2            # highest points of each toy scan refitted exactly


_NU_FLOOR = 1e-100     # floor of expectations in gradients/Hessians (nu**2 stays > 0)


def _quiet(func: Any) -> Any:
    """Run ``func`` with numpy floating-point warnings off.

    The fits try steps into extreme regions (a background fraction underflowing to 0, an
    expectation at its floor); those trial points give inf/NaN intermediate values that
    the NLL comparison then rejects, so the warnings are expected and must not reach users.
    A toy whose result is still not finite is returned as NaN and counted as failed
    (``n_failed_toys`` in the global significance).
    """
    @functools.wraps(func)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        with np.errstate(all="ignore"):
            return func(*args, **kwargs)
    return wrapper


# --------------------------------------------------------------------------- model
@dataclass(frozen=True)
class ScanModel:
    """A prepared binned scan: data, background model and signal templates (picklable).

    Attributes
    ----------
    edges : ndarray
        Edges of all bins in the window (``n_window + 1``).
    used : ndarray of int
        Indices (into the window's bins) of the bins in the likelihood (blinded ones dropped).
    window : (float, float)
        The fit window (the shapes are normalised on it).
    counts : ndarray
        Observed counts in the used bins (effective counts for weighted data).
    background : Shape
        Background shape.
    theta : ndarray
        Background shape parameters of the background-only fit to the data.
    bkg_yield : float
        Background yield ``b`` (in the whole window) of that fit.
    lower, upper : ndarray
        Bounds of the background shape parameters.
    masses : ndarray
        Mass hypotheses.
    fractions : ndarray
        Signal bin fractions ``(n_masses, n_used)`` at each hypothesis (already multiplied
        by ``bin_scale``).
    bin_scale : ndarray or None
        Weighted spectra: the scaled-Poisson factor ``k_i = values_i / variances_i`` of every
        window bin (Bohm and Zech 2014; the rule of :func:`peaksift.fit`, empty bins get
        ``sum w / sum w^2``).  Counts are effective counts ``k_i values_i`` and every
        expectation is ``k_i (s f_i + b g_i)`` with the yields in weighted units, so the
        NLL equals the weighted binned fit's up to a constant.  None: unweighted (k = 1).
    """

    edges: np.ndarray
    used: np.ndarray
    window: tuple[float, float]
    counts: np.ndarray
    background: Any
    theta: np.ndarray
    bkg_yield: float
    lower: np.ndarray
    upper: np.ndarray
    masses: np.ndarray
    fractions: np.ndarray
    nll_background: float = float("nan")
    extras: dict = field(default_factory=dict)
    bin_scale: np.ndarray | None = None

    @property
    def expected_background(self) -> np.ndarray:
        """Background expectation per used bin from the background-only fit to the data."""
        return self.bkg_yield * bkg_fractions(self, self.theta[None, :])[0]


# The fits below call these two at every step, mostly for a few rows: numpy's
# ``broadcast_to`` and ``moveaxis`` cost more than a compiled shape's kernel there, so
# they run only where the shape's answer needs them (the values are the same copies).
def bkg_fractions(model: ScanModel, theta: np.ndarray) -> np.ndarray:
    """Background bin fractions in the used bins for stacked parameters ``theta (B, K)``."""
    params = [theta[:, k : k + 1] for k in range(theta.shape[1])]
    g = np.asarray(model.background.bin_fractions(model.edges, params, model.window))
    full = (theta.shape[0], model.edges.size - 1)
    if g.shape != full:
        g = np.broadcast_to(g, full)
    if model.bin_scale is not None:
        g = g * model.bin_scale
    return np.ascontiguousarray(g[:, model.used])


def bkg_gradients(model: ScanModel, theta: np.ndarray) -> np.ndarray:
    """Derivatives of the used-bin background fractions, ``(B, K, n_used)``."""
    params = [theta[:, k : k + 1] for k in range(theta.shape[1])]
    dg = np.asarray(model.background.grad_bin_fractions(model.edges, params, model.window))
    full = (theta.shape[1], theta.shape[0], model.edges.size - 1)
    if dg.shape != full:
        dg = np.broadcast_to(dg, full)
    if model.bin_scale is not None:
        dg = dg * model.bin_scale
    return np.ascontiguousarray(dg[:, :, model.used].transpose(1, 0, 2))


def bkg_second(model: ScanModel, theta: np.ndarray) -> np.ndarray:
    """Second derivatives of the used-bin background fractions, ``(B, K, K, n_used)``.

    Central differences of the analytic first derivatives (step 1e-5 max(|theta|, 0.1)),
    kept inside the bounds; symmetrised.  This is the curvature a Fisher-type Hessian
    leaves out, needed e.g. where a squared coefficient sits at 0.  The fits compute it
    once at their starting point and reuse it (it only steers the Newton steps).

    Rows that all start from one point (a scan's masses, a toy batch, a limit's grid)
    share one computation, copied to every row: each row's value is its own either way.
    """
    nb, k = theta.shape
    if nb > 1 and k and bool(np.all(theta == theta[:1])):
        return np.repeat(bkg_second(model, theta[:1]), nb, axis=0)
    out = np.empty((nb, k, k, model.used.size))
    for j in range(k):
        h = 1e-5 * np.maximum(np.abs(theta[:, j]), 0.1)
        up = theta.copy()
        dn = theta.copy()
        up[:, j] = np.minimum(theta[:, j] + h, model.upper[j])
        dn[:, j] = np.maximum(theta[:, j] - h, model.lower[j])
        width = np.where(up[:, j] > dn[:, j], up[:, j] - dn[:, j], 1.0)
        out[:, j] = (bkg_gradients(model, up) - bkg_gradients(model, dn)) / width[:, None, None]
    return 0.5 * (out + out.transpose(0, 2, 1, 3))


def _nll(n: np.ndarray, nu: np.ndarray, sat: np.ndarray | None = None) -> np.ndarray:
    # the core's Poisson NLL without its saturated constant (differences are all we need),
    # summed in small terms: the fits below stop on NLL changes of 1e-8 to 1e-9, below the
    # rounding of the plain sum in 10,000 bins (they then ran to their step limit).
    # ``sat``: saturated_term(n) of these rows, which a fit computes once for its counts
    # (half the cost of each evaluation otherwise); the same bits either way
    if sat is None:
        return binned_nll(n, nu, saturated=False, small_terms=True)
    return binned_nll(n, nu, saturated=True, small_terms=True) - sat


# ------------------------------------------------------- background-only fit (stacked)
@_quiet
def fit_background(model: ScanModel, n: np.ndarray, theta0: np.ndarray | None = None,
                   *, steps: int = 30, tol: float = 1e-9,
                   curvature_after: int | None = None) -> tuple[np.ndarray, np.ndarray,
                                                                np.ndarray]:
    r"""Background-only fits of stacked spectra ``n (B, n_used)``.

    Levenberg-Marquardt steps on the Fisher-type Hessian for the shape parameters, the
    yield profiled in closed form (:math:`\hat b = \sum n / \sum g`); a step is taken only
    when the NLL does not rise.  Stops when the NLL changes by less than ``tol``.

    The shape's curvature (:func:`bkg_second`) is the start's throughout; with
    ``curvature_after`` = j the fits still running after j iterations recompute it at
    their current point at every further iteration.  A fit that travels far from its
    start (a squared Bernstein coefficient going to 0, a power-sum term fading out) then
    takes Newton steps with its own curvature instead of creeping along a valley with the
    start's, which overshot and crawled to the step limit (the order test's fits: 100
    iterations each on the demo, 10-20 with it, the same minimum to 1e-7 in NLL).

    Returns ``(theta (B, K), b (B,), nll (B,))``.
    """
    n = np.atleast_2d(np.asarray(n, float))
    nb, k = n.shape[0], model.theta.size
    theta = np.array(np.broadcast_to(model.theta if theta0 is None else theta0, (nb, k)),
                     dtype=float)
    ntot = n.sum(axis=1)
    sat = saturated_term(n)

    def profile_b(th: np.ndarray, rows: Any = slice(None)) -> tuple[np.ndarray, np.ndarray,
                                                                   np.ndarray]:
        g = bkg_fractions(model, th)
        b = ntot[rows] / np.maximum(g.sum(axis=1), 1e-300)
        val = _nll(n[rows], b[:, None] * g, sat[rows])
        return g, b, np.where(np.all(g > 0, axis=1) | (n[rows] == 0).all(axis=1), val, np.inf)

    g, b, nll = profile_b(theta)
    if k == 0:
        return theta, b, nll
    d2 = bkg_second(model, theta)
    calls = [0]

    def value(th: np.ndarray, rows: np.ndarray) -> tuple[np.ndarray, tuple]:
        gt, bt, nt = profile_b(th, rows)
        return nt, (gt, bt)

    def grad_hess(th: np.ndarray, state: tuple, rows: np.ndarray):
        gi, bi = state
        calls[0] += 1  # (called once per iteration)
        if curvature_after is not None and calls[0] > curvature_after:
            d2[rows] = bkg_second(model, th)
        dg = bkg_gradients(model, th)                      # (B, K, N)
        nu = np.maximum(bi[:, None] * gi, _NU_FLOOR)
        a = np.concatenate([gi[:, None, :], bi[:, None, None] * dg], axis=1)  # (B, P, N)
        w = 1.0 - n[rows] / nu
        grad = np.einsum("bpn,bn->bp", a, w)
        # exact Hessian: observed Fisher part + the curvature of the shape
        hess = np.einsum("bpn,bqn,bn->bpq", a, a, n[rows] / nu**2)
        hess[:, 1:, 1:] += bi[:, None, None] * np.einsum("bkln,bn->bkl", d2[rows], w)
        cross = np.einsum("bkn,bn->bk", dg, w)
        hess[:, 0, 1:] += cross
        hess[:, 1:, 0] += cross
        return grad, hess

    # the yield is profiled inside ``value``: only the shape part of the step moves theta
    r = minimize_stacked(value, grad_hess, theta, model.lower, model.upper,
                         start=(nll, (g, b)), steps=steps, nll_tol=tol, slack=1e-10,
                         step_columns=slice(1, None))
    return r.x, r.state[1], r.nll


# --------------------------------------------------- exact profile over masses (data)
#: a row's signal start is moved where the start's expectations are below the counts by
#: more than this factor, weighted by the signal (:func:`signal_start`); then moved while
#: they are more than START_STOP below, in at most START_STEPS steps
START_RATIO, START_STOP, START_STEPS = 4.0, 1.01, 30
#: a row not converged after this many iterations (a scan's rows take 4-6) has the
#: background's curvature in its Hessian computed again at its point: the start's, held
#: to save its evaluations, is far off where theta has moved many errors (a background
#: fitted badly, the signal taking up the difference), and there the Newton steps
#: oscillated in theta for 30-50 iterations
REFRESH_AT = 6


def signal_start(n: np.ndarray, f: np.ndarray, s: np.ndarray, b: np.ndarray, g: np.ndarray,
                 nll: np.ndarray, total_nll: Any) -> tuple[np.ndarray, np.ndarray]:
    """``(s, nll)`` with each row's signal yield moved to the minimum in s alone (b and
    the background shape held) where the start's expectations are far below the counts
    under the signal (G > START_RATIO F at the start, below); other rows unchanged.

    Why: at s = 0 under a background far below the counts (an exponential fitted to a
    power law leaves ~1e-6 events where ~50 are counted), the NLL in s is ~ -n ln(s f +
    nu) with nu << n, whose Newton step only doubles s + nu / f: ~25 iterations of the
    full fit to reach s ~ 50.  The NLL's derivative in s is F - G(s), ``F = sum f_j``,
    ``G(s) = sum n_j f_j / (s f_j + nu_j)``; 1/G is increasing and concave (a harmonic
    sum of linear functions), so Newton's method on 1/G - 1/F = 0 (the ordinary step
    times G/F) climbs to the root from below without passing it: 2-3 steps, taken while
    G > START_STOP F.  A row keeps its new point only if its NLL is lower.  The
    compiled fit does the same row by row (``profile_kernels._signal_start``)."""
    ff = f.sum(axis=1)
    move = np.zeros(s.size, bool)
    s1 = s.copy()
    for it in range(START_STEPS):
        nu = np.maximum(s1[:, None] * f + b[:, None] * g, _NU_FLOOR)
        q = n / nu
        gg = (f * q).sum(axis=1)
        hh = (f * q * (f / nu)).sum(axis=1)
        step = (gg > (START_RATIO if it == 0 else START_STOP) * ff) & (hh > 0) & (ff > 0)
        if it == 0:
            move = step
        step &= move
        if not step.any():
            break
        s1 = np.where(step, s1 + (gg - ff) * gg / np.where(step, ff * hh, 1.0), s1)
    if not move.any():
        return s, nll
    t = total_nll(s1, b, g)
    keep = move & (t < nll)
    return np.where(keep, s1, s), np.where(keep, t, nll)


#: numpy's float64 (a singleton: ``dtype is`` tests what ``dtype == np.float64`` does for
#: the arrays made here, without the comparison's conversion)
_F8 = np.dtype(np.float64)

#: saturated terms of the spectra profiled lately, by their counts' bytes, the newest
#: last: a window scanned again asks for the same one (with cold caches its six numpy
#: calls were ~28 us of a 100-bin scan)
_SATURATED: dict[bytes, np.ndarray] = {}


def _spectrum_saturated(n: np.ndarray) -> np.ndarray:
    """:func:`saturated_term` of one spectrum ``n (N,)`` (float64), kept by its bytes."""
    key = n.tobytes()
    sat = _SATURATED.get(key)
    if sat is None:
        with np.errstate(all="ignore"):
            sat = saturated_term(n)
        if len(_SATURATED) >= 8:
            _SATURATED.pop(next(iter(_SATURATED)), None)
        _SATURATED[key] = sat
    return sat


def _compiled() -> Any:
    """:mod:`peaksift.stats.profile_calls`, imported on first use (numba loads then) and
    kept: an import statement in the scan's path cost ~10 us with cold caches."""
    if not _KERNEL:
        from . import profile_calls

        _KERNEL.append(profile_calls)
    return _KERNEL[0]


_KERNEL: list[Any] = []


def profile_signal(model: ScanModel, n: np.ndarray, fractions: np.ndarray, *,
                   s_fixed: np.ndarray | None = None, s_start: np.ndarray | None = None,
                   theta_start: np.ndarray | None = None, b_start: np.ndarray | None = None,
                   steps: int = 60, tol: float = 1e-6) -> dict[str, np.ndarray]:
    """Exact signal-plus-background fits for stacked hypotheses.

    ``fractions (B, n_used)`` are the signal fractions of each hypothesis, ``n`` the counts
    (``(n_used,)`` shared or ``(B, n_used)``).  The signal yield is free (it may go negative
    as long as every expectation stays positive) unless ``s_fixed (B,)`` is given.  Newton
    steps with the Fisher-type Hessian and step halving on the exact NLL; a free signal
    whose start lies far below the counts under it is first moved to the minimum in s
    alone (:func:`signal_start`).

    Returns a dict of ``s``, ``s_error`` (from the inverse observed Hessian), ``b``,
    ``theta``, ``nll``, ``converged``, ``hessian`` (free fits: the exact Hessian
    ``(B, 2 + K, 2 + K)`` over ``(s, b, theta)`` at the minimum; else None) and
    ``curvature`` (the background shape's second derivatives at the start, ``(B, K, K,
    n_used)``, that the Hessian used; None without shape parameters).
    """
    f = fractions
    if not (type(f) is np.ndarray and f.ndim == 2 and f.dtype is _F8):
        f = np.atleast_2d(np.asarray(fractions, float))  # (the same array when it is one)
    nbin = f.shape[1]
    k = model.theta.size
    if (k == 1 and s_fixed is None and s_start is None and theta_start is None
            and b_start is None and type(n) is np.ndarray and n.shape == (nbin,)
            and n.dtype is _F8 and use_compiled()):
        # a scan's call (one spectrum, every row from the background-only fit): the
        # compiled fit's inputs made directly, without the stacked copies below (~30 us
        # of a 100-bin scan); the same values
        # (outside _quiet's errstate, ~10 us with cold caches: no numpy arithmetic here
        # but the saturated term, computed under it)
        out = _compiled().compiled_scan_profile(model, n, f, _spectrum_saturated(n), steps,
                                                tol)
        if out is not None:
            return out
    return _profile_stacked(model, n, f, s_fixed, s_start, theta_start, b_start, steps, tol)


@_quiet
def _profile_stacked(model: ScanModel, n: Any, f: np.ndarray, s_fixed: Any, s_start: Any,
                     theta_start: Any, b_start: Any, steps: int,
                     tol: float) -> dict[str, np.ndarray]:
    """:func:`profile_signal` but for the scan's compiled call: the rows stacked, compiled
    where the background has a row kernel, else numpy."""
    nb, nbin = f.shape
    k = model.theta.size
    n = np.broadcast_to(np.asarray(n, float), (nb, nbin))
    theta = np.array(np.broadcast_to(model.theta if theta_start is None else theta_start,
                                     (nb, k)), dtype=float)
    b = np.array(np.broadcast_to(model.bkg_yield if b_start is None else b_start, (nb,)),
                 dtype=float)
    fixed = s_fixed is not None
    if fixed:
        s = np.array(np.broadcast_to(s_fixed, (nb,)), dtype=float)
    elif s_start is not None:
        s = np.array(np.broadcast_to(s_start, (nb,)), dtype=float)
    else:
        s = np.zeros(nb)
    if k == 1 and use_compiled():
        # the same fit row by row in one compiled call (stats/profile_calls.py), where
        # the background has a compiled row kernel; None: the numpy path below answers
        shared = n.strides[0] == 0
        out = _compiled().compiled_profile(model, n[0] if shared else n, f, s, b, theta, fixed,
                               saturated_term(n[:1] if shared else n), steps, tol)
        if out is not None:
            return out
    g = bkg_fractions(model, theta)
    sat = np.broadcast_to(saturated_term(n[:1]), (nb,)) if n.strides[0] == 0 else \
        saturated_term(n)

    def total_nll(s_, b_, g_, rows=slice(None)):
        nu = s_[:, None] * f[rows] + b_[:, None] * g_
        bad = np.any(nu <= 0, axis=1)
        val = _nll(n[rows], nu, sat[rows])
        return np.where(bad, np.inf, val)

    nll = total_nll(s, b, g)
    if np.any(~np.isfinite(nll)):
        # start with a positive expectation everywhere
        s = np.where(np.isfinite(nll), s, 0.0)
        nll = total_nll(s, b, g)
    off = 0 if fixed else 1
    if not fixed:   # far below the counts under the signal: s moved there first
        s, nll = signal_start(n, f, s, b, g, nll, total_nll)
    d2 = bkg_second(model, theta) if k else None
    d2h = d2   # the Hessian's curvature: rows past REFRESH_AT iterations, at their point then
    calls = 0

    def unpack(x: np.ndarray, rows: np.ndarray):
        return (s[rows] if fixed else x[:, 0]), x[:, off], x[:, off + 1:]

    def value(x: np.ndarray, rows: np.ndarray) -> tuple[np.ndarray, tuple]:
        ts, tb, tth = unpack(x, rows)
        tg = bkg_fractions(model, tth)
        return total_nll(ts, tb, tg, rows), (tg,)

    def grad_hess(x: np.ndarray, state: tuple, rows: np.ndarray, final: bool = False):
        nonlocal d2h, calls
        si, bi, thi = unpack(x, rows)
        gi = state[0]
        calls += not final   # (one call an iteration, for the rows still running)
        if k and calls == REFRESH_AT + 1 and not final:
            d2h = d2.copy()
            d2h[rows] = bkg_second(model, thi)
        nu = np.maximum(si[:, None] * f[rows] + bi[:, None] * gi, _NU_FLOOR)
        cols = [gi[:, None, :]]
        if k:
            dg = bkg_gradients(model, thi)
            cols.append(bi[:, None, None] * dg)
        if not fixed:
            cols.insert(0, f[rows][:, None, :])
        a = np.concatenate(cols, axis=1)
        w = 1.0 - n[rows] / nu
        grad = np.einsum("bpn,bn->bp", a, w)
        # exact Hessian: observed Fisher part + the curvature of the background shape
        hess = np.einsum("bpn,bqn,bn->bpq", a, a, n[rows] / nu**2)
        if k:
            ib = off  # index of the background yield
            hess[:, ib + 1:, ib + 1:] += bi[:, None, None] * np.einsum("bkln,bn->bkl",
                                                                         d2h[rows], w)
            cross = np.einsum("bkn,bn->bk", dg, w)
            hess[:, ib, ib + 1:] += cross
            hess[:, ib + 1:, ib] += cross
        return grad, hess

    free = [] if fixed else [s[:, None]]
    x0 = np.concatenate(free + [b[:, None], theta], axis=1)
    unbounded = np.full(off + 1, np.inf)
    r = minimize_stacked(value, grad_hess, x0, np.concatenate([-unbounded, model.lower]),
                         np.concatenate([unbounded, model.upper]), start=(nll, (g,)),
                         steps=steps, nll_tol=1e-8, step_tol=tol)
    s, b, theta = unpack(r.x, np.arange(nb))
    s, b, theta, g, nll, converged = s.copy(), b.copy(), theta.copy(), r.state[0], r.nll, \
        r.converged
    # Hessian-based error of the signal yield: inverse of the exact Hessian at the minimum
    hess = None if fixed else grad_hess(r.x, r.state, np.arange(nb), final=True)[1]
    s_err = np.full(nb, np.nan) if fixed else first_error(hess)
    return {"s": s, "s_error": s_err, "b": b, "theta": theta, "nll": nll,
            "converged": converged, "hessian": hess, "curvature": d2}
