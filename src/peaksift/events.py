"""Reading reconstructed events from Parquet files into awkward arrays.

Which function to use
---------------------
* :func:`read_events` -- the whole data set as one ``awkward.Array`` (small and medium data).
* :func:`iter_events` -- the same, streamed in chunks of whole Parquet row groups, so memory
  stays bounded whatever the size of the data set.
* :func:`plan_chunks` + :func:`read_chunk` -- picklable chunk descriptions that workers read
  themselves (this is what :mod:`peaksift.execution` uses); :func:`check_files` checks all
  files' schemas against the request once, up front, from the footers.
* :func:`describe` -- what a set of files holds (``peaksift inspect`` prints it).
* :func:`list_files` -- resolve paths, globs, directories and lists to a sorted list of files.

What comes back
---------------
One record field per object collection (``muon``, ``electron``, ``track``, ...), each a jagged
array of records with vector's ``Momentum4D`` behaviour, so ``(ev.muon[:, 0] +
ev.muon[:, 1]).mass`` works.  Every collection carries the fields ``pt, eta, phi, mass``
(GeV, radians) followed by the file's other object fields (``charge``, ``isolation``, ...).
Per-event scalars (``weight``, run and event numbers, ...) are top-level fields.

Files may store a collection in either layout:

* one list-of-struct column: ``muon: list<struct<pt, eta, phi, mass, charge>>``;
* sibling list columns named ``<collection>_<field>``: ``muon_pt, muon_eta, ...``.

and its kinematics as ``(pt, eta, phi[, mass])`` or ``(px, py, pz, energy)`` (``m`` and ``e``
are accepted as short names).  Cartesian kinematics are converted to ``pt, eta, phi, mass``
(float64) and the cartesian fields are not kept as fields: vector computes ``.px``, ``.E``, ...
from the record.  A collection without a mass field is **massless** unless a mass is given with
``masses={"muon": 0.1056584}``.  Other object fields whose names vector would read as a
second set of coordinates (``x, y, z, t, rho, theta, tau, m, M, E, e, energy, px, py, pz``) are
renamed ``raw_<name>``.

Input repairs
-------------
Objects with NaN or infinite kinematics, negative pt, negative energy, energy below momentum
(beyond rounding) or a negative mass (beyond rounding; rounding-level values become 0) are
dropped, and one :class:`~peaksift.errors.DataWarning` per call reports how many of each, per
collection.  ``strict=True`` raises :class:`~peaksift.errors.InputError` instead.  Every
schema problem is checked from the file footers before any data are read.

Chunks are made of whole row groups: a chunk holds at least ``chunk_events`` events unless the
file ends first, and a row group larger than ``chunk_events`` is a chunk on its own.
"""

from __future__ import annotations

import dataclasses
import glob
import os
import warnings
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Union

import awkward as ak
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import vector

from . import kinematics as _kin
from .errors import DataWarning, InputError, closest

vector.register_awkward()

__all__ = [
    "ChunkSpec",
    "Description",
    "check_files",
    "describe",
    "iter_events",
    "list_files",
    "plan_chunks",
    "read_chunk",
    "read_events",
]

Source = Union[str, os.PathLike, Sequence[Union[str, os.PathLike]]]  # noqa: UP007

DEFAULT_CHUNK_EVENTS = 500_000
_PIECE_EVENTS = 200_000  # read_events' internal piece size (measured: least system time)
_MAX_OPEN_FILES = 64  # data sets with more files reopen each file when its data are read

_POLAR = ("pt", "eta", "phi")
_MASS_NAMES = ("mass", "m")
_CART = ("px", "py", "pz")
_ENERGY_NAMES = ("energy", "e")
_KIN_OUT = ("pt", "eta", "phi", "mass")
# names vector reads as coordinates of a Momentum4D record
_RESERVED = {"x", "y", "z", "t", "rho", "theta", "tau", "px", "py", "pz", "E", "e", "energy",
             "M", "m", "mass", "pt", "eta", "phi"}
_GLOB_CHARS = set("*?[")


# --------------------------------------------------------------------------- files


