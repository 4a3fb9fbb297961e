"""What a free fit fixes before it minimises.

:func:`setup_of` checks the arguments of :func:`peaksift.fit` and makes the
:class:`Setup`: the data in the window, the model, the bounds, the starting values, which
parameters float, the binned arrays every start's cost shares, and the bins the starting
values are found on.  It depends only on the arguments, so :mod:`.setup_kept` keeps it
for the common call.  Models of shapes given by name are kept (:func:`_model`): the
shapes' own per-edges work is then kept with them.  :meth:`Setup.for_fit` gives a fit a kept
setup (whose arrays are read-only); :meth:`Setup.cost_at` makes the starts' costs.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .._kept import Kept
from ..errors import FitError, closest
from ..likelihood import BinnedCost, Constraint, Model, TiedCost, UnbinnedCost
from .checks import as_limits, as_retries, as_values, check_fixed, check_support, tie_rows
from .data import FitData, prepare, start_bins
from .outcome import FLOOR_FRACTION

__all__ = ["Setup", "entries", "read_only", "setup_of", "yield_bounds", "yield_starts"]


@dataclass
class Setup:
    """The fit's data, model, bounds, starts and free parameters (see the module guide);
    its arrays ``lower``, ``upper``, ``base`` and ``is_fixed`` are read-only."""

    d: FitData
    model: Model
    names: list[str]
    lower: np.ndarray
    upper: np.ndarray
    base: np.ndarray
    is_fixed: np.ndarray
    floors: dict[int, float]
    cons: dict[str, Constraint]
    cons_idx: list
    live: list  # (target, source, Tie) of the ties recomputed inside the cost
    given: dict[str, float]
    free_idx: np.ndarray
    inner_free: np.ndarray
    n_entries: float
    binned_arrays: tuple | None  # (edges, counts, scale), read-only, of a binned fit
    start_arrays: tuple | None  # (edges, sums, scale) of the start finding, read-only
    #: the first start's cost, once made (the others are made from it; shared by the
    #: copies of :meth:`for_fit`)
    first_cost: list = field(default_factory=list)
    #: the first cost was made for this fit and not minimised yet (it is used as it is;
    #: any later cost, in this fit or another, is a copy of it: :meth:`BinnedCost.at_values`
    #: resets everything a minimisation changes)
    first_unused: bool = False

    def for_fit(self, first_unused: bool = False) -> Setup:
        """This kept setup for one fit: its own object (``first_unused`` is the fit's) on
        the same arrays, which a kept setup holds read-only (a fit only reads the starting
        values, bounds and which parameters float: copies of them cost a cold fit ~7 us),
        and its own dict of floors."""
        out = object.__new__(Setup)  # copy.copy's result, without its ~8 us of dispatch
        out.__dict__.update(self.__dict__)
        out.floors = dict(self.floors)
        out.first_unused = first_unused
        return out

    def cost_at(self, v: np.ndarray) -> Any:
        """The cost over the free parameters with the others at ``v`` (full vector); the
        binned costs of a fit's starts share the first one's per-bin work."""
        if self.d.binned:
            made = self.first_cost
            if made and self.first_unused:
                self.first_unused = False
                cost = made[0]
                cost.full = np.array(v, float)
            elif made:
                cost = made[0].at_values(v)
            else:
                edges, counts, scale = self.binned_arrays
                cost = BinnedCost(self.model, v, self.inner_free, self.cons_idx, edges, counts,
                                  scale)
                made.append(cost)
        else:
            cost = UnbinnedCost(self.model, v, self.inner_free, self.cons_idx, self.d.x,
                                self.d.w)
        if not self.live:
            return cost
        row = {int(i): k for k, i in enumerate(self.inner_free)}
        return TiedCost(cost, [(row[i_t], row[i_s], t) for i_t, i_s, t in self.live])


def setup_of(data: Any, signal: Any, background: Any, window: Any, weights: Any,
             binned: bool | None, bins: Any, start: Any, fixed: Any, limits: Any,
             constraints: Any, tied: Any, retries: Any) -> Setup:
    """The :class:`Setup` of a fit's arguments, checked (FitError naming what is wrong)."""
    d = prepare(data, weights, window, binned, bins)
    model = _model(signal, background, d.window)
    names = list(model.parameter_names)
    fixed = as_values("fixed", fixed)
    start = as_values("start", start)
    limits = as_limits(limits)
    as_retries(retries)
    cons = {k: Constraint.coerce(c, k) for k, c in dict(constraints or {}).items()}
    for label, dct in (("fixed", fixed), ("start", start), ("limits", limits),
                       ("constraints", cons)):
        for k in dct:
            if k not in names:
                hint = closest(k, names)
                raise FitError(f"{label}: unknown parameter {k!r}"
                               f"{f' (did you mean {hint!r}?)' if hint else ''}; "
                               f"parameters are {', '.join(names)}")
    if d.total <= 0:
        raise FitError(f"the fit window {d.window} holds no events (sum of weights "
                       f"{d.total:g}); widen the window or check the selection")
    lower, upper = _bounds(model, d.total, limits)
    for k, c in cons.items():
        if c.kind == "lognormal" and lower[names.index(k)] < 0:
            raise FitError(f"constraints: a log-normal constraint on {k!r} needs a parameter "
                           f"that cannot be negative, but {k} may range down to "
                           f"{lower[names.index(k)]:g}; use a Gaussian constraint, or set "
                           f"limits={{{k!r}: (0, ...)}}")
    check_fixed(model, fixed)
    base, is_fixed = _base_values(model, d, start, fixed, lower, upper)
    # a tied parameter is held in the bookkeeping and recomputed inside the cost ("live")
    # while its source floats; with the source held it is simply held at func(source)
    ties = tie_rows(tied, names, fixed, cons)
    live = [(i_t, i_s, tie) for i_t, i_s, tie in ties if not is_fixed[i_s]]
    for i_t, i_s, tie in ties:
        is_fixed[i_t] = True
        base[i_t] = tie.func(float(base[i_s]))
    floors = _width_floors(model, d, lower, upper, limits)
    for i, floor in floors.items():  # a start below the floor begins at it
        if not is_fixed[i]:
            base[i] = max(base[i], floor)
    check_support(model, base, is_fixed)
    free_idx = np.flatnonzero(~is_fixed)
    n_entries = entries(d)
    cons_idx = [(names.index(k), c) for k, c in cons.items()]
    inner_free = (np.union1d(free_idx, [i_t for i_t, _, _ in live]).astype(int) if live
                  else free_idx)  # flatnonzero's: sorted already
    # read-only arrays shared by every start's cost: their per-bin work is kept
    binned_arrays = ((read_only(d.edges), read_only(d.n),
                      read_only(d.hist.scaled_poisson_factors())) if d.binned else None)
    starts = (tuple(read_only(a) for a in start_bins(d)) if free_idx.size else None)
    # a fit only reads its starting values, bounds and which parameters float: read-only
    # in every setup, kept or not (compiled code given them sees one array type)
    for a in (lower, upper, base, is_fixed):
        a.flags.writeable = False
    return Setup(d, model, names, lower, upper, base, is_fixed, floors, cons, cons_idx, live,
                 {**start, **fixed}, free_idx, inner_free, n_entries, binned_arrays, starts)


def entries(d: FitData) -> float:
    """The number of entries in the window (weighted bins: effective entries)."""
    # (binned: prepare's total is the same sum of the same array)
    return (d.total if d.binned and not d.weighted else
            float(np.sum(d.n**2 / np.where(d.n2 > 0, d.n2, 1))) if d.binned else
            float(d.x.size))


def read_only(a: np.ndarray) -> np.ndarray:
    """A read-only float copy of ``a``: costs built on it share their per-bin work (a
    shape's logarithms of the edges, the compiled kernels' clipped edges, the counts'
    saturated term)."""
    out = np.array(a, float)
    out.flags.writeable = False
    return out


#: models by (signal, background, window) of shapes given by name (their shapes' own
#: per-edges work is then kept too)
_MODELS = Kept(16)


def _model(signal: Any, background: Any, window: tuple[float, float]) -> Model:
    """``Model(signal, background, window)``, kept for shapes given by name."""
    if type(signal) is not str or type(background) is not str:
        return Model(signal, background, window)
    key = (signal, background, float(window[0]), float(window[1]))
    model = _MODELS.get(key)
    if model is None:
        model = _MODELS.put(key, Model(signal, background, window))
    return model


# ------------------------------------------------------------------ pieces
def _bounds(model: Model, total: float, limits: dict[str, tuple[float, float]]):
    names = model.parameter_names
    lower = np.array([p.lower for p in model.parameters], float)
    upper = np.array([p.upper for p in model.parameters], float)
    yield_bounds(model, total, lower, upper)
    for k, (a, b) in limits.items():
        i = names.index(k)
        lower[i], upper[i] = float(a), float(b)
    for i, k in enumerate(names):
        if not lower[i] < upper[i]:
            raise FitError(f"inconsistent bounds for {k!r}: lower {lower[i]:g} is not below "
                           f"upper {upper[i]:g}; fix limits={{{k!r}: (lo, hi)}}")
    return lower, upper


def yield_bounds(model: Model, total: float, lower: np.ndarray, upper: np.ndarray) -> None:
    """The yields' bounds for ``total`` events in the window, into ``lower``/``upper``."""
    tot = max(total, 1.0)
    blocks = model.blocks
    for _, _, iy in blocks[:-1]:  # the signals'
        lower[iy], upper[iy] = -0.5 * tot - 10.0, 5.0 * tot + 10.0
    iy = blocks[-1][2]  # the background's
    lower[iy], upper[iy] = 0.0, 5.0 * tot + 10.0


def _width_floors(model: Model, d: FitData, lower: np.ndarray, upper: np.ndarray,
                  limits: Mapping[str, tuple[float, float]]) -> dict[int, float]:
    """Raise the lower bound of every signal's ``sigma`` in a binned fit to
    ``FLOOR_FRACTION`` of the narrowest bin (unless the caller set its limits); returns
    ``{index: floor}`` of the bounds raised."""
    if not d.binned:
        return {}
    floor = FLOOR_FRACTION * float(np.diff(d.edges).min())  # (np.min's wrapper: ~10 us)
    out = {}
    for shape, sl, _ in model.blocks[:-1]:
        if "sigma" not in shape.parameter_names:
            continue
        i = sl.start + shape.parameter_names.index("sigma")
        name = model.parameter_names[i]
        if name in limits or not lower[i] < floor < upper[i]:
            continue
        lower[i] = floor
        out[i] = floor
    return out


def _base_values(model: Model, d: FitData, start: dict, fixed: dict, lower: np.ndarray,
                 upper: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    names = list(model.parameter_names)
    for k, v in {**start, **fixed}.items():
        i = names.index(k)
        if not math.isfinite(float(v)):
            raise FitError(f"value for {k!r} is not finite ({v!r})")
        if k in start and not lower[i] <= float(v) <= upper[i]:
            raise FitError(f"start value {k}={v:g} is outside its bounds "
                           f"[{lower[i]:g}, {upper[i]:g}]; change the start or limits={{...}}")
    is_fixed = np.zeros(len(names), bool)
    for k in fixed:
        is_fixed[names.index(k)] = True
    for _, sl, iy in model.blocks[:-1]:
        if names[iy] in fixed and float(fixed[names[iy]]) == 0.0:
            is_fixed[sl] = True
    yields = [iy for _, _, iy in model.blocks]
    base = np.array([p.start for p in model.parameters], float)
    for i in range(len(names)):
        if not math.isfinite(base[i]) and i not in yields:
            base[i] = 0.5 * (lower[i] + upper[i])
    for k, v in start.items():
        base[names.index(k)] = float(v)
    base = np.clip(base, lower, upper)
    for k, v in fixed.items():  # fixed values are used as given, even outside the bounds
        base[names.index(k)] = float(v)
    yield_starts(model, d.total, base)
    return base, is_fixed


def yield_starts(model: Model, total: float, base: np.ndarray, anew: bool = False) -> None:
    """Yields not given start at 0 (signals) and at ``total`` (the background), in
    ``base`` (a yield not given is NaN there; ``anew``: no yield is given, every one is
    set)."""
    blocks = model.blocks
    for _, _, iy in blocks[:-1]:
        if anew or not math.isfinite(base[iy]):
            base[iy] = 0.0
    iy = blocks[-1][2]
    if anew or not math.isfinite(base[iy]):
        base[iy] = total
