"""Pair building and candidate choice: from events to flat di-object candidates.

Use :func:`pair` to turn events into :class:`Candidates` (flat numpy columns: mass, pT and
rapidity of each pair, event weight, event index, the two object indices) with a cut flow.
Use :meth:`Candidates.concatenate` to join chunks, :meth:`Candidates.in_window` to keep a
mass window.

What :func:`pair` does, in order
--------------------------------
1. ``event_cut`` (text over per-event scalars and ``n_<collection>`` counts, a callable or
   a mask; see :mod:`peaksift.cuts`) selects events.
2. ``cut`` selects objects of ``first``; ``second_cut`` selects objects of ``second``.  For
   two different collections each cut applies to its own collection only (``second_cut=None``
   means no requirement on the second collection's objects).
3. Pairs are formed inside each event from the selected objects:

   * one collection: every unordered pair ``i < j`` (``first_index < second_index``);
   * two collections: every ``(i, j)`` with ``i`` in ``first`` and ``j`` in ``second``.

   Within an event, pairs come in lexicographic order of ``(first_index, second_index)``;
   events come in order.  Object indices always refer to the collection as read (before
   any cut).
4. Pair requirements: ``charge="opposite"`` keeps pairs with one charge positive and the
   other negative, ``"same"`` pairs with both positive or both negative (a neutral object,
   ``q = 0``, or a NaN charge passes neither); ``min_delta_r`` keeps
   pairs with :math:`\\Delta R \\ge` ``min_delta_r`` (overlap removal).
5. ``choose`` decides what each event contributes among the pairs that passed:

   * ``"all"``: every pair (``Candidates.multiplicity`` then gives, for each candidate, the
     number of candidates its event contributed);
   * ``"leading"``: the pair whose harder object has the highest pT; if equal, the pair
     whose softer object has the higher pT;
   * ``"max_sum_pt"``: the pair with the highest scalar sum ``pT_i + pT_j``;
   * ``"closest"``: the pair whose mass is nearest ``target_mass`` (smallest
     ``|m - target_mass|``).

   Ties (exactly equal keys) go to the pair that comes first in the order of step 3, i.e.
   the lowest ``first_index``, then the lowest ``second_index``.  A pair whose key is NaN
   is never chosen.

Mass hypotheses per leg and dE/dx identification
-------------------------------------------------
``hypotheses="kaon"`` or ``("kaon", "pion")`` gives each leg the mass of a hypothesis of
:data:`peaksift.energy_loss.HYPOTHESES` (replacing the collection's mass field) and computes
the invariant mass with those masses.  ``identification`` (a
:class:`peaksift.energy_loss.DedxResponse`) lets the cuts use ``dedx_deviation(kaon)``.
For two *different* hypotheses on one collection, ``cut`` selects the first leg and
``second_cut`` the second, and pairs are ordered: ``(i, j)`` with ``i`` passing ``cut``, ``j``
passing ``second_cut``, ``i != j``.  When both objects pass both selections the pair has two
assignments (Kπ and πK); ``assignment`` decides what is kept:

* ``"both"``: both, as two candidates (each with its own mass);
* ``"more_probable"``: the one with the smaller
  :math:`z_{1}(i)^2 + z_{2}(j)^2` (z: the standardised dE/dx deviations under each leg's
  hypothesis), i.e. the larger Gaussian likelihood with equal prior abundances; on a tie,
  the one whose first leg comes first in the collection.

With ``choose="all"`` (and no ``min_delta_r``) each pair's mass, pT and rapidity come
straight from the objects' polar coordinates through the formulas of
:func:`peaksift.kinematics.pair_kinematics` (sums of non-negative terms: no cancellation
for nearly collinear or back-to-back pairs; one exponential per object, one polynomial sine
and one logarithm per pair), evaluated inside the kernel by the same functions
(:func:`~peaksift.kinematics.polar_object_terms`,
:func:`~peaksift.kinematics.half_angle_squares`,
:func:`~peaksift.kinematics.polar_pair_terms`).  The other rules add four-vectors in
Cartesian components (:func:`peaksift.kinematics.to_cartesian`, once per object) and take
:func:`peaksift.kinematics.invariant_mass`, :func:`peaksift.kinematics.rapidity` and
:math:`\\sqrt{p_x^2 + p_y^2}` of the sum (PDG Review, "Kinematics").  Both agree to
rounding (about 1e-15 relative for ordinary pairs; the polar form is the more precise one
for nearly collinear pairs).

Implementation: all work is on flat numpy columns (collection offsets + contents).  The
pair loops run in small numba kernels (compiled once, cached on disk).  Numba was chosen
because pairing inside variable-length events is naturally a loop: in numpy every step
(pair index generation with repeat/cumsum tricks, the charge mask, gathers of both objects'
components, the sums) is a separate full-size array, while a kernel counts, tests charges
and adds the four-vectors in one pass.  ``scripts/bench_pairing.py`` measures the result
against a hand-written vector + awkward selection.
"""

