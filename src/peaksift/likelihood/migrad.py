"""iminuit's MIGRAD as the fallback of :func:`.minimize.minimize`, watched so that a start
which cannot win stops early.

* :func:`new_minuit` -- an ``iminuit.Minuit`` on a cost (errordef 0.5, analytic gradient,
  bounds), for the fallback, for MINOS-type intervals and for users who want it.
* :func:`migrad` -- MIGRAD (strategy 0) from a start, returning a :class:`.minimum.Minimum`.

Why it is watched
-----------------
Where Fisher scoring does not converge, the minimum usually sits on an edge of the model: a
tail parameter at its bound, or a negative yield pressed against the wall ``mu >= 0`` (the
cost is infinite beyond it).  MIGRAD then often crawls: on the stress matrix's slow cells a
quarter of its runs went on for 1,000-21,000 calls, most of them beyond the wall, gaining
~1e-5 in NLL per thousand calls (7-19 s of a 10-26 s fit), to end well above the best
minimum found by another start.  :class:`_Watch` sits between MIGRAD and the cost:

* it keeps the lowest point MIGRAD evaluated: a run that ends invalid reports that point
  when it is lower than MIGRAD's own last one (on such runs MIGRAD's final NLL was up to
  4e-4 above a point it had seen);
* given ``beat`` (the NLL of the best minimum the caller has), a run whose lowest NLL has
  not fallen by ``STALL_GAIN`` in ``STALL_CALLS`` calls while it is still more than
  ``STALL_MARGIN`` above ``beat`` is stopped: it cannot become the lowest minimum; so is a
  run whose lowest NLL has not moved at all (by ``STUCK_GAIN``) in ``STUCK_CALLS`` calls
  while more than ``STUCK_MARGIN`` above ``beat`` (a run stuck 0.048 above the best
  minimum took 21,000 calls, 23 s, to end where it was after 91); a run more than
  ``FAR_MARGIN`` above ``beat`` gets ``FAR_CALLS`` calls without a gain of ``STALL_GAIN``
  instead of ``STALL_CALLS`` (on 42 fits of 14 slow stress-matrix cells, 39 runs stalled
  1.3-39 NLL units above the best minimum took 48 % of all MIGRAD calls, stopped only after
  1,000 calls without a gain; the longest stall of a run that went on to win was 197
  calls, then a fall of 404 units, on a half-empty window).
A run at or below ``beat`` is never stopped.  Not done: restarting a run that crawls near
or below ``beat`` (< 1e-4 in 300 calls) from its lowest point cut a Crystal Ball fit's
21,700-call crawl to its call limit and lowered 4 of 50 slow fits' minima, but on a
half-empty window (an unbinned exppoly3 whose NLL falls for thousands of calls) it left one
fit 4.9 units higher: a crawl there can end in a fall.
Nor is a run stopped when its path comes near the best minimum (Fisher scoring's
``joined``): in flat valleys such runs went on to a point up to 4e-5 lower, and stopping
them saved nothing (they had reached the minimum's neighbourhood at the end).
"""

from __future__ import annotations

import math
import warnings
from typing import Any

import numpy as np

from .minimum import Minimum

__all__ = ["FAR_CALLS", "FAR_MARGIN", "STALL_CALLS", "STALL_GAIN", "STALL_MARGIN", "STUCK_CALLS",
           "STUCK_GAIN", "STUCK_MARGIN", "migrad", "new_minuit"]

#: calls without a gain of STALL_GAIN in the run's lowest NLL after which a run still
#: STALL_MARGIN above the best minimum is stopped
STALL_CALLS = 1000
STALL_GAIN = 0.01
STALL_MARGIN = 0.05
#: the same, sooner, for a run still FAR_MARGIN above the best minimum
FAR_CALLS = 500
FAR_MARGIN = 1.0
#: the same for a run that does not move at all
STUCK_CALLS = 2000
STUCK_GAIN = 1e-6
STUCK_MARGIN = 1e-3
#: MIGRAD's own call limit
CALL_LIMIT = 20000


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


class _Stop(Exception):
    """Raised from inside MIGRAD's call of the cost: the run ends (see :class:`_Watch`)."""


class _Watch:
    """The cost as MIGRAD sees it: the same values and gradient, the lowest point seen,
    and the stops of the module guide."""

    def __init__(self, cost: Any, beat: float | None) -> None:
        self.cost = cost
        self.errordef = cost.errordef
        self.beat = math.inf if beat is None or not math.isfinite(beat) else float(beat)
        self.best_f = math.inf
        self.best_x: np.ndarray | None = None
        self.mark = math.inf  # the lowest NLL when it last fell by STALL_GAIN
        self.since = 0  # calls since then
        self.moved = math.inf  # the same for STUCK_GAIN
        self.still = 0

    def __call__(self, *x: float) -> float:
        f = self.cost(*x)
        if f < self.best_f and f < 1e299:  # (1e300 is the cost's infinity: never the best)
            self.best_f, self.best_x = f, np.array(x, float)
        if self.best_f < self.mark - STALL_GAIN:
            self.mark, self.since = self.best_f, 0
        else:
            self.since += 1
        if self.best_f < self.moved - STUCK_GAIN:
            self.moved, self.still = self.best_f, 0
        else:
            self.still += 1
        if ((self.since >= STALL_CALLS and self.best_f > self.beat + STALL_MARGIN)
                or (self.since >= FAR_CALLS and self.best_f > self.beat + FAR_MARGIN)
                or (self.still >= STUCK_CALLS and self.best_f > self.beat + STUCK_MARGIN)):
            raise _Stop
        return f

    def grad(self, *x: float) -> np.ndarray:
        return self.cost.grad(*x)


def migrad(cost: Any, start: np.ndarray, lower: np.ndarray, upper: np.ndarray,
           names: list[str], beat: float | None = None, tol: float = 0.1,
           steps: np.ndarray | None = None) -> Minimum:
    """MIGRAD from ``start`` on the watched cost (module guide): ``beat`` the NLL of the best
    minimum the caller has (None: never stopped); ``tol`` iminuit's tolerance (EDM goal
    0.002 tol errordef); ``steps`` initial step sizes (see :func:`new_minuit`)."""
    watch = _Watch(cost, beat)
    m = new_minuit(watch, start, lower, upper, names, steps)
    m.tol = tol
    nan = np.full(len(names), np.nan)
    with warnings.catch_warnings(), np.errstate(all="ignore"):
        warnings.simplefilter("ignore")
        try:
            m.migrad(ncall=CALL_LIMIT)
        except _Stop:
            x = watch.best_x if watch.best_x is not None else np.asarray(start, float)
            return Minimum(x, watch.best_f, False, False, nan, "iminuit-migrad")
    fm = m.fmin
    x, f = np.asarray(m.values, float), float(m.fval)
    if not fm.is_valid and watch.best_x is not None and watch.best_f < f:
        x, f = watch.best_x, watch.best_f  # the lowest point the run saw
    return Minimum(x, f, bool(fm.is_valid), bool(fm.has_reached_call_limit),
                   np.asarray(m.errors, float), "iminuit-migrad", m)
