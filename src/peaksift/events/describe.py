"""What a set of files holds, for ``peaksift inspect``: :func:`describe`."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pyarrow as pa

from ..errors import InputError
from .files import _MASS_NAMES, DEFAULT_COLUMN_PATTERN, Source, list_files
from .pieces import _list_chunk
from .schema import _inspect, _kin_source_fields, _open, _plan_request

# --------------------------------------------------------------------------- describe


@dataclass(frozen=True, repr=False)
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

    def __repr__(self) -> str:
        return str(self)  # the inspect text, not a dump of the fields

    def _repr_html_(self) -> str:
        import html

        return f"<pre>{html.escape(str(self))}</pre>"

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready, every key the attribute of the same name (the multiplicities'
        object counts as text: JSON keys are strings)."""
        colls = {n: {**c, "multiplicity": {str(k): int(v) for k, v in c["multiplicity"].items()}}
                 for n, c in self.collections.items()}
        return {"files": [list(f) for f in self.files], "collections": colls,
                "event_fields": dict(self.event_fields), "other_fields": dict(self.other_fields),
                "n_events": int(self.n_events), "problems": list(self.problems)}

    @classmethod
    def from_dict(cls, d: Any) -> Description:
        """The Description :meth:`to_dict` wrote."""
        try:
            colls = {n: {**c, "multiplicity": {int(k): int(v)
                                               for k, v in c["multiplicity"].items()}}
                     for n, c in d["collections"].items()}
            return cls(files=[(str(p), int(n), int(rg), int(b)) for p, n, rg, b in d["files"]],
                       collections=colls, event_fields=dict(d["event_fields"]),
                       other_fields=dict(d["other_fields"]), n_events=int(d["n_events"]),
                       problems=list(d["problems"]))
        except (KeyError, TypeError, ValueError) as exc:
            raise InputError(f"not a file description written by Description.to_dict: "
                             f"{exc!r}") from None

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
                      else "sibling columns " + c.get("columns", f"{name}.<field>"))
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


def describe(source: Source, *, column_pattern: str = DEFAULT_COLUMN_PATTERN) -> Description:
    """Describe a set of event files: collections, fields and dtypes, events per file,
    object multiplicities.  Reads footers plus one column per collection (for the counts).
    ``column_pattern`` as for :func:`~peaksift.events.read_events`."""
    files = list_files(source)
    infos = [_inspect(p, pattern=column_pattern) for p in files]
    problems: list[str] = []
    try:
        _plan_request(files, None, None, column_pattern)
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
            **({"columns": column_pattern.format(collection=name, field="<field>")}
               if c.layout == "columns" else {}),
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
