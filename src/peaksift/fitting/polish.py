"""The lowest minimum of an invalid fit: the minimisation continued where it stopped short.

Fisher scoring (and MIGRAD after it, at strategy 0) stops where the expected information
promises no more than its EDM goal.  At a valid minimum that is the minimum.  Where the fit
will be reported invalid -- the covariance not positive definite, a parameter at a bound,
not converged -- the point is often on the flat floor of a valley that goes on falling
towards a bound: on ``scripts/check_fit_minima.py``'s Crystal Ball cases a spike with a tail
parameter sliding to its bound (crystalball/32 stopped 0.109 above the lowest point inside
the bounds, /38 0.0014 above).  (A lower point in another basin, beyond such a valley, is
:mod:`.restarts`' work, before this continuation.)  The fit reports the lowest minimum (its
validity is a property of that minimum), so such a minimum is taken on by MIGRAD at
strategy 1 (its Hessian at the start, then updated: it follows a curved valley along the
bounds where the expected information's steps stall), kept only when its NLL is lower,
then refined as any minimum (:func:`peaksift.likelihood.refine`) and judged again.

A valid minimum is never touched: its numbers and its cost are the same as before.
"""

from __future__ import annotations

import math
import warnings
from typing import Any

import numpy as np

from ..likelihood import Minimum, new_minuit, refine
from .outcome import at_floor, problems_at

__all__ = ["POLISH_CALLS", "POLISH_GAIN", "POLISH_TOL", "continue_invalid", "errors_of",
           "is_invalid"]

#: a continued minimum replaces the fit's only when it is lower by more than this (below it
#: the two are one minimum for any purpose: the reported point should not wander along a
#: flat valley for nothing the NLL can tell)
POLISH_GAIN = 1e-6
#: MIGRAD's call limit for the continuation (the invalid fits of the reference set take
#: ~100-600 calls)
POLISH_CALLS = 5000
#: iminuit's tolerance (EDM goal 0.002 x tol x errordef 0.5 = 1e-6)
POLISH_TOL = 1e-3

#: numerical failures of the continuation: the fit's own minimum stands
_NUMERIC = (ArithmeticError, np.linalg.LinAlgError, ValueError, RuntimeError)


def continue_invalid(best: tuple | None, calls: int, lower: np.ndarray, upper: np.ndarray,
                     names: list[str], floors: dict[int, float] | None = None,
                     free_idx: np.ndarray | None = None) -> tuple[tuple | None, int]:
    """The free fit's best minimum ``best`` (its tuple ``(nll, Minimum, cost, problems, x,
    nll, covariance, positive definite)``) continued when it has problems or a width at or
    within one error of its floor (``floors``: model index -> floor; ``free_idx`` the free
    parameters' model indices), the verdicts that make the fit invalid (module guide);
    ``calls`` the fit's evaluations so far, returned with the continuation's added.

    Returns ``(best, calls)``: the same ``best`` when the minimum is valid, was not made
    (no Minimum), or the continuation finds nothing lower by ``POLISH_GAIN``."""
    if best is None:
        return best, calls
    _, mo, cost, problems, x, f, cov, _ = best
    if mo is None or not math.isfinite(f):
        return best, calls
    x = np.asarray(x, float)
    err = errors_of(x, cov)
    if not problems and not _near_floor(x, err, floors, free_idx):
        return best, calls
    n0 = cost.ncall
    lowest = _Lowest(cost)
    with warnings.catch_warnings(), np.errstate(all="ignore"):
        warnings.simplefilter("ignore")
        try:
            m = new_minuit(lowest, x, lower, upper, names,
                           np.where(np.isfinite(err) & (err > 0), err, np.nan))
            m.strategy = 1
            m.tol = POLISH_TOL
            m.migrad(ncall=POLISH_CALLS)
            fm = m.fmin
            x1, f1 = np.asarray(m.values, float), float(m.fval)
            if lowest.x is not None and lowest.f < f1:  # the lowest point the run saw
                x1, f1 = lowest.x, lowest.f
            if not (math.isfinite(f1) and f1 < f - POLISH_GAIN):
                return best, calls + cost.ncall - n0
            mo1 = Minimum(x1, f1, bool(fm.is_valid), bool(fm.has_reached_call_limit),
                          np.asarray(m.errors, float), "iminuit-migrad", m)
            x2, f2, cov2, posdef2 = refine(cost, mo1, lower, upper)
        except _NUMERIC:
            return best, calls + cost.ncall - n0
    calls += cost.ncall - n0
    if not (math.isfinite(f2) and f2 < f - POLISH_GAIN):
        return best, calls
    problems2 = problems_at(mo1, x2, posdef2, lower, upper, names)
    return (float(f2), mo1, cost, problems2, x2, float(f2), cov2, posdef2), calls


def is_invalid(best: tuple, floors: dict[int, float] | None = None,
               free_idx: np.ndarray | None = None) -> bool:
    """Whether the fit's result will call the best minimum ``best`` (the tuple of
    :func:`continue_invalid`) invalid: it has problems or a width at or within one error
    of its floor."""
    problems, x, cov = best[3], np.asarray(best[4], float), best[6]
    return bool(problems) or _near_floor(x, errors_of(x, cov), floors, free_idx)


def errors_of(x: np.ndarray, cov: np.ndarray | None) -> np.ndarray:
    """The errors of a minimum at ``x`` from its covariance ``cov`` (NaN without one, and
    for a negative or NaN variance)."""
    if cov is None:
        return np.full(x.size, np.nan)
    # (np.sqrt's numbers on a fit's few Python floats, without its errstate: ~5 us)
    return np.array([math.sqrt(v) if v >= 0.0 else math.nan
                     for v in cov.diagonal().tolist()])


def _near_floor(x: np.ndarray, err: np.ndarray, floors: dict[int, float] | None,
                free_idx: np.ndarray | None) -> bool:
    """A free width at or within one error of its floor (:func:`.outcome.at_floor`): the
    fit's result calls it invalid."""
    if not floors or free_idx is None:
        return False
    where = {int(i): k for k, i in enumerate(free_idx.tolist())}
    for i, floor in floors.items():
        k = where.get(int(i))
        if k is None:
            continue
        if at_floor(float(x[k]), float(err[k]), floor):
            return True
    return False


class _Lowest:
    """The cost as MIGRAD sees it, keeping the lowest point evaluated (an invalid MIGRAD run
    may end above a point it has seen)."""

    def __init__(self, cost: Any) -> None:
        self.cost = cost
        self.errordef = cost.errordef
        self.f = math.inf
        self.x: np.ndarray | None = None

    def __call__(self, *x: float) -> float:
        f = self.cost(*x)
        if f < self.f and f < 1e299:  # (1e300 is the cost's infinity)
            self.f, self.x = f, np.array(x, float)
        return f

    def grad(self, *x: float) -> np.ndarray:
        return self.cost.grad(*x)
