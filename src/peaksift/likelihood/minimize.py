"""The one minimiser: bounded damped Fisher scoring, iminuit's MIGRAD as its fallback.

Which function when
-------------------
* :func:`minimize` -- one problem: damped Fisher scoring on ``cost.value_grad_info``; when it
  does not converge, iminuit's MIGRAD (strategy 0, analytic gradient).  Returns a
  :class:`Minimum`.
* :func:`covariance` -- ``H^-1`` from an observed Hessian, with the positive-definiteness test
  done on the Hessian scaled to unit diagonal (the unscaled eigenvalue ratio of a fit with
  10^7 events is ~1e-14 although the problem is well conditioned).
* :func:`refine` -- observed Hessian at a minimum, one Newton step, covariance.
* :func:`damped_step` -- the Levenberg-Marquardt step for stacked problems (many toys or
  many mass hypotheses at once; used by :mod:`peaksift.stats`).
* :func:`new_minuit` -- an ``iminuit.Minuit`` object on a cost, for MINOS-type intervals or
  for users who want it.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from .poisson import use_compiled

__all__ = ["Minimum", "covariance", "damped_step", "fisher_scoring", "minimize", "new_minuit",
           "refine", "solve_stacked"]

#: systems up to this size are solved by the compiled :func:`.kernels.solve_small`
_SMALL = 16

#: a scaled Hessian with a smaller eigenvalue is treated as singular
POSDEF_TOL = 1e-10


@dataclass
class Minimum:
    """What a minimisation found (free parameters only)."""

    x: np.ndarray
    fval: float
    converged: bool
    call_limit: bool
    errors: np.ndarray
    method: str
    minuit: Any = None  # the Minuit object when MIGRAD ran
    #: stopped early because ``stop`` said the path had joined a minimum found before
    joined: bool = False


def new_minuit(cost: Any, start: np.ndarray, lower: np.ndarray, upper: np.ndarray,
               names: list[str], steps: np.ndarray | None = None) -> Any:
    """An ``iminuit.Minuit`` on ``cost`` (errordef 0.5, analytic gradient, bounds)."""
    from iminuit import Minuit

    m = Minuit(cost, *np.asarray(start, float), grad=cost.grad, name=names)
    m.strategy = 0
    m.print_level = 0
    for i, n in enumerate(names):
        lo = None if not math.isfinite(lower[i]) else float(lower[i])
        hi = None if not math.isfinite(upper[i]) else float(upper[i])
        m.limits[n] = (lo, hi)
        if steps is not None and math.isfinite(steps[i]) and steps[i] > 0:
            m.errors[n] = float(steps[i])
        else:
            span = upper[i] - lower[i] if math.isfinite(upper[i] - lower[i]) else abs(start[i])
            m.errors[n] = max(abs(start[i]) * 0.05, 1e-3 * span, 1e-6)
    return m


def _solve(a: np.ndarray, g: np.ndarray) -> np.ndarray | None:
    """-a^-1 g, solved on the unit-diagonal scaling of ``a`` (None when singular)."""
    if a.shape[0] <= _SMALL and use_compiled():
        # compiled for the few parameters of a fit: numpy's solve costs ~20 us of call
        # overhead per Newton step, more than the step's arithmetic
        from .kernels import solve_small

        out = np.empty(g.size)
        ok = solve_small(np.ascontiguousarray(a, float), np.ascontiguousarray(g, float), out)
        return out if ok else None
    d = np.sqrt(np.abs(np.diagonal(a)))
    d = np.where(d > 0, d, 1.0)
    try:
        step = -np.linalg.solve(a / np.outer(d, d), g / d) / d
    except np.linalg.LinAlgError:
        return None
    return step if np.all(np.isfinite(step)) else None


class Joined(Exception):
    """Raised inside :func:`fisher_scoring` when its ``stop`` callback fires."""


def fisher_scoring(cost: Any, x0: np.ndarray, lower: np.ndarray, upper: np.ndarray,
                   max_iter: int = 60, edm_goal: float = 1e-7,
                   stop: Callable[[np.ndarray, float], bool] | None = None):
    """Damped Fisher scoring (Levenberg-Marquardt on the information matrix I returned by
    ``cost.value_grad_info``).  Returns ``(x, f, converged, I^-1 or None)``; converged when
    EDM = g^T I^-1 g / 2 < ``edm_goal`` (read off the undamped Newton step).

    ``stop(x, f)``, called at every accepted point, ends the minimisation by raising
    :class:`Joined` (the path has reached a minimum already known to the caller)."""
    x = np.clip(np.asarray(x0, float), lower, upper)
    lam = 0.0  # undamped first: from good starts Newton steps are accepted
    stalled = 0
    f, g, info = cost.value_grad_info(x)
    if not (math.isfinite(f) and np.isfinite(g.sum()) and np.isfinite(info.sum())):
        return x, f, False, None
    for _ in range(max_iter):
        if stop is not None and stop(x, f):
            raise Joined((x, f))
        for _ in range(14):
            a = info if lam == 0.0 else info + lam * np.diag(info.diagonal())
            step = _solve(a, g)
            if step is None:
                if lam == 0.0:
                    lam = 1e-3
                    continue
                return x, f, False, None
            if lam == 0.0:
                edm = -0.5 * float(g @ step)
                if edm < edm_goal:
                    cov, posdef = covariance(info)
                    return x, f, posdef, cov if posdef else None
            xn = np.clip(x + step, lower, upper)
            fn, gn, infon = cost.value_grad_info(xn)
            if (math.isfinite(fn) and fn <= f + 1e-12 * abs(f) and np.isfinite(gn.sum())
                    and np.isfinite(infon.sum())):
                stalled = stalled + 1 if f - fn < 1e-10 * max(1.0, abs(f)) else 0
                x, f, g, info = xn, fn, gn, infon
                lam = 0.0 if lam <= 1e-3 else lam / 10.0
                break
            lam = 1e-3 if lam == 0.0 else lam * 10.0
        else:
            return x, f, False, None
        if stalled >= 3:  # no progress (e.g. pressing on a bound): let MIGRAD decide
            return x, f, False, None
    return x, f, False, None


def minimize(cost: Any, start: np.ndarray, lower: np.ndarray, upper: np.ndarray,
             names: list[str], edm_goal: float = 1e-7,
             stop: Callable[[np.ndarray, float], bool] | None = None) -> Minimum:
    """Fisher scoring first (few calls), MIGRAD when that does not converge.

    ``stop(x, f)`` (optional) is asked at every point Fisher scoring accepts; when it says
    True the minimisation ends there and the :class:`Minimum` has ``joined=True`` (used by
    the free fit to abandon a start whose path has run into a minimum it already has)."""
    start = np.clip(np.asarray(start, float), lower, upper)
    with np.errstate(all="ignore"):
        try:
            x, f, ok, inv = fisher_scoring(cost, start, lower, upper, edm_goal=edm_goal,
                                           stop=stop)
        except Joined as j:
            xj, fj = j.args[0]
            return Minimum(xj, float(fj), False, False, np.full(xj.size, np.nan),
                           "fisher-scoring", joined=True)
        except (ArithmeticError, np.linalg.LinAlgError, ValueError):
            ok, inv = False, None
    if ok:
        errs = np.sqrt(np.clip(np.diag(inv), 0, None))
        return Minimum(x, f, True, False, errs, "fisher-scoring")
    m = new_minuit(cost, start, lower, upper, names)
    with warnings.catch_warnings(), np.errstate(all="ignore"):
        warnings.simplefilter("ignore")
        m.migrad(ncall=20000)
    fm = m.fmin
    return Minimum(np.asarray(m.values, float), float(m.fval), bool(fm.is_valid),
                   bool(fm.has_reached_call_limit), np.asarray(m.errors, float),
                   "iminuit-migrad", m)


def covariance(hess: np.ndarray) -> tuple[np.ndarray, bool]:
    """``(H^-1, positive definite)`` with the test on ``D^-1/2 H D^-1/2`` (unit diagonal):
    its eigenvalues are scale free, so a fit of 10^8 events is judged like one of 10^3."""
    n = hess.shape[0]
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


def refine(cost: Any, mo: Minimum, lower: np.ndarray, upper: np.ndarray):
    """Observed Hessian at the minimum found, one Newton step to refine a MIGRAD minimum,
    and the covariance ``H^-1`` (errordef 0.5).

    Returns ``(x, nll, covariance, positive_definite)``.
    """
    x0 = np.asarray(mo.x, float)
    f0 = mo.fval
    errs = np.asarray(mo.errors, float)
    h = np.where(np.isfinite(errs) & (errs > 0), 1e-3 * errs, 1e-6 * np.maximum(np.abs(x0), 1.0))
    try:
        with np.errstate(all="ignore"):
            hess = cost.observed_hessian(x0, h, lower, upper)
    except (ArithmeticError, np.linalg.LinAlgError, ValueError):
        return x0, f0, np.full((x0.size, x0.size), np.nan), False
    cov, posdef = covariance(hess)
    if posdef and mo.method == "iminuit-migrad":  # one Newton step refines MIGRAD's minimum
        with np.errstate(all="ignore"), warnings.catch_warnings():
            warnings.simplefilter("ignore")
            x1 = np.clip(x0 - cov @ cost.grad(*x0), lower, upper)
            f1 = cost(*x1)
        if np.isfinite(f1) and f1 < f0:
            x0, f0 = x1, f1
    return x0, f0, cov, posdef


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
