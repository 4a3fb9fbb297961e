"""Reading row groups into numpy buffers, repairing bad objects, and building the awkward array."""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import awkward as ak
import numpy as np
import pyarrow as pa

from .. import kinematics as _kin
from ..errors import DataWarning, InputError
from .files import _ENERGY_NAMES, _KIN_OUT, _MASS_NAMES, _RESERVED
from .formats import leaf_value_count
from .schema import _FileInfo, _kin_source_fields, _open

# --------------------------------------------------------------------------- reading


@dataclass
class _Piece:
    """Flat numpy buffers of one read, kept per arrow chunk so the final build copies once."""

    n_events: int
    # collection -> (offsets per chunk, each starting at 0; field -> arrays per chunk)
    colls: dict[str, tuple[list[np.ndarray], dict[str, list[Any]]]] = field(default_factory=dict)
    scalars: dict[str, list[Any]] = field(default_factory=dict)
    others: dict[str, list[Any]] = field(default_factory=dict)
    order: list[tuple[str, str]] = field(default_factory=list)   # (kind, name) in file order
    counts: dict[str, dict[str, int]] = field(default_factory=dict)
    n_objects: dict[str, int] = field(default_factory=dict)


def _flat_numpy(arr: pa.Array) -> Any:
    """Flat numpy array (numbers, bools; zero-copy where arrow allows) or an awkward layout."""
    t = arr.type
    if pa.types.is_floating(t) or pa.types.is_integer(t) or pa.types.is_boolean(t):
        return arr.to_numpy(zero_copy_only=False)
    return ak.from_arrow(arr, highlevel=False)


def _list_chunk(ch: pa.Array) -> tuple[np.ndarray, pa.Array, int, int]:
    """Offsets of one arrow list chunk (starting at 0), its values, and the value slice."""
    o = np.asarray(ch.offsets)
    start, stop = int(o[0]), int(o[-1])
    return (o - start if start else o), ch.values, start, stop


def _struct_child(values: pa.Array, name: str) -> pa.Array:
    child = values.field(name)
    if values.offset:
        child = child.slice(values.offset, len(values))
    return child


_PROBLEMS = {
    "nonfinite": "NaN or infinite kinematics",
    "negative_pt": "negative pt",
    "negative_energy": "negative energy",
    "energy_below_momentum": "energy below momentum",
    "negative_mass": "negative mass",
}


