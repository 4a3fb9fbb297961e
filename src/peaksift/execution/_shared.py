"""Several selections on one input, each chunk read once: the map step of
:func:`peaksift.execution.collect_shared`.

Channels of a combination often select different objects or categories from the same
files.  :class:`_SharedChunkTask` reads a chunk once with what every selection reads (the
union of their collections) and runs :func:`~peaksift.execution.process_events` of each
selection on its own view of those events: the collections it did not ask for are left out
of the view, and the reader's repair warnings are kept only for its collections, so each
output is the one :func:`~peaksift.execution.process_chunk` gives for that selection alone.

Selections share a read only when they read alike: the same ``fields``, ``strict``,
``masses`` and ``column_pattern`` (those change what a read returns); collections may
differ.
"""

from __future__ import annotations

import dataclasses
import time
import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from ..errors import ConfigError
from ._chunk import ChunkOutput, Selection, _data_messages, _spec_file, process_events

_READ_ALIKE = ("fields", "strict", "masses", "column_pattern")


def read_selection(selections: Sequence[Selection]) -> Selection:
    """The first selection reading the union of every selection's collections (what the
    shared read and the footer checks use); a ConfigError when they do not read alike."""
    sels = tuple(selections)
    if not sels or not all(isinstance(s, Selection) for s in sels):
        raise ConfigError("collect_shared needs a non-empty sequence of "
                          "peaksift.execution.Selection")
    for key in _READ_ALIKE:
        values = {repr(getattr(s, key)) for s in sels}
        if len(values) > 1:
            raise ConfigError(f"collect_shared: the selections differ in {key} "
                              f"({', '.join(sorted(values))}), so one read cannot serve them; "
                              "make it the same, or collect them one by one")
    union = tuple(dict.fromkeys(c for s in sels for c in s.collections))
    return dataclasses.replace(sels[0], collections=union)


def _own_messages(messages: tuple[str, ...], collections: Sequence[str],
                  others: Sequence[str]) -> tuple[str, ...]:
    """The reader's repair messages as a read of ``collections`` alone would give them:
    its per-collection parts (``'name': ... (of N)``, joined by ``; ``) for the other
    collections read are removed, and a message left with none is dropped."""
    if not others:
        return messages
    out = []
    for msg in messages:
        head, sep, rest = msg.partition(": ")
        if not sep or not head.startswith("dropped objects from "):
            out.append(msg)
            continue
        parts = rest.split("; ")
        tail = [p for p in parts if not p.startswith("'")]
        mine = [p for p in parts if p.startswith("'") and not any(
            p.startswith(f"'{o}': ") for o in others)]
        if mine:
            out.append(head + sep + "; ".join(mine + tail))
        elif not any(p.startswith("'") for p in parts):
            out.append(msg)
    return tuple(out)


@dataclass(frozen=True)
class _SharedChunkTask:
    """Read one chunk once and run every selection on it; picklable (sent to workers)."""

    selections: tuple[Selection, ...]

    def __call__(self, spec: Any) -> tuple[ChunkOutput, ...]:
        from ..events import read_chunk

        t0 = time.perf_counter()
        read = read_selection(self.selections)
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            events = read_chunk(spec, list(read.collections), fields=read.fields,
                                strict=read.strict,
                                masses=dict(read.masses) if read.masses else None,
                                column_pattern=read.column_pattern)
        messages = _data_messages(caught)
        shared = (time.perf_counter() - t0) / len(self.selections)
        outs = []
        for sel in self.selections:
            others = [c for c in read.collections if c not in sel.collections]
            view = events[[f for f in events.fields if f not in others]] if others else events
            out = process_events(view, sel, first_event=int(spec.first_event),
                                 file=_spec_file(spec))
            outs.append(dataclasses.replace(
                out, data_warnings=_own_messages(messages, sel.collections, others)
                + out.data_warnings, seconds=out.seconds + shared))
        return tuple(outs)

    def prepare(self) -> None:
        """As :meth:`_ChunkTask.prepare`: load the chunk work before workers fork."""
        from .. import events  # noqa: F401
        from ..pairing import load_kernels

        load_kernels()
