"""The whole map-reduce over a data set: planning the chunks, running them on an engine,
and adding their outputs in chunk order (:func:`collect`, :class:`Collected`)."""

from __future__ import annotations

import dataclasses
import math
import re
import sys
import time
import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .._vocabulary import UNREADABLE_FILES
from ..errors import ConfigError, DataWarning, ExecutionError, InputError, PeaksiftError
from ..events import DEFAULT_CHUNK_EVENTS
from ..histogram import MassHistogram
from ._chunk import ChunkOutput, Selection, _ChunkTask, _describe_spec, _spec_file
from ._engines import _check_engine, _open_dask_session, _progress, _run
from ._local import _check_picklable


@dataclass(frozen=True)
class SkippedFile:
    """A file left out of a run with ``unreadable_files="left_out"``, and why."""

    path: str
    reason: str

    def to_dict(self) -> dict[str, str]:
        return {"path": self.path, "reason": self.reason}


@dataclass(frozen=True)
class Collected:
    """Result of :func:`collect`: the reduced output of every chunk.

    Attributes
    ----------
    histogram : MassHistogram
        The mass spectrum.
    window : (float, float)
        The fit window ``[lo, hi)``.
    window_mass, window_weight : ndarray
        Candidate masses and weights inside the window, in chunk order then event order
        (the same order on every engine and for every ``chunk_events``).
    pt_histogram, rapidity_histogram : MassHistogram
        Candidates' pT and rapidity (candidates inside ``summary_window``).
    summary_window : (float, float) or None
        The mass range of those summaries (the selection's ``summary_window``).
    requirements : dict[str, int]
        Per-requirement cut flow summed over chunks, in order (see
        :func:`peaksift.execution.requirement_flow`).
    cutflow : dict[str, int]
        Cut-flow counters summed over chunks, in the pairing's order.
    files_read : tuple[str, ...]
        Files whose every chunk was processed.
    files_skipped : tuple[SkippedFile, ...]
        Files left out (only with ``unreadable_files="left_out"``), with the reason.
    events_read : int
        Events read from ``files_read``.
    candidates : int
        Candidates of every mass produced by the pairing.
    data_warnings : tuple[str, ...]
        Distinct data-repair messages from reading (at most 20; see ``n_data_warnings``).
    n_data_warnings : int
        How many chunks reported repaired input.
    dropped_objects : dict[str, dict[str, int]]
        Objects dropped while reading for bad values, per collection and problem
        (``{"muon": {"NaN or infinite kinematics": 3}}``), summed over the files read.
    engine_info : dict
        ``engine``, ``workers``, ``address``, ``start_method`` (when worker processes were
        started for the call), ``chunks``, ``chunk_events``, ``seconds``,
        ``events_per_second`` and ``chunk_seconds`` (time spent inside the chunks, summed
        over workers: ``chunk_seconds / (seconds * workers)`` is how busy the workers were).
    file_hashes : dict[str, str]
        sha256 of each file read, with ``hash_files=True`` (computed where the footers were
        read: on the workers of a Dask cluster).
    """

    histogram: MassHistogram
    window: tuple[float, float]
    window_mass: np.ndarray
    window_weight: np.ndarray
    pt_histogram: MassHistogram
    rapidity_histogram: MassHistogram
    cutflow: dict[str, int]
    files_read: tuple[str, ...]
    files_skipped: tuple[SkippedFile, ...]
    events_read: int
    candidates: int
    data_warnings: tuple[str, ...] = ()
    n_data_warnings: int = 0
    dropped_objects: dict[str, dict[str, int]] = field(default_factory=dict)
    engine_info: dict[str, Any] = field(default_factory=dict)
    summary_window: tuple[float, float] | None = None
    requirements: dict[str, int] = field(default_factory=dict)
    file_hashes: dict[str, str] = field(default_factory=dict)

    @property
    def window_candidates(self) -> int:
        """Number of candidates inside the fit window."""
        return int(self.window_mass.size)

    def to_dict(self) -> dict[str, Any]:
        """Counts and provenance as plain JSON types (no arrays)."""
        return {
            "files_read": list(self.files_read),
            "files_skipped": [s.to_dict() for s in self.files_skipped],
            "events_read": int(self.events_read),
            "candidates": int(self.candidates),
            "window": list(self.window),
            "window_candidates": self.window_candidates,
            "cutflow": {k: int(v) for k, v in self.cutflow.items()},
            "requirements": {k: int(v) for k, v in self.requirements.items()},
            "data_warnings": list(self.data_warnings),
            "dropped_objects": {c: dict(v) for c, v in self.dropped_objects.items()},
            "engine": dict(self.engine_info),
        }