def _repair(name: str, data: dict[str, np.ndarray], cart: bool, masses: Mapping[str, float],
            counts: dict[str, int]) -> np.ndarray:
    """Turn the kinematic fields into pt, eta, phi, mass (in place) and return the keep mask."""
    if cart:
        px, py, pz, en = (data.pop(k) for k in ("px", "py", "pz", "energy"))
        dt = np.result_type(px, py, pz, en)
        rtol = 1e-6 if (np.issubdtype(dt, np.floating) and np.finfo(dt).bits < 64) else 1e-12
        finite = np.isfinite(px) & np.isfinite(py) & np.isfinite(pz) & np.isfinite(en)
        neg_e = finite & (en < 0)
        with np.errstate(invalid="ignore", divide="ignore"):
            pxf, pyf, pzf, enf = (np.asarray(a, dtype=np.float64) for a in (px, py, pz, en))
            m2, below = _kin.mass_squared(enf, pxf, pyf, pzf, rtol)
            pt = np.hypot(pxf, pyf)
            eta = np.arcsinh(pzf / pt)
        below &= finite & ~neg_e
        zero_pt = finite & (pt == 0)
        data["pt"], data["eta"], data["phi"] = pt, eta, np.arctan2(pyf, pxf)
        with np.errstate(invalid="ignore"):
            data["mass"] = np.sqrt(np.where(below, 0.0, m2))
        counts["nonfinite"] = int(np.count_nonzero(~finite | zero_pt))
        counts["negative_energy"] = int(np.count_nonzero(neg_e))
        counts["energy_below_momentum"] = int(np.count_nonzero(below))
        return finite & ~zero_pt & ~neg_e & ~below
    pt, eta, phi = data["pt"], data["eta"], data["phi"]
    for k in ("pt", "eta", "phi"):
        if not np.issubdtype(data[k].dtype, np.floating):
            data[k] = data[k].astype(np.float64)
    pt, eta, phi = data["pt"], data["eta"], data["phi"]
    if "mass" not in data:
        data["mass"] = np.full(len(pt), float(masses.get(name, 0.0)), dtype=pt.dtype)
    elif not np.issubdtype(data["mass"].dtype, np.floating):
        data["mass"] = data["mass"].astype(np.float64)
    mass = data["mass"]
    finite = np.isfinite(pt) & np.isfinite(eta) & np.isfinite(phi) & np.isfinite(mass)
    neg_pt = finite & (pt < 0)
    keep = finite & ~neg_pt
    neg_m = keep & (mass < 0)
    n_neg_mass = 0
    if neg_m.any():
        rel = 1e-3 if np.finfo(mass.dtype).bits < 64 else 1e-6
        with np.errstate(over="ignore"):
            p = np.abs(pt) * np.cosh(eta.astype(np.float64))
        tiny = neg_m & (-mass <= rel * p)
        data["mass"] = mass = np.where(tiny, mass.dtype.type(0), mass)
        real = neg_m & ~tiny
        n_neg_mass = int(np.count_nonzero(real))
        keep &= ~real
    counts["nonfinite"] = int(np.count_nonzero(~finite))
    counts["negative_pt"] = int(np.count_nonzero(neg_pt))
    counts["negative_mass"] = n_neg_mass
    return keep


