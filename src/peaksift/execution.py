"""Running the per-chunk work serially, on local processes or on a Dask cluster.

What is here, and which piece to use when
-----------------------------------------
* :class:`Selection` -- everything one chunk of events needs (collections, cuts, pairing
  options, histogram edges, fit window).  A frozen, picklable value; the search builds it
  from the config, scripts build it by hand.
* :func:`process_chunk` -- the pure per-chunk function: read one chunk, select, pair, fill.
  Returns a :class:`ChunkOutput`.  Call it yourself only to debug one chunk.
* :func:`collect` -- the whole map-reduce over a dataset, on the engine you choose.  Returns
  a :class:`Collected` (spectrum, candidate masses inside the fit window, cut flow, files
  read and skipped, events read).  This is what :func:`peaksift.run_search` calls.
* :func:`map_tasks` -- map any picklable function over a list of task descriptions with the
  same engines, results in task order (so toy batches can run on the same engines).

Engines
-------
``"serial"`` (default)
    In this process, one chunk after another.  Nothing to set up; the reference result.
``"processes"``
    A local pool of ``workers`` processes (:class:`concurrent.futures.ProcessPoolExecutor`).
    :func:`collect` counts this process as one of the ``workers``: it runs chunks itself
    (from the same ordered queue) beside a pool of ``workers - 1``; :func:`map_tasks` uses
    ``workers`` pool processes.
``"dask"``
    A Dask cluster: the scheduler at ``address`` (``"tcp://host:8786"``) when given,
    otherwise a :class:`distributed.LocalCluster` with ``workers`` single-threaded worker
    processes that is started for the call and closed after it.  Every worker must be able
    to import peaksift and to open the input paths.

How local worker processes start (``start_method``)
---------------------------------------------------
``"auto"`` (default) is ``"fork"`` on Linux and ``"spawn"`` elsewhere.  A spawned process
starts a fresh interpreter: imports and numba's first-call set-up cost it about 0.6 s of
CPU before its first chunk, as much as a fifth of a whole 20M-event selection on two cores.
With ``"fork"`` this process first imports the chunk work and loads the pairing kernels,
then forks the pool (or the local Dask cluster's workers), which start ready in a few
milliseconds.  Forking a process that holds threads is safe here because the children
run only the chunk work, whose libraries re-create their thread pools after a fork (Arrow,
OpenBLAS) or use none (the numba kernels); choose ``"spawn"`` if your own code in the
calling process is not fork-safe.  Scripts that use ``"spawn"`` need the usual
``if __name__ == "__main__":`` guard.  The start method changes nothing in the results.

Guarantees
----------
* **Identical results on every engine.**  Chunk outputs are reduced strictly in chunk order
  (results that arrive early wait for their predecessors), so the histogram, the window
  masses (in the same order) and the cut flow are bit for bit the same whichever engine
  ran them.  For unweighted data the bin counts also equal one pass over all events
  exactly; for weighted data a different ``chunk_events`` may change sums at the
  rounding level (floating-point addition is not associative).
* **Bounded memory.**  At most ``2 x workers`` chunks are in flight or waiting to be reduced
  (outputs of chunks this process ran for ``processes`` may wait longer: they hold only
  what the reduce keeps anyway);
  memory grows with the chunk size, not the dataset (plus the window masses, which an
  unbinned fit needs anyway: 16 bytes per candidate in the window).
* **Faults are reported, never hidden.**  A file that cannot be read stops the run with an
  error naming it; with ``skip_bad_files=True`` the whole file is left out (its chunks that
  were already processed are discarded too, so a file counts completely or not at all) and
  listed in :attr:`Collected.files_skipped`.  A worker process that dies raises
  :class:`~peaksift.errors.ExecutionError` naming the chunk.  ``KeyboardInterrupt`` stops
  the workers, closes what was started and propagates.
"""

from __future__ import annotations

import atexit
import contextlib
import dataclasses
import math
import multiprocessing
import os
import pickle
import re
import signal
import sys
import time
import uuid
import warnings
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .errors import ConfigError, DataWarning, ExecutionError, InputError, PeaksiftError
from .histogram import MassHistogram

__all__ = [
    "DEFAULT_CHUNK_EVENTS",
    "ENGINES",
    "START_METHODS",
    "ChunkOutput",
    "Collected",
    "Selection",
    "SkippedFile",
    "collect",
    "map_tasks",
    "process_chunk",
]

ENGINES = ("serial", "processes", "dask")

#: How local worker processes start (see the module guide).
START_METHODS = ("auto", "fork", "spawn")

#: Events per chunk when the caller does not say.  The demo search on 500 000-event chunks
#: peaks near 0.4 GiB per process (about half of it the libraries themselves).
DEFAULT_CHUNK_EVENTS = 500_000

#: Chunks allowed in flight (running, queued or waiting to be reduced) per worker.
_INFLIGHT_PER_WORKER = 2