from __future__ import annotations

import contextlib
import dataclasses
import threading
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from typing import Any

import numba
import numpy as np

from . import kinematics
from .cuts import CutLike, event_mask, flat_object_mask
from .energy_loss import DedxResponse, hypothesis_mass
from .errors import ConfigError, InputError, closest
from .histogram import in_range

__all__ = ["ASSIGNMENT_RULES", "CHOOSE_RULES", "Candidates", "load_kernels", "pair"]

CHOOSE_RULES = ("all", "leading", "max_sum_pt", "closest")
#: what to keep when an unlike pair has two mass assignments (see the module guide)
ASSIGNMENT_RULES = ("both", "more_probable")
_CHARGE = {None: 0, "any": 0, "opposite": -1, "same": 1}
_CUTFLOW_KEYS = ("events_in", "events_after_event_cut", "events_with_pair", "candidates")
_KINEMATIC_FIELDS = ("pt", "eta", "phi", "mass")
_NO_INDEX = np.zeros(1, dtype=np.int64)


# ------------------------------------------------------------------------ result
@dataclass(frozen=True, eq=False)
class Candidates:
    """Di-object candidates as flat numpy columns (one entry per candidate).

    Attributes
    ----------
    mass, pt, rapidity : ndarray (float64)
        Invariant mass (GeV), transverse momentum (GeV) and rapidity of the pair.
    weight : ndarray (float64)
        The event's weight (1 when the events carry no ``weight`` field).
    event_index : ndarray (int64)
        Index of the event (plus the ``event_offset`` given to :func:`pair`, so chunks keep
        global indices).
    first_index, second_index : ndarray (int64)
        Index of each object within its event's collection, as read (before cuts).
    cutflow : dict
        ``events_in``, ``events_after_event_cut``, ``events_with_pair`` (events with at
        least one pair passing every requirement), ``candidates``.
    multiplicity : ndarray (int64) or None
        With ``choose="all"``: the number of candidates from the same event, per candidate
        (e.g. weight by ``1 / multiplicity`` to count each event once).  None otherwise.
    choose : str
        The rule that produced the candidates.
    hypotheses : (str, str) or None
        The mass hypothesis of each leg (None: the collections' own masses).
    """

    mass: np.ndarray
    pt: np.ndarray
    rapidity: np.ndarray
    weight: np.ndarray
    event_index: np.ndarray
    first_index: np.ndarray
    second_index: np.ndarray
    cutflow: dict[str, int] = field(default_factory=dict)
    multiplicity: np.ndarray | None = None
    choose: str = "all"
    hypotheses: tuple[str, str] | None = None

    _COLUMNS = ("mass", "pt", "rapidity", "weight", "event_index", "first_index",
                "second_index")

    def __len__(self) -> int:
        return int(self.mass.size)

    def __repr__(self) -> str:
        flow = ", ".join(f"{k}={v}" for k, v in self.cutflow.items())
        return f"Candidates({len(self)} candidates, choose={self.choose!r}, {flow})"

    @classmethod
    def empty(cls, choose: str = "all") -> Candidates:
        """No candidates, zero counters."""
        f = np.zeros(0)
        i = np.zeros(0, dtype=np.int64)
        return cls(f, f.copy(), f.copy(), f.copy(), i, i.copy(), i.copy(),
                   dict.fromkeys(_CUTFLOW_KEYS, 0),
                   i.copy() if choose == "all" else None, choose)

    @classmethod
    def concatenate(cls, parts: Sequence[Candidates]) -> Candidates:
        """Join candidates from several chunks: columns concatenated, counters summed.

        Event indices are kept as they are (give each chunk its ``event_offset`` when
        pairing so they are global).  All parts must come from the same ``choose`` rule.
        """
        parts = list(parts)
        if not parts:
            return cls.empty()
        for p in parts:
            if not isinstance(p, Candidates):
                raise InputError(
                    f"Candidates.concatenate takes Candidates, got {type(p).__name__}")
        rules = {p.choose for p in parts}
        if len(rules) > 1:
            raise InputError(
                f"cannot concatenate candidates made with different choose rules "
                f"({', '.join(sorted(rules))}); pair every chunk with the same options")
        cols = {c: np.concatenate([getattr(p, c) for p in parts]) for c in cls._COLUMNS}
        keys: list[str] = []
        for p in parts:
            keys += [k for k in p.cutflow if k not in keys]
        flow = {k: int(sum(int(p.cutflow.get(k, 0)) for p in parts)) for k in keys}
        mult = None
        if all(p.multiplicity is not None for p in parts):
            mult = np.concatenate([p.multiplicity for p in parts])
        hyps = {p.hypotheses for p in parts}
        if len(hyps) > 1:
            raise InputError("cannot concatenate candidates made with different mass "
                             "hypotheses; pair every chunk with the same options")
        return cls(**cols, cutflow=flow, multiplicity=mult, choose=parts[0].choose,
                   hypotheses=parts[0].hypotheses)

    def select(self, mask: Any) -> Candidates:
        """The candidates where the boolean ``mask`` (one entry per candidate) is true.

        The cut flow is copied unchanged (it describes the pairing).
        """
        m = np.asarray(mask)
        if m.dtype != np.bool_ or m.shape != self.mass.shape:
            raise InputError(
                f"select needs a boolean mask of {len(self)} entries, got {m.dtype} {m.shape}")
        cols = {c: getattr(self, c)[m] for c in self._COLUMNS}
        mult = None if self.multiplicity is None else self.multiplicity[m]
        return dataclasses.replace(self, **cols, cutflow=dict(self.cutflow), multiplicity=mult)

    def in_window(self, lo: float, hi: float) -> Candidates:
        """Candidates with ``lo <= mass <= hi``: the masses a histogram on ``[lo, hi]`` puts
        in its bins (:func:`peaksift.histogram.in_range`; the last bin is closed).

        The cut flow and multiplicities are copied unchanged: they describe the pairing,
        before the window.
        """
        lo, hi = float(lo), float(hi)
        if not (np.isfinite(lo) and np.isfinite(hi) and hi > lo):
            raise InputError(f"in_window needs finite lo < hi, got ({lo!r}, {hi!r})")
        return self.select(in_range(self.mass, lo, hi))


