"""Applying cuts to events and collections: object and event masks, and the per-requirement cut flow."""

from __future__ import annotations

import ast
from collections.abc import Callable
from typing import Any

import numpy as np

from ..errors import CutError
from .expression import Cut, CutLike, compile_cut


# ----------------------------------------------------------- applying to data
def _is_text(cut: Any) -> bool:
    return isinstance(cut, (str, Cut))


def _collection_counts_and_getter(collection: Any, name: str) -> tuple[np.ndarray, Callable, list]:
    import awkward as ak

    if not isinstance(collection, ak.Array) or collection.ndim != 2 or not collection.fields:
        raise CutError(
            f"{name}: an object cut needs a jagged collection of records (one list of objects "
            "per event)"
        )
    counts = np.asarray(ak.num(collection, axis=1))
    fields = list(collection.fields)

    def get(n: str) -> Any:
        if n not in fields:
            raise KeyError(n)
        return ak.to_numpy(ak.flatten(collection[n], axis=1))

    return counts, get, fields


def _flat_from_mask(mask: Any, counts: np.ndarray, name: str) -> np.ndarray:
    """Validate a user mask (jagged awkward or flat numpy) against ``counts``; return flat bool."""
    import awkward as ak

    if isinstance(mask, ak.Array):
        if mask.ndim != 2:
            raise CutError(f"{name}: an object mask must be jagged (one list per event), "
                           f"got {mask.ndim} dimension(s)")
        if len(mask) != counts.size or not np.array_equal(np.asarray(ak.num(mask, axis=1)), counts):
            raise CutError(f"{name}: the object mask's shape does not match the collection "
                           "(different events or object counts); build it from the same array")
        flat = ak.flatten(ak.fill_none(mask, False), axis=1)
        arr = ak.to_numpy(flat)
    else:
        arr = np.asarray(mask)
        if arr.ndim != 1 or arr.size != int(counts.sum()):
            raise CutError(f"{name}: an object mask must be a jagged awkward array, or a flat "
                           f"array with one entry per object ({int(counts.sum())}), got shape "
                           f"{arr.shape}")
    if arr.dtype != np.bool_:
        raise CutError(f"{name}: the object mask holds {arr.dtype} values, not true/false")
    return arr


def flat_object_mask(
    cut: CutLike, collection: Any, counts: np.ndarray, get: Callable[[str], Any],
    fields: list[str], name: str, identification: Any = None,
) -> np.ndarray:
    """Flat boolean mask over all objects of ``collection``, one entry per object.

    The flat form of :func:`object_mask` for callers that already hold the collection's
    flat columns (the pairing works on them and never builds the jagged mask).

    Parameters
    ----------
    cut : str, Cut, callable or mask
        As for :func:`object_mask`.
    collection : awkward.Array
        The jagged collection (passed to a callable cut).
    counts : numpy.ndarray
        Objects per event.
    get : callable
        ``get(field)`` returns the flat column of ``field``; raises ``KeyError`` for others.
    fields : list of str
        The fields a text cut may use.
    name : str
        The collection's name, for messages.
    identification : peaksift.energy_loss.DedxResponse, optional
        The dE/dx response behind ``dedx_deviation(...)`` in a text cut.

    Returns
    -------
    numpy.ndarray of bool, length ``counts.sum()``.
    """
    if _is_text(cut):
        c = compile_cut(cut)
        where = f"collection {name!r}"
        identify = None
        if identification is not None and c.hypotheses:
            def identify(h: str) -> Any:
                return identification.deviation_of(h, get, where)
        return c.evaluate(get, int(counts.sum()), where=where, available=fields,
                          identify=identify)
    if callable(cut):
        out = cut(collection)
        return _flat_from_mask(out, counts, f"cut on {name!r} (from {_callable_name(cut)})")
    return _flat_from_mask(cut, counts, f"cut on {name!r}")


def _callable_name(f: Any) -> str:
    return getattr(f, "__qualname__", None) or type(f).__name__


def object_mask(collection: Any, cut: CutLike, *, name: str = "objects",
                identification: Any = None) -> Any:
    """Jagged boolean mask over the objects of ``collection`` for any kind of cut.

    Parameters
    ----------
    collection : awkward.Array
        A jagged array of records (e.g. ``events.muon``).
    cut : str, Cut, callable or mask
        Text or :class:`Cut` (names are the collection's fields), a callable taking the
        collection and returning a jagged boolean mask, or such a mask.
    name : str
        The collection's name, for messages.
    identification : peaksift.energy_loss.DedxResponse, optional
        The dE/dx response behind ``dedx_deviation(...)`` in a text cut.
    """
    import awkward as ak

    counts, get, fields = _collection_counts_and_getter(collection, name)
    flat = flat_object_mask(cut, collection, counts, get, fields, name, identification)
    return ak.unflatten(flat, counts)