def _read_piece(info: _FileInfo, sel: tuple, row_groups: Sequence[int], first_event: int,
                masses: Mapping[str, float], strict: bool) -> _Piece:
    colls, extras, scal, others = sel
    paths: list[str] = []
    for c in colls:
        for f in (*_kin_source_fields(c), *extras[c.name]):
            paths.extend(c.paths[f])
    for s in scal:
        paths.extend(info.scalar_paths[s])
    for o in others:
        for lp in info.others[o].paths.values():
            paths.extend(lp)
    if not paths and not row_groups:
        return _Piece(0)
    pf = info.handle if info.handle is not None else _open(info.path)
    try:
        # Arrow's decoding pool only where it has more than one thread: a forked worker
        # (one thread, set by its parent before the fork) reads in its own thread, so it
        # never waits on a pool thread that did not survive the fork (a hang seen once)
        table = pf.read_row_groups(list(row_groups), columns=paths,
                                   use_threads=pa.cpu_count() > 1)
    except (pa.ArrowException, OSError, ValueError) as exc:
        raise InputError(
            f"cannot read row groups {list(row_groups)} of '{info.path}' "
            f"({' '.join(str(exc).split())}); the file is corrupt or truncated: regenerate it "
            "or leave it out of the input") from None
    n = table.num_rows
    piece = _Piece(n)
    for c in colls:
        names = (*_kin_source_fields(c), *extras[c.name])
        if c.layout == "records":
            chunks = [_list_chunk(ch) for ch in table.column(c.name).chunks]
            offs = [o for o, _, _, _ in chunks]
            cols = {f: [_flat_numpy(_struct_child(v, f).slice(a, b - a)) for _, v, a, b in chunks]
                    for f in names}
        else:
            colarrs = {f: table.column(c.columns[f]) for f in names}
            if len({tuple(len(ch) for ch in ca.chunks) for ca in colarrs.values()}) > 1:
                colarrs = {f: pa.chunked_array([ca.combine_chunks()]) for f, ca in colarrs.items()}
            offs, cols, ref = [], {}, None
            for f in names:
                chunks = [_list_chunk(ch) for ch in colarrs[f].chunks]
                if ref is None:
                    offs, ref = [o for o, _, _, _ in chunks], c.columns[f]
                else:
                    row = 0
                    for o_ref, (o, _, _, _) in zip(offs, chunks):
                        if not np.array_equal(o, o_ref):
                            bad = row + int(np.flatnonzero(np.diff(o) != np.diff(o_ref))[0])
                            raise InputError(
                                f"columns '{ref}' and '{c.columns[f]}' of '{info.path}' have "
                                f"different numbers of entries in event {first_event + bad}; "
                                f"sibling columns of collection '{c.name}' must have one entry "
                                "per object")
                        row += len(o) - 1
                cols[f] = [_flat_numpy(v.slice(a, b - a)) for _, v, a, b in chunks]
        for f in list(cols):
            if f in _MASS_NAMES and f != "mass" and c.coords == "polar":
                cols["mass"] = cols.pop(f)
            if f in _ENERGY_NAMES and f != "energy" and c.coords == "cartesian":
                cols["energy"] = cols.pop(f)
        counts: dict[str, int] = dict.fromkeys(_PROBLEMS, 0)
        out_cols: dict[str, list[Any]] = {}
        out_offs: list[np.ndarray] = []
        row = 0
        n_obj = 0
        for i, o in enumerate(offs):
            data = {f: v[i] for f, v in cols.items()}
            cc: dict[str, int] = {}
            keep = _repair(c.name, data, c.coords == "cartesian", masses, cc)
            n_obj += len(keep)
            for k, v in cc.items():
                counts[k] += v
            n_ev = len(o) - 1
            if not keep.all():
                ev = np.repeat(np.arange(n_ev), np.diff(o))
                if strict:
                    problem = next(k for k, v in cc.items() if v)
                    first = first_event + row + int(ev[np.flatnonzero(~keep)[0]])
                    raise InputError(
                        f"'{info.path}', collection '{c.name}': {cc[problem]} objects have "
                        f"{_PROBLEMS[problem]} (first in event {first}); repair the file, or "
                        "read with strict=False to drop such objects with a warning")
                o = np.concatenate([[0], np.cumsum(np.bincount(ev[keep], minlength=n_ev))])
                data = {f: (v[keep] if isinstance(v, np.ndarray) else ak.Array(v)[keep].layout)
                        for f, v in data.items()}
            out_offs.append(o)
            ordered = {k: data.pop(k) for k in _KIN_OUT}
            for f in extras[c.name]:
                if f in data:
                    ordered["raw_" + f if f in _RESERVED else f] = data.pop(f)
            for f, v in ordered.items():
                out_cols.setdefault(f, []).append(v)
            row += n_ev
        if not offs:
            out_cols = {f: [] for f in (*_KIN_OUT, *(("raw_" + f if f in _RESERVED else f)
                                                     for f in extras[c.name]))}
        piece.n_objects[c.name] = n_obj
        piece.counts[c.name] = counts
        piece.colls[c.name] = (out_offs, out_cols)
        piece.order.append(("coll", c.name))
    for s in scal:
        piece.scalars[s] = [_flat_numpy(ch) for ch in table.column(s).chunks]
        piece.order.append(("scalar", s))
    for o in others:
        piece.others[o] = [ak.from_arrow(table.column(o), highlevel=False)]
        piece.order.append(("other", o))
    return piece


def _empty(n: int, dtype: Any) -> np.ndarray:
    """A writable numpy array in Arrow's memory pool.

    The pool keeps and reuses freed memory, so large outputs do not pay the page faults of a
    fresh ``malloc`` each time (a measurable share of the read time otherwise)."""
    dt = np.dtype(dtype)
    return np.frombuffer(pa.allocate_buffer(int(n) * dt.itemsize), dtype=dt)