# ----------------------------------------------------------------------- kernels
# Charges enter the kernels as int8 signs (+1, -1, 0); ``mode`` is 0 (any charge), -1
# (opposite: sign product -1) or +1 (same: sign product +1).  ``sa, ea`` / ``sb, eb`` are
# each event's start and stop in the selected objects of the first / second collection;
# ``same`` pairs the first collection with itself (j > i).


@numba.njit(cache=True, nogil=True)
def _count_pairs(sa, ea, sb, eb, same, ga, gb, mode, out):  # pragma: no cover
    """Number of pairs passing the charge requirement per event (into ``out``), from the
    numbers of positive and negative objects in each event (counted without branches)."""
    for ev in range(sa.size):
        na = ea[ev] - sa[ev]
        nb = eb[ev] - sb[ev]
        if mode == 0:
            out[ev] = na * (na - 1) // 2 if same else na * nb
            continue
        pa = 0
        ma = 0
        for i in range(sa[ev], ea[ev]):
            g = ga[i]
            pa += g > 0
            ma += g < 0
        pb = pa
        mb = ma
        if not same:
            pb = 0
            mb = 0
            for j in range(sb[ev], eb[ev]):
                g = gb[j]
                pb += g > 0
                mb += g < 0
        if same:
            c = pa * ma if mode < 0 else pa * (pa - 1) // 2 + ma * (ma - 1) // 2
        else:
            c = pa * mb + ma * pb if mode < 0 else pa * pb + ma * mb
        out[ev] = c