_DROPPED_COLL = re.compile(r"'([^']+)': ((?:\d+ with [^,;(]+?)(?:, \d+ with [^,;(]+?)*) \(of \d+\)")


_DROPPED_ITEM = re.compile(r"(\d+) with ([^,;(]+?)(?=, \d+ with |$)")


def _parse_dropped(message: str) -> dict[str, dict[str, int]]:
    """Counts from the reader's DataWarning text:
    ``'muon': 3 with NaN or infinite kinematics, 1 with negative pt (of 900)``."""
    out: dict[str, dict[str, int]] = {}
    for coll, items in _DROPPED_COLL.findall(message):
        for n, problem in _DROPPED_ITEM.findall(items):
            d = out.setdefault(coll, {})
            d[problem.strip()] = d.get(problem.strip(), 0) + int(n)
    return out


class _Reducer:
    """Adds chunk outputs in chunk order; a file counts only when all its chunks are in."""

    def __init__(self, selection: Selection) -> None:
        self.sel = selection
        self.hist = MassHistogram(selection.edges, unit=selection.unit, label="m")
        self.pt = MassHistogram(selection.pt_edges, unit=selection.unit, label="p_T")
        self.rap = MassHistogram(selection.rapidity_edges, unit="", label="y")
        self.masses: list[np.ndarray] = []
        self.weights: list[np.ndarray] = []
        self.cutflow: dict[str, int] = {}
        self.requirements: dict[str, int] = {}
        self.events = 0
        self.candidates = 0
        self.files: list[str] = []
        self.warn: dict[str, None] = {}
        self.n_warn = 0
        self.dropped: dict[str, dict[str, int]] = {}
        self.busy = 0.0
        self._file: list[ChunkOutput] = []

    def add(self, out: ChunkOutput, last_of_file: bool) -> None:
        self._file.append(out)
        if last_of_file:
            self._commit()

    def drop_file(self) -> None:
        self._file = []

    def _commit(self) -> None:
        for out in self._file:
            self.hist += out.histogram
            self.pt += out.pt_histogram
            self.rap += out.rapidity_histogram
            if out.window_mass.size:
                self.masses.append(out.window_mass)
                self.weights.append(out.window_weight)
            for k, v in out.cutflow.items():
                self.cutflow[k] = self.cutflow.get(k, 0) + int(v)
            for k, v in (out.requirements or {}).items():
                self.requirements[k] = self.requirements.get(k, 0) + int(v)
            self.events += out.events
            self.candidates += out.candidates
            self.busy += out.seconds
            if out.data_warnings:
                self.n_warn += 1
                for m in out.data_warnings:
                    if len(self.warn) < 20:
                        self.warn[m] = None
                    for coll, problems in _parse_dropped(m).items():
                        tot = self.dropped.setdefault(coll, {})
                        for k, v in problems.items():
                            tot[k] = tot.get(k, 0) + v
        if self._file:
            self.files.append(self._file[0].file)
        self._file = []


@dataclass(frozen=True)
class _PlanFile:
    """Check one file's footer against the selection and plan its chunks (a picklable task,
    so that on a cluster the workers read the footers, not the client)."""

    selection: Selection
    chunk_events: int
    hash_files: bool = False

    def __call__(self, f: str) -> tuple[list[Any], str | None]:
        from ..events import check_files, file_sha256, plan_chunks

        check_files(f, list(self.selection.collections), fields=self.selection.fields,
                    column_pattern=self.selection.column_pattern)
        specs = list(plan_chunks(f, chunk_events=self.chunk_events))
        return specs, (file_sha256(f) if self.hash_files else None)