# ----------------------------------------------------------------------------- selection
def _float_tuple(values: Any, what: str) -> tuple[float, ...]:
    try:
        arr = np.asarray(values, dtype=float).ravel()
    except (TypeError, ValueError):
        raise ConfigError(
            f"Selection.{what} must be a sequence of numbers, got {values!r:.80}"
        ) from None
    if arr.size < 2 or not np.all(np.isfinite(arr)) or np.any(np.diff(arr) <= 0):
        raise ConfigError(
            f"Selection.{what} must be at least two finite, strictly increasing numbers, "
            f"got {values!r:.80}"
        )
    return tuple(float(v) for v in arr)


@dataclass(frozen=True, kw_only=True)
class Selection:
    """Everything the per-chunk work needs, as one picklable value.

    Parameters
    ----------
    first : str
        Collection of the first object of each pair (``"muon"``).
    second : str, optional
        Collection of the second object; None pairs ``first`` with itself.
    edges : sequence of float
        Bin edges of the mass spectrum (GeV), strictly increasing.
    window : (float, float), optional
        Fit window ``[lo, hi)`` in GeV; candidate masses inside it are kept for unbinned
        fits.  Default: the histogram range.
    cut, second_cut, event_cut : str or compiled cut, optional
        Object cuts for ``first`` and ``second`` and the event-level cut, as accepted by
        :func:`peaksift.pair` (cut strings are always safe to send to workers; Python
        callables must be module-level functions for the ``processes`` engine).
    charge, choose, target_mass, min_delta_r
        Pairing options, passed to :func:`peaksift.pair` unchanged.
    collections : sequence of str, optional
        Collections to read; default ``first`` and ``second``.  Add any collection an
        event cut counts.
    fields : iterable of str, optional
        Restrict the extra object fields and event columns read (see
        :func:`peaksift.read_events`); kinematics and ``weight`` are always read.
    masses : mapping of str to float, optional
        Mass in GeV for collections stored without a mass field (default massless).
    strict : bool
        Raise on NaN, infinite or negative kinematics instead of dropping those objects.
    pt_edges, rapidity_edges : sequence of float, optional
        Bins of the candidates' pT (GeV; default 100 bins from 0 to the top mass edge)
        and rapidity (default 60 bins on [-3, 3]) summary histograms, filled with the
        candidates whose mass lies in the histogram range.
    unit : str
        Unit of the mass axis (default ``"GeV"``).
    """

    first: str
    edges: tuple[float, ...]
    second: str | None = None
    window: tuple[float, float] | None = None
    cut: Any = None
    second_cut: Any = None
    event_cut: Any = None
    charge: str | None = None
    choose: str = "all"
    target_mass: float | None = None
    min_delta_r: float | None = None
    collections: tuple[str, ...] | None = None
    fields: tuple[str, ...] | None = None
    masses: tuple[tuple[str, float], ...] | None = None
    strict: bool = False
    pt_edges: tuple[float, ...] | None = None
    rapidity_edges: tuple[float, ...] | None = None
    unit: str = "GeV"

    def __post_init__(self) -> None:
        set_ = object.__setattr__
        if not isinstance(self.first, str) or not self.first:
            raise ConfigError(f"Selection.first must be a collection name, got {self.first!r}")
        if self.second is not None and not isinstance(self.second, str):
            raise ConfigError(
                f"Selection.second must be a collection name or None, got {self.second!r}"
            )
        edges = _float_tuple(self.edges, "edges")
        set_(self, "edges", edges)
        if self.window is None:
            set_(self, "window", (edges[0], edges[-1]))
        else:
            win = _float_tuple(self.window, "window")
            if len(win) != 2:
                raise ConfigError(
                    f"Selection.window must be two numbers (lo, hi), got {self.window!r}"
                )
            set_(self, "window", win)
        if self.collections is None:
            names = (self.first,) if self.second in (None, self.first) else (self.first,
                                                                               self.second)
        else:
            if isinstance(self.collections, str):
                names = (self.collections,)
            else:
                names = tuple(str(c) for c in self.collections)
            missing = [c for c in (self.first, self.second) if c is not None and c not in names]
            names = names + tuple(missing)
        set_(self, "collections", tuple(dict.fromkeys(names)))
        pt = np.linspace(0.0, max(edges[-1], 1.0), 101) if self.pt_edges is None \
            else self.pt_edges
        set_(self, "pt_edges", _float_tuple(pt, "pt_edges"))
        rap = np.linspace(-3.0, 3.0, 61) if self.rapidity_edges is None else self.rapidity_edges
        set_(self, "rapidity_edges", _float_tuple(rap, "rapidity_edges"))
        set_(self, "strict", bool(self.strict))
        if self.fields is not None:
            set_(self, "fields", (self.fields,) if isinstance(self.fields, str)
                 else tuple(str(f) for f in self.fields))
        if self.masses is not None:
            items = self.masses.items() if isinstance(self.masses, Mapping) else self.masses
            try:
                set_(self, "masses", tuple((str(k), float(v)) for k, v in items))
            except (TypeError, ValueError):
                raise ConfigError(
                    f"Selection.masses must map collection names to masses in GeV, got "
                    f"{self.masses!r}"
                ) from None