# The polar pair formulas live in peaksift.kinematics (written with arithmetic and numpy
# functions only) and are compiled into the kernels here.  numba's on-disk cache keys a
# kernel on this file only: after editing those kinematics functions, touch this file (or
# delete __pycache__/pairing.*.nb*) or the kernels keep the old formulas.
_object_terms = numba.njit(inline="always")(kinematics.polar_object_terms)
_pair_terms = numba.njit(inline="always")(kinematics.polar_pair_terms)
_half_angle_squares = numba.njit(inline="always")(kinematics.half_angle_squares)


@numba.njit(cache=True, nogil=True)
def _terms_of_event(s0, s1, sel, has_sel, pt, eta, phi, mass, t):  # pragma: no cover
    """Polar terms (pt, phi, m, mT, e^y, e^-y) of objects ``s0 <= i < s1`` into rows of ``t``."""
    for i in range(s0, s1):
        f = sel[i] if has_sel else i
        p = np.float64(pt[f])
        m = np.float64(mass[f])
        mt, a, r = _object_terms(p, np.float64(eta[f]), m)
        row = i - s0
        t[0, row] = p
        t[1, row] = np.float64(phi[f])
        t[2, row] = m
        t[3, row] = mt
        t[4, row] = a
        t[5, row] = r


@numba.njit(cache=True, nogil=True)
def _fill_all(sa, ea, sb, eb, same, ga, gb, mode, starts, counts,  # pragma: no cover
              sela, selb, has_sela, has_selb, pta, etaa, phia, ma, ptb, etab, phib, mb,
              offa, offb, w, has_w, ta, tb, mass, pt, rap, evo, fi, si, mult, wo):
    """Every passing pair, for choose='all': mass, pT and rapidity from the polar formulas
    of :func:`peaksift.kinematics.pair_kinematics` (per-object terms once per event into
    the scratch rows ``ta``/``tb``), event and object indices, multiplicity and weight.

    ``sela``/``selb`` map selected objects to flat indices of the collection as read
    (identity when ``has_sel*`` is false); ``offa``/``offb`` are the collections' event
    offsets.
    """
    for ev in range(sa.size):
        nc = counts[ev]
        if nc == 0:
            continue
        _terms_of_event(sa[ev], ea[ev], sela, has_sela, pta, etaa, phia, ma, ta)
        if not same:
            _terms_of_event(sb[ev], eb[ev], selb, has_selb, ptb, etab, phib, mb, tb)
        k = starts[ev]
        wev = w[ev] if has_w else 1.0
        s0 = sa[ev]
        t0 = sb[ev]
        for i in range(s0, ea[ev]):
            j0 = i + 1 if same else t0
            ia = i - s0
            fa = (sela[i] if has_sela else i) - offa[ev]
            gi = ga[i] if mode != 0 else 0
            for j in range(j0, eb[ev]):
                if mode != 0 and gi * gb[j] != mode:
                    continue
                jb = j - t0
                s2, c2 = _half_angle_squares(ta[1, ia] - tb[1, jb])
                msq, ptsq, y = _pair_terms(ta[0, ia], ta[2, ia], ta[3, ia], ta[4, ia],
                                           ta[5, ia], tb[0, jb], tb[2, jb], tb[3, jb],
                                           tb[4, jb], tb[5, jb], s2, c2)
                mass[k] = np.sqrt(msq)
                pt[k] = np.sqrt(ptsq)
                rap[k] = y
                evo[k] = ev
                fi[k] = fa
                si[k] = (selb[j] if has_selb else j) - offb[ev]
                mult[k] = nc
                wo[k] = wev
                k += 1


@numba.njit(cache=True, nogil=True)
def _fill_pairs(sa, ea, sb, eb, same, ga, gb, mode, starts, counts, a, b, pe):  # pragma: no cover
    """Object indices (a, b) and event index of every passing pair, in event then (i, j) order
    (outputs allocated by the caller with one spare entry)."""
    for ev in range(sa.size):
        if counts[ev] == 0:
            continue
        k = starts[ev]
        for i in range(sa[ev], ea[ev]):
            j0 = i + 1 if same else sb[ev]
            gi = ga[i] if mode != 0 else 0
            for j in range(j0, eb[ev]):
                a[k] = i
                b[k] = j
                pe[k] = ev
                if mode == 0 or gi * gb[j] == mode:
                    k += 1


