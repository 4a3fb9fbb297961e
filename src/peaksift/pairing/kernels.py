"""The compiled pairing kernels (numba): counting, filling and choosing pairs per event."""

from __future__ import annotations

import numba
import numpy as np

from .. import kinematics

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
