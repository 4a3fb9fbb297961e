"""The one minimiser: bounded damped Fisher scoring, iminuit's MIGRAD as its fallback.

Which function when
-------------------
* :func:`minimize` -- one problem: damped Fisher scoring on ``cost.value_grad_info`` (held
  at bounds, cut at the wall ``mu >= 0``: :func:`fisher_scoring`); when it does not
  converge, iminuit's MIGRAD (strategy 0, analytic gradient), from where it stopped on
  binned costs with empty bins.
  Returns a :class:`Minimum`.
* :func:`covariance` -- ``H^-1`` from an observed Hessian, with the positive-definiteness test
  done on the Hessian scaled to unit diagonal (the unscaled eigenvalue ratio of a fit with
  10^7 events is ~1e-14 although the problem is well conditioned).
* :func:`refine` (:mod:`.refine`) -- observed Hessian at a minimum, polish, covariance.
* :func:`minimize_stacked` -- many independent bounded problems at once (toys, mass
  hypotheses, channels): Levenberg-Marquardt with per-problem damping, a convergence mask and
  an iteration cap; the one driver under the stacked fits of :mod:`peaksift.stats`.
  :func:`damped_step` is its step.
* :func:`new_minuit` -- an ``iminuit.Minuit`` object on a cost, for MINOS-type intervals or
  for users who want it (:mod:`.migrad`, with the watched fallback; :class:`Minimum` and
  :class:`NearMinimum` live in :mod:`.minimum`).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from .._jit import compiled_module
from .migrad import migrad, new_minuit
from .minimum import Minimum, NearMinimum
from .poisson import (
    DRIVER_MODULE,
    KERNELS_MODULE,
    NEWTON_MODULE,
    WALL_FRACTION,
    use_compiled,
)

__all__ = ["Minimum", "NearMinimum", "StackedMinimum", "covariance", "damped_step", "first_error",
           "fisher_scoring", "held_at_bounds", "minimize", "minimize_stacked", "new_minuit",
           "solve_stacked", "to_wall"]

#: systems up to this size are solved by the compiled :func:`.kernels.solve_small`
_SMALL = 16

#: a scaled Hessian with a smaller eigenvalue is treated as singular
POSDEF_TOL = 1e-10


def _solve(a: np.ndarray, g: np.ndarray) -> np.ndarray | None:
    """-a^-1 g, solved on the unit-diagonal scaling of ``a`` (None when singular)."""
    if a.shape[0] <= _SMALL and use_compiled():
        # compiled for the few parameters of a fit: numpy's solve costs ~20 us of call
        # overhead per Newton step, more than the step's arithmetic
        out = np.empty(g.size)
        ok = compiled_module(KERNELS_MODULE).solve_small(
            np.ascontiguousarray(a, float), np.ascontiguousarray(g, float), out)
        return out if ok else None
    d = np.sqrt(np.abs(np.diagonal(a)))
    d = np.where(d > 0, d, 1.0)
    try:
        step = -np.linalg.solve(a / np.outer(d, d), g / d) / d
    except np.linalg.LinAlgError:
        return None
    return step if np.all(np.isfinite(step)) else None


#: an exception inside Fisher scoring: MIGRAD starts afresh
_FAILED = np.empty(0)


class Joined(Exception):
    """Raised inside :func:`fisher_scoring` when its ``stop`` callback fires."""


def fisher_scoring(cost: Any, x0: np.ndarray, lower: np.ndarray, upper: np.ndarray,
                   max_iter: int = 60, edm_goal: float = 1e-7,
                   stop: Callable[[np.ndarray, float], bool] | None = None):
    """Damped Fisher scoring (Levenberg-Marquardt on the information matrix I returned by
    ``cost.value_grad_info``).  Returns ``(x, f, converged, I^-1 or None)``; converged when
    EDM = g^T I^-1 g / 2 < ``edm_goal`` (read off the undamped Newton step) and I is
    positive definite.  Not converged, ``x`` is where it stopped (at least as low as the
    start).

    Two rules keep it converging where a minimum sits on an edge of the model:

    * a parameter on a bound whose gradient points out of the box is held there for the
      step (:func:`held_at_bounds`), and the EDM is that of the others;
    * near the wall ``mu >= 0`` of a binned cost (a negative yield over an empty bin), the
      step uses the information without the empty bins (their term ``s mu`` is linear: no
      curvature; :meth:`.cost.BinnedCost.wall_terms`), cut to 0.99 of the way to the wall
      (:func:`to_wall`).  With the information alone the steps shrink as the bin's
      ``1 / mu`` grows and the path crawls; at the wall the EDM goes to 0 with ``mu``, and
      convergence also asks that this step, so cut, promise less than ``edm_goal``.

    ``stop(x, f)``, called at every accepted point, ends the minimisation by raising
    :class:`Joined` (the path has reached a minimum already known to the caller)."""
    x = np.clip(np.asarray(x0, float), lower, upper)
    lam = 0.0  # undamped first: from good starts Newton steps are accepted
    stalled = 0
    f, g, info = cost.value_grad_info(x)
    if not (math.isfinite(f) and np.isfinite(g.sum()) and np.isfinite(info.sum())):
        return x, f, False, None
    terms = getattr(cost, "wall_terms", None)
    wall = terms(x) if terms is not None else None
    for _ in range(max_iter):
        if stop is not None and stop(x, f):
            raise Joined((x, f))
        held = held_at_bounds(x, g, lower, upper)
        gr = np.where(held, 0.0, g)
        for _ in range(14):
            a = info if lam == 0.0 else info + lam * np.diag(info.diagonal())
            step = _solve(_hold(a, held), gr)
            if step is None:
                if lam == 0.0:
                    lam = 1e-3
                    continue
                return x, f, False, None
            near = None
            if wall is not None:
                b = wall[0] if lam == 0.0 else wall[0] + lam * np.diag(wall[0].diagonal())
                near = _solve(_hold(b, held), gr)
                if near is not None:
                    near = near * to_wall(wall[1], wall[2], near)
            if lam == 0.0:
                edm = -0.5 * float(gr @ step)
                if edm < edm_goal and (near is None or _promise(gr, near, b) < edm_goal):
                    cov, posdef = covariance(info)
                    return x, f, posdef, cov if posdef else None
            if near is not None:
                step = near
            xn = np.clip(x + step, lower, upper)
            fn, gn, infon = cost.value_grad_info(xn)
            if (math.isfinite(fn) and fn <= f + 1e-12 * abs(f) and np.isfinite(gn.sum())
                    and np.isfinite(infon.sum())):
                stalled = stalled + 1 if f - fn < 1e-10 * max(1.0, abs(f)) else 0
                x, f, g, info = xn, fn, gn, infon
                wall = terms(x) if terms is not None else None
                lam = 0.0 if lam <= 1e-3 else lam / 10.0
                break
            lam = 1e-3 if lam == 0.0 else lam * 10.0
        else:
            return x, f, False, None
        if stalled >= 3:  # no progress (e.g. pressing on a bound): let MIGRAD decide
            return x, f, False, None
    return x, f, False, None


def held_at_bounds(x: np.ndarray, g: np.ndarray, lower: np.ndarray,
                   upper: np.ndarray) -> np.ndarray:
    """Parameters on a bound whose descent direction leaves the box (held for the step)."""
    return ((x <= lower) & (g > 0)) | ((x >= upper) & (g < 0))


def _hold(a: np.ndarray, held: np.ndarray) -> np.ndarray:
    """``a`` with the rows and columns of held parameters replaced by the identity's (their
    step is then 0, the others' the Newton step with them fixed)."""
    if not held.any():
        return a
    a = a * np.outer(~held, ~held)
    a[held, held] = 1.0
    return a


