"""A scan's prepared model (spectrum, plan, background-only fit) kept by its inputs, under one key of plain values.

Why: a search scans one window several times (its background choice, the scan, the
limits), and the benchmark of issue 11 scans one histogram again and again.  The plan and
the background-only fit were already kept (:mod:`.scan_plan`, ``scan_inputs._fit_key``),
but finding them again cost two pickled keys, two digests and the model's construction:
~0.25 ms of a 100-bin scan once the caches of the processor are cold (the machine's other
work and a large scan run in between), a fifth of its time.  Here the inputs themselves
are the key (:func:`prepared_key`): a :class:`~peaksift.histogram.MassHistogram`'s edges
and bins as bytes, shape names, the hypotheses, a :class:`~peaksift.resolution.Resolution`
and plain numbers.  Anything else (masses to histogram, a shape object, a function, a
signal model, a weighted histogram, whose warning names the caller) is not kept: the
model is prepared as before.

What is given again: the objects as they were built, with every array that was writable
a fresh copy (:func:`handed_out`; arrays that were one stay one), the read-only ones
shared, and a fresh ``extras`` dict -- what the two caches gave before, the same numbers
(tests/test_scan_prepared.py).  The warnings of the first preparation are raised again.
"""

from __future__ import annotations

import threading
import warnings
from collections import OrderedDict
from typing import Any

import numpy as np

from ..histogram import MassHistogram
from ..likelihood.poisson import use_compiled
from ..resolution import Resolution

__all__ = ["handed_out", "handed_out_model", "keep_prepared", "kept_entry", "kept_prepared",
           "model_parts", "prepared_key"]

#: prepared models by key, the newest last; only those whose signal fractions have at most
#: _CELLS_KEPT cells (as the plans: a 10,000-bin scan's are 8 MB each, and its preparation
#: is ~3% of it)
_KEPT: OrderedDict[tuple, tuple] = OrderedDict()
_KEPT_COUNT = 8
_CELLS_KEPT = 200_000
_LOCK = threading.Lock()

#: the plain values a key holds as they are (with their type: 1 and 1.0 and True differ)
_PLAIN = frozenset({type(None), bool, int, float, str})


def _tagged(values: Any) -> tuple | None:
    """``(type, value)`` pairs of plain values, or None when one is not plain."""
    out = []
    for v in values:
        if type(v) not in _PLAIN:
            return None
        out.append((type(v).__name__, v))
    return tuple(out)


def _pair(pair: Any) -> tuple | None | bool:
    """A window or blinded range as a key part: None for None, False when not plain."""
    if pair is None:
        return None
    if type(pair) not in (tuple, list) or len(pair) != 2:
        return False
    return _tagged(pair) or False


def _mapping(m: Any) -> tuple | None | bool:
    """Shape parameters or starts as a key part: None when empty, False when not plain."""
    if not m:
        return None
    if type(m) is not dict or not all(type(k) is str for k in m):
        return False
    tags = _tagged(m.values())
    return False if tags is None else tuple(sorted(zip(m, tags)))


def prepared_key(data: Any, signal: Any, background: Any, masses: Any, resolution: Any,
                 relative: Any, absolute: Any, window: Any, natural_width: Any, blind: Any,
                 signal_params: Any, bins: Any, background_start: Any, signal_model: Any,
                 what: str) -> tuple | None:
    """Everything ``scan_inputs._prepare_model`` reads, as a tuple of plain values and
    bytes, or None (not kept).  The usual call (every option None) costs a few type tests:
    this runs in every scan, mostly with cold caches."""
    if (type(data) is not MassHistogram or signal_model is not None
            or type(signal) is not str or type(background) is not str
            or not (resolution is None or (type(resolution) is Resolution
                                           and resolution.func is None))):
        return None
    if type(masses) is np.ndarray:
        count = masses.size
        hyp: Any = None
    elif type(masses) is int:
        count = hyp = masses
    else:
        return None
    if count * (data.edges.size - 1) > _CELLS_KEPT:
        return None   # would not be kept: no key (a 10,000-bin one hashed ~0.2 ms of bytes)
    if hyp is None:
        hyp = (masses.dtype.str, masses.shape, masses.tobytes())
    values = data.values()
    counts = values.tobytes()
    if values.dtype != np.float64 or counts != data.variances().tobytes():
        return None   # weighted (or not numbers): prepared anew, its warning as before
    small: Any = (relative, absolute, natural_width, bins, what)
    parts: Any = None
    if not (window is None and blind is None and not signal_params and not background_start):
        parts = (_pair(window), _pair(blind), _mapping(signal_params),
                 _mapping(background_start))
        if any(p is False for p in parts):
            return None
    if not (relative is None and absolute is None and natural_width is None
            and bins is None):
        small = _tagged(small)
        if small is None:
            return None
    elif type(what) is not str:
        return None
    if resolution is not None:
        # its fields as plain values (the value with its type): the frozen dataclass's own
        # __hash__ and __eq__ are Python calls, ~10 us of the lookup with cold caches
        value = resolution.value
        resolution = (resolution.kind, type(value).__name__, value, resolution.points)
    return (signal, background, hyp, resolution, small, parts, data.edges.tobytes(), counts,
            data.unit, use_compiled())