# ------------------------------------------------------------------------ chunk output
@dataclass(frozen=True)
class ChunkOutput:
    """What :func:`process_chunk` returns for one chunk (the map step's value).

    Attributes
    ----------
    index : int
        Position of the chunk in the plan (set by :func:`collect`; -1 when called alone).
    file : str
        The file the chunk was read from.
    first_event : int
        Global index of the chunk's first event.
    events : int
        Events read.
    candidates : int
        Candidates the pairing produced (all masses).
    histogram : MassHistogram
        Partial mass spectrum (weighted with the event weights).
    window_mass, window_weight : ndarray
        Masses and weights of the candidates inside the fit window, in event order.
    pt_histogram, rapidity_histogram : MassHistogram
        The candidates' pT and rapidity, for candidates inside the histogram range.
    cutflow : dict[str, int]
        The pairing's cut-flow counters.
    data_warnings : tuple[str, ...]
        Messages of the :class:`~peaksift.errors.DataWarning` raised while reading (objects
        with bad values dropped), to be reported once by the reduce.
    seconds : float
        Wall time spent on the chunk.
    """

    index: int
    file: str
    first_event: int
    events: int
    candidates: int
    histogram: MassHistogram
    window_mass: np.ndarray
    window_weight: np.ndarray
    pt_histogram: MassHistogram
    rapidity_histogram: MassHistogram
    cutflow: dict[str, int]
    data_warnings: tuple[str, ...] = ()
    seconds: float = 0.0


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


# ------------------------------------------------------------------------ the map step
def _spec_file(spec: Any) -> str:
    return str(spec.path)


def _describe_spec(spec: Any) -> str:
    """One-line description of a chunk for error messages."""
    parts = [f"file {_spec_file(spec)!r}"]
    groups = list(spec.row_groups)
    if len(groups) == 1:
        parts.append(f"row group {groups[0]}")
    elif groups:
        parts.append(f"row groups {groups[0]}-{groups[-1]}")
    first, n = int(spec.first_event), int(spec.n_events)
    parts.append(f"events {first}-{first + n - 1}")
    return ", ".join(parts)


def _fill_hist(edges: Sequence[float], values: np.ndarray, weights: np.ndarray,
               unit: str, label: str) -> MassHistogram:
    """A new histogram filled with ``values`` and ``weights``."""
    return MassHistogram(edges, unit=unit, label=label).fill(values, weights)


def process_chunk(spec: Any, selection: Selection) -> ChunkOutput:
    """Read one chunk, select, pair and fill: the pure map step of :func:`collect`.

    Parameters
    ----------
    spec : ChunkSpec
        One element of :func:`peaksift.events.plan_chunks` (file, row groups, global index
        of the first event).
    selection : Selection
        What to read and how to pair.

    Returns
    -------
    ChunkOutput
        Partial spectrum, window masses and weights, pT and rapidity summaries, cut flow.

    Raises
    ------
    InputError
        When the chunk cannot be read (the message names the file and row groups).
    """
    from .events import read_chunk
    from .pairing import pair

    t0 = time.perf_counter()
    messages: list[str] = []
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        events = read_chunk(spec, list(selection.collections), fields=selection.fields,
                            strict=selection.strict,
                            masses=dict(selection.masses) if selection.masses else None)
        cands = pair(
            events, selection.first, selection.second,
            cut=selection.cut, second_cut=selection.second_cut, event_cut=selection.event_cut,
            charge=selection.charge, choose=selection.choose,
            target_mass=selection.target_mass, min_delta_r=selection.min_delta_r,
            event_offset=int(spec.first_event),
        )
    for w in caught:
        if issubclass(w.category, DataWarning):
            messages.append(str(w.message))
        else:  # not ours to swallow
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)

    mass = np.asarray(cands.mass, dtype=float)
    weight = np.asarray(cands.weight, dtype=float)
    edges = selection.edges
    hist = _fill_hist(edges, mass, weight, selection.unit, "m")
    lo, hi = selection.window
    inwin = (mass >= lo) & (mass < hi)
    inrange = (mass >= edges[0]) & (mass < edges[-1])
    w_range = weight[inrange]
    pt_hist = _fill_hist(selection.pt_edges, np.asarray(cands.pt, dtype=float)[inrange],
                         w_range, selection.unit, "p_T")
    y_hist = _fill_hist(selection.rapidity_edges,
                        np.asarray(cands.rapidity, dtype=float)[inrange], w_range, "", "y")
    return ChunkOutput(
        index=-1,
        file=_spec_file(spec),
        first_event=int(spec.first_event),
        events=len(events),
        candidates=int(mass.size),
        histogram=hist,
        window_mass=np.ascontiguousarray(mass[inwin]),
        window_weight=np.ascontiguousarray(weight[inwin]),
        pt_histogram=pt_hist,
        rapidity_histogram=y_hist,
        cutflow={str(k): int(v) for k, v in dict(cands.cutflow).items()},
        data_warnings=tuple(messages),
        seconds=time.perf_counter() - t0,
    )


