"""Result objects as values: ``==`` over their compared fields, nothing changeable in place.

Base layer (no peaksift imports).  A frozen dataclass that inherits :class:`FrozenValue`

* compares equal when every field declared with ``compare=True`` (the dataclass default) is
  equal, arrays by content with NaN equal to NaN, mappings and sequences item by item;
* has its numpy arrays made read-only and its dicts wrapped in read-only mappings on
  creation, so a result cannot be changed through it (``res.values["mass"] = 0`` raises).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from types import MappingProxyType
from typing import Any

import numpy as np

__all__ = ["FrozenValue", "values_equal"]


def values_equal(a: Any, b: Any) -> bool:
    """Deep equality with arrays by content and NaN equal to NaN."""
    if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        try:
            return bool(np.array_equal(np.asarray(a), np.asarray(b), equal_nan=True))
        except TypeError:  # object arrays: no NaN test
            return bool(np.array_equal(np.asarray(a), np.asarray(b)))
    if isinstance(a, Mapping) and isinstance(b, Mapping):
        return a.keys() == b.keys() and all(values_equal(a[k], b[k]) for k in a)
    if isinstance(a, (list, tuple)) and isinstance(b, (list, tuple)):
        return len(a) == len(b) and all(values_equal(x, y) for x, y in zip(a, b))
    if isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b):
        return True
    try:
        return bool(a == b)
    except (TypeError, ValueError):
        return False


def _frozen(v: Any) -> Any:
    if isinstance(v, np.ndarray):
        v = v.view()
        v.flags.writeable = False
        return v
    if isinstance(v, dict):
        return MappingProxyType({k: _frozen(x) for k, x in v.items()})
    return v


class FrozenValue:
    """Mixin for frozen dataclasses: value equality and read-only contents."""

    def __post_init__(self) -> None:
        for f in dataclasses.fields(self):  # type: ignore[arg-type]
            object.__setattr__(self, f.name, _frozen(getattr(self, f.name)))

    def __eq__(self, other: object) -> bool:
        if type(other) is not type(self):
            return NotImplemented
        return all(values_equal(getattr(self, f.name), getattr(other, f.name))
                   for f in dataclasses.fields(self) if f.compare)  # type: ignore[arg-type]

    __hash__ = None  # type: ignore[assignment]
