"""Candidates on disk and as Arrow tables, for users who continue elsewhere.

:meth:`Candidates.to_arrow` gives a ``pyarrow.Table`` with one row per candidate (``mass``,
``pt``, ``rapidity``, ``weight``, ``event_index``, ``first_index``, ``second_index`` and,
for ``choose="all"``, ``multiplicity``); the cut flow and the ``choose`` rule ride in the
schema metadata under ``peaksift.candidates``.  :meth:`Candidates.save` writes it as Parquet
(``.parquet``) or Arrow IPC (``.arrow``, ``.feather``, ``.ipc``), atomically;
:meth:`Candidates.load` and :meth:`Candidates.from_arrow` read it back exactly.  Any tool
that reads Parquet or Arrow (pandas, polars, DuckDB, plain notebooks) reads the columns.
"""

from __future__ import annotations

import io
import json
import os
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from ._files import atomic_write
from .errors import InputError

__all__ = ["from_arrow", "load", "save", "to_arrow"]

_META = b"peaksift.candidates"
_FLOATS = ("mass", "pt", "rapidity", "weight")
_INTS = ("event_index", "first_index", "second_index")
_ARROW_SUFFIXES = (".arrow", ".feather", ".ipc")


def to_arrow(c: Any) -> pa.Table:
    cols = {k: pa.array(np.asarray(getattr(c, k), dtype=np.float64)) for k in _FLOATS}
    cols.update({k: pa.array(np.asarray(getattr(c, k), dtype=np.int64)) for k in _INTS})
    if c.multiplicity is not None:
        cols["multiplicity"] = pa.array(np.asarray(c.multiplicity, dtype=np.int64))
    meta = {"choose": c.choose, "cutflow": {k: int(v) for k, v in c.cutflow.items()},
            "format_version": 1}
    return pa.table(cols).replace_schema_metadata({_META: json.dumps(meta).encode()})


def from_arrow(cls: Any, table: Any, where: str = "table") -> Any:
    if isinstance(table, pa.RecordBatchReader):
        table = table.read_all()
    if not isinstance(table, pa.Table):
        raise InputError(f"{where}: Candidates.from_arrow takes a pyarrow Table, got "
                         f"{type(table).__name__}")
    missing = [k for k in (*_FLOATS, *_INTS) if k not in table.column_names]
    if missing:
        raise InputError(f"{where}: not peaksift candidates (no column {missing[0]!r}); "
                         f"columns present: {', '.join(table.column_names)}")
    meta_raw = (table.schema.metadata or {}).get(_META)
    meta = json.loads(meta_raw) if meta_raw else {}
    cols = {k: table.column(k).to_numpy().astype(np.float64) for k in _FLOATS}
    cols.update({k: table.column(k).to_numpy().astype(np.int64) for k in _INTS})
    mult = (table.column("multiplicity").to_numpy().astype(np.int64)
            if "multiplicity" in table.column_names else None)
    return cls(**cols, cutflow={str(k): int(v) for k, v in meta.get("cutflow", {}).items()},
               multiplicity=mult, choose=str(meta.get("choose", "all")))


def save(c: Any, path: str | os.PathLike[str]) -> Path:
    path = Path(path)
    table = to_arrow(c)
    buf = io.BytesIO()
    if path.suffix.lower() in _ARROW_SUFFIXES:
        with pa.ipc.new_file(buf, table.schema) as w:
            w.write_table(table)
    elif path.suffix.lower() == ".parquet":
        import pyarrow.parquet as pq

        pq.write_table(table, buf)
    else:
        raise InputError(f"cannot save candidates as {path.name!r}: give a .parquet, .arrow or "
                         ".feather file name")
    atomic_write(path, buf.getvalue())
    return path


def load(cls: Any, path: str | os.PathLike[str]) -> Any:
    from .events.formats import open_source

    handle = open_source(str(path) if "://" in str(path) else Path(path))
    table = handle.read()
    return from_arrow(cls, table, str(path))