# ------------------------------------------------------------------------------ engines
def _check_engine(engine: str, workers: int | None, address: str | None,
                  start_method: str = "auto") -> None:
    from .errors import closest

    for what, value, allowed in (("engine", engine, ENGINES),
                                 ("start_method", start_method, START_METHODS)):
        if value not in allowed:
            near = closest(str(value), allowed)
            hint = f"; did you mean {near!r}?" if near else ""
            raise ConfigError(
                f"unknown {what} {value!r}: choose one of {', '.join(allowed)}{hint}"
            )
    if workers is not None and (isinstance(workers, bool) or int(workers) != workers
                                or workers < 1):
        raise ConfigError(f"workers must be a positive integer, got {workers!r}")


def _default_workers() -> int:
    return max(1, os.cpu_count() or 1)


def _resolve_start(start_method: str) -> str:
    """``"fork"`` or ``"spawn"``: ``"auto"`` forks on Linux only (on macOS system libraries
    are not fork-safe, and Windows cannot fork)."""
    if start_method == "auto":
        linux = sys.platform.startswith("linux")
        return "fork" if linux and "fork" in multiprocessing.get_all_start_methods() \
            else "spawn"
    return start_method


def _prepare_to_fork(func: Callable[[Any], Any]) -> None:
    """Get this process ready to be forked: whatever ``func.prepare`` loads (the chunk
    work's imports and numba kernels) is then inherited by every worker."""
    prepare = getattr(func, "prepare", None)
    if callable(prepare):
        prepare()


