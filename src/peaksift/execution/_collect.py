"""The whole map-reduce over a data set: planning the chunks, running them on an engine,
and adding their outputs in chunk order (:func:`collect`, :class:`Collected`)."""

from __future__ import annotations

import dataclasses
import math
import re
import time
import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..errors import ConfigError, DataWarning, ExecutionError, InputError
from ..events import DEFAULT_CHUNK_EVENTS
from ..histogram import MassHistogram
from ._chunk import ChunkOutput, Selection, _ChunkTask, _describe_spec, _spec_file
from ._engines import _check_engine, _progress, _run
from ._local import _check_picklable


@dataclass(frozen=True)
class SkippedFile:
    """A file left out of a run with ``skip_bad_files=True``, and why."""

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
        Candidates' pT and rapidity (candidates inside the histogram range).
    cutflow : dict[str, int]
        Cut-flow counters summed over chunks, in the pairing's order.
    files_read : tuple[str, ...]
        Files whose every chunk was processed.
    files_skipped : tuple[SkippedFile, ...]
        Files left out (only with ``skip_bad_files=True``), with the reason.
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


def _plan(source: Any, chunk_events: int, skip_bad_files: bool, selection: Selection
          ) -> tuple[list[Any], list[SkippedFile], list[str]]:
    """Chunks of every readable file, the files skipped at planning, all files.

    Each file's footer is checked for what the selection reads (collections, kinematic
    fields, requested fields) before any chunk runs, so a file that lacks them stops the
    run (or is skipped) at once, not after the files before it were processed.  Files are
    checked one by one: chunks are processed independently, so files may differ in layout.
    """
    from ..events import check_files, list_files, plan_chunks

    files = [str(f) for f in list_files(source)]

    def check(f: str) -> None:
        check_files(f, list(selection.collections), fields=selection.fields)

    if not skip_bad_files:
        for f in files:
            check(f)
        return list(plan_chunks(files, chunk_events=chunk_events)), [], files
    specs: list[Any] = []
    skipped: list[SkippedFile] = []
    offset = 0
    for f in files:
        try:
            check(f)
            part = list(plan_chunks(f, chunk_events=chunk_events))
        except InputError as exc:
            skipped.append(SkippedFile(f, str(exc)))
            continue
        for s in part:
            specs.append(dataclasses.replace(s, first_event=int(s.first_event) + offset)
                         if offset else s)
        offset += sum(int(getattr(s, "n_events", 0)) for s in part)
    return specs, skipped, files


def collect(source: Any, selection: Selection, *, engine: str = "serial",
            workers: int | None = None, address: str | None = None,
            chunk_events: int = DEFAULT_CHUNK_EVENTS, skip_bad_files: bool = False,
            progress: bool = False, start_method: str = "auto") -> Collected:
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
    chunk_events : int
        Target events per chunk (chunks are whole Parquet row groups).
    skip_bad_files : bool
        Leave out files that cannot be read (listed in ``files_skipped``) instead of
        stopping.
    progress : bool
        Show a progress bar over events.
    start_method : {"auto", "fork", "spawn"}
        How the local worker processes of ``processes`` and of a local Dask cluster start
        (see the module guide); ``"auto"`` forks on Linux.  Results do not depend on it.

    Returns
    -------
    Collected

    Raises
    ------
    InputError
        A file cannot be read (named in the message) and ``skip_bad_files`` is False.
    ExecutionError
        A worker died (the chunk is named), the selection cannot be sent to workers, or
        every file had to be skipped.
    """
    if not isinstance(selection, Selection):
        raise ConfigError(
            f"collect needs a peaksift.execution.Selection, got {type(selection).__name__}"
        )
    _check_engine(engine, workers, address, start_method)
    if isinstance(chunk_events, bool) or int(chunk_events) != chunk_events or chunk_events < 1:
        raise ConfigError(f"chunk_events must be a positive integer, got {chunk_events!r}")
    if engine == "processes":
        _check_picklable(selection, "the selection")
    t0 = time.perf_counter()
    specs, skipped, files = _plan(source, int(chunk_events), skip_bad_files, selection)
    n = len(specs)
    last_of_file = [i == n - 1 or _spec_file(specs[i + 1]) != _spec_file(specs[i])
                    for i in range(n)]
    reducer = _Reducer(selection)
    bad_file: str | None = None
    info: dict[str, Any] = {}
    total = sum(int(getattr(s, "n_events", 0)) for s in specs)
    bar = _progress(total or n, "events" if total else "chunks", "ev" if total else "chunk",
                    progress)
    func = _ChunkTask(selection)
    run = None
    try:
        run = _run(func, specs, engine=engine, workers=workers, address=address,
                   describe=lambda i: f"chunk {i} ({_describe_spec(specs[i])})", info=info,
                   parent_helps=True, start_method=start_method)
        for i, ok, value in run:
            fname = _spec_file(specs[i])
            if fname == bad_file:  # rest of a file already skipped
                continue
            if not ok:
                if skip_bad_files and isinstance(value, InputError):
                    reducer.drop_file()
                    skipped.append(SkippedFile(fname, str(value)))
                    bad_file = fname
                    continue
                raise value
            reducer.add(dataclasses.replace(value, index=i), last_of_file[i])
            bar.update(value.events if total else 1)
    finally:
        if run is not None:
            run.close()  # stop the workers now, not when the traceback is freed
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
    if reducer.n_warn:
        first = next(iter(reducer.warn))
        warnings.warn(
            f"{reducer.n_warn} of {n} chunks had input repaired while reading; first: {first}",
            DataWarning, stacklevel=2,
        )
    seconds = time.perf_counter() - t0
    info.update(chunks=n, chunk_events=int(chunk_events), seconds=round(seconds, 3),
                events_per_second=(reducer.events / seconds if seconds > 0 else math.inf),
                chunk_seconds=round(reducer.busy, 3))
    masses = np.concatenate(reducer.masses) if reducer.masses else np.zeros(0)
    weights = np.concatenate(reducer.weights) if reducer.weights else np.zeros(0)
    order = {f: k for k, f in enumerate(files)}
    skipped.sort(key=lambda s: order.get(s.path, len(order)))
    return Collected(
        histogram=reducer.hist,
        window=selection.window,
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
    )
