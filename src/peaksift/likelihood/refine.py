"""A minimum made ready for its errors: :func:`refine` (the observed Hessian, its covariance,
a MIGRAD minimum polished, the final exact-Hessian Newton stage that makes the reported point
independent of the path to it, MIGRAD's convergence verdict checked against that
Hessian).  Used by the free fit for every start that improves on the best
minimum, and by the blinded background fit."""

from __future__ import annotations

import math
import warnings
from typing import Any

import numpy as np

from .._jit import compiled_module
from .migrad import migrad
from .minimize import _hold, _solve, covariance, fisher_scoring, held_at_bounds
from .minimum import Minimum, at_bounds
from .poisson import NEWTON_MODULE  # the compiled Newton stage, imported on first use

__all__ = [
    "EDM_MIGRAD",
    "NEWTON_RISE",
    "NEWTON_STEP",
    "NEWTON_STEPS",
    "POLISH_GAIN",
    "POLISH_STEPS",
    "POLISH_TOL",
    "REHESSE",
    "refine",
]



#: MIGRAD's EDM goal at strategy 0 and errordef 0.5 (0.002 x tolerance 0.1 x errordef)
EDM_MIGRAD = 1e-4


def refine(cost: Any, mo: Minimum, lower: np.ndarray, upper: np.ndarray):
    """Observed Hessian at the minimum found, a MIGRAD minimum polished (:func:`_polish`),
    the final Newton stage (:func:`_newton`: exact-Hessian steps until the next one is below
    ``NEWTON_STEP`` of every error, so that the point no longer depends on the path that
    reached it) and the covariance ``H^-1`` (errordef 0.5).  A MIGRAD minimum that MIGRAD
    left unconverged (not at its call limit) is marked converged (``mo.converged``) when
    the Hessian is positive definite and the EDM it gives, held at the bounds, is below
    ``EDM_MIGRAD``.

    Returns ``(x, nll, covariance, positive_definite)``.
    """
    done = mo.refined
    if done is not None and done[0] is lower and done[1] is upper:
        return done[2]  # made with the minimum (the same steps in one compiled call)
    x0 = np.asarray(mo.x, float)
    f0 = mo.fval
    g0 = mo.grad
    if mo.method == "iminuit-migrad" and math.isfinite(f0):
        x0, f0 = _polish(cost, x0, f0, lower, upper, np.asarray(mo.errors, float))
        g0 = None
    errs = np.asarray(mo.errors, float)
    h = np.where(np.isfinite(errs) & (errs > 0), 1e-3 * errs, 1e-6 * np.maximum(np.abs(x0), 1.0))
    try:
        with np.errstate(all="ignore"):
            hess = cost.observed_hessian(x0, h, lower, upper)
    except (ArithmeticError, np.linalg.LinAlgError, ValueError):
        return x0, f0, np.full((x0.size, x0.size), np.nan), False
    cov, posdef = covariance(hess)
    if posdef and math.isfinite(f0):
        with np.errstate(all="ignore"), warnings.catch_warnings():
            warnings.simplefilter("ignore")
            try:
                x1, f1, g, _ = _newton(cost, x0, f0, g0, hess, cov, lower, upper)
            except (ArithmeticError, np.linalg.LinAlgError, ValueError):
                x1, f1, g = x0, f0, None
            if np.max(np.abs(x1 - x0) / np.sqrt(np.diagonal(cov))) > REHESSE:
                # from a MIGRAD minimum the stage may go ~1e-2 of an error: the Hessian there
                # is then ~1e-3 off the minimum's on a weak peak (third derivatives)
                try:
                    hess1 = cost.observed_hessian(x1, h, lower, upper)
                    cov, posdef = covariance(hess1)
                    g = None
                except (ArithmeticError, np.linalg.LinAlgError, ValueError):
                    pass
            x0, f0 = x1, f1
            if mo.method == "iminuit-migrad" and not mo.converged and not mo.call_limit:
                if g is None:
                    g = cost.grad(*x0)
                g = np.where(held_at_bounds(x0, g, lower, upper), 0.0, g)
                edm = 0.5 * float(g @ cov @ g)
                # MIGRAD's verdict depends on its path to the last ~1e-4 (the same start
                # converged or not as a gradient's last digits changed); a point where the
                # observed Hessian is positive definite and promises less than MIGRAD's own
                # goal (strategy 0, errordef 0.5) is a minimum
                mo.converged = bool(math.isfinite(edm) and edm < EDM_MIGRAD)
    return x0, f0, cov, posdef


#: the final Newton stage ends when its next step is below this fraction of every error
#: (``docs/decisions/tight-minimum.md``), or after ``NEWTON_STEPS`` evaluations
NEWTON_STEP = 1e-5
NEWTON_STEPS = 6
#: a Newton step may raise the NLL by this much (absolute) and still be taken: near the
#: minimum its true change is at the rounding of an NLL whose saturated constant is large
#: (~1e-8 with 5e5 events), while the step itself, from the gradient (a sum of small
#: terms), is exact to ~1e-7 of an error
NEWTON_RISE = 1e-7
#: the Hessian (and the covariance) is made again at the stage's end when the stage moved a
#: value by more than this fraction of its error
REHESSE = 1e-3


