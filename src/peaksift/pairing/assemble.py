"""From selected objects to candidates: the reader's layout, all pairs or the chosen ones, sums."""

from __future__ import annotations

from typing import Any

import numpy as np

from .. import kinematics
from ..errors import InputError, closest
from .candidates import _KINEMATIC_FIELDS, _NO_INDEX, Candidates
from .collection import _cartesian, _Collection, _take
from .kernels import (
    _best_pairs_direct,
    _best_per_event,
    _count_pairs,
    _fill_all,
    _fill_pairs,
    _ordered_pairs,
    _run_counts,
    _sum_pairs,
)


def _plain_collection(events: Any, name: str) -> bool:
    """True when ``events[name]`` has the reader's layout: a list of records whose pt, eta,
    phi and mass are plain floating-point arrays (no option types, no vector conversion)."""
    import awkward as ak

    if name not in events.fields:
        return True  # let _Collection name what is missing
    lay = events[name].layout
    if not isinstance(lay, (ak.contents.ListOffsetArray, ak.contents.ListArray)):
        return False
    rec = lay.content
    if not isinstance(rec, ak.contents.RecordArray) or not all(
            f in rec.fields for f in _KINEMATIC_FIELDS):
        return False
    return all(isinstance(rec.content(f), ak.contents.NumpyArray)
               and rec.content(f).data.dtype.kind == "f" for f in _KINEMATIC_FIELDS)


def _as_read_events(events: Any, names: list[str]) -> Any:
    """Events as :func:`peaksift.read_events` gives them: an awkward array whose collections
    are already plain is used as it is; other in-memory events (option types, other vector
    coordinates, Arrow tables) go through :func:`peaksift.events.from_memory`."""
    import awkward as ak
    import pyarrow as pa

    from ..events import from_memory, is_in_memory

    if isinstance(events, ak.Array) and events.fields and events.ndim == 1 and all(
            _plain_collection(events, n) for n in names):
        return events
    if not is_in_memory(events) or (isinstance(events, ak.Array) and not events.fields):
        raise InputError(
            "pair needs events: an awkward array of event records (from peaksift.read_events, "
            "ak.from_parquet, vector.zip, ...) or a pyarrow Table / RecordBatchReader; got "
            f"{type(events).__name__}")
    present = events.fields if isinstance(events, ak.Array) else (
        events.schema.names if not isinstance(events, pa.RecordBatchReader) else None)
    if present is not None:
        for n in names:
            if n not in present:
                guess = closest(n, list(present))
                hint = f"; did you mean {guess!r}?" if guess else ""
                raise InputError(f"no collection {n!r} in the events; fields present: "
                                 f"{', '.join(present) or '(none)'}{hint}")
    return from_memory(events, names)


def _pair_selected(events: Any, ca: _Collection, cb: _Collection, same: bool,
                   sel_a: np.ndarray | None, sa: np.ndarray, ea: np.ndarray,
                   sel_b: np.ndarray | None, sb: np.ndarray, eb: np.ndarray, qa: np.ndarray,
                   qb: np.ndarray, mode: int, choose: str, tm: float | None,
                   dr: float | None, n_events: int, n_after: int,
                   event_offset: int, ordered: tuple | None = None) -> Candidates:
    """The pairs of the selected objects: the kernel part of :func:`pair`.

    ``ordered`` (from :func:`_ordered_inputs`) lists ordered pairs of two hypotheses on one
    collection instead of the usual pairs; the rest is the same."""
    if ordered is not None:
        ia, ib, rule, ina, inb, za2, zb2 = ordered
        e1 = np.empty(1, dtype=np.int64)
        total = _ordered_pairs(sa, ea, sb, eb, ia, ib, qa, qb, mode, rule, ina, inb, za2, zb2,
                               False, e1, e1, e1)
        a, b, pe = (np.empty(total + 1, dtype=np.int64) for _ in range(3))
        _ordered_pairs(sa, ea, sb, eb, ia, ib, qa, qb, mode, rule, ina, inb, za2, zb2, True,
                       a, b, pe)
        a, b, pe = a[:total], b[:total], pe[:total]
        return _chosen(events, ca, cb, same, sel_a, sel_b, a, b, pe, choose, tm, dr,
                       n_events, n_after, event_offset)
    if dr is None and choose in ("leading", "max_sum_pt"):
        # fast path: pick each event's pair while scanning, without listing every pair
        pta = np.ascontiguousarray(_take(ca.get("pt"), sel_a), dtype=np.float64)
        ptb = pta if same else np.ascontiguousarray(_take(cb.get("pt"), sel_b), dtype=np.float64)
        rule = 1 if choose == "leading" else 2
        a, b, pe = _best_pairs_direct(sa, ea, sb, eb, same, qa, qb, mode, pta, ptb, rule)
        del pta, ptb
        return _finish(events, ca, cb, same, sel_a, sel_b, a, b, pe, choose, None,
                       n_events, n_after, int(pe.size), event_offset)

    if dr is None and choose == "all":
        return _all_pairs(events, ca, cb, same, sel_a, sel_b, sa, ea, sb, eb, qa, qb, mode,
                          n_events, n_after, event_offset)

    counts = np.empty(n_events, dtype=np.int64)
    _count_pairs(sa, ea, sb, eb, same, qa, qb, mode, counts)
    starts = np.zeros(n_events, dtype=np.int64)
    if n_events > 1:
        np.cumsum(counts[:-1], out=starts[1:])
    total = int(counts.sum())
    a, b, pe = (np.empty(total + 1, dtype=np.int64) for _ in range(3))
    _fill_pairs(sa, ea, sb, eb, same, qa, qb, mode, starts, counts, a, b, pe)
    a, b, pe = a[:total], b[:total], pe[:total]
    del counts, starts
    return _chosen(events, ca, cb, same, sel_a, sel_b, a, b, pe, choose, tm, dr,
                   n_events, n_after, event_offset)