def list_files(source: Source) -> list[Path]:
    """Resolve ``source`` to a list of Parquet files.

    Parameters
    ----------
    source : str, path or sequence of them
        Each entry is a file, a directory (all ``*.parquet`` files below it, recursively) or a
        glob (``"data/run_*.parquet"``, ``**`` allowed).  Matches of one entry are sorted; the
        entries keep their order; duplicates are removed.

    Raises
    ------
    InputError
        An entry matches nothing, or a directory holds no ``.parquet`` file.
    """
    entries: list[Any]
    if isinstance(source, (str, os.PathLike)):
        entries = [source]
    else:
        entries = list(source)
        if not entries:
            raise InputError("no input given: pass a Parquet file, a directory or a glob")
    out: list[Path] = []
    seen: set[Path] = set()
    for entry in entries:
        text = os.fspath(entry)
        if _GLOB_CHARS & set(text):
            found = sorted(Path(p) for p in glob.glob(text, recursive=True) if Path(p).is_file())
            if not found:
                raise InputError(
                    f"no file matches the glob '{text}' (working directory {os.getcwd()}); "
                    "check the pattern and the path")
        else:
            path = Path(text)
            if path.is_dir():
                found = sorted(p for p in path.rglob("*.parquet") if p.is_file())
                if not found:
                    raise InputError(
                        f"directory '{text}' contains no .parquet file; point to the directory "
                        "that holds the event files or give the files themselves")
            elif path.is_file():
                found = [path]
            else:
                hint = ""
                parent = path.parent if str(path.parent) else Path(".")
                if parent.is_dir():
                    near = closest(path.name, [p.name for p in parent.iterdir()])
                    if near:
                        hint = f" (did you mean '{parent / near}'?)"
                raise InputError(
                    f"no file or directory '{text}'{hint}; check the path "
                    f"(working directory {os.getcwd()})")
        for p in found:
            if p not in seen:
                seen.add(p)
                out.append(p)
    return out


# --------------------------------------------------------------------------- schema


@dataclass(frozen=True)
class _Coll:
    """How one collection is stored in one file."""

    name: str
    layout: str                      # "records" (list<struct>) or "columns" (<coll>_<field>)
    fields: dict[str, pa.DataType]   # file field name -> arrow value type
    paths: dict[str, list[str]]      # file field name -> parquet leaf paths to read
    columns: dict[str, str]          # file field name -> top-level column name (layout columns)
    coords: str | None               # "polar", "cartesian" or None (no usable kinematics)


@dataclass(frozen=True)
class _FileInfo:
    path: Path
    n_events: int
    row_groups: tuple[int, ...]      # events per row group
    size: int
    collections: dict[str, _Coll]    # with kinematics
    others: dict[str, _Coll]         # jagged columns / groups without kinematics
    scalars: dict[str, pa.DataType]  # per-event columns
    scalar_paths: dict[str, list[str]]
    handle: pq.ParquetFile | None = field(default=None, compare=False, repr=False)
    leaf_index: dict[str, int] = field(default_factory=dict, compare=False, repr=False)


def _kind(t: pa.DataType) -> str:
    if pa.types.is_floating(t):
        return "float"
    if pa.types.is_integer(t):
        return "int"
    if pa.types.is_boolean(t):
        return "bool"
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        return "string"
    return str(t)


def _is_list(t: pa.DataType) -> bool:
    return pa.types.is_list(t) or pa.types.is_large_list(t)


def _coords_of(names: Iterable[str]) -> str | None:
    s = set(names)
    if all(n in s for n in _POLAR):
        return "polar"
    if all(n in s for n in _CART) and any(n in s for n in _ENERGY_NAMES):
        return "cartesian"
    return None


def _open(path: Path) -> pq.ParquetFile:
    try:
        return pq.ParquetFile(path)
    except (pa.ArrowException, OSError, ValueError) as exc:
        raise InputError(
            f"cannot read '{path}' as Parquet ({' '.join(str(exc).split())}); the file is "
            "corrupt, truncated or not Parquet: regenerate it or leave it out of the input"
        ) from None


