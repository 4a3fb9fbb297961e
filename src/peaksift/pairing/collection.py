"""One jagged collection as flat arrays, object selection, and the option checks of :func:`pair`."""

from __future__ import annotations

from typing import Any

import numpy as np

from .. import kinematics
from ..cuts import CutLike, flat_object_mask
from ..energy_loss import DedxResponse
from ..errors import ConfigError, InputError, closest
from .candidates import _CHARGE, _KINEMATIC_FIELDS, CHOOSE_RULES


# ----------------------------------------------------------------- collections
class _Collection:
    """Flat view of one jagged collection: counts, offsets and lazily flattened fields."""

    def __init__(self, events: Any, name: str) -> None:
        import awkward as ak

        fields = list(events.fields)
        if name not in fields:
            guess = closest(name, fields)
            hint = f"; did you mean {guess!r}?" if guess else ""
            raise InputError(
                f"no collection {name!r} in the events; fields present: "
                f"{', '.join(fields) or '(none)'}{hint}")
        arr = events[name]
        if arr.ndim != 2 or not arr.fields:
            raise InputError(
                f"{name!r} is not a collection (a list of objects per event with fields pt, "
                "eta, phi, mass); pair a jagged collection such as 'muon'")
        missing = [f for f in _KINEMATIC_FIELDS if f not in arr.fields]
        if missing:
            raise InputError(
                f"collection {name!r} lacks the kinematic field(s) {', '.join(missing)}; it has "
                f"{', '.join(arr.fields)}; read the events with peaksift.read_events, which "
                "provides pt, eta, phi and mass")
        self.name = name
        self.array = arr
        self.fields = list(arr.fields)
        lay = arr.layout
        if isinstance(lay, ak.contents.ListOffsetArray):
            # plain layout: the counts are the differences of its offsets (no awkward pass)
            raw = np.asarray(lay.offsets.data).astype(np.int64, copy=False)
            self.counts = np.diff(raw)
            self.offsets = raw - raw[0] if raw[0] else raw
        else:
            try:
                self.counts = ak.to_numpy(ak.num(arr, axis=1)).astype(np.int64, copy=False)
            except (ValueError, TypeError) as exc:
                raise InputError(f"collection {name!r}: cannot read its object counts ({exc}); "
                                 "missing (None) entries are not supported") from None
            self.offsets = np.zeros(self.counts.size + 1, dtype=np.int64)
            np.cumsum(self.counts, out=self.offsets[1:])
        self.n_objects = int(self.offsets[-1])
        self._cache: dict[str, np.ndarray] = {}

    def use_mass(self, mass: float) -> None:
        """Give every object the mass of a hypothesis (GeV), in place of its mass field."""
        self._cache["mass"] = np.full(self.n_objects, float(mass))

    def get(self, f: str) -> np.ndarray:
        import awkward as ak

        if f in self._cache:
            return self._cache[f]
        if f not in self.fields:
            raise KeyError(f)
        try:
            out = self._direct(f)
            if out is None:
                out = ak.to_numpy(ak.flatten(self.array[f], axis=1))
        except (ValueError, TypeError) as exc:
            raise InputError(f"collection {self.name!r}, field {f!r}: not a flat number per "
                             f"object ({exc})") from None
        self._cache[f] = out
        return out

    def _direct(self, f: str) -> np.ndarray | None:
        """The field's flat numpy content straight from the layout (no copy), when simple."""
        import awkward as ak

        lay = self.array.layout
        if not isinstance(lay, ak.contents.ListOffsetArray):
            return None
        rec = lay.content
        if not isinstance(rec, ak.contents.RecordArray):
            return None
        col = rec.content(f)
        if not isinstance(col, ak.contents.NumpyArray):
            return None
        off = np.asarray(lay.offsets.data)
        lo, hi = int(off[0]), int(off[-1])
        if hi - lo != self.n_objects:  # pragma: no cover - offsets disagree with counts
            return None
        data = np.asarray(col.data)
        return data[lo:hi] if data.ndim == 1 else None


def _is_no_cut(cut: Any) -> bool:
    return cut is None or (isinstance(cut, str) and not cut.strip())