@numba.njit(cache=True, nogil=True)
def _best_per_event(pe, k1, k2):  # pragma: no cover - compiled
    """Index of the pair maximising (k1, k2) within each run of equal ``pe``.

    Strict comparisons: among equal keys the first pair wins; NaN keys never win.
    """
    n = pe.size
    out = np.empty(n, dtype=np.int64)
    m = 0
    i = 0
    while i < n:
        ev = pe[i]
        best = -1
        b1 = 0.0
        b2 = 0.0
        while i < n and pe[i] == ev:
            x1 = k1[i]
            x2 = k2[i]
            ok = not (np.isnan(x1) or np.isnan(x2))
            if ok and (best < 0 or x1 > b1 or (x1 == b1 and x2 > b2)):
                best = i
                b1 = x1
                b2 = x2
            i += 1
        if best >= 0:
            out[m] = best
            m += 1
    return out[:m]


@numba.njit(cache=True, nogil=True)
def _best_pairs_direct(sa, ea, sb, eb, same, ga, gb, mode, pta, ptb, rule):  # pragma: no cover
    """Chosen pair per event without listing all pairs (rule 1: leading, 2: max_sum_pt).

    Same order, keys and tie rule as listing the passing pairs and calling
    :func:`_best_per_event`; returns (a, b, event) of the chosen pairs.
    """
    n_ev = sa.size
    a = np.empty(n_ev, dtype=np.int64)
    b = np.empty(n_ev, dtype=np.int64)
    pe = np.empty(n_ev, dtype=np.int64)
    m = 0
    for ev in range(n_ev):
        best_i = -1
        best_j = -1
        b1 = 0.0
        b2 = 0.0
        for i in range(sa[ev], ea[ev]):
            j0 = i + 1 if same else sb[ev]
            for j in range(j0, eb[ev]):
                if mode != 0 and ga[i] * gb[j] != mode:
                    continue
                x = pta[i]
                y = ptb[j]
                if rule == 1:
                    x1 = max(x, y)
                    x2 = min(x, y)
                else:
                    x1 = x + y
                    x2 = 0.0
                ok = not (np.isnan(x1) or np.isnan(x2))
                if ok and (best_i < 0 or x1 > b1 or (x1 == b1 and x2 > b2)):
                    best_i = i
                    best_j = j
                    b1 = x1
                    b2 = x2
        if best_i >= 0:
            a[m] = best_i
            b[m] = best_j
            pe[m] = ev
            m += 1
    return a[:m], b[:m], pe[:m]


@numba.njit(cache=True, nogil=True)
def _ordered_pairs(sa, ea, sb, eb, sela, selb, ga, gb, mode, rule, ina, inb, za2,
                   zb2, fill, a, b, pe):  # pragma: no cover - compiled
    """Ordered pairs (i, j) of one collection under two different leg hypotheses.

    ``i`` runs over the first leg's selection, ``j`` over the second's (``sela``/``selb``:
    their flat indices in the collection); the same object is never paired with itself.
    ``rule`` 1 (more probable): when the swapped assignment also exists (``ina[fb]`` and
    ``inb[fa]``), keep the one with the smaller ``za2[first] + zb2[second]`` (ties: the one
    whose first leg has the lower index; a NaN sum loses).  With ``fill`` false only counts;
    otherwise writes (i, j, event) into a, b, pe.  Returns the number of pairs.
    """
    k = 0
    for ev in range(sa.size):
        for i in range(sa[ev], ea[ev]):
            fa = sela[i]
            gi = ga[i] if mode != 0 else 0
            for j in range(sb[ev], eb[ev]):
                fb = selb[j]
                if fa == fb:
                    continue
                if mode != 0 and gi * gb[j] != mode:
                    continue
                if rule == 1 and ina[fb] and inb[fa]:
                    c = za2[fa] + zb2[fb]
                    cs = za2[fb] + zb2[fa]
                    if not (c < cs or (c == cs and fa < fb)
                            or (np.isnan(cs) and not np.isnan(c))):
                        continue
                if fill:
                    a[k] = i
                    b[k] = j
                    pe[k] = ev
                k += 1
    return k