def _plan(source: Any, chunk_events: int, leave_out: bool, selection: Selection,
          session: Any = None, info: dict[str, Any] | None = None,
          hashes: dict[str, str] | None = None
          ) -> tuple[list[Any], list[SkippedFile], list[str]]:
    """Chunks of every readable file, the files skipped at planning, all files.

    Each file's footer is checked for what the selection reads (collections, kinematic
    fields, requested fields) before any chunk runs, so a file that lacks them stops the
    run (or is skipped) at once, not after the files before it were processed.  Files are
    checked one by one: chunks are processed independently, so files may differ in layout.
    """
    from ..events import list_files

    files = [str(f) for f in list_files(source)]
    plan_file = _PlanFile(selection, chunk_events, hashes is not None)
    if session is not None:  # footers read on the workers, all files at once
        outcomes = _run(plan_file, files, engine="dask", workers=None, address=None,
                        describe=lambda i: f"footer of {files[i]!r}", info=dict(info or {}),
                        session=session)
    else:
        outcomes = ((i, *_try(plan_file, f)) for i, f in enumerate(files))
    specs: list[Any] = []
    skipped: list[SkippedFile] = []
    offset = 0
    for i, ok, part in outcomes:
        f = files[i]
        if not ok:
            if leave_out and isinstance(part, InputError):
                skipped.append(SkippedFile(f, str(part)))
                continue
            raise part
        part, digest = part
        if digest is not None and hashes is not None:
            hashes[f] = digest
        for s in part:
            specs.append(dataclasses.replace(s, first_event=int(s.first_event) + offset)
                         if offset else s)
        offset += sum(int(getattr(s, "n_events", 0)) for s in part)
    return specs, skipped, files


def _try(func: Any, arg: Any) -> tuple[bool, Any]:
    try:
        return True, func(arg)
    except PeaksiftError as exc:
        return False, exc


def collect(source: Any, selection: Selection, *, engine: str = "serial",
            workers: int | None = None, address: str | None = None,
            chunk_events: int = DEFAULT_CHUNK_EVENTS, unreadable_files: str = "stop",
            progress: bool = False, start_method: str = "auto", client: Any = None,
            hash_files: bool = False) -> Collected:
    """Run the selection over a dataset, chunk by chunk, and reduce.

    Parameters
    ----------
    source : path, glob, directory or list of them
        The Parquet files (resolved by :func:`peaksift.events.list_files`).
    selection : Selection
        What to read, cut and pair, and where to histogram.
    engine : {"serial", "processes", "dask"}
        Where the chunks run (see the module guide).  All give identical results.
    workers : int, optional
        Worker processes for ``processes`` and for a local Dask cluster (default: the
        number of CPUs).  Ignored with ``serial`` and with a Dask ``address``.
    address : str, optional
        Scheduler of an existing Dask cluster (``"tcp://host:8786"``); engine ``dask`` only.
    client : distributed.Client, optional
        A Dask client you already hold (engine ``dask``); it and its cluster stay open.
        Without ``client`` and ``address`` the client current in this process is used when
        there is one (said in ``engine_info["note"]``), else a local cluster is started.
    chunk_events : int
        Target events per chunk (chunks are whole Parquet row groups).
    unreadable_files : {"stop", "left_out"}
        What a file that cannot be read does: ``"stop"`` the run (the error names it), or
        it is ``"left_out"`` whole (listed with the reason in ``files_skipped``).
    progress : bool
        Show a progress bar over events.
    start_method : {"auto", "fork", "spawn"}
        How the local worker processes of ``processes`` and of a local Dask cluster start
        (see the module guide); ``"auto"`` forks on Linux.  Results do not depend on it.

    hash_files : bool
        Record each file's sha256 in ``Collected.file_hashes``, computed where the footers
        are read (on a Dask cluster: on the workers, in parallel, near the data).

    Returns
    -------
    Collected

    Raises
    ------
    InputError
        A file cannot be read (named in the message) and ``unreadable_files="stop"``.
    ExecutionError
        A worker died (the chunk is named), the selection cannot be sent to workers, or
        every file had to be skipped.
    """
    if not isinstance(selection, Selection):
        raise ConfigError(
            f"collect needs a peaksift.execution.Selection, got {type(selection).__name__}"
        )
    return _collect_all(source, (selection,), _ChunkTask(selection), engine=engine,
                        workers=workers, address=address, chunk_events=chunk_events,
                        unreadable_files=unreadable_files, progress=progress,
                        start_method=start_method, client=client, hash_files=hash_files)[0]