@contextlib.contextmanager
def _quiet_fork() -> Iterator[None]:
    """Python 3.12+ warns at every fork of a process that holds threads; the pool's
    children run only the chunk work or the task function (see the module guide)."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=r".*use of fork\(\) may lead to deadlocks",
                                category=DeprecationWarning)
        yield


_TRACK: Any = None  # in a pool worker: queue of (pid, task index) as tasks start


def _exit_fast() -> None:
    """Last step of a worker process we started: end without the interpreter's final
    clean-up.  A worker that has delivered its results has nothing left to save, and
    finalising numba's compiler objects alone takes about a second per process, which the
    pool's (or the local cluster's) shutdown would otherwise wait for."""
    import logging

    logging.shutdown()
    for stream in (sys.stdout, sys.stderr):
        with contextlib.suppress(OSError, ValueError, AttributeError):
            stream.flush()
    os._exit(0)


def _install_exit_fast() -> None:
    # registered late, so it runs first among the exit handlers; the ones it skips are
    # multiprocessing's (already run by then for pool workers) and module finalisers
    atexit.register(_exit_fast)


def _worker_init(track: Any) -> None:
    """Pool workers leave Ctrl-C to the parent, which stops them cleanly, and decode with
    one Arrow thread (one process per core already; a forked worker does not see the
    thread settings of ``_WORKER_ENV``, so it is told here)."""
    global _TRACK
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _TRACK = track
    for k, v in _WORKER_ENV.items():
        os.environ.setdefault(k, v)
    arrow = sys.modules.get("pyarrow")
    if arrow is not None:  # already imported: a forked worker (or a user's setting)
        with contextlib.suppress(ValueError):
            arrow.set_cpu_count(max(1, int(os.environ["OMP_NUM_THREADS"])))
    _install_exit_fast()


#: Environment of the pool's worker processes (unless the user set these): the pool runs
#: one process per core, so Arrow's decoding threads and BLAS threads would only contend
#: with the other workers (measured: ~10% faster chunks with one thread each).
_WORKER_ENV = {"OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}


def _pool(size: int, method: str, track: Any) -> Any:
    """A process pool of ``size`` workers started with ``method`` ("fork" or "spawn")."""
    from concurrent.futures import ProcessPoolExecutor

    return ProcessPoolExecutor(max_workers=size, mp_context=multiprocessing.get_context(method),
                               initializer=_worker_init, initargs=(track,))


@contextlib.contextmanager
def _spawn_env(env: Mapping[str, str]) -> Iterator[None]:
    """Set ``env`` in ``os.environ`` (keeping values the user set) while workers are spawned;
    spawned processes take the environment of the moment they start."""
    added = [k for k in env if k not in os.environ]
    os.environ.update({k: env[k] for k in added})
    try:
        yield
    finally:
        for k in added:
            os.environ.pop(k, None)


def _tracked(func: Callable[[Any], Any], index: int, task: Any) -> Any:
    """Run one task in a pool worker, first telling the parent which process took it."""
    if _TRACK is not None:
        _TRACK.put((os.getpid(), index))
    return func(task)


def _check_picklable(obj: Any, what: str) -> None:
    try:
        pickle.dumps(obj)
    except (pickle.PicklingError, TypeError, AttributeError) as exc:
        raise ExecutionError(
            f"{what} cannot be sent to worker processes ({type(exc).__name__}: {exc}); "
            "use cut strings or module-level functions instead of lambdas and local "
            "functions, or engine='serial'"
        ) from None


# Each runner yields (index, ok, value) strictly in task order: ok=False carries a
# PeaksiftError raised by the task (the caller decides: raise it, or skip a bad file).
# Failures of the machinery itself (a dead worker, a lost scheduler) raise ExecutionError.
_Run = Iterator[tuple[int, bool, Any]]


def _run_serial(func: Callable[[Any], Any], tasks: Sequence[Any]) -> _Run:
    for i, task in enumerate(tasks):
        try:
            value = func(task)
        except PeaksiftError as exc:
            yield i, False, exc
        else:
            yield i, True, value


def _dead_worker_error(kind: str, i: int, n: int, describe: Callable[[int], str],
                       running: Sequence[int], detail: str, hint: str) -> ExecutionError:
    others = [j for j in running if j != i]
    also = f" (with {len(others)} other task(s) in flight)" if others else ""
    return ExecutionError(
        f"a {kind} died while running {describe(i)} [{i + 1} of {n}]{also}: {detail}; {hint}"
    )


def _broken_pool_error(procs: dict[int, Any], track: Any, started: dict[int, int],
                       unfinished: set[int], n: int,
                       describe: Callable[[int], str]) -> ExecutionError:
    """The error for a process pool broken by a dying worker: the task it ran when the pool
    can tell, otherwise the tasks in flight."""
    hint = ("it was killed or crashed: lower chunk_events or workers, or run "
            "engine='serial' to see the underlying error")
    found = _culprit(procs, track, started, unfinished)
    if found is None:
        return _dead_worker_unknown("worker process", n, describe, sorted(unfinished), hint)
    j, detail = found
    return _dead_worker_error("worker process", j, n, describe, sorted(unfinished), detail,
                              hint)


def _submit(pool: Any, func: Callable[[Any], Any], index: int, task: Any) -> Any:
    """Submit one task to the process pool.  A pool that a dying worker has already broken
    refuses new work; the refusal comes back as a failed future, so it surfaces where the
    results are read and is reported like any other dead worker."""
    from concurrent.futures import Future
    from concurrent.futures.process import BrokenProcessPool

    try:
        return pool.submit(_tracked, func, index, task)
    except BrokenProcessPool as exc:
        failed: Future = Future()
        failed.set_exception(exc)
        return failed


def _dead_worker_unknown(kind: str, n: int, describe: Callable[[int], str],
                         running: Sequence[int], hint: str) -> ExecutionError:
    """A worker died, but the pool did not tell which of the tasks in flight it ran."""
    listed = ", ".join(f"{describe(j)} [{j + 1} of {n}]" for j in running[:6])
    more = f" and {len(running) - 6} more" if len(running) > 6 else ""
    return ExecutionError(
        f"a {kind} died while one of these tasks was in flight: {listed}{more} "
        f"(the pool did not report which); {hint}"
    )


def _exit_text(code: int | None) -> str:
    if code is None:
        return "exit code unknown"
    if code < 0:
        try:
            name = signal.Signals(-code).name
        except ValueError:
            name = f"signal {-code}"
        return f"killed by {name}" + (" (out of memory?)" if -code == signal.SIGKILL else "")
    return f"exit code {code}"


def _drain(track: Any, started: dict[int, int]) -> None:
    """Read the (pid, task) start records; done after every result, so the pipe never
    fills (a worker blocked on a full pipe would stall the pool)."""
    with contextlib.suppress(OSError, EOFError):
        while not track.empty():
            pid, index = track.get()
            started[pid] = index


def _culprit(procs: dict[int, Any], track: Any, started: dict[int, int],
             unfinished: set[int]) -> tuple[int, str] | None:
    """The task whose worker died first: it started last on a process that did not exit
    by the pool's own SIGTERM."""
    for attempt in range(3):  # start records and exit codes can lag the pool's notice
        _drain(track, started)
        found = _dead_tasks(procs, started, unfinished)
        if found:
            return min(found)
        time.sleep(0.2 * (attempt + 1))
    return None


def _dead_tasks(procs: dict[int, Any], started: dict[int, int],
                unfinished: set[int]) -> list[tuple[int, str]]:
    found = []
    for pid, index in started.items():
        proc = procs.get(pid)
        if proc is None or index not in unfinished:
            continue
        proc.join(timeout=2)
        code = proc.exitcode
        if code is not None and code != -signal.SIGTERM:
            found.append((index, _exit_text(code)))
    return found


