"""Candidates: the pairs as flat numpy columns, and the rules a pairing may use."""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..errors import InputError
from ..histogram import in_range

CHOOSE_RULES = ("all", "leading", "max_sum_pt", "closest")
#: what to keep when an unlike pair has two mass assignments (see the module guide)
ASSIGNMENT_RULES = ("both", "more_probable")
_CHARGE = {None: 0, "any": 0, "opposite": -1, "same": 1}
_CUTFLOW_KEYS = ("events_in", "events_after_event_cut", "events_with_pair", "candidates")
_KINEMATIC_FIELDS = ("pt", "eta", "phi", "mass")
_NO_INDEX = np.zeros(1, dtype=np.int64)


# ------------------------------------------------------------------------ result
@dataclass(frozen=True, eq=False)
class Candidates:
    """Di-object candidates as flat numpy columns (one entry per candidate).

    Attributes
    ----------
    mass, pt, rapidity : ndarray (float64)
        Invariant mass (GeV), transverse momentum (GeV) and rapidity of the pair.
    weight : ndarray (float64)
        The event's weight (1 when the events carry no ``weight`` field).
    event_index : ndarray (int64)
        Index of the event (plus the ``event_offset`` given to :func:`pair`, so chunks keep
        global indices).
    first_index, second_index : ndarray (int64)
        Index of each object within its event's collection, as read (before cuts).
    cutflow : dict
        ``events_in``, ``events_after_event_cut``, ``events_with_pair`` (events with at
        least one pair passing every requirement), ``candidates``.
    multiplicity : ndarray (int64) or None
        With ``choose="all"``: the number of candidates from the same event, per candidate
        (e.g. weight by ``1 / multiplicity`` to count each event once).  None otherwise.
    choose : str
        The rule that produced the candidates.
    hypotheses : (str, str) or None
        The mass hypothesis of each leg (None: the collections' own masses).
    """

    mass: np.ndarray
    pt: np.ndarray
    rapidity: np.ndarray
    weight: np.ndarray
    event_index: np.ndarray
    first_index: np.ndarray
    second_index: np.ndarray
    cutflow: dict[str, int] = field(default_factory=dict)
    multiplicity: np.ndarray | None = None
    choose: str = "all"
    hypotheses: tuple[str, str] | None = None

    _COLUMNS = ("mass", "pt", "rapidity", "weight", "event_index", "first_index",
                "second_index")

    def __len__(self) -> int:
        return int(self.mass.size)

    def __getitem__(self, index: Any) -> Candidates | dict[str, Any]:
        """``c[10:20]``, ``c[c.mass > 120]`` or ``c[[3, 5]]``: the selected candidates as a new
        :class:`Candidates` (every column, the multiplicity too; ``cutflow`` still describes
        the selection that made the whole set).  ``c[i]`` with one integer: that candidate's
        columns as a dict of numbers."""
        if isinstance(index, (int, np.integer)):
            n = len(self)
            if not -n <= int(index) < n:
                raise InputError(f"candidate {int(index)} does not exist: there are {n}")
            out = {k: getattr(self, k)[index].item() for k in self._COLUMNS}
            if self.multiplicity is not None:
                out["multiplicity"] = int(self.multiplicity[index])
            return out
        try:
            cols = {k: getattr(self, k)[index] for k in self._COLUMNS}
        except (IndexError, TypeError, ValueError) as exc:
            raise InputError(f"cannot select candidates with {type(index).__name__} "
                             f"({exc}); use a slice, a boolean mask of length {len(self)} "
                             "or an array of integer positions") from None
        if cols["mass"].ndim != 1:
            raise InputError("selecting candidates needs a one-dimensional index")
        mult = None if self.multiplicity is None else self.multiplicity[index]
        return dataclasses.replace(self, **cols, cutflow=dict(self.cutflow), multiplicity=mult)

    def __repr__(self) -> str:
        flow = ", ".join(f"{k}={v}" for k, v in self.cutflow.items())
        return f"Candidates({len(self)} candidates, choose={self.choose!r}, {flow})"

    @classmethod
    def empty(cls, choose: str = "all") -> Candidates:
        """No candidates, zero counters."""
        f = np.zeros(0)
        i = np.zeros(0, dtype=np.int64)
        return cls(f, f.copy(), f.copy(), f.copy(), i, i.copy(), i.copy(),
                   dict.fromkeys(_CUTFLOW_KEYS, 0),
                   i.copy() if choose == "all" else None, choose)

    @classmethod
    def concatenate(cls, parts: Sequence[Candidates]) -> Candidates:
        """Join candidates from several chunks: columns concatenated, counters summed.

        Event indices are kept as they are (give each chunk its ``event_offset`` when
        pairing so they are global).  All parts must come from the same ``choose`` rule.
        """
        parts = list(parts)
        if not parts:
            return cls.empty()
        for p in parts:
            if not isinstance(p, Candidates):
                raise InputError(
                    f"Candidates.concatenate takes Candidates, got {type(p).__name__}")
        rules = {p.choose for p in parts}
        if len(rules) > 1:
            raise InputError(
                f"cannot concatenate candidates made with different choose rules "
                f"({', '.join(sorted(rules))}); pair every chunk with the same options")
        cols = {c: np.concatenate([getattr(p, c) for p in parts]) for c in cls._COLUMNS}
        keys: list[str] = []
        for p in parts:
            keys += [k for k in p.cutflow if k not in keys]
        flow = {k: int(sum(int(p.cutflow.get(k, 0)) for p in parts)) for k in keys}
        mult = None
        if all(p.multiplicity is not None for p in parts):
            mult = np.concatenate([p.multiplicity for p in parts])
        hyps = {p.hypotheses for p in parts}
        if len(hyps) > 1:
            raise InputError("cannot concatenate candidates made with different mass "
                             "hypotheses; pair every chunk with the same options")
        return cls(**cols, cutflow=flow, multiplicity=mult, choose=parts[0].choose,
                   hypotheses=parts[0].hypotheses)

    def select(self, mask: Any) -> Candidates:
        """The candidates where the boolean ``mask`` (one entry per candidate) is true.

        The cut flow is copied unchanged (it describes the pairing).
        """
        m = np.asarray(mask)
        if m.dtype != np.bool_ or m.shape != self.mass.shape:
            raise InputError(
                f"select needs a boolean mask of {len(self)} entries, got {m.dtype} {m.shape}")
        cols = {c: getattr(self, c)[m] for c in self._COLUMNS}
        mult = None if self.multiplicity is None else self.multiplicity[m]
        return dataclasses.replace(self, **cols, cutflow=dict(self.cutflow), multiplicity=mult)

    # ------------------------------------------------ Arrow and files (candidates_io)
    def to_arrow(self) -> Any:
        """The candidates as a ``pyarrow.Table`` (one row each; cut flow and rule in the
        schema metadata); see :mod:`peaksift.candidates_io`."""
        from ..candidates_io import to_arrow

        return to_arrow(self)

    @classmethod
    def from_arrow(cls, table: Any) -> Candidates:
        """Candidates from :meth:`to_arrow`'s table (or a record-batch reader of it)."""
        from ..candidates_io import from_arrow

        return from_arrow(cls, table)

    def save(self, path: Any) -> Any:
        """Write to ``path``: Parquet (``.parquet``) or Arrow IPC (``.arrow``, ``.feather``)."""
        from ..candidates_io import save

        return save(self, path)

    @classmethod
    def load(cls, path: Any) -> Candidates:
        """Read candidates written by :meth:`save` (a local path or an fsspec URL)."""
        from ..candidates_io import load

        return load(cls, path)

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Candidates):
            return NotImplemented
        return (all(np.array_equal(getattr(self, c), getattr(other, c)) for c in self._COLUMNS)
                and self.cutflow == other.cutflow and self.choose == other.choose
                and (self.multiplicity is None) == (other.multiplicity is None)
                and (self.multiplicity is None
                     or np.array_equal(self.multiplicity, other.multiplicity)))

    __hash__ = None  # type: ignore[assignment]

    def in_window(self, lo: float, hi: float) -> Candidates:
        """Candidates with ``lo <= mass <= hi``: the masses a histogram on ``[lo, hi]`` puts
        in its bins (:func:`peaksift.histogram.in_range`; the last bin is closed).

        The cut flow and multiplicities are copied unchanged: they describe the pairing,
        before the window.
        """
        lo, hi = float(lo), float(hi)
        if not (np.isfinite(lo) and np.isfinite(hi) and hi > lo):
            raise InputError(f"in_window needs finite lo < hi, got ({lo!r}, {hi!r})")
        return self.select(in_range(self.mass, lo, hi))
