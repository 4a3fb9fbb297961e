"""The public readers: :func:`read_events`, :func:`iter_events`, and the chunk plan workers read."""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import awkward as ak

from ..errors import InputError
from .files import _PIECE_EVENTS, DEFAULT_CHUNK_EVENTS, Source, list_files
from .pieces import _build, _Collector, _object_capacity, _read_piece, _warn
from .schema import _inspect, _plan_request

# --------------------------------------------------------------------------- public API


@dataclass(frozen=True)
class ChunkSpec:
    """A picklable description of one chunk: whole row groups of one file.

    Attributes
    ----------
    path : str
        The Parquet file.
    row_groups : tuple of int
        Row-group indices in that file, consecutive.
    n_events : int
        Number of events in the chunk.
    first_event : int
        Global index (over the whole data set, files in :func:`list_files` order) of the
        chunk's first event.
    """

    path: str
    row_groups: tuple[int, ...]
    n_events: int
    first_event: int


def check_files(
    source: Source,
    collections: str | Sequence[str] | None = None,
    *,
    fields: Iterable[str] | None = None,
) -> list[Path]:
    """Check a data set before reading it, from the file footers only, and return its files.

    Raises the same :class:`~peaksift.errors.InputError` as :func:`read_events` would for a
    missing file, unreadable Parquet, an absent collection or kinematic field, non-numeric
    kinematics, an unknown requested field, or files that disagree on what would be read
    (both named).  Workers reading :func:`read_chunk` see one file each, so a driver calls this
    once up front.
    """
    files = list_files(source)
    _plan_request(files, collections, fields)
    return files


def plan_chunks(source: Source, *, chunk_events: int = DEFAULT_CHUNK_EVENTS) -> list[ChunkSpec]:
    """Split a data set into chunks of whole row groups holding ~``chunk_events`` events each.

    Only file footers are read.  Consecutive row groups of one file are grouped until the chunk
    holds at least ``chunk_events`` events; chunks never span files.
    """
    if int(chunk_events) < 1:
        raise InputError(f"chunk_events must be a positive number of events, got {chunk_events}")
    specs: list[ChunkSpec] = []
    first = 0
    for p in list_files(source):
        for rgs, n in _group_row_groups(_inspect(p).row_groups, int(chunk_events)):
            specs.append(ChunkSpec(str(p), rgs, n, first))
            first += n
    return specs


def _group_row_groups(sizes: Sequence[int], chunk_events: int) -> list[tuple[tuple[int, ...], int]]:
    """Consecutive row groups until at least ``chunk_events`` events: (indices, events)."""
    out: list[tuple[tuple[int, ...], int]] = []
    cur: list[int] = []
    n = 0
    for i, k in enumerate(sizes):
        cur.append(i)
        n += k
        if n >= chunk_events:
            out.append((tuple(cur), n))
            cur, n = [], 0
    if cur:
        out.append((tuple(cur), n))
    return out


def read_chunk(
    spec: ChunkSpec,
    collections: str | Sequence[str] | None = None,
    *,
    fields: Iterable[str] | None = None,
    strict: bool = False,
    masses: Mapping[str, float] | None = None,
) -> ak.Array:
    """Read one chunk planned by :func:`plan_chunks` (same options as :func:`read_events`)."""
    path = Path(spec.path)
    if not path.is_file():
        raise InputError(f"chunk file '{path}' no longer exists; plan the chunks again")
    info, sel = _plan_request([path], collections, fields)[0]
    if any(i >= len(info.row_groups) for i in spec.row_groups) or \
            sum(info.row_groups[i] for i in spec.row_groups) != spec.n_events:
        raise InputError(
            f"'{path}' changed since its chunks were planned (row groups {list(spec.row_groups)} "
            f"no longer hold {spec.n_events} events); plan the chunks again")
    piece = _read_piece(info, sel, spec.row_groups, spec.first_event, masses or {}, strict)
    _warn([piece], [path])
    return _build([piece])


def read_events(
    source: Source,
    collections: str | Sequence[str] | None = None,
    *,
    fields: Iterable[str] | None = None,
    strict: bool = False,
    masses: Mapping[str, float] | None = None,
) -> ak.Array:
    """Read Parquet event files into one ``awkward.Array``.

    Parameters
    ----------
    source : str, path or sequence of them
        Files, directories or globs (see :func:`list_files`); all are one data set.
    collections : str or sequence of str, optional
        Object collections to read (default: every collection with kinematics, plus all other
        columns).  When given, only those collections and the per-event columns are read.
    fields : iterable of str, optional
        Restrict the extra object fields and event columns to these names (``"charge"`` for
        every collection that has it, ``"muon.charge"`` for one).  Kinematics and ``weight``
        are always read.
    strict : bool
        Raise :class:`~peaksift.errors.InputError` at the first bad object instead of dropping
        bad objects with one :class:`~peaksift.errors.DataWarning`.
    masses : mapping, optional
        Mass in GeV for collections stored without a mass field (default massless).

    Returns
    -------
    awkward.Array
        One record per event; collections are jagged ``Momentum4D`` records with fields
        ``pt, eta, phi, mass`` first.

    Raises
    ------
    InputError
        No file matches; a file is not readable Parquet; a collection, kinematic field or
        requested field is absent; kinematics are not numbers; files disagree on what is read;
        bad objects with ``strict=True``.  All schema checks happen before any data are read.
    """
    files = list_files(source)
    plans = _plan_request(files, collections, fields)
    out = _Collector(sum(info.n_events for info, _ in plans), _object_capacity(plans))
    first = 0
    for info, sel in plans:
        # whole row groups in pieces of ~_PIECE_EVENTS, each copied into the outputs and
        # released before the next is read (small pieces let the pool reuse their memory)
        for rgs, n in _group_row_groups(info.row_groups, _PIECE_EVENTS):
            out.add(_read_piece(info, sel, rgs, first, masses or {}, strict))
            first += n
    _warn(out.meta, files)
    return out.array()


def iter_events(
    source: Source,
    *,
    chunk_events: int = DEFAULT_CHUNK_EVENTS,
    collections: str | Sequence[str] | None = None,
    fields: Iterable[str] | None = None,
    strict: bool = False,
    masses: Mapping[str, float] | None = None,
) -> Iterator[ak.Array]:
    """Stream a data set in chunks of whole row groups (~``chunk_events`` events each).

    Options as :func:`read_events`; the concatenated chunks equal ``read_events(source)``.
    All files' schemas are checked before the first chunk is read.  A
    :class:`~peaksift.errors.DataWarning` is issued per chunk that had bad objects.
    """
    specs = plan_chunks(source, chunk_events=chunk_events)
    files = list(dict.fromkeys(Path(s.path) for s in specs))
    plans = {info.path: (info, sel) for info, sel in _plan_request(files, collections, fields)}

    def _gen() -> Iterator[ak.Array]:
        for s in specs:
            info, sel = plans[Path(s.path)]
            piece = _read_piece(info, sel, s.row_groups, s.first_event, masses or {}, strict)
            _warn([piece], [info.path])
            yield _build([piece])

    return _gen()