def _selected(coll: _Collection, cut: CutLike, ev_ok: np.ndarray | None,
              identification: DedxResponse | None = None) -> tuple:
    """(flat indices of selected objects or None for all, per-event start, per-event stop)."""
    if _is_no_cut(cut) and ev_ok is None:
        return None, coll.offsets[:-1], coll.offsets[1:]
    if _is_no_cut(cut):
        ok = np.repeat(ev_ok, coll.counts)
    else:
        ok = flat_object_mask(cut, coll.array, coll.counts, coll.get, coll.fields, coll.name,
                              identification)
        if ev_ok is not None:
            ok &= np.repeat(ev_ok, coll.counts)
    cs = np.zeros(ok.size + 1, dtype=np.int64)
    np.cumsum(ok, out=cs[1:])
    sel_off = cs[coll.offsets]
    return np.flatnonzero(ok), sel_off[:-1], sel_off[1:]


def _take(col: np.ndarray, idx: np.ndarray | None) -> np.ndarray:
    return col if idx is None else col[idx]


def _check_options(choose: str, charge: Any, target_mass: Any, min_delta_r: Any) -> tuple:
    if choose not in CHOOSE_RULES:
        guess = closest(str(choose), CHOOSE_RULES)
        hint = f"; did you mean {guess!r}?" if guess else ""
        raise ConfigError(
            f"choose={choose!r} is not a candidate rule; use one of "
            f"{', '.join(map(repr, CHOOSE_RULES))}{hint}")
    if charge not in _CHARGE:
        guess = closest(str(charge), [k for k in _CHARGE if k])
        hint = f"; did you mean {guess!r}?" if guess else ""
        raise ConfigError(
            f"charge={charge!r} is not a charge requirement; use None (any), 'opposite' or "
            f"'same'{hint}")
    if choose == "closest":
        if target_mass is None:
            raise ConfigError("choose='closest' needs target_mass=<mass in GeV>")
        try:
            tm = float(target_mass)
        except (TypeError, ValueError):
            raise ConfigError(f"target_mass must be a number in GeV, got {target_mass!r}") from None
        if not np.isfinite(tm):
            raise ConfigError(f"target_mass must be finite, got {target_mass!r}")
    elif target_mass is not None:
        raise ConfigError(
            f"target_mass={target_mass!r} is only used with choose='closest' (choose is "
            f"{choose!r}); remove it or set choose='closest'")
    else:
        tm = None
    dr = None
    if min_delta_r is not None:
        try:
            dr = float(min_delta_r)
        except (TypeError, ValueError):
            raise ConfigError(f"min_delta_r must be a number, got {min_delta_r!r}") from None
        if not (dr >= 0 and np.isfinite(dr)):
            raise ConfigError(f"min_delta_r must be a finite number >= 0, got {min_delta_r!r}")
        if dr == 0:
            dr = None
    return _CHARGE[charge], tm, dr


def _charges(coll: _Collection, idx: np.ndarray | None, charge: str) -> np.ndarray:
    """Charge signs (+1, -1, 0; NaN counts as 0) of the selected objects, as int8."""
    if "charge" not in coll.fields:
        raise InputError(
            f"charge={charge!r} needs a 'charge' field in collection {coll.name!r}, which has "
            f"{', '.join(coll.fields)}; pass charge=None to pair regardless of charge")
    q = _take(coll.get("charge"), idx)
    if q.dtype.kind not in "biuf":
        raise InputError(f"collection {coll.name!r}: field 'charge' is not numeric ({q.dtype})")
    if q.dtype.kind == "b":
        raise InputError(f"collection {coll.name!r}: field 'charge' holds true/false values; "
                         "charges must be numbers such as +1 and -1")
    return (q > 0).view(np.int8) - (q < 0).view(np.int8)


def _cartesian(coll: _Collection, sel: np.ndarray | None, used: np.ndarray) -> tuple:
    """Cartesian components of the objects ``sel[used]`` (indices into the selection)."""
    flat = used if sel is None else sel[used]
    cols = [coll.get(f)[flat] for f in _KINEMATIC_FIELDS]
    return kinematics.to_cartesian(*cols)