def _concat(values: list[Any], dtype: Any = None) -> Any:
    """One concatenation (one copy) of per-chunk arrays; a single part is used as is."""
    if not values:
        return np.zeros(0, dtype=dtype or np.float64)
    if len(values) == 1:
        return values[0]
    if all(isinstance(v, np.ndarray) for v in values):
        dt = np.result_type(*values)
        if dt.kind in "biuf":
            out = _empty(sum(len(v) for v in values), dt)
            return np.concatenate(values, out=out)
        return np.concatenate(values)
    return ak.concatenate([ak.Array(v) for v in values], highlevel=False)


def _to_layout(x: Any) -> ak.contents.Content:
    if isinstance(x, np.ndarray):
        return ak.contents.NumpyArray(x)
    return x


def _offsets(parts: list[np.ndarray]) -> np.ndarray:
    if not parts:
        return np.zeros(1, np.int64)
    if len(parts) == 1:
        return parts[0].astype(np.int64, copy=False)
    sizes = [len(p) - 1 for p in parts]
    out = _empty(sum(sizes) + 1, np.int64)
    out[0] = 0
    pos, shift = 1, 0
    for p, k in zip(parts, sizes):
        out[pos:pos + k] = p[1:]
        out[pos:pos + k] += shift
        shift += int(p[-1])
        pos += k
    return out


def _build(pieces: list[_Piece]) -> ak.Array:
    pieces = [p for p in pieces if p.order] or pieces[:1]
    if not pieces:
        return ak.Array(ak.contents.RecordArray([], [], length=0))
    n = sum(p.n_events for p in pieces)
    contents, names = [], []
    for kind, name in pieces[0].order:
        if kind == "coll":
            offsets = _offsets([o for p in pieces for o in p.colls[name][0]])
            fnames = list(pieces[0].colls[name][1])
            arrays = [_to_layout(_concat([v for p in pieces for v in p.colls[name][1][f]]))
                      for f in fnames]
            rec = ak.contents.RecordArray(arrays, fnames, length=int(offsets[-1]),
                                          parameters={"__record__": "Momentum4D"})
            contents.append(ak.contents.ListOffsetArray(ak.index.Index64(offsets), rec))
        elif kind == "scalar":
            contents.append(_to_layout(_concat([v for p in pieces for v in p.scalars[name]])))
        else:
            contents.append(_to_layout(_concat([v for p in pieces for v in p.others[name]])))
        names.append(name)
    return ak.Array(ak.contents.RecordArray(contents, names, length=n))


class _Growing:
    """Numpy parts appended into one buffer allocated once at an upper-bound capacity.

    Pages past the filled length are never touched, so the spare capacity costs no memory.
    Anything unexpected (a non-numeric part, a dtype change, a capacity overflow) falls back to
    collecting the parts and concatenating them at the end."""

    def __init__(self, capacity: int) -> None:
        self.capacity = int(capacity)
        self.buf: np.ndarray | None = None
        self.n = 0
        self.parts: list[Any] | None = None

    def append(self, arr: Any) -> None:
        if self.parts is None:
            ok = isinstance(arr, np.ndarray) and arr.dtype.kind in "biuf"
            if ok and self.buf is None:
                self.buf = _empty(self.capacity, arr.dtype)
            if ok and arr.dtype == self.buf.dtype and self.n + len(arr) <= self.capacity:
                self.buf[self.n:self.n + len(arr)] = arr
                self.n += len(arr)
                return
            self.parts = [] if self.buf is None else [self.buf[:self.n]]
        self.parts.append(arr)

    def result(self) -> Any:
        if self.parts is not None:
            return _concat(self.parts)
        return self.buf[:self.n] if self.buf is not None else np.zeros(0)