@numba.njit(cache=True, nogil=True)
def _sum_pairs(a, b, ua, ub, pxa, pya, pza, ea, pxb, pyb, pzb, eb):  # pragma: no cover
    """Component-wise four-vector sums of the pairs (a, b); ua/ub map to the Cartesian rows."""
    n = a.size
    px = np.empty(n)
    py = np.empty(n)
    pz = np.empty(n)
    e = np.empty(n)
    for k in range(n):
        i = ua[a[k]]
        j = ub[b[k]]
        px[k] = pxa[i] + pxb[j]
        py[k] = pya[i] + pyb[j]
        pz[k] = pza[i] + pzb[j]
        e[k] = ea[i] + eb[j]
    return px, py, pz, e


@numba.njit(cache=True, nogil=True)
def _run_counts(pe):  # pragma: no cover - compiled
    """For sorted ``pe``: the length of the run each entry belongs to."""
    n = pe.size
    out = np.empty(n, dtype=np.int64)
    i = 0
    while i < n:
        j = i
        while j < n and pe[j] == pe[i]:
            j += 1
        for k in range(i, j):
            out[k] = j - i
        i = j
    return out


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


# ------------------------------------------------------------------------- pair
def pair(
    events: Any,
    first: str,
    second: str | None = None,
    *,
    cut: CutLike = None,
    second_cut: CutLike = None,
    event_cut: CutLike = None,
    charge: str | None = None,
    choose: str = "all",
    target_mass: float | None = None,
    min_delta_r: float | None = None,
    event_offset: int = 0,
    hypotheses: str | Sequence[str] | None = None,
    identification: DedxResponse | None = None,
    assignment: str = "both",
) -> Candidates:
    """Build di-object candidates; see the module guide for the exact rules.

    Parameters
    ----------
    events : awkward.Array
        Events as read by :func:`peaksift.read_events` (collections of Momentum4D records
        with ``pt, eta, phi, mass``; optional per-event ``weight``).
    first : str
        Collection of the first object (``"muon"``).
    second : str, optional
        Collection of the second object; None (or ``first``) pairs ``first`` with itself.
    cut, second_cut : str, Cut, callable or mask, optional
        Object cuts on ``first`` and on ``second`` (see :mod:`peaksift.cuts`); an empty
        string means no cut.  ``second_cut`` needs a different ``second`` collection, or two
        different ``hypotheses`` (it then selects the second leg).
    event_cut : str, Cut, callable or mask, optional
        Event cut (per-event scalars, ``n_<collection>`` counts before object cuts).
    charge : {None, "any", "opposite", "same"}
        Charge requirement on the pair (needs a ``charge`` field).
    choose : {"all", "leading", "max_sum_pt", "closest"}
        What each event contributes.
    target_mass : float, optional
        Mass in GeV for ``choose="closest"`` (required there, refused otherwise).
    min_delta_r : float, optional
        Keep pairs with :math:`\\Delta R = \\sqrt{\\Delta\\eta^2 + \\Delta\\phi^2} \\ge`
        ``min_delta_r``; None or 0 for no requirement.
    event_offset : int
        Added to ``event_index`` (the global index of this chunk's first event).
    hypotheses : str or (str, str), optional
        Mass hypothesis of both legs, or of each leg (names of
        :data:`peaksift.energy_loss.HYPOTHESES`); None keeps the collections' masses.
    identification : DedxResponse, optional
        The dE/dx response behind ``dedx_deviation(...)`` in the cuts and the
        ``"more_probable"`` assignment.
    assignment : {"both", "more_probable"}
        What to keep when an unlike pair has two assignments (module guide).

    Returns
    -------
    Candidates

    Raises
    ------
    InputError
        Missing collection, kinematic field or ``charge`` field.
    ConfigError
        Unknown ``choose``/``charge``/hypothesis/``assignment``, missing ``target_mass``,
        bad ``min_delta_r``, ``"more_probable"`` without ``identification``.
    CutError
        A cut that cannot be parsed or names an unknown field.
    """
    return _pair(events, first, second, cut=cut, second_cut=second_cut,
                 event_cut=event_cut, charge=charge, choose=choose, target_mass=target_mass,
                 min_delta_r=min_delta_r, event_offset=event_offset,
                 hypotheses=_check_hypotheses(hypotheses, identification, assignment),
                 identification=identification, assignment=assignment)