def _stop_pool(pool: Any, procs: dict[int, Any]) -> None:
    """Cancel what is queued and stop the pool's processes now."""
    procs = {**procs, **(getattr(pool, "_processes", None) or {})}
    pool.shutdown(wait=False, cancel_futures=True)
    for p in procs.values():
        if p.is_alive():
            p.terminate()
    for p in procs.values():
        p.join(timeout=10)


def _run_processes(func: Callable[[Any], Any], tasks: Sequence[Any], workers: int,
                   describe: Callable[[int], str], method: str) -> _Run:
    from concurrent.futures.process import BrokenProcessPool

    n = len(tasks)
    limit = _INFLIGHT_PER_WORKER * workers
    track = multiprocessing.get_context(method).SimpleQueue()
    pool = _pool(workers, method, track)
    pending: dict[int, Any] = {}
    procs: dict[int, Any] = {}
    started: dict[int, int] = {}
    clean = False
    try:
        nxt = 0
        with _spawn_env(_WORKER_ENV), _quiet_fork():  # the first submit starts the workers
            while nxt < min(n, limit):
                pending[nxt] = _submit(pool, func, nxt, tasks[nxt])
                nxt += 1
        procs.update(getattr(pool, "_processes", None) or {})
        for i in range(n):
            while nxt < n and nxt < i + limit:
                pending[nxt] = _submit(pool, func, nxt, tasks[nxt])
                nxt += 1
                procs.update(getattr(pool, "_processes", None) or {})
            fut = pending.pop(i)
            try:
                value = fut.result()
            except PeaksiftError as exc:
                _drain(track, started)
                yield i, False, exc
                continue
            except BrokenProcessPool:
                raise _broken_pool_error(procs, track, started, {i, *pending}, n,
                                         describe) from None
            _drain(track, started)
            yield i, True, value
        clean = True
    finally:
        if clean:
            pool.shutdown(wait=True)
        else:  # error, early stop or KeyboardInterrupt: do not wait for running chunks
            _stop_pool(pool, procs)
        track.close()


def _run_processes_helping(func: Callable[[Any], Any], tasks: Sequence[Any], workers: int,
                           describe: Callable[[int], str], method: str) -> _Run:
    """``workers`` processes in all: this one and a pool of ``workers - 1``.

    This process takes tasks too, from the same ordered counter as the pool: the pool is
    kept at ``_INFLIGHT_PER_WORKER`` unfinished tasks per worker, this process runs the
    next task whenever the one to deliver is not ready.  Results are still yielded in task
    order (early ones wait; chunk outputs are small, the data they came from is freed).
    On 2 cores a third process would only share the cores (and, spawned, add a second
    start-up); a spawned worker's start-up is covered by this process's work.
    """
    from concurrent.futures.process import BrokenProcessPool

    n = len(tasks)
    size = workers - 1
    limit = _INFLIGHT_PER_WORKER * size
    track = multiprocessing.get_context(method).SimpleQueue()
    pending: dict[int, Any] = {}
    own: dict[int, tuple[bool, Any]] = {}
    procs: dict[int, Any] = {}
    started: dict[int, int] = {}
    clean = False
    import pyarrow as pa

    arrow_threads = pa.cpu_count()
    pa.set_cpu_count(1)  # like the workers: one process per core, no decoding threads
    pool = _pool(size, method, track)
    try:
        nxt = 0
        with _spawn_env(_WORKER_ENV), _quiet_fork():  # the first submits start the workers
            while nxt < min(n, limit):
                pending[nxt] = _submit(pool, func, nxt, tasks[nxt])
                nxt += 1
        procs.update(getattr(pool, "_processes", None) or {})
        i = 0
        while i < n:
            _drain(track, started)
            busy = sum(1 for f in pending.values() if not f.done())
            while nxt < n and busy < limit:
                pending[nxt] = _submit(pool, func, nxt, tasks[nxt])
                nxt += 1
                busy += 1
                procs.update(getattr(pool, "_processes", None) or {})
            if i in own:
                ok, value = own.pop(i)
                yield i, ok, value
                i += 1
                continue
            fut = pending.get(i)
            if fut is not None and not fut.done() and nxt < n:
                j = nxt  # this process takes the next task while the pool works
                nxt += 1
                try:
                    own[j] = (True, func(tasks[j]))
                except PeaksiftError as exc:
                    own[j] = (False, exc)
                continue
            if fut is None:  # pragma: no cover - every index is either own or pending
                raise ExecutionError(f"internal error: task {i} was never started")
            del pending[i]
            try:
                value = fut.result()
            except PeaksiftError as exc:
                _drain(track, started)
                yield i, False, exc
                i += 1
                continue
            except BrokenProcessPool:
                unfinished = {i, *(k for k, f in pending.items() if not f.done())}
                raise _broken_pool_error(procs, track, started, unfinished, n,
                                         describe) from None
            _drain(track, started)
            yield i, True, value
            i += 1
        clean = True
    finally:
        if clean:
            pool.shutdown(wait=True)
        else:  # error, early stop or KeyboardInterrupt: do not wait for running chunks
            _stop_pool(pool, procs)
        track.close()
        pa.set_cpu_count(arrow_threads)