def to_wall(mu: np.ndarray, jac: np.ndarray, step: np.ndarray) -> float:
    """The step's length factor: 1, or ``WALL_FRACTION`` of the way to where the first
    expectation, linearised (``mu + jac^T step``), reaches 0 (fraction to the boundary)."""
    d = step @ jac
    down = d < 0.0
    if not down.any():
        return 1.0
    r = float(np.min(mu[down] / -d[down]))
    return 1.0 if r >= 1.0 else WALL_FRACTION * r


def _promise(g: np.ndarray, step: np.ndarray, a: np.ndarray) -> float:
    """The NLL decrease a quadratic model with Hessian ``a`` predicts for ``step``."""
    return -float(g @ step) - 0.5 * float(step @ a @ step)


def minimize(cost: Any, start: np.ndarray, lower: np.ndarray, upper: np.ndarray,
             names: list[str], edm_goal: float = 1e-7,
             stop: Callable[[np.ndarray, float], bool] | None = None,
             beat: float | None = None, refine_below: float | None = None) -> Minimum:
    """Fisher scoring first (few calls), MIGRAD when it does not converge (from where it
    stopped on binned costs with empty bins, see :func:`_goes_on`).

    ``refine_below`` (optional): the caller will call :func:`.refine.refine` on this
    minimum, with the same ``lower``/``upper``, when its NLL is below this; where the
    compiled loop answers, that is made in the same compiled call and kept on the
    minimum (``Minimum.refined``), which ``refine`` then returns.

    ``stop(x, f)`` (optional) is asked at every point Fisher scoring accepts; when it says True the minimisation ends there and the :class:`Minimum` has
    ``joined=True`` (used by the free fit to abandon a start whose path has run into a
    minimum it already has).  ``beat`` (optional), the NLL of the best minimum the caller
    has, lets a MIGRAD run that stalls above it stop early (:mod:`.migrad`)."""
    start = np.minimum(np.maximum(np.asarray(start, float), lower), upper)  # np.clip
    if stop is None or isinstance(stop, NearMinimum):
        fast = _compiled(cost, start, lower, upper, edm_goal, stop, refine_below)
        if fast is not None:
            return fast if isinstance(fast, Minimum) else migrad(
                cost, fast if _goes_on(cost) else start, lower, upper, names, beat)
    with np.errstate(all="ignore"):
        try:
            x, f, ok, inv = fisher_scoring(cost, start, lower, upper, edm_goal=edm_goal,
                                           stop=stop)
        except Joined as j:
            xj, fj = j.args[0]
            return Minimum(xj, float(fj), False, False, np.full(xj.size, np.nan),
                           "fisher-scoring", joined=True)
        except (ArithmeticError, np.linalg.LinAlgError, ValueError):
            ok, inv = False, _FAILED
    if ok:
        errs = np.sqrt(np.maximum(np.diag(inv), 0.0))  # np.clip(.., 0, None)
        return Minimum(x, f, True, False, errs, "fisher-scoring")
    return migrad(cost, x if inv is not _FAILED and _goes_on(cost) else start, lower, upper,
                  names, beat)


