"""Result objects as values: ``==`` over their compared fields, nothing changeable in place.

Base layer (no peaksift imports).

Value and error
---------------
Every fitted number with an error is a :class:`Measurement`: a float (it adds, compares and
formats as its value) that also carries ``.error`` and unpacks as ``value, error``; its
``str`` is ``152.24 ± 0.52``.  results.json writes it as ``{"value": ..., "error": ...}``
under the same name.  Arrays of fitted numbers come as two arrays, ``name`` and
``name_error`` (``ScanResult.signal_yield`` / ``signal_yield_error``).

Frozen results
--------------
A frozen dataclass that inherits :class:`FrozenValue`

* compares equal when every field declared with ``compare=True`` (the dataclass default) is
  equal, arrays by content with NaN equal to NaN, mappings and sequences item by item;
* has its numpy arrays made read-only and its dicts wrapped in read-only mappings on
  creation, so a result cannot be changed through it (``res.values["mass"] = 0`` raises);
* shows in a notebook as a small table (``_repr_html_``, :func:`summary_html`) of the rows
  its ``_summary()`` gives (by default its short ``repr``);
* may be made with some fields deferred (:meth:`FrozenValue._deferred`): computed at the
  first access of any of them (``==``, pickling, ``repr`` and ``dataclasses.replace``
  read them too), frozen like the others, so the value is the same whenever it is read.
"""

from __future__ import annotations

import copyreg
import dataclasses
import math
from collections.abc import Callable, Mapping
from types import MappingProxyType
from typing import Any

import numpy as np

__all__ = ["FrozenValue", "Measurement", "summary_html", "values_equal"]

# A result's read-only mappings pickle as what they wrap (pickle refuses mappingproxy), so
# results cross process boundaries: a search's stages in forked processes, engines' workers.
def _read_only(d: dict[str, Any]) -> Mapping[str, Any]:
    return MappingProxyType(d)


copyreg.pickle(MappingProxyType, lambda m: (_read_only, (dict(m),)))


class Measurement(float):
    """A value with its error: a float that also has ``.value``, ``.error``, unpacks as
    ``value, error`` and indexes as such (``m[1]`` is the error).

    >>> m = Measurement(152.24, 0.52)
    >>> m + 1, m.error, str(m)
    (153.24, 0.52, '152.24 ± 0.52')
    """

    __slots__ = ("error",)

    def __new__(cls, value: float, error: float = math.nan) -> Measurement:  # noqa: PYI034
        obj = super().__new__(cls, float(value))
        obj.error = float(error) if error is not None else math.nan
        return obj

    @property
    def value(self) -> float:
        return float(self)

    def __iter__(self) -> Any:
        return iter((float(self), self.error))

    def __getitem__(self, i: int) -> float:
        return (float(self), self.error)[i]

    def __getnewargs__(self) -> tuple[float, float]:
        return float(self), self.error

    def __repr__(self) -> str:
        return f"Measurement({float(self)!r}, {self.error!r})"

    def __str__(self) -> str:
        if not (math.isfinite(self.error) and self.error > 0) or not math.isfinite(self):
            return f"{float(self):.6g}"
        dec = max(0, 1 - math.floor(math.log10(self.error)))  # two digits of the error
        return f"{float(self):.{dec}f} \u00b1 {self.error:.{dec}f}"

    def to_dict(self) -> dict[str, float | None]:
        """``{"value": ..., "error": ...}`` as in results.json (non-finite -> None)."""
        def f(x: float) -> float | None:
            return x if math.isfinite(x) else None
        return {"value": f(float(self)), "error": f(self.error)}


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
        return MappingProxyType({k: x if type(x) in _PLAIN else _frozen(x)
                                 for k, x in v.items()})
    return v


#: values :func:`_frozen` leaves as they are (checked by type first: a fit's result holds
#: dicts of many floats)
_PLAIN = frozenset({float, int, str, bool, tuple, type(None), Measurement})


def _field_names(cls: type) -> tuple[str, ...]:
    """The dataclass fields of ``cls`` by name, looked up once per class (``fields()``
    builds its tuple anew on every call)."""
    names = cls.__dict__.get("_frozen_fields")
    if names is None:
        names = tuple(f.name for f in dataclasses.fields(cls))  # type: ignore[arg-type]
        type.__setattr__(cls, "_frozen_fields", names)
    return names


def summary_html(name: str, rows: Any, note: str = "") -> str:
    """A result as notebook HTML: its name, a two-column table of ``(label, text)`` rows and
    an optional closing sentence (every result's ``_repr_html_``)."""
    import html

    body = "".join(f"<tr><td>{html.escape(str(k))}</td><td>{html.escape(str(v))}</td></tr>"
                   for k, v in rows)
    tail = f"<p>{html.escape(note)}</p>" if note else ""
    return f"<div><b>{html.escape(name)}</b><table>{body}</table>{tail}</div>"


class FrozenValue:
    """Mixin for frozen dataclasses: value equality, read-only contents, notebook HTML."""

    def _summary(self) -> list[tuple[str, str]]:
        """``(label, text)`` rows for the notebook table; by default the short ``repr``."""
        text = repr(self)
        inner = text[text.find("(") + 1:-1] if text.endswith(")") else text
        return [("summary", inner)]

    def _repr_html_(self) -> str:
        return summary_html(type(self).__name__, self._summary())

    def __post_init__(self) -> None:
        # through the instance's dict (what object.__setattr__ writes), ~2x faster for the
        # ~40 fields of a fit's result
        d = self.__dict__
        for name in _field_names(type(self)):
            v = d[name]
            if type(v) not in _PLAIN:
                d[name] = _frozen(v)

    @classmethod
    def _deferred(cls, now: dict[str, Any], later: Callable[[], dict[str, Any]]) -> Any:
        """An instance with the fields ``now`` and the other fields from ``later()``, called
        once, at the first access of any of them; both frozen as ``__post_init__`` freezes
        (the caller gives the values in the form ``__init__`` would leave them).  For parts
        of a result that cost more than they are read (a fit's figure arrays in a toy
        study): ``later`` must compute from values that nothing changes afterwards."""
        obj = object.__new__(cls)
        d = obj.__dict__
        for name, v in now.items():
            d[name] = v if type(v) in _PLAIN else _frozen(v)
        d["_later"] = later
        return obj

    def __getattr__(self, name: str) -> Any:
        # called only for a name not found: a deferred field not computed yet (else none)
        d = self.__dict__
        if "_later" in d and not name.startswith("__"):
            self._complete()
            if name in d:
                return d[name]
        raise AttributeError(f"{type(self).__name__!r} object has no attribute {name!r}")

    def _complete(self) -> None:
        """Compute the deferred fields, if any are left (two threads may both compute them:
        the same values; the fields are in place before the marker goes)."""
        d = self.__dict__
        later = d.get("_later")
        if later is None:
            return
        for name, v in later().items():
            d[name] = v if type(v) in _PLAIN else _frozen(v)
        d.pop("_later", None)

    def __getstate__(self) -> dict[str, Any]:
        self._complete()  # a pickle holds values, never the function deferring them
        return self.__dict__

    def __eq__(self, other: object) -> bool:
        if type(other) is not type(self):
            return NotImplemented
        return all(values_equal(getattr(self, f.name), getattr(other, f.name))
                   for f in dataclasses.fields(self) if f.compare)  # type: ignore[arg-type]

    __hash__ = None  # type: ignore[assignment]