def _start_local_cluster(workers: int, start_method: str = "auto") -> Any:
    """A LocalCluster of ``workers`` single-threaded processes, quiet, no dashboard.

    The nannies start their workers with ``start_method`` (``"auto"``: fork on Linux; see
    the module guide): forked from this process, a worker starts with distributed, the
    chunk work and its kernels already loaded.

    Dask's nannies start workers with ``MALLOC_TRIM_THRESHOLD_=65536``, which makes glibc
    return freed memory to the system at once: every large temporary array of a chunk is
    then mapped afresh, page by page (measured here: ~9x the page faults and ~40% more CPU
    per chunk).  Workers of the clusters we start keep the default allocator behaviour.
    Their statistical profiler (a thread sampling the running task every 10 ms, for the
    dashboard) is off too, since these clusters have no dashboard (~5% of a chunk's CPU).
    """
    import logging

    import dask
    from distributed import LocalCluster

    env = dict(dask.config.get("distributed.nanny.pre-spawn-environ", {}) or {})
    env.pop("MALLOC_TRIM_THRESHOLD_", None)
    method = _resolve_start(start_method)
    with dask.config.set({"distributed.nanny.pre-spawn-environ": env,
                          "distributed.worker.multiprocessing-method": method,
                          "distributed.worker.profile.enabled": False}), _quiet_fork():
        # dashboard off; the scheduler's small HTTP endpoint takes a free port, not 8787
        return LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                            dashboard_address=None, silence_logs=logging.ERROR,
                            scheduler_kwargs={"dashboard": False, "dashboard_address": ":0"})


def _connect(address: str | None, workers: int, timeout: str = "30s",
             start_method: str = "auto") -> tuple[Any, Any]:
    """Return (client, cluster_we_started_or_None)."""
    try:
        from distributed import Client
    except ImportError:
        raise ExecutionError(
            "engine='dask' needs the dask and distributed packages: "
            "pip install 'peaksift[distributed]'"
        ) from None
    if address is None:
        cluster = _start_local_cluster(workers, start_method)
        try:
            client = Client(cluster, set_as_default=False)
            client.run(_install_exit_fast)  # our own workers only, never a user's cluster
            return client, cluster
        except BaseException:
            cluster.close()
            raise
    try:
        return Client(address, set_as_default=False, timeout=timeout), None
    except (OSError, TimeoutError) as exc:
        raise ExecutionError(
            f"cannot connect to the Dask scheduler at {address!r} ({type(exc).__name__}: "
            f"{exc}); check the address and that the scheduler is running, or leave the "
            "address unset to start a local cluster"
        ) from None


def _dask_threads(client: Any) -> int:
    try:
        info = client.scheduler_info()
        return max(1, sum(int(w.get("nthreads", 1)) for w in info.get("workers", {}).values()))
    except (KeyError, TypeError, AttributeError, OSError):  # pragma: no cover
        return 1


def _run_dask(func: Callable[[Any], Any], tasks: Sequence[Any], workers: int,
              address: str | None, describe: Callable[[int], str], info: dict[str, Any],
              method: str) -> _Run:
    from distributed import KilledWorker

    n = len(tasks)
    client, cluster = _connect(address, workers, start_method=method)
    pending: dict[int, Any] = {}
    try:
        threads = _dask_threads(client)
        info["workers"] = threads
        info["address"] = address if address is not None else cluster.scheduler_address
        limit = _INFLIGHT_PER_WORKER * threads
        token = uuid.uuid4().hex[:12]
        nxt = 0
        for i in range(n):
            while nxt < n and nxt < i + limit:
                pending[nxt] = client.submit(func, tasks[nxt], key=f"peaksift-{token}-{nxt}",
                                             pure=False)
                nxt += 1
            fut = pending.pop(i)
            try:
                value = fut.result()
            except PeaksiftError as exc:
                yield i, False, exc
                continue
            except KilledWorker as exc:
                # tasks queued on the same worker may have failed with it; name them too
                also = [j for j, f in pending.items() if f.status == "error"]
                detail = f"KilledWorker: {exc}" + (
                    f" (tasks {', '.join(map(str, also))} failed with it)" if also else "")
                raise _dead_worker_error(
                    "Dask worker", i, n, describe, [i, *pending], detail,
                    "the worker process running it was killed or crashed (out of memory?): "
                    "lower chunk_events, or run engine='serial' to see the underlying error",
                ) from None
            except ModuleNotFoundError as exc:
                if "peaksift" in str(exc):
                    raise ExecutionError(
                        f"the Dask workers cannot import peaksift ({exc}); install the same "
                        "peaksift version in every worker's environment"
                    ) from None
                raise
            finally:
                fut.release()
            yield i, True, value
    finally:
        if pending:
            with contextlib.suppress(OSError, RuntimeError, TimeoutError):  # scheduler gone
                client.cancel(list(pending.values()))
        client.close()
        if cluster is not None:
            cluster.close()