def collect_shared(source: Any, selections: Any, *, engine: str = "serial",
                   workers: int | None = None, address: str | None = None,
                   chunk_events: int = DEFAULT_CHUNK_EVENTS, unreadable_files: str = "stop",
                   progress: bool = False, start_method: str = "auto", client: Any = None,
                   hash_files: bool = False) -> tuple[Collected, ...]:
    """:func:`collect` of several selections on one input, each chunk read once.

    Every chunk is read with the union of the selections' collections and each selection
    runs on it (:mod:`peaksift.execution._shared`); the outputs are reduced per selection in
    chunk order, so each :class:`Collected` holds exactly what ``collect(source, selection,
    ...)`` gives (histograms, window masses, cut flows, files, repair warnings), on every
    engine.  The selections must read alike (same ``fields``, ``strict``, ``masses`` and
    ``column_pattern``).  Footers are checked for what all selections read together: a
    file that cannot serve one of them stops the run, or with
    ``unreadable_files="left_out"`` is left out of every selection.  ``engine_info``
    (shared by all) says ``shared_by``: the number of selections.
    """
    from ._shared import _SharedChunkTask, read_selection

    sels = tuple(selections) if not isinstance(selections, Selection) else (selections,)
    read_selection(sels)  # checks them
    return _collect_all(source, sels, _SharedChunkTask(sels), engine=engine, workers=workers,
                        address=address, chunk_events=chunk_events,
                        unreadable_files=unreadable_files, progress=progress,
                        start_method=start_method, client=client, hash_files=hash_files)


def _collect_all(source: Any, selections: tuple[Selection, ...], func: Any, *, engine: str,
                 workers: int | None, address: str | None, chunk_events: int,
                 unreadable_files: str, progress: bool, start_method: str, client: Any,
                 hash_files: bool) -> tuple[Collected, ...]:
    """The map-reduce of :func:`collect` (one selection, ``func`` a :class:`_ChunkTask`)
    and :func:`collect_shared` (``func`` returns one output per selection)."""
    from ._shared import read_selection

    many = len(selections) > 1 or not isinstance(func, _ChunkTask)
    selection = read_selection(selections) if many else selections[0]
    _check_engine(engine, workers, address, start_method)
    if unreadable_files not in UNREADABLE_FILES:
        raise ConfigError(f"unreadable_files must be one of {', '.join(UNREADABLE_FILES)}, got "
                          f"{unreadable_files!r}")
    leave_out = unreadable_files == "left_out"
    if isinstance(chunk_events, bool) or int(chunk_events) != chunk_events or chunk_events < 1:
        raise ConfigError(f"chunk_events must be a positive integer, got {chunk_events!r}")
    if engine == "processes":
        for sel in selections:
            _check_picklable(sel, "the selection")
    t0 = time.perf_counter()
    info: dict[str, Any] = {}
    session = None
    run = None
    bar = None
    try:
        if engine == "dask":
            session = _open_dask_session(func, workers, address, client, start_method, info)
        hashes: dict[str, str] | None = {} if hash_files else None
        specs, skipped, files = _plan(source, int(chunk_events), leave_out, selection,
                                      session, info, hashes)
        n = len(specs)
        last_of_file = [i == n - 1 or _spec_file(specs[i + 1]) != _spec_file(specs[i])
                        for i in range(n)]
        reducers = [_Reducer(sel) for sel in selections]
        reducer = reducers[0]
        bad_file: str | None = None
        total = sum(int(getattr(s, "n_events", 0)) for s in specs)
        bar = _progress(total or n, "events" if total else "chunks",
                        "ev" if total else "chunk", progress)
        run = _run(func, specs, engine=engine, workers=workers, address=address,
                   describe=lambda i: f"chunk {i} ({_describe_spec(specs[i])})", info=info,
                   parent_helps=True, start_method=start_method, session=session)
        for i, ok, value in run:
            fname = _spec_file(specs[i])
            if fname == bad_file:  # rest of a file already skipped
                continue
            if not ok:
                if leave_out and isinstance(value, InputError):
                    for red in reducers:
                        red.drop_file()
                    skipped.append(SkippedFile(fname, str(value)))
                    bad_file = fname
                    continue
                raise value
            for red, out in zip(reducers, value if many else (value,)):
                red.add(dataclasses.replace(out, index=i), last_of_file[i])
            bar.update((value[0] if many else value).events if total else 1)
    finally:
        if run is not None:
            run.close()  # stop the workers now, not when the traceback is freed
        if session is not None:  # abandoned (an exception in flight): workers end at once
            session.close(abort=sys.exc_info()[0] is not None)
        if bar is not None:
            bar.close()
    if skipped and len(skipped) == len(files):
        reasons = "; ".join(f"{s.path}: {s.reason}" for s in skipped[:3])
        raise ExecutionError(
            f"every input file was skipped as unreadable ({len(skipped)} of {len(files)}): "
            f"{reasons}"
        )
    # files read: those whose chunks all went in, and those with no events (no chunks)
    done = set(reducer.files)
    planned = {_spec_file(s) for s in specs}
    gone = {s.path for s in skipped}
    files_read = tuple(f for f in files if f in done or (f not in planned and f not in gone))
    seconds = time.perf_counter() - t0
    info.update(chunks=n, chunk_events=int(chunk_events), seconds=round(seconds, 3),
                events_per_second=(reducer.events / seconds if seconds > 0 else math.inf))
    if many:
        info["shared_by"] = len(selections)
    order = {f: k for k, f in enumerate(files)}
    skipped.sort(key=lambda s: order.get(s.path, len(order)))
    for red in reducers:
        if red.n_warn:
            first = next(iter(red.warn))
            warnings.warn(
                f"{red.n_warn} of {n} chunks had input repaired while reading; first: {first}",
                DataWarning, stacklevel=3,
            )
    return tuple(_collected(red, sel, files_read, skipped, hashes,
                            {**info, "chunk_seconds": round(red.busy, 3)})
                 for red, sel in zip(reducers, selections))