def _goes_on(cost: Any) -> bool:
    """Whether MIGRAD starts where Fisher scoring stopped rather than at the start: on binned
    costs with empty bins, where Fisher scoring stops at the wall mu >= 0 or at the flat
    directions of a narrow dip (from the start MIGRAD redid the way there, 400-1,700 calls
    on background-only fits).  Elsewhere from the start, as before: on an unbinned Crystal
    Ball fit of a Gaussian peak the tails' flat directions took MIGRAD from Fisher
    scoring's end to a minimum 0.005 higher, at a bound."""
    return bool(getattr(cost, "has_empty_bins", False))


def _compiled(cost: Any, start: np.ndarray, lower: np.ndarray, upper: np.ndarray,
              edm_goal: float, stop: NearMinimum | None,
              refine_below: float | None = None) -> Minimum | bool | None:
    """:func:`fisher_scoring` in one compiled call (:mod:`.driver`) where the cost allows:
    its Minimum, the point where MIGRAD must take over, None when the Python loop must
    run.  With ``refine_below``, :func:`.refine.refine`'s work in the same call
    (:func:`.driver_newton.compiled_minimum`)."""
    problem = getattr(cost, "compiled_problem", None)
    # (a cost has a compiled problem only when it was made with the compiled path on)
    if problem is None or problem() is None:
        return None
    drv = compiled_module(DRIVER_MODULE)
    out = compiled_module(NEWTON_MODULE).compiled_minimum(
        cost, start, lower, upper, 60, edm_goal, stop, refine_below) if (
        refine_below is not None and 0 < cost.free.size <= _SMALL) else False
    if out is False:  # one by one (the refinement, if any, by the caller)
        out = drv.compiled_fisher_scoring(cost, start, lower, upper, 60, edm_goal, stop)
        out = None if out is None else (*out, False, None)
    if out is None:
        return None
    status, x, f, info, g, inv, refined = out
    if status == drv.JOINED:
        return Minimum(x, f, False, False, np.full(x.size, np.nan), "fisher-scoring",
                       joined=True)
    if status != drv.CONVERGED:
        return x  # where MIGRAD goes on (see minimize)
    if inv is False:
        inv, posdef = covariance(info)
        if not posdef:
            return x
    elif inv is None:  # (not positive definite)
        return x
    return Minimum(x, f, True, False, np.sqrt(np.maximum(inv.diagonal(), 0.0)),
                   "fisher-scoring", grad=g,
                   refined=None if refined is None else (lower, upper, refined))


