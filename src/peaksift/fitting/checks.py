"""Checks of the arguments of :func:`peaksift.fit`: a user's mistake is a FitError that names
it, never a raw ``TypeError``/``ValueError`` from deep inside the minimiser.

Each helper turns one argument into the form the fit uses, or raises
:class:`~peaksift.errors.FitError` saying what was wrong and how to fix it.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Mapping
from typing import Any

import numpy as np

from ..errors import FitError
from ..likelihood import Model

__all__ = ["as_limits", "as_retries", "as_values", "check_fixed", "check_support"]


def _number(label: str, name: str, value: Any) -> float:
    try:
        return float(value)
    except (TypeError, ValueError):
        raise FitError(f"{label}: the value for {name!r} must be a number, got "
                       f"{value!r}") from None


def as_values(label: str, values: Any) -> dict[str, float]:
    """``start=`` / ``fixed=``: a mapping name -> number (None: empty)."""
    if values is None:
        return {}
    if not isinstance(values, Mapping):
        raise FitError(f"{label} must be a mapping of parameter name to value, e.g. "
                       f"{label}={{'mass': 125.0}}; got {type(values).__name__}")
    return {str(k): _number(label, str(k), v) for k, v in values.items()}


def as_limits(limits: Any) -> dict[str, tuple[float, float]]:
    """``limits=``: a mapping name -> (lower, upper) (None: empty)."""
    if limits is None:
        return {}
    if not isinstance(limits, Mapping):
        raise FitError("limits must be a mapping of parameter name to (lower, upper), e.g. "
                       f"limits={{'sigma': (0.5, 5.0)}}; got {type(limits).__name__}")
    out = {}
    for k, v in limits.items():
        try:
            a, b = v
        except (TypeError, ValueError):
            raise FitError(f"limits: {k!r} needs a pair (lower, upper), got {v!r}") from None
        out[str(k)] = (_number("limits", str(k), a), _number("limits", str(k), b))
    return out


def as_retries(retries: Any) -> int:
    if type(retries) is int and retries >= 0:  # the common case, without the ABC's check
        return retries
    if (isinstance(retries, bool) or not isinstance(retries, numbers.Integral)
            or retries < 0):
        raise FitError(f"retries must be a non-negative integer, got {retries!r}")
    return int(retries)


def check_fixed(model: Model, fixed: Mapping[str, float]) -> None:
    """A fixed shape parameter must lie in its shape's own domain (e.g. a width > 0, a
    Crystal Ball power n > 1): outside it the density is not defined, whatever the fit's
    bounds (which fixed values may leave).  A fixed background yield must be >= 0 (a signal
    yield may be negative)."""
    byield = model.parameter_names[model.blocks[-1][2]]
    if fixed.get(byield, 0.0) < 0:
        raise FitError(f"fixed value {byield}={fixed[byield]:g} is negative; a background "
                       "yield is a number of events >= 0")
    for shape, sl, _ in model.blocks:
        for par, name in zip(shape.parameters, model.parameter_names[sl]):
            if name not in fixed:
                continue
            v = fixed[name]
            positive = par.name in ("sigma", "width", "resolution") or par.lower == 0.0
            if v < par.lower or v > par.upper or (positive and v <= 0.0):
                lo = "0 (exclusive)" if positive and par.lower <= 0 else f"{par.lower:g}"
                raise FitError(f"fixed value {name}={v:g} is outside the domain of the "
                               f"{shape.name} shape ({lo} to {par.upper:g}); fix it inside")


def check_support(model: Model, values: np.ndarray, is_fixed: np.ndarray | None = None) -> None:
    """Every component with a shape parameter fixed (all of them, without ``is_fixed``)
    must put probability into the window at ``values`` (a peak fixed far outside it has
    none: its bin fractions are 0/0).  A component whose shape parameters all float and
    start inside the model's window-aware bounds has probability in the window: not
    evaluated (its fractions cost ~0.05 ms of a ~2 ms fit)."""
    edges = np.array(model.window, float)
    names = model.parameter_names
    for shape, sl, _ in model.blocks:
        if is_fixed is not None and not any(is_fixed[sl]) and all(
                p.lower <= v <= p.upper for p, v in zip(model.parameters[sl], values[sl])):
            continue
        p = [float(v) for v in values[sl]]
        with np.errstate(all="ignore"):
            try:
                total = float(np.sum(shape.bin_fractions(edges, p, model.window)))
            except (ArithmeticError, ValueError):
                total = math.nan
        if not (math.isfinite(total) and total > 0.5):
            given = ", ".join(f"{n}={v:g}" for n, v in zip(names[sl], p))
            raise FitError(f"the {shape.name} shape with {given} has no probability in the "
                           f"window {model.window} (it lies too far outside); fix its "
                           "parameters inside the window or widen the window")


def tie_rows(tied: Mapping[str, Any] | None, names: list[str], fixed: Mapping[str, float],
             constraints: Mapping[str, Any]) -> list[tuple[int, int, Any]]:
    """``tied`` (name -> :class:`peaksift.likelihood.Tie`, or a :class:`peaksift.Resolution`
    for the peak's ``sigma``: tied to it at the fitted mass) checked, as ``(target index,
    source index, Tie)``."""
    from ..likelihood import Tie, resolution_tie
    from ..resolution import Resolution

    out = []
    tied = {key: resolution_tie(tie, key) if isinstance(tie, Resolution) else tie
            for key, tie in dict(tied or {}).items()}
    for key, tie in tied.items():
        if not isinstance(tie, Tie):
            raise FitError(f"tied: {key!r} must map to a peaksift.likelihood.Tie or (for the "
                           f"peak's sigma) a peaksift.Resolution, got {type(tie).__name__}")
        for what in (tie.target, tie.source):
            if what not in names:
                raise FitError(f"tied: unknown parameter {what!r}; parameters are "
                               f"{', '.join(names)}")
        if key != tie.target or tie.target == tie.source:
            raise FitError(f"tied: {key!r} -> Tie({tie.target!r}, {tie.source!r}) must tie "
                           "the named parameter to another")
        if tie.target in fixed or tie.target in constraints:
            raise FitError(f"tied: {tie.target!r} is also fixed or constrained; give it one "
                           "treatment")
        if tie.source in tied:
            raise FitError(f"tied: {tie.source!r} is tied itself; tie {tie.target!r} to a "
                           "free or fixed parameter")
        out.append((names.index(tie.target), names.index(tie.source), tie))
    return out


def tie_indices(cost: Any) -> list[tuple[int, int, Any]]:
    """``(target index, source index, Tie)`` in the model's parameter vector of a
    :class:`peaksift.likelihood.TiedCost` (none for another cost)."""
    ties = getattr(cost, "ties", None)
    if not ties:
        return []
    return [(int(cost.inner.free[t]), int(cost.free[s]), tie) for t, s, tie in ties]


#: Delta(-2 ln L) by which a later start must beat an earlier valid minimum before the
#: result says so (below it the two are the same minimum for any purpose; our choice)
LOWER_MINIMUM_NOTE = 0.1


def note_lower_minimum(fr: Any, superseded: float | None) -> Any:
    """``fr`` (a FitResult) with a note when a later start went below an earlier valid
    minimum of NLL ``superseded`` by more than ``LOWER_MINIMUM_NOTE`` in -2 ln L."""
    if superseded is None:
        return fr
    gap = 2.0 * (superseded - float(fr.nll))
    if not gap > LOWER_MINIMUM_NOTE:
        return fr
    import dataclasses

    return dataclasses.replace(fr, notes=(*fr.notes, (
        f"a later start found a lower minimum than an earlier valid one (-2 ln L lower by "
        f"{gap:.3g}); the lowest is kept")))