class _Collector:
    """Pieces added one by one into preallocated outputs (read_events' single-copy path).

    Each piece's Arrow buffers can be freed as soon as it is copied, so the memory pool reuses
    them for the next piece and the peak is about one output plus one piece."""

    def __init__(self, n_events: int, capacity: dict[str, int]) -> None:
        self.n_events = n_events
        self.capacity = capacity
        self.order: list[tuple[str, str]] | None = None
        self.offsets: dict[str, np.ndarray] = {}
        self.pos = 1
        self.shift: dict[str, int] = {}
        self.fields: dict[str, dict[str, _Growing]] = {}
        self.columns: dict[str, _Growing] = {}
        self.meta: list[_Piece] = []

    def add(self, p: _Piece) -> None:
        if self.order is None:
            self.order = list(p.order)
            for kind, name in p.order:
                if kind == "coll":
                    self.offsets[name] = _empty(self.n_events + 1, np.int64)
                    self.offsets[name][0] = 0
                    self.shift[name] = 0
                    self.fields[name] = {f: _Growing(self.capacity.get(name, 0))
                                         for f in p.colls[name][1]}
                else:
                    self.columns[name] = _Growing(self.n_events)
        pos = self.pos
        for kind, name in self.order:
            if kind == "coll":
                offs, cols = p.colls[name]
                out, at, shift = self.offsets[name], pos, self.shift[name]
                for o in offs:
                    k = len(o) - 1
                    out[at:at + k] = o[1:]
                    out[at:at + k] += shift
                    shift += int(o[-1])
                    at += k
                self.shift[name] = shift
                for f, g in self.fields[name].items():
                    for v in cols[f]:
                        g.append(v)
            else:
                for v in (p.scalars if kind == "scalar" else p.others)[name]:
                    self.columns[name].append(v)
        self.pos = pos + p.n_events
        self.meta.append(_Piece(p.n_events, counts=p.counts, n_objects=p.n_objects))

    def array(self) -> ak.Array:
        if self.order is None:
            return ak.Array(ak.contents.RecordArray([], [], length=0))
        contents, names = [], []
        for kind, name in self.order:
            if kind == "coll":
                offsets = self.offsets[name][:self.pos]
                fnames = list(self.fields[name])
                arrays = [_to_layout(self.fields[name][f].result()) for f in fnames]
                rec = ak.contents.RecordArray(arrays, fnames, length=int(offsets[-1]),
                                              parameters={"__record__": "Momentum4D"})
                contents.append(ak.contents.ListOffsetArray(ak.index.Index64(offsets), rec))
            else:
                contents.append(_to_layout(self.columns[name].result()))
            names.append(name)
        return ak.Array(ak.contents.RecordArray(contents, names, length=self.pos - 1))


def _object_capacity(plans: list[tuple[_FileInfo, tuple]]) -> dict[str, int]:
    """Upper bound on the objects per collection (Parquet: from the footers' leaf value
    counts; Arrow IPC and memory: from the list offsets)."""
    cap: dict[str, int] = {}
    for info, sel in plans:
        handle = info.handle if info.handle is not None else _open(info.path)
        for c in sel[0]:
            leaf = c.paths[_kin_source_fields(c)[0]][0]
            j = info.leaf_index.get(leaf)
            if j is None:  # pragma: no cover - every kinematic field has a leaf
                raise InputError(f"'{info.path}': no column for '{leaf}'")
            cap[c.name] = cap.get(c.name, 0) + leaf_value_count(handle, leaf, j)
    return cap


def _warn(pieces: list[_Piece], files: list[Path]) -> None:
    parts = []
    for name in dict.fromkeys(k for p in pieces for k in p.counts):
        tot: dict[str, int] = {}
        n_obj = 0
        for p in pieces:
            n_obj += p.n_objects.get(name, 0)
            for k, v in p.counts.get(name, {}).items():
                tot[k] = tot.get(k, 0) + v
        items = [f"{v} with {_PROBLEMS[k]}" for k, v in tot.items() if v]
        if items:
            parts.append(f"'{name}': " + ", ".join(items) + f" (of {n_obj})")
    if parts:
        where = f"'{files[0]}'" if len(files) == 1 else f"{len(files)} files ('{files[0]}', ...)"
        warnings.warn(
            "dropped objects from " + where + ": " + "; ".join(parts)
            + "; repair the input, or pass strict=True to stop at such objects instead",
            DataWarning, stacklevel=3)
