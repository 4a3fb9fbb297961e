"""Events already in memory: awkward arrays, Arrow tables and record-batch readers.

:func:`from_memory` turns what a user holds into the events :func:`read_events` returns,
through the same reader (the table's record batches play the row groups), so the schema
checks, the coordinate conversion and the repairs are the ones files get:

* an ``awkward.Array`` of records: from ``ak.from_parquet``/``ak.from_feather`` (option types
  everywhere), built with ``vector.zip`` or ``ak.zip(..., with_name="Momentum4D")`` in any
  coordinate system vector knows (``px, py, pz, E``; ``x, y, z, t``; ``pt, eta, phi, M``;
  ``rho, phi, eta, tau``; ...), or with flat sibling columns (``muon.pt``, ...);
* a ``pyarrow.Table``, ``RecordBatch`` or ``RecordBatchReader``.

Option (nullable) types are stripped: a missing collection becomes an empty one, a missing
object is left out, a missing number becomes NaN (and an object with a NaN kinematic is
dropped by the repairs); one :class:`~peaksift.errors.DataWarning` counts what was missing.
Anything else is an :class:`~peaksift.errors.InputError` naming what is accepted.
"""

from __future__ import annotations

import warnings
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

import awkward as ak
import pyarrow as pa

from ..errors import DataWarning, InputError
from .files import DEFAULT_COLUMN_PATTERN
from .formats import TableSource
from .pieces import _build, _read_piece, _warn
from .schema import _inspect, _select

__all__ = ["from_memory", "is_in_memory"]

ACCEPTED = ("an awkward array of event records, a pyarrow Table, RecordBatch or "
            "RecordBatchReader, or Parquet / Arrow IPC files (paths, globs, directories, URLs)")

# coordinate names vector reads, by the role they play: the reader's own names come first
_CART_ROLES = {"px": ("px", "x"), "py": ("py", "y"), "pz": ("pz", "z"),
               "energy": ("energy", "e", "E", "t")}
_POLAR_ROLES = {"pt": ("pt", "rho"), "eta": ("eta",), "phi": ("phi",),
                "mass": ("mass", "m", "M", "tau")}
_COORDS = {n for roles in (_CART_ROLES, _POLAR_ROLES) for names in roles.values()
           for n in names} | {"theta", "E", "t", "tau", "rho"}


def is_in_memory(obj: Any) -> bool:
    """True for the in-memory inputs :func:`from_memory` takes."""
    return isinstance(obj, (ak.Array, pa.Table, pa.RecordBatch, pa.RecordBatchReader))


def from_memory(
    events: Any,
    collections: str | Sequence[str] | None = None,
    *,
    fields: Iterable[str] | None = None,
    strict: bool = False,
    masses: Mapping[str, float] | None = None,
    column_pattern: str = DEFAULT_COLUMN_PATTERN,
) -> ak.Array:
    """In-memory events as :func:`~peaksift.events.read_events` returns them (options as
    there; see the module guide for what is accepted).

    Raises
    ------
    InputError
        ``events`` is not one of the accepted kinds, or holds no collection with kinematics,
        or as :func:`read_events` for the schema and ``strict``.
    """
    name = f"<in-memory {type(events).__name__}>"
    if isinstance(events, ak.Array):
        table = _arrow_of(events)
    elif isinstance(events, pa.Table):
        table = events
    elif isinstance(events, pa.RecordBatch):
        table = pa.Table.from_batches([events])
    elif isinstance(events, pa.RecordBatchReader):
        table = events.read_all()
    else:
        raise InputError(f"cannot read events from {type(events).__name__}; give {ACCEPTED}")
    info = _inspect(name, handle=TableSource.from_table(table), pattern=column_pattern)
    sel = _select(info, collections, None if fields is None else list(fields))
    piece = _read_piece(info, sel, range(len(info.row_groups)), 0, masses or {}, strict)
    _warn([piece], [name])
    return _build([piece])


def _record_name(layout: Any) -> str | None:
    while not isinstance(layout, ak.contents.RecordArray):
        if not hasattr(layout, "content"):
            return None
        layout = layout.content
    return layout.parameter("__record__")


def _pick(names: Sequence[str], roles: Mapping[str, tuple[str, ...]]) -> dict[str, str] | None:
    """Our name -> the record's field for every role, or None when a role is absent."""
    out = {}
    for role, options in roles.items():
        hit = next((o for o in options if o in names), None)
        if hit is None:
            return None
        out[role] = hit
    return out


def _as_our_coordinates(x: ak.Array) -> ak.Array:
    """A jagged record collection with fields the reader knows: renamed when the record
    has one of the reader's coordinate sets under vector's other names, converted by vector
    (pt, eta, phi, mass) when it is a vector record in any other system."""
    names = list(x.fields)
    cart = _pick(names, _CART_ROLES)
    polar = _pick(names, _POLAR_ROLES)
    pick = cart or polar
    if pick is None and all(n in names for n in ("pt", "eta", "phi")):
        return x  # massless polar: the reader's own case
    keep = {n: x[n] for n in names if n not in _COORDS}
    if pick is not None:
        kin = {ours: x[theirs] for ours, theirs in pick.items()}
    elif _record_name(x.layout) is not None and hasattr(x, "tau"):
        kin = {"pt": x.pt, "eta": x.eta, "phi": x.phi, "mass": x.tau}  # vector's conversion
    else:
        return x
    return ak.zip({**kin, **keep}, depth_limit=2)


def _n_none(x: ak.Array, axis: int) -> int:
    """Missing entries at ``axis`` (vector's behaviours stripped: only the layout counts)."""
    if "?" not in str(ak.type(x)):  # no option type anywhere: nothing can be missing
        return 0
    return int(ak.count_nonzero(ak.is_none(ak.without_parameters(x), axis=axis), axis=None))


def _arrow_of(events: ak.Array) -> pa.Table:
    if not events.fields or events.ndim != 1:
        raise InputError(f"the awkward array holds no event records (type {events.type}); give "
                         f"{ACCEPTED}")
    cols: dict[str, Any] = {}
    missing: list[str] = []
    for f in events.fields:
        x = events[f]
        n = _n_none(x, 0)
        if x.ndim == 2:  # a collection or a jagged column
            if n:
                x = ak.fill_none(x, [], axis=0)
            n_obj = _n_none(x, 1)
            if n_obj:
                x = ak.drop_none(x, axis=1)
            n_val = sum(_n_none(x[g], 1) for g in (x.fields or []))
            if x.fields:
                x = _as_our_coordinates(x)
            parts = [f"{n} events without the collection" if n else "",
                     f"{n_obj} missing objects" if n_obj else "",
                     f"{n_val} missing values" if n_val else ""]
            if any(parts):
                missing.append(f"'{f}': " + ", ".join(p for p in parts if p))
        elif n:
            missing.append(f"'{f}': {n} missing values (read as NaN)")
        cols[f] = x
    if missing:
        warnings.warn("in-memory events with missing (None) entries: " + "; ".join(missing)
                      + "; missing collections are read as empty, missing objects left out, "
                      "objects with a missing kinematic value dropped",
                      DataWarning, stacklevel=4)
    arr = ak.zip(cols, depth_limit=1) if cols else events
    try:
        return ak.to_arrow_table(arr, extensionarray=False)
    except (TypeError, ValueError, NotImplementedError) as exc:
        raise InputError(f"cannot read the awkward array as events ({exc}); give "
                         f"{ACCEPTED}") from None


