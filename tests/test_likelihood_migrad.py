"""The watched MIGRAD fallback (:mod:`peaksift.likelihood.migrad`).

* Unwatched in effect (no ``beat``), it finds the minimum of a bounded smooth function that
  ``scipy.optimize.minimize`` (L-BFGS-B, written in the test) finds, 1e-6 in the value and
  1e-3 in the parameters (MIGRAD's strategy 0 stops at EDM ~1e-4).
* The stops, against the rule stated in the module guide (constants from the module): a run
  whose lowest NLL does not move stops after ``STUCK_CALLS`` calls when it is more than
  ``STUCK_MARGIN`` above ``beat``, never when it is below; a run still falling by more than
  ``STALL_GAIN`` per ``STALL_CALLS`` calls is not stopped; a stalled run stops after
  ``STALL_CALLS`` calls within ``FAR_MARGIN`` of ``beat``, after ``FAR_CALLS`` beyond it,
  and a run far above that stalls for fewer calls and then falls goes on; the lowest point
  seen is what a stopped run reports.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import optimize

from peaksift.likelihood import migrad as mg


class _Smooth:
    """f = sum (x - c)^2 + 0.3 sum cos(3 x): several minima, one inside the box from the
    start used below."""

    errordef = 0.5

    def __init__(self) -> None:
        self.c = np.array([0.4, -0.2, 0.9])

    def __call__(self, *x):
        x = np.asarray(x, float)
        return float(np.sum((x - self.c) ** 2) + 0.3 * np.sum(np.cos(3.0 * x)))

    def grad(self, *x):
        x = np.asarray(x, float)
        return 2.0 * (x - self.c) - 0.9 * np.sin(3.0 * x)


def test_minimum_as_scipy_finds_it():
    cost = _Smooth()
    lo, hi = np.full(3, -2.0), np.full(3, 2.0)
    start = np.array([0.1, 0.1, 0.1])
    mo = mg.migrad(cost, start, lo, hi, ["a", "b", "c"])
    ref = optimize.minimize(lambda v: cost(*v), start, jac=lambda v: cost.grad(*v),
                            bounds=list(zip(lo, hi)), method="L-BFGS-B",
                            options={"ftol": 1e-15, "gtol": 1e-12})
    assert mo.converged and not mo.joined
    assert abs(mo.fval - ref.fun) < 1e-6
    assert np.max(np.abs(mo.x - ref.x)) < 1e-3


class _Sequence:
    """A cost whose values follow ``values(k)`` for the k-th call, whatever the point."""

    errordef = 0.5

    def __init__(self, values) -> None:
        self.values, self.k = values, 0

    def __call__(self, *x):
        self.k += 1
        return self.values(self.k)

    def grad(self, *x):
        return np.zeros(len(x))


def _run(watch: mg._Watch, calls: int) -> int:
    """Call the watch ``calls`` times; the call on which it stopped (0: never)."""
    for k in range(1, calls + 1):
        try:
            watch(0.0)
        except mg._Stop:
            return k
    return 0


def test_stuck_run_above_the_best_stops_below_it_does_not():
    flat = _Sequence(lambda k: 10.0)
    above = mg._Watch(flat, 10.0 - 2 * mg.STUCK_MARGIN)
    assert _run(above, 3 * mg.STUCK_CALLS) == mg.STUCK_CALLS + 1
    assert above.best_f == 10.0
    below = mg._Watch(_Sequence(lambda k: 10.0), 10.5)
    assert _run(below, 3 * mg.STUCK_CALLS) == 0
    unknown = mg._Watch(_Sequence(lambda k: 10.0), None)
    assert _run(unknown, 3 * mg.STUCK_CALLS) == 0


def test_a_run_that_keeps_falling_is_not_stopped():
    # falls by twice STALL_GAIN every STALL_CALLS / 2 calls: never stalled, never stuck
    step = 2.0 * mg.STALL_GAIN / (mg.STALL_CALLS / 2)
    falling = mg._Watch(_Sequence(lambda k: 100.0 - step * k), 0.0)
    assert _run(falling, 4 * mg.STALL_CALLS) == 0


def test_stalled_run_stops_after_stall_calls_and_keeps_its_lowest_point():
    # a small gain (below STALL_GAIN, above STUCK_GAIN) on every call, above the best by
    # more than STALL_MARGIN (after FAR_CALLS) but less than FAR_MARGIN
    gain = 0.5 * mg.STALL_GAIN / mg.STALL_CALLS
    assert 2 * gain > mg.STUCK_GAIN
    seq = _Sequence(lambda k: 50.0 - gain * k if k % 2 else math.inf)
    beat = 50.0 - 0.5 * mg.FAR_MARGIN
    assert 50.0 - gain * 3 * mg.STALL_CALLS > beat + mg.STALL_MARGIN
    watch = mg._Watch(seq, beat)
    stopped = _run(watch, 3 * mg.STALL_CALLS)
    assert stopped == mg.STALL_CALLS + 1
    last_odd = stopped if stopped % 2 else stopped - 1
    assert watch.best_f == pytest.approx(50.0 - gain * last_odd, abs=1e-12)


def test_far_above_the_best_a_stall_ends_sooner():
    assert mg.FAR_CALLS < mg.STALL_CALLS
    gain = 0.5 * mg.STALL_GAIN / mg.STALL_CALLS  # stalled: below STALL_GAIN per stall
    far = mg._Watch(_Sequence(lambda k: 50.0 - gain * k), 50.0 - 2.0 * mg.FAR_MARGIN)
    assert _run(far, 3 * mg.STALL_CALLS) == mg.FAR_CALLS + 1
    # a plateau just shorter than FAR_CALLS, then a fall of 100 units below the best: the
    # run goes on to its minimum (such runs won on half-empty windows, see the module guide)
    wins = mg._Watch(_Sequence(lambda k: 50.0 if k < mg.FAR_CALLS else 50.0 - 0.5 * k),
                     40.0)
    assert _run(wins, 3 * mg.STALL_CALLS) == 0
    assert wins.best_f == pytest.approx(50.0 - 0.5 * 3 * mg.STALL_CALLS)