def _check_hypotheses(hypotheses: Any, identification: Any, assignment: Any
                      ) -> tuple[str, str] | None:
    """The two legs' hypothesis names (or None), after checking every identification option."""
    if identification is not None and not isinstance(identification, DedxResponse):
        raise ConfigError("identification must be a peaksift.energy_loss.DedxResponse, got "
                          f"{type(identification).__name__}")
    if assignment not in ASSIGNMENT_RULES:
        guess = closest(str(assignment), ASSIGNMENT_RULES)
        hint = f"; did you mean {guess!r}?" if guess else ""
        raise ConfigError(f"assignment={assignment!r} is not a rule; use one of "
                          f"{', '.join(map(repr, ASSIGNMENT_RULES))}{hint}")
    if hypotheses is None:
        if assignment != "both":
            raise ConfigError("assignment applies only with two different hypotheses; set "
                              "hypotheses=('kaon', 'pion') (for example) or drop it")
        return None
    legs = (hypotheses, hypotheses) if isinstance(hypotheses, str) else tuple(hypotheses)
    if len(legs) != 2 or not all(isinstance(h, str) for h in legs):
        raise ConfigError(f"hypotheses must be one name or two names (one per leg), got "
                          f"{hypotheses!r}")
    for h in legs:
        hypothesis_mass(h, where="hypotheses")
    if assignment == "more_probable" and identification is None:
        raise ConfigError("assignment='more_probable' compares the dE/dx of both assignments; "
                          "pass identification=DedxResponse(...)")
    return legs  # type: ignore[return-value]


_KERNELS_LOADED = False  # the first kernel section of this process has run
_FIRST_SECTION = threading.Lock()


@contextlib.contextmanager
def _kernels_without_extensions(first_section: bool = True) -> Iterator[None]:
    """Let the kernels load without numba's third-party extensions, once per process.

    The first numba compilation or cache load in a process runs every installed
    ``numba_extensions`` entry point (``numba.core.entrypoints.init_all``): awkward's and
    vector's among them, about 0.25 s here, half of numba's whole first-call cost, paid
    again by every worker process.  The kernels take plain numpy arrays and need none of
    those extensions.  So while the first kernel section runs, ``init_all`` is replaced by a
    function that does nothing when called from this thread and the real thing from any
    other thread (whose compilations may need the extensions); it is put back afterwards,
    and the next compilation in this thread loads the extensions as usual.  numba's own
    "initialised" flag is never touched.  Tested: a user's ``numba.njit`` function over
    awkward arrays works after :func:`pair`, inside a callable cut of the first
    :func:`pair` call, and in another thread during it.  Only our kernels run inside: cuts
    and other user code are evaluated before.  Once the first section has run, or with a
    numba whose extensions are already in, this does nothing.  ``first_section=False``
    (the warm-up before forking) leaves the next section its turn.
    """
    global _KERNELS_LOADED
    eps = getattr(getattr(numba, "core", None), "entrypoints", None)
    if (_KERNELS_LOADED or eps is None or not callable(getattr(eps, "init_all", None))
            or getattr(eps, "_already_initialized", True) is not False):
        yield
        return
    with _FIRST_SECTION:  # one thread's first section at a time; the others then skip
        if _KERNELS_LOADED:
            yield
            return
        real = eps.init_all
        owner = threading.get_ident()

        def init_all_but_here() -> None:
            if threading.get_ident() != owner:
                real()

        try:
            eps.init_all = init_all_but_here
            yield
            _KERNELS_LOADED = _KERNELS_LOADED or first_section
        finally:
            eps.init_all = real


def load_kernels() -> None:
    """Run numba's first-call set-up now (its typing and target contexts, about 0.25 s)
    by calling one small kernel; the other kernels then load from the disk cache in
    milliseconds.  Called before worker processes are forked from this one."""
    z = np.zeros(1, dtype=np.int64)
    q = np.zeros(1, dtype=np.int8)
    with _kernels_without_extensions(first_section=False):
        _count_pairs(z, z, z, z, True, q, q, -1, np.zeros(1, dtype=np.int64))