def _inspect(path: Path) -> _FileInfo:
    pf = _open(path)
    schema = pf.schema_arrow
    md = pf.metadata
    leaf_paths: dict[str, list[str]] = {}
    leaf_index: dict[str, int] = {}
    for i in range(len(pf.schema)):
        p = pf.schema.column(i).path
        leaf_paths.setdefault(p.split(".")[0], []).append(p)
        leaf_index[p] = i

    records: dict[str, _Coll] = {}
    scalars: dict[str, pa.DataType] = {}
    scalar_paths: dict[str, list[str]] = {}
    flat_lists: dict[str, pa.DataType] = {}
    jagged_other: dict[str, _Coll] = {}
    for f in schema:
        t = f.type
        if _is_list(t) and pa.types.is_struct(t.value_type):
            st = t.value_type
            names = [st.field(i).name for i in range(st.num_fields)]
            types = {st.field(i).name: st.field(i).type for i in range(st.num_fields)}
            paths: dict[str, list[str]] = {n: [] for n in names}
            for lp in leaf_paths.get(f.name, []):
                parts = lp.split(".")
                # leaf paths look like <col>.list.element.<field>[.<sub>...]
                for k in range(1, len(parts)):
                    if parts[k] in paths and k >= 2:
                        paths[parts[k]].append(lp)
                        break
            coll = _Coll(f.name, "records", types, paths, {}, _coords_of(names))
            (records if coll.coords else jagged_other)[f.name] = coll
        elif _is_list(t) and not pa.types.is_nested(t.value_type):
            flat_lists[f.name] = t.value_type
        else:
            scalars[f.name] = t
            scalar_paths[f.name] = leaf_paths.get(f.name, [f.name])

    # sibling list columns: a prefix is a collection when <prefix>_pt or <prefix>_px exists
    prefixes = set()
    for name in flat_lists:
        for k in ("pt", "px"):
            if name.endswith("_" + k) and len(name) > len(k) + 1:
                prefixes.add(name[: -len(k) - 1])
    groups: dict[str, dict[str, str]] = {}
    for name in flat_lists:
        owner = max((p for p in prefixes if name.startswith(p + "_")), key=len, default=None)
        if owner is None:
            continue
        groups.setdefault(owner, {})[name[len(owner) + 1:]] = name
    assigned = set()
    for prefix, cols in groups.items():
        if prefix in records or prefix in scalars or _coords_of(cols) is None:
            continue  # without full kinematics the columns stay plain jagged columns
        records[prefix] = _Coll(prefix, "columns", {f: flat_lists[c] for f, c in cols.items()},
                                {f: leaf_paths.get(c, [c]) for f, c in cols.items()}, dict(cols),
                                _coords_of(cols))
        assigned.update(cols.values())
    for name, t in flat_lists.items():
        if name not in assigned:
            jagged_other[name] = _Coll(name, "plain", {"": t}, {"": leaf_paths.get(name, [name])},
                                       {"": name}, None)
    rg = tuple(md.row_group(i).num_rows for i in range(md.num_row_groups))
    try:
        size = path.stat().st_size
    except OSError:
        size = 0
    return _FileInfo(path, md.num_rows, rg, size, records, jagged_other, scalars, scalar_paths,
                     pf, leaf_index)


def _present_text(info: _FileInfo) -> str:
    names = list(info.collections) + [n for n, c in info.others.items() if c.layout != "plain"]
    return ", ".join(names) if names else "none"