def covariance(hess: np.ndarray) -> tuple[np.ndarray, bool]:
    """``(H^-1, positive definite)`` with the test on ``D^-1/2 H D^-1/2`` (unit diagonal):
    its eigenvalues are scale free, so a fit of 10^8 events is judged like one of 10^3."""
    n = hess.shape[0]
    if 0 < n <= _SMALL and use_compiled():
        # compiled for a fit's few parameters (~60 us of numpy calls less per minimum);
        # the same tests, the eigenvalue one by a Cholesky factor
        out = np.empty((n, n))
        covariance_small = compiled_module(KERNELS_MODULE).covariance_small
        if covariance_small(np.ascontiguousarray(hess, float), POSDEF_TOL, out):
            return out, True
        return np.full((n, n), np.nan), False
    bad = (np.full((n, n), np.nan), False)
    if not np.all(np.isfinite(hess)):
        return bad
    d = np.diagonal(hess)
    if np.any(d <= 0):
        return bad
    # no RuntimeWarning may leak from here: an overflow in the scaling or the inverse is a
    # bad covariance, returned as such (the fit is then flagged invalid)
    with np.errstate(all="ignore"):
        s = 1.0 / np.sqrt(d)
        scaled = hess * np.outer(s, s)
        if not np.all(np.isfinite(scaled)):
            return bad
        try:
            ev = np.linalg.eigvalsh(scaled)
            if ev.min() <= POSDEF_TOL:
                return bad
            cov = np.linalg.inv(scaled) * np.outer(s, s)
        except np.linalg.LinAlgError:
            return bad
    if not np.all(np.isfinite(cov)):
        return bad
    return cov, True


def damped_step(hess: np.ndarray, grad: np.ndarray, lam: np.ndarray) -> np.ndarray:
    """Levenberg-Marquardt step ``-(H + lam (diag H + floor))^-1 g`` for stacked systems
    ``hess (B, P, P)``, ``grad (B, P)``, ``lam (B,)``.

    The floor (1e-6 of the mean diagonal) keeps directions the Fisher-type Hessian sees as
    flat (e.g. a squared coefficient at 0) from taking huge steps; a singular system gives a
    zero step (the caller then raises the damping).
    """
    p = hess.shape[-1]
    d = np.diagonal(hess, axis1=-2, axis2=-1)
    floor = 1e-6 * np.abs(d).mean(axis=-1, keepdims=True) + 1e-300
    h = hess.copy()
    i = np.arange(p)
    h[:, i, i] += lam[:, None] * (d + floor) + 1e-14 * floor
    step = -solve_stacked(h, grad)
    return np.where(np.isfinite(step), step, 0.0)