def kept_prepared(key: tuple | None, slots: list | None = None) -> tuple | None:
    """The prepared ``(model, spectrum, info)`` kept under ``key`` (:func:`handed_out`),
    its warnings raised again; or None.  ``slots``, a list, receives the entry's slot (see
    :func:`keep_prepared`)."""
    hit = kept_entry(key)
    if hit is None:
        return None
    kept, seen, slot = hit
    for message, category, filename, lineno in seen:
        warnings.warn_explicit(message, category, filename, lineno)
    if slots is not None:
        slots.append(slot)
    return handed_out(kept)


def kept_entry(key: tuple | None) -> tuple | None:
    """The entry kept under ``key``, now the newest: ``(kept, seen, slot)`` (the kept
    parts, the warnings of the first preparation, the slot), or None.  For a caller that
    hands out less than the whole preparation (``scan``'s kept call)."""
    if key is None:
        return None
    with _LOCK:
        try:
            hit = _KEPT.get(key)
        except TypeError:  # something in the key does not hash: not kept
            return None
        if hit is not None:
            _KEPT.move_to_end(key)
    return hit


def keep_prepared(key: tuple, prepared: tuple, seen: list, slots: list | None = None
                  ) -> tuple:
    """Keep ``prepared`` (read-only copies of its writable arrays) under ``key``, raise the
    warnings ``seen`` while preparing it again, and return it as it is.  ``slots``, a
    list, receives the new entry's slot: an empty list kept with it, where the scan keeps
    what its compiled call needs beyond the model (``scan.scan_prepared``: made once per
    entry, as the entry it depends on nothing but the key)."""
    model = prepared[0]
    if model.fractions.size <= _CELLS_KEPT:
        slot: list = []
        entry = (_kept(prepared), [(w.message, w.category, w.filename, w.lineno)
                                   for w in seen], slot)
        if slots is not None:
            slots.append(slot)
        with _LOCK:
            try:
                _KEPT[key] = entry
            except TypeError:
                pass
            while len(_KEPT) > _KEPT_COUNT:
                # its slot's parts let go (set to None, its length kept: a scan reading
                # it meanwhile finds None and goes the old way), so that a scan that
                # scan_kept remembers holds no preparation the store dropped
                slot = _KEPT.popitem(last=False)[1][2]
                slot[:] = [None] * len(slot)
    for w in seen:
        warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    return prepared


def _kept(prepared: tuple) -> tuple:
    """``(model, spectrum, info)`` as kept: their fields as dicts with read-only copies of
    the writable arrays, and those arrays with where each goes (``(part, name)``: part 0
    the model, 1 the spectrum, 2 the info); mappings copied."""
    groups: dict[int, tuple[np.ndarray, list[tuple[int, str]]]] = {}
    parts: list[dict[str, Any]] = []
    for i, fields in enumerate((vars(prepared[0]), vars(prepared[1]), prepared[2])):
        kept = {}
        for name, a in fields.items():
            if isinstance(a, np.ndarray) and a.flags.writeable:
                if id(a) not in groups:
                    c = a.copy()
                    c.flags.writeable = False
                    groups[id(a)] = (c, [])
                groups[id(a)][1].append((i, name))
                a = groups[id(a)][0]
            elif isinstance(a, dict):
                a = dict(a)
            kept[name] = a
        parts.append(kept)
    mappings = tuple((i, name) for i, d in enumerate(parts) for name, a in d.items()
                     if isinstance(a, dict))
    return (type(prepared[0]), type(prepared[1]), *parts, tuple(groups.values()), mappings)


def handed_out(kept: tuple) -> tuple:
    """A kept ``(model, spectrum, info)`` as it was built: fresh copies of the arrays
    that were writable (arrays that were one stay one), fresh mappings (the model's
    ``extras``), the rest shared.  The dataclasses are rebuilt from their fields without
    running ``__init__`` again (their values were checked when they were built)."""
    model_type, spec_type, model_fields, spec_fields, info, groups, mappings = kept
    out = (model_fields.copy(), spec_fields.copy(), info.copy())
    for a, places in groups:
        c = a.copy()
        for part, name in places:
            out[part][name] = c
    for part, name in mappings:
        out[part][name] = dict(out[part][name])
    model = object.__new__(model_type)
    model.__dict__.update(out[0])
    spec = object.__new__(spec_type)
    spec.__dict__.update(out[1])
    return model, spec, out[2]


def model_parts(kept: tuple) -> tuple:
    """What :func:`handed_out_model` needs of a kept preparation: the model's type, its
    fields, its arrays that were writable (with their field names) and its mappings."""
    model_type, _, fields, _, _, groups, mappings = kept
    arrays = tuple((a, tuple(name for part, name in places if part == 0))
                   for a, places in groups if any(part == 0 for part, _ in places))
    return model_type, fields, arrays, tuple(name for part, name in mappings if part == 0)


def handed_out_model(parts: tuple) -> Any:
    """The model of a kept preparation (:func:`model_parts`) as :func:`handed_out` gives
    it, without the spectrum and the plan: fresh copies of its arrays that were writable,
    a fresh ``extras``, the rest shared."""
    model_type, fields, arrays, mappings = parts
    out = fields.copy()
    for a, names in arrays:
        c = a.copy()
        for name in names:
            out[name] = c
    for name in mappings:
        out[name] = dict(out[name])
    model = object.__new__(model_type)
    model.__dict__.update(out)
    return model