def _chosen(events: Any, ca: _Collection, cb: _Collection, same: bool,
            sel_a: np.ndarray | None, sel_b: np.ndarray | None, a: np.ndarray, b: np.ndarray,
            pe: np.ndarray, choose: str, tm: float | None, dr: float | None, n_events: int,
            n_after: int, event_offset: int) -> Candidates:
    """From the listed pairs (a, b in event pe): Delta R, the choose rule and the columns."""
    if dr is not None and a.size:
        eta_a, phi_a = _take(ca.get("eta"), sel_a), _take(ca.get("phi"), sel_a)
        eta_b, phi_b = (eta_a, phi_a) if same else (_take(cb.get("eta"), sel_b),
                                                    _take(cb.get("phi"), sel_b))
        keep = kinematics.delta_r(eta_a[a], phi_a[a], eta_b[b], phi_b[b]) >= dr
        a, b, pe = a[keep], b[keep], pe[keep]
        del keep

    n_with_pair = int(np.count_nonzero(pe[1:] != pe[:-1]) + 1) if pe.size else 0

    if choose in ("leading", "max_sum_pt") and a.size:
        pta = _take(ca.get("pt"), sel_a)[a]
        ptb = (_take(ca.get("pt"), sel_a) if same else _take(cb.get("pt"), sel_b))[b]
        if choose == "leading":
            k1, k2 = np.maximum(pta, ptb), np.minimum(pta, ptb)
        else:
            k1 = pta + ptb
            k2 = np.zeros_like(k1)
        best = _best_per_event(pe, k1, k2)
        a, b, pe = a[best], b[best], pe[best]
        del pta, ptb, k1, k2, best

    return _finish(events, ca, cb, same, sel_a, sel_b, a, b, pe, choose, tm,
                   n_events, n_after, n_with_pair, event_offset)


def _event_weights(events: Any) -> np.ndarray | None:
    import awkward as ak

    if "weight" not in events.fields:
        return None
    if events["weight"].ndim != 1 or events["weight"].fields:
        raise InputError("the per-event 'weight' field must hold one number per event, "
                         f"got type {events['weight'].type}; rename it or flatten it")
    try:
        return np.ascontiguousarray(ak.to_numpy(events["weight"]), dtype=np.float64)
    except (ValueError, TypeError) as exc:
        raise InputError(f"per-event 'weight' is not a flat number per event ({exc})") from None