def _select(
    info: _FileInfo,
    collections: str | Sequence[str] | None,
    fields: Iterable[str] | None,
) -> tuple[list[_Coll], dict[str, list[str]], list[str], list[str]]:
    """Check the request against one file.

    Returns (collections, extra fields kept per collection, scalar columns, other jagged).
    """
    path = info.path
    if collections is None:
        colls = list(info.collections.values())
        others = list(info.others)
    else:
        names = [collections] if isinstance(collections, str) else list(collections)
        colls = []
        for n in names:
            if n in info.collections:
                colls.append(info.collections[n])
                continue
            if n in info.others and info.others[n].layout != "plain":
                c = info.others[n]
                _raise_missing_kinematics(path, c)
            # sibling columns with partial kinematics (no <n>_pt / <n>_px column)
            partial = sorted(c[len(n) + 1:] for c in info.others if c.startswith(n + "_"))
            if partial:
                _raise_missing_kinematics(
                    path, _Coll(n, "columns", dict.fromkeys(partial, pa.float64()), {}, {}, None))
            near = closest(n, info.collections)
            hint = f" (did you mean '{near}'?)" if near else ""
            raise InputError(
                f"collection '{n}' is not in '{path}'{hint}; collections present: "
                f"{_present_text(info)}. Name one of those in 'collections'")
        others = []
    for c in colls:
        for fname in _kin_source_fields(c):
            t = c.fields[fname]
            if not (pa.types.is_floating(t) or pa.types.is_integer(t)):
                col = c.columns.get(fname, f"{c.name}.{fname}")
                raise InputError(
                    f"kinematic field '{fname}' of collection '{c.name}' in '{path}' (column "
                    f"'{col}') has type {t}, not a number; store kinematics as float32/float64")

    wanted = None if fields is None else {str(f) for f in fields}
    extras: dict[str, list[str]] = {}
    for c in colls:
        kin = set(_kin_source_fields(c))
        ex = [f for f in c.fields if f not in kin and (c.coords != "cartesian" or f not in
                                                       (*_POLAR, *_MASS_NAMES))]
        if wanted is not None:
            ex = [f for f in ex if f in wanted or f"{c.name}.{f}" in wanted]
        extras[c.name] = ex
    scal = list(info.scalars)
    if wanted is not None:
        scal = [s for s in scal if s in wanted or s == "weight"]
        others = [o for o in info.others if o in wanted]
        known = set(info.scalars) | set(info.others) | set(_KIN_OUT)
        for c in colls:
            known |= set(c.fields) | {f"{c.name}.{f}" for f in c.fields}
            known |= {f"{c.name}.{f}" for f in _KIN_OUT}
        unknown = sorted(wanted - known)
        if unknown:
            avail = sorted({f for c in colls for f in _extras_all(c)} | set(info.scalars))
            near = closest(unknown[0], avail)
            hint = f" (did you mean '{near}'?)" if near else ""
            raise InputError(
                f"field '{unknown[0]}' is not in the selected collections or event columns of "
                f"'{path}'{hint}; available: {', '.join(avail) or 'none'}")
    return colls, extras, scal, others


def _extras_all(c: _Coll) -> list[str]:
    kin = set(_kin_source_fields(c))
    return [f for f in c.fields if f not in kin]


def _kin_source_fields(c: _Coll) -> list[str]:
    if c.coords == "polar":
        m = [n for n in _MASS_NAMES if n in c.fields][:1]
        return [*_POLAR, *m]
    e = [n for n in _ENERGY_NAMES if n in c.fields][:1]
    return [*_CART, *e]


def _raise_missing_kinematics(path: Path, c: _Coll) -> None:
    have = set(c.fields)
    need_polar = [n for n in _POLAR if n not in have]
    need_cart = [n for n in _CART if n not in have] + (
        [] if any(n in have for n in _ENERGY_NAMES) else ["energy"])
    missing = need_polar if len(need_polar) <= len(need_cart) else need_cart
    where = (f"columns '{c.name}_<field>'" if c.layout == "columns" else f"column '{c.name}'")
    raise InputError(
        f"collection '{c.name}' in '{path}' ({where}) has no kinematic field "
        f"'{missing[0]}'; fields present: {', '.join(sorted(have)) or 'none'}. A collection needs "
        "pt, eta, phi (and optionally mass) or px, py, pz, energy")


def _signature(info: _FileInfo, colls: list[_Coll], extras: dict[str, list[str]],
               scal: list[str], others: list[str]) -> dict[str, Any]:
    sig: dict[str, Any] = {}
    for c in colls:
        sig[c.name] = (c.coords, tuple((f, _kind(c.fields[f])) for f in extras[c.name]),
                       any(n in c.fields for n in _MASS_NAMES))
    for s in scal:
        sig["event column " + s] = _kind(info.scalars[s])
    for o in others:
        sig["jagged column " + o] = tuple(sorted((k, _kind(v))
                                                 for k, v in info.others[o].fields.items()))
    return sig


