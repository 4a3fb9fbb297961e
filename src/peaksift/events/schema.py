"""What a file holds, from its footer: collections, their layout and kinematics, and the checks of a request against it."""

from __future__ import annotations

import dataclasses
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq

from ..errors import InputError, closest
from .files import _CART, _ENERGY_NAMES, _KIN_OUT, _MASS_NAMES, _MAX_OPEN_FILES, _POLAR

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
    _check_weight_column(info)
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


def _check_weight_column(info: _FileInfo) -> None:
    """A ``weight`` column must hold one number per event: a list, a struct or a string
    would otherwise be left out of the event weights without a word (CLI) or refused
    (API); both paths read through here, so both refuse it the same way."""
    if "weight" in info.scalars:
        t = info.scalars["weight"]
        if pa.types.is_floating(t) or pa.types.is_integer(t):
            return
    elif "weight" in info.others:
        c = info.others["weight"]
        t = next(iter(c.fields.values())) if c.layout == "plain" else None
        t = pa.list_(t) if t is not None else "a jagged collection"
    elif "weight" in info.collections:
        t = "a collection of objects"
    else:
        return
    raise InputError(
        f"column 'weight' in '{info.path}' has type {t}, not one number per event; peaksift "
        "reads 'weight' as the per-event weight, so store it as float64 (one value per row) "
        "or rename the column")


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