def _run(func: Callable[[Any], Any], tasks: Sequence[Any], *, engine: str,
         workers: int | None, address: str | None, describe: Callable[[int], str],
         info: dict[str, Any], parent_helps: bool = False,
         start_method: str = "auto") -> _Run:
    n_workers = workers or _default_workers()
    address = address or None  # "" (the config's default) means: start a local cluster
    if engine != "dask":
        address = None  # only Dask connects to a scheduler
    info.update(engine=engine, workers=1 if engine == "serial" else n_workers, address=address)
    if engine == "serial":
        return _run_serial(func, tasks)
    method = _resolve_start(start_method)
    if address is None:  # we start the worker processes
        info["start_method"] = method
        if method == "fork":
            _prepare_to_fork(func)
    if engine == "processes":
        if parent_helps and n_workers > 1 and len(tasks) > 1:
            return _run_processes_helping(func, tasks, n_workers, describe, method)
        return _run_processes(func, tasks, n_workers, describe, method)
    return _run_dask(func, tasks, n_workers, address, describe, info, method)


def _progress(total: int, desc: str, unit: str, enabled: bool) -> Any:
    from tqdm.auto import tqdm

    return tqdm(total=total, desc=desc, unit=unit, disable=not enabled, unit_scale=True,
                leave=False)


# ------------------------------------------------------------------------------ map_tasks
def map_tasks(func: Callable[[Any], Any], specs: Sequence[Any], *, engine: str = "serial",
              workers: int | None = None, address: str | None = None,
              progress: bool = False, desc: str = "tasks",
              start_method: str = "auto") -> list[Any]:
    """Apply ``func`` to every task description, on the chosen engine; results in order.

    Parameters
    ----------
    func : callable
        A picklable (module-level) function of one argument, e.g.
        ``peaksift.stats.toys.run_toy_batch``.  It should be pure: the same spec gives the
        same result wherever it runs (seed random numbers from the spec).
    specs : sequence
        Picklable task descriptions.
    engine, workers, address, start_method
        As for :func:`collect`.
    progress : bool
        Show a progress bar (one step per finished task).
    desc : str
        Label of the progress bar and of error messages.

    Returns
    -------
    list
        ``[func(s) for s in specs]``, whichever engine computed it.

    Raises
    ------
    ExecutionError
        A worker died (the message names the task), or ``func`` cannot be pickled.
    PeaksiftError
        The first error a task raised, in task order.
    """
    specs = list(specs)
    _check_engine(engine, workers, address, start_method)
    if not specs:
        return []
    if engine == "processes":
        _check_picklable(func, f"the function {getattr(func, '__name__', func)!r}")

    def describe(i: int) -> str:
        text = repr(specs[i])
        return f"{desc.removesuffix('s')} {i} ({text[:120]})"

    info: dict[str, Any] = {}
    out: list[Any] = []
    bar = _progress(len(specs), desc, "task", progress)
    run = None
    try:
        run = _run(func, specs, engine=engine, workers=workers, address=address,
                   describe=describe, info=info, start_method=start_method)
        for _, ok, value in run:
            if not ok:
                raise value
            out.append(value)
            bar.update(1)
    finally:
        if run is not None:
            run.close()  # stop the workers now, not when the traceback is freed
        bar.close()
    return out


# -------------------------------------------------------------------------------- collect
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


def _plan(source: Any, chunk_events: int, skip_bad_files: bool
          ) -> tuple[list[Any], list[SkippedFile], list[str]]:
    """Chunks of every readable file, the files skipped at planning, all files."""
    from .events import list_files, plan_chunks

    files = [str(f) for f in list_files(source)]
    if not skip_bad_files:
        return list(plan_chunks(files, chunk_events=chunk_events)), [], files
    specs: list[Any] = []
    skipped: list[SkippedFile] = []
    offset = 0
    for f in files:
        try:
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
    specs, skipped, files = _plan(source, int(chunk_events), skip_bad_files)
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


@dataclass(frozen=True)
class _ChunkTask:
    """``process_chunk`` with the selection bound; picklable, unlike a lambda."""

    selection: Selection

    def __call__(self, spec: Any) -> ChunkOutput:
        return process_chunk(spec, self.selection)

    def prepare(self) -> None:
        """Load the chunk work in this process before workers are forked from it: the
        reader and pairing modules, and numba's kernels (its first-call set-up is most of
        a worker's start-up)."""
        from . import events  # noqa: F401
        from .pairing import _load_kernels

        _load_kernels()

