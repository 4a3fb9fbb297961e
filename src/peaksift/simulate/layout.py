"""The stored event layout: objects collected per event while a block is built, sorted and
turned into Arrow list columns with detector quantities rounded to a fixed precision."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa


@dataclass
class _Objects:
    """Flat arrays of one collection while an event block is assembled."""

    event: list[np.ndarray] = field(default_factory=list)
    cols: dict[str, list[np.ndarray]] = field(default_factory=dict)

    def add(self, event: np.ndarray, **cols: np.ndarray) -> None:
        self.event.append(np.asarray(event, dtype=np.int64))
        for k, v in cols.items():
            self.cols.setdefault(k, []).append(np.asarray(v))


def _round_mantissa(x: np.ndarray, bits: int) -> np.ndarray:
    """float32 rounded to ``bits`` mantissa bits (relative precision 2**-bits), as compact
    event formats store detector quantities; the zeroed low bits compress well."""
    u = np.ascontiguousarray(x, dtype=np.float32).view(np.uint32)
    drop = 23 - int(bits)
    half = np.uint32(1 << (drop - 1))
    mask = np.uint32((0xFFFFFFFF >> drop) << drop)
    return ((u + half) & mask).view(np.float32)


# mantissa bits kept per stored field (2**-14 = 6e-5 relative, far below the resolutions)
_PRECISION = {"pt": 14, "eta": 14, "phi": 14, "isolation": 10, "track": 11}


def _assemble(objs: _Objects, n: int) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Sort objects by event, then by decreasing pT; return offsets and flat columns."""
    if not objs.event:
        return np.zeros(n + 1, np.int64), {}
    ev = np.concatenate(objs.event)
    flat = {k: np.concatenate(v) for k, v in objs.cols.items()}
    order = np.lexsort((-flat["pt"], ev))
    ev = ev[order]
    flat = {k: v[order] for k, v in flat.items()}
    offsets = np.concatenate([[0], np.cumsum(np.bincount(ev, minlength=n))])
    return offsets, flat


def _lepton_column(objs: _Objects, n: int) -> pa.ListArray:
    """A ``muon`` or ``electron`` column: list<struct<pt, eta, phi, mass, charge, isolation>>."""
    offsets, flat = _assemble(objs, n)
    struct = pa.StructArray.from_arrays(
        [pa.array(_round_mantissa(flat[k], _PRECISION[k])) for k in ("pt", "eta", "phi")]
        + [pa.array(flat["mass"].astype(np.float32)),
           pa.array(flat["charge"].astype(np.int8)),
           pa.array(_round_mantissa(flat["isolation"], _PRECISION["isolation"]))],
        ["pt", "eta", "phi", "mass", "charge", "isolation"])
    return pa.ListArray.from_arrays(pa.array(offsets.astype(np.int32)), struct)


def _track_columns(tracks: _Objects, n: int) -> dict[str, pa.ListArray]:
    """The tracks as sibling list columns ``track.pt, track.eta, track.phi, track.charge``."""
    offsets, flat = _assemble(tracks, n)
    off = pa.array(offsets.astype(np.int32))
    cols = {f"track.{k}": pa.ListArray.from_arrays(
        off, pa.array(_round_mantissa(flat[k], _PRECISION["track"]))) for k in ("pt", "eta", "phi")}
    cols["track.charge"] = pa.ListArray.from_arrays(off, pa.array(flat["charge"].astype(np.int8)))
    return cols