def solve_stacked(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``a^-1 b`` for stacked ``a (B, P, P)``, ``b (B, P)``; a singular system gets the
    least-squares (minimum-norm) solution instead of stopping the whole stack."""
    with np.errstate(all="ignore"):
        try:
            return np.linalg.solve(a, b[..., None])[..., 0]
        except np.linalg.LinAlgError:
            out = np.empty_like(b, dtype=float)
            for k in range(a.shape[0]):
                try:
                    out[k] = np.linalg.solve(a[k], b[k])
                except np.linalg.LinAlgError:
                    out[k] = np.linalg.lstsq(a[k], b[k], rcond=None)[0]
            return out


@dataclass
class StackedMinimum:
    """What :func:`minimize_stacked` found for ``B`` problems.

    ``x (B, P)`` the parameters, ``nll (B,)``, ``state`` the extra arrays the problem's
    ``value`` returned at ``x`` (each ``(B, ...)``), ``hessian (B, S, S)`` the last Hessian
    computed for each problem (zeros where none was), ``converged (B,)`` (the NLL stopped
    falling at low damping, or no step at any damping lowered it: at the minimum to
    rounding), ``stalled (B,)`` the latter kind, ``iterations`` the iterations run."""

    x: np.ndarray
    nll: np.ndarray
    state: tuple
    hessian: np.ndarray
    converged: np.ndarray
    stalled: np.ndarray
    iterations: int


def minimize_stacked(value: Callable, grad_hess: Callable, x0: np.ndarray,
                     lower: np.ndarray, upper: np.ndarray, *, start: tuple | None = None,
                     active: np.ndarray | None = None, steps: int = 60,
                     nll_tol: float = 1e-8, step_tol: float | None = None,
                     slack: float = 1e-9, step_columns: slice = slice(None),
                     tries: int = 12) -> StackedMinimum:
    """Minimise ``B`` independent bounded problems at once (Levenberg-Marquardt).

    Parameters
    ----------
    value : callable
        ``value(x, rows) -> (nll (R,), state)`` at trial parameters ``x (R, P)`` of problems
        ``rows``; ``state`` is a tuple of arrays ``(R, ...)`` kept for the accepted points
        (e.g. background fractions, so that ``grad_hess`` need not recompute them).  An
        inadmissible point has an infinite NLL.
    grad_hess : callable
        ``grad_hess(x, state, rows) -> (grad (R, S), hess (R, S, S))`` at accepted points.
    x0 : array (B, P)
        Starting points; ``lower``, ``upper`` bounds ``(P,)`` (infinite where free).
    start : (nll, state), optional
        ``value(x0, all rows)`` when the caller has it already.
    active : bool array (B,), optional
        Problems to minimise (default all); the others keep ``x0``.
    steps : int
        Iteration cap (an iteration: one gradient and Hessian, up to ``tries`` damped steps).
    nll_tol, step_tol : float
        A problem converges on an accepted step at damping <= 1e-2 that lowers the NLL by
        less than ``nll_tol`` or (with ``step_tol``) whose every component is below
        ``step_tol`` times the Hessian's diagonal error ``|1/H_jj|^1/2``.
    slack : float
        A trial is accepted when its NLL is at most ``slack`` above the current one.
    step_columns : slice
        The components of the ``S``-vector step that move ``x`` (default all, ``S = P``);
        others belong to parameters the problem profiles inside ``value``.

    The damping starts at 1e-3, falls tenfold on every accepted step (to 1e-9) and rises
    tenfold on every rejected one.  A parameter sitting on a bound with its gradient
    pointing outward is held there for the step (the others take the Newton step of the
    problem with it fixed), so a pinned parameter does not drag the free ones along a step
    that clipping then cuts short.
    """
    x = np.array(x0, dtype=float)
    nb = x.shape[0]
    rows_all = np.arange(nb)
    nll, state = value(x, rows_all) if start is None else start
    nll = np.array(nll, dtype=float)
    state = tuple(np.array(a) for a in state)
    active = np.ones(nb, bool) if active is None else np.array(active, bool)
    lam = np.full(nb, 1e-3)
    converged = np.zeros(nb, bool)
    stalled = np.zeros(nb, bool)
    hess_last: np.ndarray | None = None
    it = 0
    for it in range(1, steps + 1):
        idx = np.flatnonzero(active)
        if idx.size == 0:
            it -= 1
            break
        xi = x[idx]
        grad, hess = grad_hess(xi, tuple(a[idx] for a in state), idx)
        if hess_last is None:
            hess_last = np.zeros((nb,) + hess.shape[1:])
        hess_last[idx] = hess
        if step_tol is not None:
            with np.errstate(all="ignore"):
                err = np.sqrt(np.abs(1.0 / np.diagonal(hess, axis1=1, axis2=2)))
        grad, hess = _pin_at_bounds(xi, grad, hess, lower, upper, step_columns)
        todo = np.ones(idx.size, bool)
        for _try in range(tries):
            r = np.flatnonzero(todo)
            rows = idx[r]
            step = damped_step(hess[r], grad[r], lam[rows])
            trial = np.clip(xi[r] + step[:, step_columns], lower, upper)
            tn, tstate = value(trial, rows)
            ok = tn <= nll[rows] + slack
            acc = rows[ok]
            done = nll[rows] - tn < nll_tol
            if step_tol is not None:
                done = done | np.all(np.abs(step) < step_tol * err[r], axis=1)
            conv = ok & done & (lam[rows] <= 1e-2)
            x[acc], nll[acc] = trial[ok], tn[ok]
            for a, t in zip(state, tstate):
                a[acc] = t[ok]
            converged[rows[conv]] = True
            active[rows[conv]] = False
            lam[rows] = np.where(ok, np.maximum(lam[rows] * 0.1, 1e-9), lam[rows] * 10.0)
            todo[r[ok]] = False
            if not todo.any():
                break
        stuck = idx[todo]
        converged[stuck] = True  # no descent at any damping: at the minimum to rounding
        stalled[stuck] = True
        active[stuck] = False
    if hess_last is None:
        hess_last = np.zeros((nb, 0, 0))
    return StackedMinimum(x, nll, state, hess_last, converged, stalled, it)


def _pin_at_bounds(x: np.ndarray, grad: np.ndarray, hess: np.ndarray, lower: np.ndarray,
                   upper: np.ndarray, step_columns: slice) -> tuple[np.ndarray, np.ndarray]:
    """Gradient and Hessian with the rows of parameters on a bound whose descent direction
    leaves it replaced by a unit row and a zero gradient (their step is then 0)."""
    gx = grad[:, step_columns]
    pinned = ((x <= lower) & (gx > 0)) | ((x >= upper) & (gx < 0))
    if not pinned.any():
        return grad, hess
    pin = np.zeros(grad.shape, bool)
    pin[:, np.arange(grad.shape[1])[step_columns]] = pinned
    keep = ~pin
    hess = hess * keep[:, :, None] * keep[:, None, :]
    i = np.arange(grad.shape[1])
    hess[:, i, i] += pin
    return np.where(pin, 0.0, grad), hess


def first_error(hess: np.ndarray) -> np.ndarray:
    """Standard error of the first parameter of stacked problems, ``sqrt((H^-1)_00)`` from
    Hessians ``(B, P, P)`` regularised by 1e-12 of their absolute trace (a flat direction
    elsewhere must not make the whole inverse fail); NaN where it is not positive."""
    nb = hess.shape[0]
    if hess.shape[1] == 0:
        return np.full(nb, np.nan)
    with np.errstate(all="ignore"):
        try:
            reg = 1e-12 * np.trace(np.abs(hess), axis1=1, axis2=2)[:, None, None]
            cov = np.linalg.inv(hess + reg * np.eye(hess.shape[1]))
        except np.linalg.LinAlgError:
            return np.full(nb, np.nan)
        return np.sqrt(np.where(cov[:, 0, 0] > 0, cov[:, 0, 0], np.nan))
