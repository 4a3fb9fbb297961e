"""Opening an event source: Parquet and Arrow IPC (Feather) files, local or behind an fsspec
URL, and in-memory Arrow tables, all behind the few calls the reader makes.

The reader speaks to a Parquet file's interface (``schema_arrow``, row groups, leaf column
paths, ``read_row_groups``).  :class:`TableSource` gives the same interface to record
batches: those of an Arrow IPC file (each record batch is a row group; a local file is
memory-mapped, so reading a batch copies nothing) or of a table or record-batch reader held
in memory.  :func:`open_source` picks the format from the file's first bytes, not its name.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from ..errors import InputError

__all__ = ["TableSource", "is_url", "open_source", "source_size"]

_PARQUET_MAGIC = b"PAR1"
_ARROW_MAGIC = b"ARROW1"


def is_url(loc: Any) -> bool:
    """True for ``protocol://...`` text (an fsspec URL), false for local paths."""
    return isinstance(loc, str) and "://" in loc and not loc.startswith("file://")


def local_path(loc: Any) -> Path | str:
    """A local path as :class:`~pathlib.Path` (``file://`` stripped); a URL stays text."""
    if isinstance(loc, str) and loc.startswith("file://"):
        return Path(loc[len("file://"):])
    return loc if is_url(loc) else Path(loc)


def _leaf_paths(name: str, t: pa.DataType) -> list[str]:
    """Leaf column paths as Parquet names them (``muon.list.element.pt``)."""
    if pa.types.is_list(t) or pa.types.is_large_list(t):
        return _leaf_paths(f"{name}.list.element", t.value_type)
    if pa.types.is_struct(t):
        return [p for i in range(t.num_fields)
                for p in _leaf_paths(f"{name}.{t.field(i).name}", t.field(i).type)]
    return [name]


def column_of(path: str, names: Sequence[str]) -> str:
    """The top-level column a leaf path belongs to (column names may hold dots themselves:
    ``muon.pt.list.element`` is column ``muon.pt`` when there is one); ``names`` longest
    first."""
    for n in names:
        if path == n or path.startswith(n + "."):
            return n
    return path.split(".")[0]


def _values_of(arr: pa.Array, parts: Sequence[str]) -> int:
    """Number of leaf values under ``arr`` along the path ``parts`` (list levels counted by
    their offsets, so a sliced batch counts only its own values)."""
    if not parts:
        return len(arr)
    if parts[0] == "list" and isinstance(arr, (pa.ListArray, pa.LargeListArray)):
        o = arr.offsets
        lo, hi = (int(o[0].as_py()), int(o[-1].as_py())) if len(o) else (0, 0)
        return _values_of(arr.values.slice(lo, hi - lo), parts[2:])
    if isinstance(arr, pa.StructArray):
        return _values_of(arr.field(parts[0]), parts[1:])
    return len(arr)


class TableSource:
    """Record batches with the part of the Parquet file interface the reader uses."""

    def __init__(self, batches: Sequence[pa.RecordBatch], schema: pa.Schema) -> None:
        self.batches = [b for b in batches if b.num_rows] or list(batches[:1])
        self.schema_arrow = schema
        self.leaf_paths = [p for f in schema for p in _leaf_paths(f.name, f.type)]
        self.row_group_sizes = tuple(b.num_rows for b in self.batches)
        self.names = sorted(schema.names, key=len, reverse=True)
        self.num_rows = sum(self.row_group_sizes)

    @classmethod
    def from_table(cls, table: pa.Table) -> TableSource:
        return cls(table.to_batches(), table.schema)

    def read_row_groups(self, row_groups: Sequence[int], columns: Sequence[str] | None = None,
                        use_threads: bool = True) -> pa.Table:
        del use_threads
        t = pa.Table.from_batches([self.batches[i] for i in row_groups], self.schema_arrow)
        return t if columns is None else t.select(list(dict.fromkeys(
            column_of(c, self.names) for c in columns)))

    def read(self, columns: Sequence[str] | None = None) -> pa.Table:
        return self.read_row_groups(range(len(self.batches)), columns)

    def leaf_values(self, leaf: str) -> int:
        """Values of one leaf column over all batches (the object capacity of a collection)."""
        top = column_of(leaf, self.names)
        rest = leaf[len(top) + 1:].split(".") if leaf != top else []
        return sum(_values_of(b.column(top), rest) for b in self.batches)


def _open_ipc(buf: Any) -> TableSource:
    try:
        r = pa.ipc.open_file(buf)
        return TableSource([r.get_batch(i) for i in range(r.num_record_batches)], r.schema)
    except pa.ArrowInvalid:
        pass
    if hasattr(buf, "seek"):
        buf.seek(0)
    r = pa.ipc.open_stream(buf)
    return TableSource(list(r), r.schema)


def open_source(loc: Path | str) -> pq.ParquetFile | TableSource:
    """Open a Parquet or Arrow IPC file (local path or fsspec URL), by its first bytes.

    Raises
    ------
    InputError
        The file cannot be opened or is neither Parquet nor Arrow IPC.
    """
    try:
        if is_url(loc):
            import fsspec

            fs, path = fsspec.core.url_to_fs(loc)
            f = fs.open(path, "rb")
            magic = f.read(6)
            f.seek(0)
            if magic[:4] == _PARQUET_MAGIC:  # read through the file object: only what is asked
                return pq.ParquetFile(f)
            with f:
                return _open_ipc(pa.BufferReader(pa.py_buffer(f.read())))
        with open(loc, "rb") as f:
            magic = f.read(6)
        if magic == _ARROW_MAGIC or magic[:4] == b"\xff\xff\xff\xff":
            return _open_ipc(pa.memory_map(str(loc)))
        return pq.ParquetFile(loc)  # Parquet, or the reason it is not
    except InputError:
        raise
    except (pa.ArrowException, OSError, ValueError, ImportError) as exc:
        raise InputError(
            f"cannot read '{loc}' as Parquet or Arrow IPC ({' '.join(str(exc).split())}); the "
            "file is corrupt, truncated or in another format: regenerate it or leave it out of "
            "the input") from None


def leaf_paths(handle: Any) -> list[str]:
    if isinstance(handle, TableSource):
        return handle.leaf_paths
    return [handle.schema.column(i).path for i in range(len(handle.schema))]


def row_group_sizes(handle: Any) -> tuple[int, ...]:
    if isinstance(handle, TableSource):
        return handle.row_group_sizes
    md = handle.metadata
    return tuple(md.row_group(i).num_rows for i in range(md.num_row_groups))


def leaf_value_count(handle: Any, leaf: str, index: int) -> int:
    """Values of one leaf column in the whole file (Parquet: from the footer)."""
    if isinstance(handle, TableSource):
        return handle.leaf_values(leaf)
    md = handle.metadata
    return int(np.sum([md.row_group(i).column(index).num_values
                       for i in range(md.num_row_groups)], dtype=np.int64))


def source_size(loc: Any) -> int:
    """Bytes of a file (0 when unknown or in memory)."""
    try:
        if is_url(loc):
            import fsspec

            fs, p = fsspec.core.url_to_fs(loc)
            return int(fs.size(p) or 0)
        return os.stat(loc).st_size
    except (OSError, ValueError, TypeError, ImportError):
        return 0