def _all_pairs(events: Any, ca: _Collection, cb: _Collection, same: bool,
               sel_a: np.ndarray | None, sel_b: np.ndarray | None, sa: np.ndarray,
               ea: np.ndarray, sb: np.ndarray, eb: np.ndarray, qa: np.ndarray, qb: np.ndarray,
               mode: int, n_events: int, n_after: int, event_offset: int) -> Candidates:
    """choose='all' without Delta R: one counting pass, then one kernel writes every column.

    Masses, pT and rapidities come from the polar pair formulas
    (:func:`peaksift.kinematics.pair_kinematics`): per object two square roots and one
    ``sinh``, per pair one sine, one cosine and one logarithm.  Converting each object to
    Cartesian components instead cost four trigonometric/hyperbolic calls per object, the
    largest part of the time.
    """
    counts = np.empty(n_events, dtype=np.int64)
    _count_pairs(sa, ea, sb, eb, same, qa, qb, mode, counts)
    starts = np.zeros(n_events + 1, dtype=np.int64)
    np.cumsum(counts, out=starts[1:])
    total = int(starts[-1])
    n_with_pair = int(np.count_nonzero(counts))
    w = _event_weights(events)

    mass, rap, pt, weight = (np.empty(total) for _ in range(4))
    pe, fi, si, mult = (np.empty(total, dtype=np.int64) for _ in range(4))
    if total:
        na = int((ea - sa).max())
        nb = na if same else int((eb - sb).max())
        ta = np.empty((6, na))
        tb = ta if same else np.empty((6, nb))
        cols_a = [ca.get(f) for f in _KINEMATIC_FIELDS]
        cols_b = cols_a if same else [cb.get(f) for f in _KINEMATIC_FIELDS]
        _fill_all(sa, ea, sb, eb, same, qa, qb, mode, starts, counts,
                  _NO_INDEX if sel_a is None else sel_a, _NO_INDEX if sel_b is None else sel_b,
                  sel_a is not None, sel_b is not None, *cols_a, *cols_b,
                  ca.offsets, cb.offsets, np.zeros(1) if w is None else w, w is not None,
                  ta, tb, mass, pt, rap, pe, fi, si, mult, weight)
    del counts, starts
    if event_offset:
        pe += int(event_offset)
    flow = {
        "events_in": int(n_events),
        "events_after_event_cut": int(n_after),
        "events_with_pair": n_with_pair,
        "candidates": total,
    }
    return Candidates(mass=mass, pt=pt, rapidity=rap, weight=weight, event_index=pe,
                      first_index=fi, second_index=si, cutflow=flow, multiplicity=mult,
                      choose="all")


def _finish(events: Any, ca: _Collection, cb: _Collection, same: bool,
            sel_a: np.ndarray | None, sel_b: np.ndarray | None, a: np.ndarray, b: np.ndarray,
            pe: np.ndarray, choose: str, tm: float | None, n_events: int, n_after: int,
            n_with_pair: int, event_offset: int) -> Candidates:
    """Kinematics, weights and indices of the chosen pairs (a, b in event pe)."""
    px, py, pz, e = _pair_sums(ca, cb, same, sel_a, sel_b, a, b)
    mass = kinematics.invariant_mass(e, px, py, pz)

    if choose == "closest" and a.size:
        k1 = -np.abs(mass - tm)
        best = _best_per_event(pe, k1, np.zeros_like(k1))
        a, b, pe, mass = a[best], b[best], pe[best], mass[best]
        px, py, pz, e = px[best], py[best], pz[best], e[best]
        del k1, best

    pt = np.sqrt(px * px + py * py)
    rap = kinematics.rapidity(e, pz)
    del px, py, pz, e

    w_ev = _event_weights(events)
    weight = np.ones(pe.size) if w_ev is None else w_ev[pe]

    first_index = (a if sel_a is None else sel_a[a]) - ca.offsets[pe]
    second_index = (b if sel_b is None else sel_b[b]) - cb.offsets[pe]

    multiplicity = _run_counts(pe) if choose == "all" else None
    event_index = pe + int(event_offset)
    flow = {
        "events_in": int(n_events),
        "events_after_event_cut": int(n_after),
        "events_with_pair": n_with_pair,
        "candidates": int(mass.size),
    }
    return Candidates(
        mass=mass, pt=pt, rapidity=rap, weight=weight, event_index=event_index,
        first_index=first_index, second_index=second_index, cutflow=flow,
        multiplicity=multiplicity, choose=choose,
    )


def _pair_sums(ca: _Collection, cb: _Collection, same: bool, sel_a: np.ndarray | None,
               sel_b: np.ndarray | None, a: np.ndarray, b: np.ndarray) -> tuple:
    """Summed Cartesian components of the pairs, converting each used object once."""
    if a.size == 0:
        z = np.zeros(0)
        return z, z.copy(), z.copy(), z.copy()
    n_sel_a = ca.n_objects if sel_a is None else sel_a.size
    if same:
        used = np.zeros(n_sel_a, dtype=np.bool_)
        used[a] = True
        used[b] = True
        ia = np.flatnonzero(used)
        cart = _cartesian(ca, sel_a, ia)
        remap = np.cumsum(used, dtype=np.int64) - 1
        del used, ia
        return _sum_pairs(a, b, remap, remap, *cart, *cart)
    n_sel_b = cb.n_objects if sel_b is None else sel_b.size
    used_a = np.zeros(n_sel_a, dtype=np.bool_)
    used_a[a] = True
    used_b = np.zeros(n_sel_b, dtype=np.bool_)
    used_b[b] = True
    cart_a = _cartesian(ca, sel_a, np.flatnonzero(used_a))
    cart_b = _cartesian(cb, sel_b, np.flatnonzero(used_b))
    ra = np.cumsum(used_a, dtype=np.int64) - 1
    rb = np.cumsum(used_b, dtype=np.int64) - 1
    return _sum_pairs(a, b, ra, rb, *cart_a, *cart_b)