def _describe_sig_diff(a: dict[str, Any], b: dict[str, Any]) -> str:
    for k in a:
        if k not in b:
            return f"'{k}' is only in the first"
    for k in b:
        if k not in a:
            return f"'{k}' is only in the second"
    for k, va in a.items():
        if va != b[k]:
            if isinstance(va, tuple) and len(va) == 3 and not k.startswith("jagged"):
                ca, fa, ma = va
                cb, fb, mb = b[k]
                if ca != cb:
                    return f"collection '{k}' has {ca} kinematics in one and {cb} in the other"
                if ma != mb:
                    return f"collection '{k}' has a mass field in only one of them"
                da, db = dict(fa), dict(fb)
                only_a = sorted(set(da) - set(db))
                only_b = sorted(set(db) - set(da))
                if only_a:
                    return f"field '{k}.{only_a[0]}' is only in the first"
                if only_b:
                    return f"field '{k}.{only_b[0]}' is only in the second"
                f = next(f for f in da if da[f] != db[f])
                return f"field '{k}.{f}' is {da[f]} in the first and {db[f]} in the second"
            return f"{k} is {va} in the first and {b[k]} in the second"
    return "they differ"  # pragma: no cover


def _plan_request(files: list[Path], collections: str | Sequence[str] | None,
                  fields: Iterable[str] | None) -> list[tuple[_FileInfo, tuple]]:
    """Inspect every file and check the request and schema agreement before reading data."""
    if isinstance(fields, str):
        fields = [fields]
    elif fields is not None:
        fields = list(fields)
    plans = []
    first_sig: dict[str, Any] | None = None
    first_path: Path | None = None
    keep_open = len(files) <= _MAX_OPEN_FILES
    for p in files:
        info = _inspect(p)
        if not keep_open:  # do not hold thousands of file descriptors; reopen when reading
            info = dataclasses.replace(info, handle=None)
        sel = _select(info, collections, fields)
        sig = _signature(info, *sel)
        if first_sig is None:
            first_sig, first_path = sig, p
        elif sig != first_sig:
            raise InputError(
                f"files '{first_path}' and '{p}' disagree: {_describe_sig_diff(first_sig, sig)}; "
                "read them separately, make the files consistent, or name the collections and "
                "fields they share")
        plans.append((info, sel))
    return plans


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
        table = pf.read_row_groups(list(row_groups), columns=paths, use_threads=True)
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
    """Upper bound on the objects per collection from the footers (leaf value counts)."""
    cap: dict[str, int] = {}
    for info, sel in plans:
        md = info.handle.metadata if info.handle is not None else _open(info.path).metadata
        for c in sel[0]:
            leaf = c.paths[_kin_source_fields(c)[0]][0]
            j = info.leaf_index.get(leaf)
            if j is None:
                cap[c.name] = 1 << 62
                continue
            tot = sum(md.row_group(i).column(j).num_values for i in range(md.num_row_groups))
            cap[c.name] = cap.get(c.name, 0) + int(tot)
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


# --------------------------------------------------------------------------- describe


