"""The map step: what one chunk needs (:class:`Selection`), what it gives
(:class:`ChunkOutput`) and the pure function between them (:func:`process_chunk`).

Everything here is picklable and runs unchanged in this process, in a pool worker or on a
Dask worker.  :class:`_ChunkTask` binds a selection to :func:`process_chunk` for the
engines, and knows how to get a process ready before workers are forked from it.
"""

from __future__ import annotations

import time
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import ConfigError, DataWarning
from ..histogram import MassHistogram, in_range


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
        Fit window ``[lo, hi]`` in GeV (both ends inside, as the histogram's last bin);
        candidate masses inside it are kept for unbinned fits.  Default: the histogram range.
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
    hypotheses, identification, assignment
        Mass hypotheses per leg, the dE/dx response and the assignment rule, passed to
        :func:`peaksift.pair` unchanged.
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
    hypotheses: tuple[str, ...] | None = None
    identification: Any = None
    assignment: str = "both"

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
    from ..events import read_chunk
    from ..pairing import pair

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
            event_offset=int(spec.first_event), hypotheses=selection.hypotheses,
            identification=selection.identification, assignment=selection.assignment,
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
    inwin = in_range(mass, lo, hi)
    inrange = in_range(mass, edges[0], edges[-1])
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
        from .. import events  # noqa: F401
        from ..pairing import load_kernels

        load_kernels()