def _collected(reducer: _Reducer, selection: Selection, files_read: tuple[str, ...],
               skipped: list[SkippedFile], hashes: dict[str, str] | None,
               info: dict[str, Any]) -> Collected:
    masses = np.concatenate(reducer.masses) if reducer.masses else np.zeros(0)
    weights = np.concatenate(reducer.weights) if reducer.weights else np.zeros(0)
    return Collected(
        histogram=reducer.hist,
        window=selection.window,
        summary_window=selection.summary_window,
        requirements=reducer.requirements,
        window_mass=masses,
        window_weight=weights,
        pt_histogram=reducer.pt,
        rapidity_histogram=reducer.rap,
        cutflow=reducer.cutflow,
        files_read=files_read,
        files_skipped=tuple(skipped),
        events_read=reducer.events,
        candidates=reducer.candidates,
        data_warnings=tuple(reducer.warn),
        n_data_warnings=reducer.n_warn,
        dropped_objects=reducer.dropped,
        engine_info=info,
        file_hashes={f: hashes[f] for f in files_read if f in hashes} if hashes else {},
    )


def reduce_outputs(outputs: Any, selection: Selection) -> Collected:
    """Reduce chunk outputs you computed yourself (:func:`process_events` or
    :func:`process_chunk` on your own cluster or collection) into a :class:`Collected`.

    Give the outputs in chunk order (the order of their events): the sums are then bit for
    bit those :func:`collect` makes.  ``engine_info`` says ``{"engine": "outputs"}``.
    """
    reducer = _Reducer(selection)
    outs = list(outputs)
    for i, out in enumerate(outs):
        if not isinstance(out, ChunkOutput):
            raise ConfigError(f"reduce_outputs: item {i} is a {type(out).__name__}, not a "
                              "ChunkOutput from process_events or process_chunk")
        reducer.add(dataclasses.replace(out, index=i), True)
    masses = np.concatenate(reducer.masses) if reducer.masses else np.zeros(0)
    weights = np.concatenate(reducer.weights) if reducer.weights else np.zeros(0)
    return Collected(
        histogram=reducer.hist, window=selection.window, window_mass=masses,
        window_weight=weights, pt_histogram=reducer.pt, rapidity_histogram=reducer.rap,
        cutflow=reducer.cutflow, files_read=tuple(dict.fromkeys(reducer.files)),
        files_skipped=(), events_read=reducer.events, candidates=reducer.candidates,
        data_warnings=tuple(reducer.warn), n_data_warnings=reducer.n_warn,
        dropped_objects=reducer.dropped, engine_info={"engine": "outputs", "chunks": len(outs)})