def _newton(cost: Any, x: np.ndarray, f: float, g: np.ndarray | None, hess: np.ndarray,
            cov: np.ndarray, lower: np.ndarray, upper: np.ndarray):
    """The final stage of every minimisation the free fit reports: Newton steps with the
    observed Hessian ``hess`` (inverse ``cov``) from ``(x, f)`` (``g`` its gradient, or
    None), held at the bounds as :func:`.minimize.fisher_scoring`, until the next step is
    below ``NEWTON_STEP`` of every error ``sqrt(cov_ii)``.  Returns ``(x, f, gradient,
    converged)``.

    Fisher scoring stops at EDM < 1e-7: up to ~4.5e-4 of an error from the minimum, on a
    side that depends on its path (the start).  One exact Newton step from there lands
    ~1e-7 of an error from it (the Hessian's own error is ~1e-6 relative), and the gradient
    of that evaluation shows it: a fit costs one evaluation more.  From a MIGRAD minimum
    (~1e-2 of an error off, its Hessian made with MIGRAD's rougher errors) it may take a few.
    A step is taken while it raises the NLL by no more than ``NEWTON_RISE``; otherwise the
    stage ends where it is, not converged."""
    if g is None:
        f1, g, _ = cost.value_grad_info(x, info=False)
        if not (math.isfinite(f1) and np.isfinite(g).all()):
            return x, f, None, False
    problem = getattr(cost, "compiled_problem", None)
    if problem is not None and problem() is not None:  # the same loop in one compiled call
        out = compiled_module(NEWTON_MODULE).compiled_newton(
            cost, x, f, g, hess, cov, lower, upper, NEWTON_STEP, NEWTON_RISE, NEWTON_STEPS)
        if out is not None:
            return out
    errs = np.sqrt(np.diagonal(cov))
    for k in range(NEWTON_STEPS + 1):
        held = held_at_bounds(x, g, lower, upper)
        step = _solve(_hold(hess, held), np.where(held, 0.0, g)) if held.any() else -(cov @ g)
        if step is None:
            return x, f, g, False
        if np.all(np.abs(step) <= NEWTON_STEP * errs):
            return x, f, g, True
        if k == NEWTON_STEPS:
            break
        x1 = np.minimum(np.maximum(x + step, lower), upper)
        f1, g1, _ = cost.value_grad_info(x1, info=False)
        if not (math.isfinite(f1) and f1 <= f + NEWTON_RISE and np.isfinite(g1).all()):
            break
        x, f, g = x1, float(f1), g1
    return x, f, g, False


#: Fisher-scoring iterations that polish a MIGRAD minimum, and the least NLL gain kept
POLISH_STEPS = 20
POLISH_GAIN = 1e-7
#: iminuit's tolerance for the polishing MIGRAD run (EDM goal 1e-6 at errordef 0.5)
POLISH_TOL = 1e-3


def _polish(cost: Any, x0: np.ndarray, f0: float, lower: np.ndarray, upper: np.ndarray,
            errors: np.ndarray) -> tuple[np.ndarray, float]:
    """A MIGRAD minimum polished by a few Fisher-scoring steps, kept when they lower the NLL
    by more than ``POLISH_GAIN``.

    MIGRAD (strategy 0) stops at EDM ~1e-4; where the minimum lies in a flat valley (tails
    at their bounds, a width at its floor) the NLL it stops at depends on its path: exact
    derivatives of the turn-on instead of differenced ones left one fit 1.5e-5 higher.
    Fisher scoring from there (held at the bounds, EDM goal 1e-7) takes it down, else a
    second MIGRAD run from there with an EDM goal of 1e-6.  A polished point that puts a
    parameter on a bound or takes one off it is not kept: along a flat tail direction a
    Crystal Ball's alpha_high went from 4.4 to its bound 10 for 4e-5 in NLL, which would
    turn a valid fit invalid for a difference no result can tell.  A smaller
    gain is left alone: along a valley flat to 1e-7 the point would only wander (onto a
    bound, say) for nothing the NLL can tell."""
    with np.errstate(all="ignore"):
        try:
            x1, f1, _, _ = fisher_scoring(cost, x0, lower, upper, max_iter=POLISH_STEPS)
        except (ArithmeticError, np.linalg.LinAlgError, ValueError):
            x1, f1 = x0, f0
    on = at_bounds(x0, lower, upper)

    def better(x: np.ndarray, f: float) -> bool:
        return (math.isfinite(f) and f < f0 - POLISH_GAIN
                and bool(np.array_equal(at_bounds(x, lower, upper), on)))
    if better(x1, f1):
        return np.asarray(x1, float), float(f1)
    # Fisher scoring could not go on (the information singular along the flat directions):
    # MIGRAD again from the minimum with a 100 times tighter EDM goal
    names = [f"p{i}" for i in range(x0.size)]
    steps = np.where(np.isfinite(errors) & (errors > 0), errors, np.nan)
    mo = migrad(cost, x0, lower, upper, names, tol=POLISH_TOL, steps=steps)
    if better(mo.x, mo.fval):
        return np.asarray(mo.x, float), float(mo.fval)
    return x0, f0
