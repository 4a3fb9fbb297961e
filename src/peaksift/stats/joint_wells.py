r"""The lowest well of each channel's mass scale in the joint fits of a combination.

Which piece when
----------------
* :func:`joint_global` -- a joint fit (:func:`peaksift.stats.joint.profile_joint`) and,
  where a channel's mass scale moves its peak further than the peak's width, the same fit
  started again from each such channel's lowest well; the lower of the two per hypothesis.
  Every joint fit with shape factors uses it: the combined scan (:mod:`.channels`) and its
  envelope of background functions (:mod:`.channel_envelope`), the global significance
  toys' refitted top points and the toy limits (:mod:`.channel_toys`, :mod:`.channel_toy_limits`), the asymptotic
  combined limits (:mod:`.channel_limits`).

Why
---
The joint fit starts every channel's mass-scale factor at 1 and takes damped Newton steps:
it stops in the nearest well of the NLL in that factor, not the lowest (Cowan, Cranmer,
Gross, Vitells, EPJC 71 (2011) 1554, eq. 7: the profile is the lowest).  Measured on two
channels with a 1 % mass scale on a 0.5 GeV peak at 150 GeV against a grid-profiled
reference (``scripts/study_joint_mass_scale_wells.py``): the combined q0 was wrong
(|dq| > 0.01) in 5 of 34 toys, by up to 6.1, an observed limit 0.76 of the reference's;
with the restart 1 of 34 (the reference's lowest point a deficit in both channels at
once, mu = -41.5, which no channel's own lowest well leads to).

Method: the channels cannot be scanned jointly (a grid per channel's factor), but given
the parameter of interest they are independent, so each scanned channel's lowest well is
found alone by :func:`peaksift.stats.scale_scan.profile_global` at the joint fit's signal
(its yield free for a free fit, held for a conditional one; the normalisation nuisances'
factors left out: a start), and the joint fit runs again from those factors.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

from .scale_scan import DIFFERENT, needs_scan, other_well, profile_global, several_minima_note

__all__ = ["joint_global", "several_minima_notes"]


def several_minima_notes(several: Any, masses: np.ndarray, shapes: Sequence[Any] | None,
                         what: str) -> list[str]:
    """The results' note (:func:`.scale_scan.several_minima_note`, the single channel's)
    at the ``masses`` where ``several`` (:func:`joint_global`'s) is set, with the widest
    of the channels' mass scales (the reach of the data the ``what`` responds to); none
    where it is not set anywhere."""
    if several is None or not np.any(several) or not shapes:
        return []
    size = max(float(sp[2].mass_scale) for sp in shapes if sp is not None)
    return [several_minima_note(np.asarray(masses)[np.asarray(several, bool)], size, what)]


def _merge(a: dict[str, Any], b: dict[str, Any], better: np.ndarray) -> dict[str, Any]:
    """Row-wise ``b`` where ``better``, else ``a`` (per-channel lists element-wise)."""
    out: dict[str, Any] = {}
    nb = better.size
    for key, va in a.items():
        vb = b.get(key)
        if isinstance(va, list):
            out[key] = [_pick(x, y, better, nb) for x, y in zip(va, vb)]
        else:
            out[key] = _pick(va, vb, better, nb)
    return out


def _pick(x: Any, y: Any, better: np.ndarray, nb: int) -> Any:
    x = np.asarray(x)
    if x.ndim == 0 or x.shape[0] != nb or y is None:
        return x
    return np.where(better.reshape((-1,) + (1,) * (x.ndim - 1)), np.asarray(y), x)


def _well_starts(r: dict[str, Any], models: Sequence[Any], counts: Sequence[Any],
                 conv: Sequence[np.ndarray], shapes: Sequence[Any], mu: np.ndarray,
                 fixed_signal: bool, centers: Sequence[Any] | None,
                 starts_per: int | None, memo: dict) -> tuple[list[Any], np.ndarray]:
    """Per channel the factors of its lowest well at the signal ``mu`` (a start: the yield
    free from there unless ``fixed_signal``), from the fit ``r``'s other parameters; and
    which hypotheses found a well other than ``r``'s."""
    nb = mu.size
    starts: list[Any] = []
    moved = np.zeros(nb, bool)
    for c, (m, sp) in enumerate(zip(models, shapes)):
        fc = np.asarray(r["factors"][c])
        rows = (np.zeros(0, np.intp) if sp is None
                else np.flatnonzero(needs_scan(sp[0], sp[1], sp[2], nb)))
        if rows.size == 0:
            starts.append(None if sp is None else fc)
            continue
        sig, base, nuis = sp

        def take(v: Any, rows: np.ndarray = rows) -> Any:
            v = np.asarray(v)
            return v[rows] if v.ndim and v.shape[0] == nb else v

        n_c = np.asarray(counts[c], float)
        cen = None if centers is None or centers[c] is None else take(centers[c])
        with np.errstate(all="ignore"):   # the scanned hypotheses alone
            g = profile_global(m, n_c[rows] if n_c.ndim == 2 else n_c, sig,
                               [take(p) if np.ndim(p) else p for p in base], nuis,
                               start={"s": take(mu * np.asarray(conv[c], float)),
                                      "b": take(r["b"][c]), "theta": take(r["theta"][c]),
                                      "factors": take(fc)},
                               centers=cen, fixed_signal=fixed_signal, tol=1e-5,
                               starts=starts_per, memo=memo)
        f_new = fc.copy()
        f_new[rows] = g["factors"]
        starts.append(f_new)
        moved[rows] |= g["moved"]
    return starts, moved


def joint_global(fit: Callable[..., dict[str, Any]], models: Sequence[Any],
                 counts: Sequence[Any], conv: Sequence[np.ndarray],
                 shapes: Sequence[Any] | None, *, mu_fixed: Any = None,
                 centers: Sequence[Any] | None = None,
                 starts: int | None = None, memo: dict | None = None,
                 groups: np.ndarray | None = None) -> dict[str, Any]:
    """``fit(**starts)`` (a :func:`~peaksift.stats.joint.profile_joint` call taking
    ``factors_start``, ``mu_start``, ``theta_start``, ``b_start``) from its own starts,
    then, where a channel of ``shapes`` is scanned (:func:`.scale_scan.needs_scan`), again
    from each scanned channel's lowest well at the first fit's signal; with a free signal
    also from each one's lowest well at the opposite signal (a deficit where the first fit
    found an excess, and the reverse: the joint profile's lowest well can be a dip in every
    channel at once that no channel's own lowest well leads to); per hypothesis the lowest.
    ``mu_fixed``: the conditional fits' parameter of interest (else free); ``centers``:
    per channel its constraints' centres (or None); ``starts``: the wells each channel's
    scan refits (:func:`.scale_scan.profile_global`'s); ``memo``: the channels' scans'
    signal fractions kept across the restarts (and across calls, where the caller passes
    one dict: they depend on the bins and hypotheses alone).  ``groups``: a label per
    row where the stack batches independent problems (the toy limits' sets at several
    signal values): a restart's rows are taken only in the problems where one of its own
    rows moved, as if each problem had been fitted alone (the same numbers, to the bit).

    With a scanned channel the result also has ``several`` (bool per hypothesis): a
    restart ended lower than the first fit by more than
    :data:`.scale_scan.DIFFERENT` in another well of some channel's mass scale
    (:func:`.scale_scan.other_well`) -- the profile has several minima and the nearest is
    not the lowest, the combination's counterpart of the single channel's ``moved``."""
    r = fit()
    if not shapes or not any(sp is not None for sp in shapes):
        return r
    nb = np.asarray(r["nll"]).size
    free = mu_fixed is None
    mu = np.broadcast_to(np.asarray(r["mu"] if free else mu_fixed, float), (nb,))
    memo = {} if memo is None else memo
    first = r
    probes = [(mu, not free, False)]
    if free:   # each channel's wells at the first fit's signal held, one error either side
        # of it, and at the other sign (at least one error away from 0, where no well
        # shows); their wells are the factors there however reached (the fit from r's
        # factors slides down into one where r's well turns into a hill)
        err = np.nan_to_num(np.asarray(r.get("mu_error", 0.0), float), nan=0.0)
        size = np.maximum(np.abs(mu), err)
        sign = np.where(mu > 0, 1.0, -1.0)
        probes += [(sign * size, True, True), (mu + err, True, True),
                   (mu - err, True, True), (-sign * size, True, True)]
    for probe, fixed, any_well in probes:
        fs, moved = _well_starts(r, models, counts, conv, shapes, probe, fixed, centers,
                                 starts, memo)
        if any_well:
            moved = np.zeros(nb, bool)
            for st, fc in zip(fs, r["factors"]):
                if st is not None:
                    moved |= np.any(np.abs(np.asarray(st) - np.asarray(fc)) > 0, axis=1)
        if not moved.any():
            continue
        r2 = fit(factors_start=fs, mu_start=probe if free else None,
                 theta_start=r["theta"], b_start=r["b"])
        better = np.asarray(r2["nll"]) < np.asarray(r["nll"])
        if groups is not None:   # alone, a problem without a moved row is not refitted
            better &= np.isin(groups, groups[moved])
        if better.any():
            r = _merge(r, r2, better)
    several = np.zeros(nb, bool)
    for sp, fa, fb in zip(shapes, first["factors"], r["factors"]):
        if sp is not None:
            several |= other_well(sp[0], sp[1], sp[2], fa, fb)
    return {**r, "several": several & (np.asarray(first["nll"]) - np.asarray(r["nll"])
                                       > DIFFERENT)}