def event_names(events: Any) -> dict[str, Callable[[], Any]]:
    """The names an event-level cut may use, each with a function giving its flat column.

    Per-event scalar fields keep their name (``weight``); every collection ``c`` gives
    ``n_c`` (its number of objects per event, before any object cut); a per-event record
    ``r`` with scalar fields ``f`` gives ``r_f`` (e.g. ``met_pt``).  A real field wins over
    a derived name.
    """
    import awkward as ak

    out: dict[str, Callable[[], Any]] = {}
    derived: dict[str, Callable[[], Any]] = {}
    for f in events.fields:
        arr = events[f]
        if arr.ndim == 1 and not arr.fields:
            out[f] = (lambda a=arr: a)
        elif arr.ndim == 2:
            derived[f"n_{f}"] = (lambda a=arr: ak.num(a, axis=1))
        elif arr.ndim == 1 and arr.fields:
            for sub in arr.fields:
                if arr[sub].ndim == 1 and not arr[sub].fields:
                    derived[f"{f}_{sub}"] = (lambda a=arr, s=sub: a[s])
    for k, v in derived.items():
        out.setdefault(k, v)
    return out


def event_mask(events: Any, cut: CutLike) -> np.ndarray:
    """Boolean numpy mask over events for any kind of cut.

    Parameters
    ----------
    events : awkward.Array
        The events (one record per event).
    cut : str, Cut, callable or mask
        Text or :class:`Cut` over the names of :func:`event_names`, a callable taking the
        events and returning one boolean per event, or such a mask.
    """
    import awkward as ak

    n = len(events)
    if _is_text(cut):
        c = compile_cut(cut)
        names = event_names(events)

        def get(name: str) -> Any:
            if name not in names:
                raise KeyError(name)
            return ak.to_numpy(names[name]())

        return c.evaluate(get, n, where="each event", available=list(names))
    label = "event cut"
    if callable(cut):
        label = f"event cut (from {_callable_name(cut)})"
        cut = cut(events)
    if isinstance(cut, ak.Array):
        if cut.ndim != 1:
            raise CutError(f"{label}: must give one true/false value per event, got a "
                           f"{cut.ndim}-dimensional array; reduce it, e.g. with ak.any(..., axis=1)")
        cut = ak.to_numpy(ak.fill_none(cut, False))
    arr = np.asarray(cut)
    if arr.ndim != 1 or arr.shape[0] != n:
        raise CutError(f"{label}: must give one true/false value per event ({n}), got shape "
                       f"{arr.shape}")
    if arr.dtype != np.bool_:
        raise CutError(f"{label}: holds {arr.dtype} values, not true/false")
    return arr


# ------------------------------------------------------------------ per-requirement flow
def clauses(cut: CutLike) -> tuple[Cut, ...]:
    """The requirements of a text cut that a top-level ``and`` joins, in order, each a
    :class:`Cut` (``"pt > 20 and abs(eta) < 2.4"`` -> ``pt > 20``, ``abs(eta) < 2.4``).

    A cut without a top-level ``and`` is its own single clause; ``or``/``not`` groups and
    chained comparisons stay whole.  Callables and masks have no clauses: ``()``.
    """
    if not _is_text(cut) or cut == "":
        return ()
    c = compile_cut(cut)
    text = " ".join(c.expression.split())
    try:
        tree = ast.parse(text, mode="eval").body
    except SyntaxError:  # compile_cut accepted it, so this does not happen
        return (c,)
    if not (isinstance(tree, ast.BoolOp) and isinstance(tree.op, ast.And)):
        return (c,)
    out = []
    for value in tree.values:
        seg = ast.get_source_segment(text, value)
        if seg is None:
            return (c,)
        if isinstance(value, ast.BoolOp) and isinstance(value.op, ast.Or):
            seg = f"({seg})"
        out.append(compile_cut(seg))
    return tuple(out)


def requirement_counts(collection: Any, cut: CutLike, *, name: str,
                       keep_events: np.ndarray | None = None, identification: Any = None
                       ) -> tuple[list[tuple[str, int]], np.ndarray]:
    """Objects of ``collection`` passing each clause of ``cut`` in turn, in one pass.

    Parameters
    ----------
    collection : awkward.Array
        A jagged collection of records (one list of objects per event).
    cut : str, Cut, callable or mask
        The object cut; a text cut is split by :func:`clauses`, anything else counts as one
        step named ``"cut"``.
    name : str
        The collection's name (step labels and messages).
    keep_events : ndarray of bool, optional
        Count only the objects of these events (those passing the event cut).
    identification : peaksift.energy_loss.DedxResponse, optional
        The dE/dx response behind ``dedx_deviation(...)`` clauses (as in the pairing).

    Returns
    -------
    steps : list of (label, count)
        ``(f"{name} objects", all)``, then one ``(clause text, objects passing it and every
        clause before it)`` per clause.
    per_event : ndarray of int
        Objects per event passing the whole cut (0 for events not kept).
    """
    counts, get, fields = _collection_counts_and_getter(collection, name)
    n_obj = int(counts.sum())
    keep = np.ones(n_obj, dtype=bool)
    if keep_events is not None:
        keep = np.repeat(np.asarray(keep_events, dtype=bool), counts)
    steps = [(f"{name} objects", int(keep.sum()))]
    parts: tuple[Any, ...] = clauses(cut) if _is_text(cut) else ((cut,) if cut is not None
                                                                  else ())
    for part in parts:
        if part is None or (isinstance(part, str) and not part):
            continue
        keep &= flat_object_mask(part, collection, counts, get, fields, name, identification)
        label = part.expression if isinstance(part, Cut) else "cut"
        steps.append((label, int(keep.sum())))
    owner = np.repeat(np.arange(counts.size), counts)
    per_event = np.bincount(owner[keep], minlength=counts.size).astype(np.int64)
    return steps, per_event