@dataclass(frozen=True)
class Description:
    """What a set of event files holds; ``str()`` gives the ``peaksift inspect`` text.

    Attributes
    ----------
    files : list of (path, events, row groups, bytes)
    collections : dict
        name -> {"layout", "coordinates", "fields" (name -> dtype), "mean", "max",
        "multiplicity" (objects per event -> events; the last bin is "n or more")}.
    event_fields : dict
        Per-event column name -> dtype.
    other_fields : dict
        Jagged columns without kinematics -> type.
    n_events : int
    problems : list of str
        Disagreements between files (``describe`` reports them instead of raising).
    """

    files: list[tuple[str, int, int, int]]
    collections: dict[str, dict[str, Any]]
    event_fields: dict[str, str]
    other_fields: dict[str, str]
    n_events: int
    problems: list[str]

    def __str__(self) -> str:
        plural = "s" if len(self.files) != 1 else ""
        lines = [f"{len(self.files)} file{plural}, {self.n_events} events"]
        w = max(len(f[0]) for f in self.files)
        for path, n, rg, size in self.files:
            lines.append(f"  {path:<{w}}  {n:>10} events  {rg:>4} row group"
                         f"{'s' if rg != 1 else ' '}  {size / 1e6:8.2f} MB")
        lines.append("event fields: " + (", ".join(f"{k} ({v})" for k, v in
                                                  self.event_fields.items()) or "none"))
        lines.append("collections:")
        for name, c in self.collections.items():
            layout = ("one list-of-struct column" if c["layout"] == "records"
                      else f"sibling columns {name}_<field>")
            coords = ("pt, eta, phi, mass" if c["coordinates"] == "polar" and c["has_mass"]
                      else "pt, eta, phi (no mass field: massless)" if c["coordinates"] == "polar"
                      else "px, py, pz, energy (converted to pt, eta, phi, mass)")
            lines.append(f"  {name}: {layout}; kinematics {coords}")
            lines.append("    fields: " + ", ".join(f"{k} {v}" for k, v in c["fields"].items()))
            mult = c["multiplicity"]
            tot = max(sum(mult.values()), 1)
            keys = list(mult)
            hist = "  ".join(
                f"{k}{'+' if i == len(keys) - 1 else ''}: {100 * mult[k] / tot:.1f}%"
                for i, k in enumerate(keys))
            lines.append(f"    objects per event: mean {c['mean']:.2f}, max {c['max']};  {hist}")
        if self.other_fields:
            lines.append("other jagged columns (no kinematics): " + ", ".join(
                f"{k} ({v})" for k, v in self.other_fields.items()))
        for p in self.problems:
            lines.append("problem: " + p)
        return "\n".join(lines)


def _dtype_text(t: pa.DataType) -> str:
    """numpy-style names for numbers (float32, int8, ...), arrow's own text otherwise."""
    if pa.types.is_floating(t) or pa.types.is_integer(t) or pa.types.is_boolean(t):
        return pa.array([], type=t).to_numpy(zero_copy_only=False).dtype.name
    return str(t)


def describe(source: Source) -> Description:
    """Describe a set of Parquet event files: collections, fields and dtypes, events per file,
    object multiplicities.  Reads footers plus one column per collection (for the counts)."""
    files = list_files(source)
    infos = [_inspect(p) for p in files]
    problems: list[str] = []
    try:
        _plan_request(files, None, None)
    except InputError as exc:
        problems.append(str(exc))
    first = infos[0]
    colls: dict[str, dict[str, Any]] = {}
    top = 6
    for name, c in first.collections.items():
        counts_all = []
        for info in infos:
            cc = info.collections.get(name)
            if cc is None or not info.row_groups:
                continue
            f0 = _kin_source_fields(cc)[0]
            pf = info.handle if info.handle is not None else _open(info.path)
            tab = pf.read(columns=cc.paths[f0][:1])
            counts_all.extend(np.diff(_list_chunk(ch)[0]) for ch in tab.column(0).chunks)
        counts = np.concatenate(counts_all) if counts_all else np.zeros(0, np.int64)
        binned = np.bincount(np.minimum(counts, top), minlength=top + 1) if counts.size else \
            np.zeros(top + 1, np.int64)
        fields_out = {f: _dtype_text(t) for f, t in c.fields.items()}
        colls[name] = {
            "layout": c.layout,
            "coordinates": c.coords,
            "has_mass": any(n in c.fields for n in _MASS_NAMES),
            "fields": fields_out,
            "mean": float(counts.mean()) if counts.size else 0.0,
            "max": int(counts.max()) if counts.size else 0,
            "multiplicity": {int(k): int(v) for k, v in enumerate(binned)},
        }
    return Description(
        files=[(str(i.path), i.n_events, len(i.row_groups), i.size) for i in infos],
        collections=colls,
        event_fields={k: _dtype_text(v) for k, v in first.scalars.items()},
        other_fields={k: ", ".join(f"{f or 'values'} {_dtype_text(t)}" for f, t in c.fields.items())
                      for k, c in first.others.items()},
        n_events=sum(i.n_events for i in infos),
        problems=problems,
    )
