r"""The global minimum over the mass scale when its reach exceeds the peak's width.

Which piece when
----------------
* :func:`profile_global` -- :func:`~peaksift.stats.shape_profile.profile_with_nuisances`
  plus, on the hypotheses whose mass scale can move the peak further than its own width,
  the factors' exact curvature and further starts from a scan of the mass-scale factor;
  the best fit of each hypothesis and whether a start other than the centre won.  The limits
  with systematics (:mod:`peaksift.stats.limits_systematics`), their toys
  (:mod:`peaksift.stats.toy_limits_systematics`), the scan's q0 with shape nuisances
  (:func:`peaksift.stats.scan.scan`, hence the envelope's) and its toys' refitted points
  (:func:`peaksift.stats.shape_profile.refine_toy_points`) use it.
* :func:`several_minima_note` -- the results' note where the lowest well was not the nearest.
* :func:`needs_scan` -- which hypotheses those are.
* :func:`other_well` -- whether two fits' mass-scale factors lie in different wells (the
  combination's note, :mod:`.joint_wells`).

Why
---
The signal's mass-scale factor :math:`k_m` moves the peak to :math:`m k_m`.  Where the
mass scale's standard deviation :math:`\delta m` is comparable to the peak's width
:math:`w` or larger, the NLL as a function of :math:`k_m` has a well at every upward
fluctuation of the data within a few :math:`\delta m`: a fit started at
:math:`k_m = 1` finds the nearest well, not the lowest one.  The profile likelihood is
the lowest (Cowan, Cranmer, Gross, Vitells, EPJC 71 (2011) 1554, eq. 7), and a limit
built from the nearest one is too strong (measured: a factor 1.3 to 3 on a peak of
width 0.5 GeV at 150 GeV with a 1-10 % mass scale, ``docs/decisions/mass-scale-scan.md``);
so is a q~mu of the toy limits, and a q0 of the scan is too low or, where the lowest well
is a deficit (q0 = 0, CCGV eq. 12), too high (measured on 100 background-only toys with a
1 % mass scale: q0 wrong in 31, by up to 6.6; q~mu in 30-57, by up to 14).

Method: on each such hypothesis the NLL is evaluated on a grid of :math:`k_m` over its
whole range (steps of half the peak's width in mass), the other parameters held at the
centre start's fit and the other factors' shapes at their centres (with a free signal, its
yield at the one-step optimum of each grid point; the logarithms only over the bins where
the peak is not negligible); the ``_STARTS`` (free yield: ``_STARTS_FREE``) lowest wells
away from the centre fit's own (those within a grid step of it are its own) are refitted
with every parameter free, and the lowest fit of each hypothesis is kept.
The scanned hypotheses' fits also use the factors' exact curvature.  Where
:math:`3\,\delta m < w` a second well lies more than 18 units of NLL up the constraint
(a shift of two widths is six standard deviations), so the scan is skipped: those
hypotheses keep the single fit with the Fisher form of the factors' curvature, to the bit
(there it converges: the curvature moved the demo's limits by 1e-8 at most).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from ..likelihood import SignalNuisances
from .shape_profile import _fractions, profile_with_nuisances
from .toys import ScanModel, bkg_fractions

__all__ = ["DIFFERENT", "asimov_band_note", "needs_scan", "other_well", "peak_width",
           "profile_global", "several_minima_note"]

#: the scan runs where this many standard deviations of the mass scale exceed the width
_REACH = 3.0
#: grid step, in units of the peak's width (a well is about two widths across)
_STEP = 0.5
#: refitted wells per hypothesis besides the centre fit
_STARTS = 2
#: the same with a free yield: the grid's one-step yield ranks the wells less well (on 100
#: toys with a 3 % scale the lowest was third twice: q0 4.1 and 2.7 too low with two)
_STARTS_FREE = 4
#: the toy limits' conditional fits take as many (:mod:`.toy_limits_systematics`): on 100
#: toys with a 3 % scale the lowest well of 1 of 600 was third; the asymptotic limits keep
#: two (four cost them 1.5x for the same limits to 4 decimals)
STARTS_TOYS = _STARTS_FREE
#: at most this many grid values x bins are held at once
_CHUNK = 2_000_000
#: a memo of the grid's fractions (:func:`_grid_fractions`) keeps at most this many bytes
#: (a scan of a few hundred masses: ~60 MB)
_MEMO_BYTES = 256_000_000
#: a start other than the centre's counts as a different minimum when lower by this (NLL)
DIFFERENT = _DIFFERENT = 1e-3


def _column(params: Sequence[Any], names: Sequence[str], name: str, nb: int) -> np.ndarray:
    i = list(names).index(name)
    return np.broadcast_to(np.asarray(params[i], float).reshape(-1), (nb,)).copy()


def peak_width(signal: Any, base: Sequence[Any], nb: int) -> np.ndarray:
    """The peak's width per hypothesis: its ``sigma``, half its natural ``width`` (a half
    width at half maximum), the larger of the two where it has both."""
    names = list(signal.parameter_names)
    w = np.zeros(nb)
    if "sigma" in names:
        w = np.maximum(w, _column(base, names, "sigma", nb))
    if "width" in names:
        w = np.maximum(w, 0.5 * _column(base, names, "width", nb))
    return w


def needs_scan(signal: Any, base: Sequence[Any], nuisances: SignalNuisances,
               nb: int) -> np.ndarray:
    """Hypotheses whose mass scale reaches beyond the peak's width (see the module guide)."""
    if "mass_scale" not in nuisances.shape_active:
        return np.zeros(nb, bool)
    mass = _column(base, signal.parameter_names, "mass", nb)
    return _REACH * nuisances.mass_scale * np.abs(mass) > peak_width(signal, base, nb)