def _pair(events: Any, first: str, second: str | None, *, cut: CutLike, second_cut: CutLike,
          event_cut: CutLike, charge: str | None, choose: str, target_mass: float | None,
          min_delta_r: float | None, event_offset: int,
          hypotheses: tuple[str, str] | None = None,
          identification: DedxResponse | None = None,
          assignment: str = "both") -> Candidates:
    import awkward as ak

    mode, tm, dr = _check_options(choose, charge, target_mass, min_delta_r)
    if not isinstance(events, ak.Array) or not events.fields:
        raise InputError(
            f"pair needs events as an awkward array of records (from peaksift.read_events), "
            f"got {type(events).__name__}")
    if not isinstance(first, str):
        raise ConfigError(f"first must be a collection name, got {first!r}")
    one_collection = second is None or second == first
    # two different hypotheses on one collection: two views of it, paired as ordered legs
    unlike = one_collection and hypotheses is not None and hypotheses[0] != hypotheses[1]
    same = one_collection and not unlike
    if same and not _is_no_cut(second_cut):
        raise ConfigError(
            "second_cut applies only when pairing two different collections (or two "
            "different hypotheses); with one collection put the requirement in cut")
    n_events = len(events)

    ca = _Collection(events, first)
    cb = ca if same else _Collection(events, first if one_collection else str(second))
    if hypotheses is not None:
        ca.use_mass(hypothesis_mass(hypotheses[0]))
        if not same:
            cb.use_mass(hypothesis_mass(hypotheses[1]))

    ev_ok = None
    n_after = n_events
    if not _is_no_cut(event_cut):
        ev_ok = event_mask(events, event_cut)
        n_after = int(np.count_nonzero(ev_ok))

    sel_a, sa, ea = _selected(ca, cut, ev_ok, identification)
    if same:
        sel_b, sb, eb = sel_a, sa, ea
    else:
        sel_b, sb, eb = _selected(cb, second_cut, ev_ok, identification)

    if mode != 0:
        qa = _charges(ca, sel_a, charge)  # type: ignore[arg-type]
        qb = qa if same else _charges(cb, sel_b, charge)  # type: ignore[arg-type]
    else:
        qa = qb = np.zeros(1, dtype=np.int8)

    ordered = None
    if unlike:
        ordered = _ordered_inputs(ca, sel_a, sel_b, hypotheses, identification,  # type: ignore[arg-type]
                                  assignment)
    with _kernels_without_extensions():  # from here on only our own kernels and numpy
        out = _pair_selected(events, ca, cb, same, sel_a, sa, ea, sel_b, sb, eb, qa, qb,
                             mode, choose, tm, dr, n_events, n_after, event_offset, ordered)
    return out if hypotheses is None else dataclasses.replace(out, hypotheses=hypotheses)


def _ordered_inputs(coll: _Collection, sel_a: np.ndarray | None, sel_b: np.ndarray | None,
                    hypotheses: tuple[str, str], identification: DedxResponse | None,
                    assignment: str) -> tuple:
    """Arguments of :func:`_ordered_pairs` after the two selections: flat indices of each
    leg's selection, membership masks, squared deviations and the rule."""
    n = coll.n_objects
    ia = np.arange(n, dtype=np.int64) if sel_a is None else sel_a
    ib = np.arange(n, dtype=np.int64) if sel_b is None else sel_b
    rule = 1 if assignment == "more_probable" else 0
    if rule:
        ina = np.zeros(n, dtype=np.bool_)
        ina[ia] = True
        inb = np.zeros(n, dtype=np.bool_)
        inb[ib] = True
        where = f"collection {coll.name!r}"
        za2 = identification.deviation_of(hypotheses[0], coll.get, where) ** 2  # type: ignore[union-attr]
        zb2 = identification.deviation_of(hypotheses[1], coll.get, where) ** 2  # type: ignore[union-attr]
    else:
        ina = inb = np.zeros(1, dtype=np.bool_)
        za2 = zb2 = np.zeros(1)
    return ia, ib, rule, ina, inb, za2, zb2


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