def other_well(signal: Any, base: Sequence[Any], nuisances: SignalNuisances,
               factors_a: np.ndarray, factors_b: np.ndarray) -> np.ndarray:
    """Per hypothesis whether the mass-scale factors of two fits ``(B, J)`` are further
    apart than the scan's grid step (half the peak's width in mass): two wells of the
    profile, not one well reached twice (False without a mass scale)."""
    nb = np.asarray(factors_a).shape[0]
    if "mass_scale" not in nuisances.shape_active:
        return np.zeros(nb, bool)
    jm = nuisances.shape_active.index("mass_scale")
    mass = _column(base, signal.parameter_names, "mass", nb)
    gap = np.abs(np.asarray(factors_a, float)[:, jm] - np.asarray(factors_b, float)[:, jm])
    return gap * np.abs(mass) > _STEP * peak_width(signal, base, nb)


def _band(f: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Bin indices ``(U, G, L)`` around each row's highest fraction that hold every
    fraction above 1e-12 of it (one width ``L`` for all), and which of them are bins."""
    nbin = f.shape[-1]
    top = f.max(axis=-1, keepdims=True)
    centre = f.argmax(axis=-1)
    above = f > 1e-12 * top
    i = np.arange(nbin)
    left = np.where(above, centre[..., None] - i, 0).max(initial=0)
    right = np.where(above, i - centre[..., None], 0).max(initial=0)
    off = np.arange(-int(left), int(right) + 1)
    raw = centre[..., None] + off
    inside = (raw >= 0) & (raw < nbin)
    return np.clip(raw, 0, nbin - 1), inside


def _grid_wells(model: ScanModel, n: np.ndarray, signal: Any, base: Sequence[Any],
                nuisances: SignalNuisances, fit: dict[str, np.ndarray], rows: np.ndarray,
                centers: np.ndarray | None, fixed_signal: bool, starts: int | None = None,
                memo: dict | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Starts ``(R, S, J)`` of the factors and of the yield ``(R, S)`` at the ``S``
    (``_STARTS``, with a free yield ``_STARTS_FREE``) lowest wells of the grid NLL in
    ``k_m`` of hypotheses ``rows``, away from the centre fit's own well (NaN where a
    hypothesis has fewer).  ``memo``: the grid's fractions kept for the next call
    (:func:`_grid_fractions`)."""
    names = nuisances.shape_active
    jm = names.index("mass_scale")
    lo, hi = nuisances.bounds("mass_scale")
    nb = fit["s"].size
    mass = _column(base, signal.parameter_names, "mass", nb)[rows]
    width = peak_width(signal, base, nb)[rows]
    span = (hi - lo) * np.abs(mass) / (_STEP * width)
    grid = np.linspace(lo, hi, int(min(np.ceil(span.max()), 20_000)) + 1)
    g = grid.size
    if starts is None:
        starts = _STARTS if fixed_signal else _STARTS_FREE
    k_out = np.full((rows.size, starts, len(names)), np.nan)
    s_out = np.full((rows.size, starts), np.nan)
    # the grid's signal fractions depend on the hypothesis and k_m only (the other
    # factors at their centres here): once per distinct hypothesis, shared by its rows
    cols = np.stack([np.broadcast_to(np.asarray(p, float).reshape(-1), (nb,))
                     for p in base], axis=1)[rows]
    hyps, inv = np.unique(cols, axis=0, return_inverse=True)
    inv = inv.reshape(-1)
    first = rows[np.unique(inv, return_index=True)[1]]   # a row of each hypothesis
    # the fractions of a group of hypotheses at a time, at most _CHUNK cells (a wide mass
    # scale on a narrow peak: ~14 MB a mass of 400 bins); one group, as a rule (a toy
    # ensemble's rows share a few hypotheses)
    hyp_per = max(1, _CHUNK // (g * model.used.size))
    for h0 in range(0, first.size, hyp_per):
        group = np.arange(h0, min(h0 + hyp_per, first.size))
        fr = _grid_fractions(model, signal, base, names, nuisances, grid, jm,
                             first[group], hyps[group], memo)
        _group_wells(model, n, nuisances, names, fit, rows, centers, fixed_signal, grid,
                     jm, mass, width, inv, group, fr, k_out, s_out)
    return k_out, s_out


def _grid_fractions(model: ScanModel, signal: Any, base: Sequence[Any], names: Any,
                    nuisances: SignalNuisances, grid: np.ndarray, jm: int,
                    first: np.ndarray, hyps: np.ndarray, memo: dict | None
                    ) -> tuple[np.ndarray, ...]:
    """The grid's signal fractions of the hypotheses ``hyps`` (their parameters; ``first``
    a row of each): per hypothesis and grid point their sum over the used bins, the band
    of bins around the peak (:func:`_band`), the fractions there, and where there is no
    shape.  They depend on the bins, the signal shape, the hypothesis and ``k_m`` alone,
    not on the data or the fit: ``memo`` (a dict) keeps them for the next call on the
    same bins and hypotheses (a combination's restarts scan each channel five times)."""
    key = None
    if memo is not None:
        key = (model.edges.tobytes(), tuple(model.window), model.used.tobytes(),
               None if model.bin_scale is None else np.asarray(model.bin_scale).tobytes(),
               id(signal), id(nuisances), tuple(names), grid.tobytes(), hyps.tobytes())
        hit = memo.get(key)
        if hit is not None and hit[0] is signal and hit[1] is nuisances:
            return hit[2]
    g = grid.size
    k = np.ones((first.size * g, len(names)))
    k[:, jm] = np.tile(grid, first.size)
    with np.errstate(all="ignore"):
        f_all = _fractions(model, signal, base, names, nuisances, k,
                           np.repeat(first, g)).reshape(first.size, g, -1)
        # no signal shape there (e.g. a peak so far outside the window that its integral
        # over it underflows): not a start
        shapeless = ~np.all(np.isfinite(f_all), axis=-1)                  # (U, G)
        f_all = np.where(np.isfinite(f_all), f_all, 0.0)
    # the NLL minus the background's, sum_i [s f_i - n_i ln(1 + s f_i / b_i)], needs the
    # log only where f_i is not negligible: a band of bins around each grid point's peak
    # (those above 1e-12 of its highest; the whole spectrum for heavy tails), the sum of
    # f_i over every bin
    f_sum = f_all.sum(axis=-1)
    band, inside = _band(f_all)
    f_band = np.where(inside, np.take_along_axis(f_all, band, axis=-1), 0.0)
    out = (f_sum, band, f_band, shapeless)
    size = sum(a.nbytes for a in out)
    if memo is not None and memo.get("bytes", 0) + size <= _MEMO_BYTES:
        memo[key] = (signal, nuisances, out)   # the shape objects kept: their ids stay
        memo["bytes"] = memo.get("bytes", 0) + size
    return out


def _group_wells(model: ScanModel, n: np.ndarray, nuisances: SignalNuisances,
                 names: Any, fit: dict[str, np.ndarray], rows: np.ndarray,
                 centers: np.ndarray | None, fixed_signal: bool, grid: np.ndarray, jm: int,
                 mass: np.ndarray, width: np.ndarray, inv: np.ndarray, group: np.ndarray,
                 fractions: tuple[np.ndarray, ...], k_out: np.ndarray,
                 s_out: np.ndarray) -> None:
    """:func:`_grid_wells` for the rows of the hypotheses ``group`` (their grid's
    ``fractions``, :func:`_grid_fractions`), into ``k_out`` / ``s_out``."""
    g = grid.size
    f_sum, band, f_band, shapeless = fractions
    mine = np.flatnonzero((inv >= group[0]) & (inv <= group[-1]))  # positions in rows
    per = max(1, _CHUNK // (g * band.shape[-1]))
    for c0 in range(0, mine.size, per):
        loc = mine[c0:c0 + per]
        r = rows[loc]
        with np.errstate(all="ignore"):
            h = inv[loc] - group[0]
            idx = band[h]                                              # (R, G, L)
            f = f_band[h]
            nu_b = fit["b"][r, None] * bkg_fractions(model, fit["theta"][r])
            nu_b = np.maximum(np.take_along_axis(nu_b[:, None, :], idx, axis=-1), 1e-300)
            nr = np.take_along_axis(n[r][:, None, :], idx, axis=-1)
            kg = np.repeat(fit["factors"][r], g, axis=0)
            kg[:, jm] = np.tile(grid, r.size)
            cen = None if centers is None else np.repeat(centers[r], g, axis=0)
            cons = nuisances.constraint_terms(names, kg, cen)[0].reshape(r.size, g)
            if fixed_signal:
                s = np.broadcast_to(fit["s"][r, None], (r.size, g))
                val = (s * f_sum[h] - np.sum(nr * np.log1p(s[..., None] * f / nu_b), axis=-1)
                       + cons)
            else:  # the yield at the one-step optimum over the background (a start only)
                g1 = np.sum(nr * f / nu_b, axis=-1) - f_sum[h]
                g2 = np.maximum(np.sum(nr * f * f / nu_b**2, axis=-1), 1e-300)
                s = g1 / g2
                val = cons - 0.5 * g1 * g1 / g2
        val = np.where(np.isfinite(val) & ~shapeless[h], val, np.inf)
        # wells: grid points not above either neighbour (the ends: their one neighbour)
        left = np.concatenate([np.full((r.size, 1), np.inf), val[:, :-1]], axis=1)
        right = np.concatenate([val[:, 1:], np.full((r.size, 1), np.inf)], axis=1)
        well = (val <= left) & (val <= right) & np.isfinite(val)
        # the centre fit's own well is refitted already: the grid's wells within a step
        # of it (not within a width: on bins about as wide as the peak the fit can stop
        # in a shallow dip on its well's side, 0.2 in NLL up, half a width from its floor)
        own = np.abs(grid[None, :] - fit["factors"][r, jm][:, None]) * np.abs(
            mass[loc, None]) <= _STEP * width[loc, None]
        cand = np.where(well & ~own, val, np.inf)
        starts = k_out.shape[1]
        order = np.argsort(cand, axis=1)[:, :starts]
        ok = np.isfinite(np.take_along_axis(cand, order, axis=1))
        kk = np.repeat(fit["factors"][r][:, None, :], starts, axis=1)
        kk[:, :, jm] = grid[order]
        k_out[loc] = np.where(ok[..., None], kk, np.nan)
        s_out[loc] = np.where(ok, np.take_along_axis(s, order, axis=1), np.nan)


def _centre_fits(model: ScanModel, n: Any, signal: Any, base: Sequence[Any],
                 nuisances: SignalNuisances, start: dict[str, np.ndarray],
                 centers: np.ndarray | None, tol: float, fixed_signal: bool,
                 scan: np.ndarray) -> dict[str, np.ndarray]:
    """The fits from the centre start: with the factors' exact curvature on the scanned
    hypotheses (where the Fisher form crawls), as before elsewhere (the same numbers)."""
    if scan.all() or not scan.any():
        return profile_with_nuisances(model, n, signal, base, nuisances, start=start,
                                      centers=centers, tol=tol, fixed_signal=fixed_signal,
                                      exact=bool(scan.any()))
    nb = scan.size
    n = np.asarray(n, float)

    def part(rows: np.ndarray, exact: bool) -> dict[str, np.ndarray]:
        def take(v: Any) -> Any:
            return np.asarray(v)[rows] if np.ndim(v) and np.shape(v)[0] == nb else v

        return profile_with_nuisances(
            model, n[rows] if n.ndim == 2 else n, signal, [take(p) for p in base],
            nuisances, start={k: take(v) for k, v in start.items()},
            centers=None if centers is None else take(centers), tol=tol,
            fixed_signal=fixed_signal, exact=exact)

    rows_s, rows_c = np.flatnonzero(scan), np.flatnonzero(~scan)
    a, b = part(rows_s, True), part(rows_c, False)
    out: dict[str, Any] = {"names": a["names"]}
    for key, va in a.items():
        if key == "names":
            continue
        va = np.asarray(va)
        full = np.empty((nb,) + va.shape[1:], va.dtype)
        full[rows_s], full[rows_c] = va, np.asarray(b[key])
        out[key] = full
    return out


def profile_global(model: ScanModel, n: Any, signal: Any, base: Sequence[Any],
                   nuisances: SignalNuisances, *, start: dict[str, np.ndarray],
                   centers: np.ndarray | None = None, tol: float = 1e-8,
                   fixed_signal: bool = False, starts: int | None = None,
                   memo: dict | None = None) -> dict[str, np.ndarray]:
    """:func:`~peaksift.stats.shape_profile.profile_with_nuisances` with further starts
    from a scan of the mass scale where it reaches beyond the peak's width (there also
    with the factors' exact curvature; elsewhere the fits are those of before).

    Arguments as there; ``starts``: the grid's wells refitted per hypothesis (default
    ``_STARTS``, with a free yield ``_STARTS_FREE``); ``memo``: a dict that keeps the
    scan's signal fractions for later calls on the same bins and hypotheses (the same
    numbers; a caller that scans one channel's hypotheses again passes the same dict).  Returns its dict with the lowest fit of each hypothesis, plus
    ``scanned`` (bool per hypothesis: the scan ran) and ``moved`` (a start other than the
    centre gave a lower minimum by more than 1e-3: the profile in the mass scale has
    several wells and the nearest is not the lowest)."""
    nb = np.asarray(start["s"]).size
    scan = needs_scan(signal, base, nuisances, nb)
    fit = _centre_fits(model, n, signal, base, nuisances, start, centers, tol,
                       fixed_signal, scan)
    fit["scanned"] = scan
    fit["moved"] = np.zeros(nb, bool)
    rows = np.flatnonzero(scan & np.isfinite(fit["nll"]))
    if rows.size == 0:
        return fit
    n2 = np.broadcast_to(np.asarray(n, float), (nb, model.used.size))
    k_st, s_st = _grid_wells(model, n2, signal, base, nuisances, fit, rows, centers,
                             fixed_signal, starts, memo)
    have = np.isfinite(s_st) & np.all(np.isfinite(k_st), axis=2)   # (R, starts)
    if not have.any():
        return fit
    ri, si = np.nonzero(have)
    src = rows[ri]     # the hypothesis of each extra start
    base_rep = [np.asarray(p).reshape(-1, 1)[src] if np.ndim(p) else p for p in base]
    more = profile_with_nuisances(
        model, n2[src], signal, base_rep, nuisances,
        start={"s": fit["s"][src] if fixed_signal else s_st[ri, si], "b": fit["b"][src],
               "theta": fit["theta"][src], "factors": k_st[ri, si]},
        centers=None if centers is None else np.asarray(centers)[src], tol=tol,
        fixed_signal=fixed_signal, exact=True)
    centre = fit["nll"].copy()
    for j in np.argsort(-more["nll"]):   # the lowest of a hypothesis is written last
        h = src[j]
        if more["nll"][j] < fit["nll"][h]:
            fit["moved"][h] |= more["nll"][j] < centre[h] - _DIFFERENT
            for key in ("s", "s_error", "b", "theta", "nll", "factors", "converged"):
                fit[key][h] = more[key][j]
    return fit


def several_minima_note(masses: np.ndarray, size: float, what: str) -> str:
    """The note where the profile in the mass scale had a lower well than the nearest:
    ``what`` (the limits, q0) there responds to the data further from the mass than the
    peak's width."""
    where = ", ".join(f"{m:g}" for m in masses[:6]) + (", ..." if masses.size > 6 else "")
    return (f"mass scale with several minima at {masses.size} mass(es) ({where}): its "
            f"{100 * size:.3g}% moves the peak further than its width, and the lowest minimum "
            "of the profile likelihood (found by a scan of the mass scale) is not the nearest;"
            f" the {what} there respond{'s' if what == 'q0' else ''} to the data within "
            f"+-{300 * size:.3g}% of the mass (3 standard deviations of the mass scale)")


def asimov_band_note(masses: np.ndarray) -> str:
    """The note where asymptotic limits were made with a mass scale reaching beyond the
    peak's width: the expected band comes from the Asimov data set, which has none of the
    upward fluctuations within the scale's reach that a real spectrum's limit follows
    (`docs/decisions/mass-scale-scan.md`: toys' median expected limit 1.4-2.0 times the
    asymptotic one on the study's spectra)."""
    where = ", ".join(f"{m:g}" for m in masses[:6]) + (", ..." if masses.size > 6 else "")
    return (f"asymptotic limits where the mass scale reaches beyond the peak's width at "
            f"{masses.size} mass(es) ({where}): the expected band (Asimov data set) is likely "
            "too low there -- each spectrum's limit follows its own fluctuations within the "
            "scale's reach; use toy limits there (limits.method = \"toys\", limits.toy_masses)")
