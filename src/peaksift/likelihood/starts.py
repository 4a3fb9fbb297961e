"""Starting values for fits: the background from the sidebands, peak masses from a coarse
likelihood scan of the window.

:func:`fit_starts` yields starting points lazily, best first.  The candidate masses are the
local maxima of a coarse profile-likelihood scan (signal and background yields profiled at
each mass on at most 100 bins, the background shape from a background-only fit), so a fit
starts at every plausible peak, not only at the largest excess; :func:`peaksift.fitting.fit`
then keeps the lowest minimum.  The same scan's deepest dips are candidates too (a negative
signal yield, which the fit's bounds allow), and so, in a binned fit, are the data's most
significant single bins above and below the background, with a peak narrower than a bin
(:func:`narrow_candidates`): on background-only spectra these are often the lowest minimum, and a
fit that never starts there reports a higher one.  A candidate far below the best one (see
:func:`worth_trying`) is not minimised: in practice it is never the lowest minimum, and
minimising it cost most of a fit's time on strong peaks.  The coarse scan lives in
:mod:`.coarse_scan`, the background fits in :mod:`.start_background`, the start widths in
:mod:`.start_widths`; their compiled steps in :mod:`.start_kernels`; the common case's
first look and first start in two compiled calls in :mod:`.first_look`.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator

import numpy as np

from ..errors import PeaksiftError
from .coarse_scan import coarse_gains, peak_candidates
from .first_look import fused_starts
from .model import Model
from .narrow import NARROW_MARGIN, narrow_candidates
from .start_background import background_counts, background_start, background_start_counts
from .start_widths import WidthProfile, background_rows, lowest_width, scan_width

__all__ = [
    "CANDIDATE_MARGIN",
    "background_counts",
    "background_start",
    "fit_starts",
    "narrow_candidates",
    "peak_candidates",
    "worth_trying",
]

#: numerical failures a helper fit may meet; a failed helper fit only costs a worse start
_NUMERIC = (ArithmeticError, np.linalg.LinAlgError, ValueError, PeaksiftError)


def _clip(x: float, lo: float, hi: float) -> float:
    """``np.clip`` of one number (a NaN stays NaN), without its ~5 us of call overhead."""
    return min(max(x, lo), hi)


def fit_starts(model: Model, edges: np.ndarray, n: np.ndarray, scale: np.ndarray,
               base: np.ndarray, is_fixed: np.ndarray, given: dict[str, float],
               lower: np.ndarray, upper: np.ndarray, total: float,
               retries: int, fine: tuple | None = None,
               ) -> Iterator[tuple[bool, Callable[[], np.ndarray]]]:
    """Starting points, best first, as ``(essential, make)`` with ``make(near=None)`` giving
    the full parameter vector: background from the sidebands of each candidate peak, the peak
    at each local maximum of the coarse likelihood scan (essential: every one is minimised),
    other widths at the best candidate (essential too when a width is free to vary, else
    tried only while no valid fit is found), then the scan's deepest dips (a negative yield)
    and, given ``fine`` (the data's own ``(edges, counts, scaled-Poisson factors)`` in a
    binned fit), a peak narrower than a bin on the bins most above and below the background
    (:func:`narrow_candidates`; essential, when their gains can win).  Given
    ``near`` (the full vector of the best minimum so far), an other-width start is that
    minimum with its free widths scaled.  ``given`` holds the parameters whose starts (or
    fixed values) the caller set; a given mass is not scanned (no dips, no spikes).

    Lazy: the coarse scan runs at the first step and each start only when ``make`` is
    called, so the other widths cost nothing once a valid minimum is found.
    """
    with np.errstate(all="ignore"):
        first = _first_look(model, edges, n, scale, base, is_fixed, given, lower, upper, fine,
                            total)
    if first is None:  # no free signal: the background-only start (and the given one)
        def background_only(near: np.ndarray | None = None) -> np.ndarray:
            with np.errstate(all="ignore"):
                vb = _background_or_base(model, edges, n, scale, base, is_fixed, given,
                                         lower, upper)
            return np.where(is_fixed, base, np.clip(vb, lower, upper))

        yield True, background_only
        if retries > 0:
            yield False, lambda near=None: np.where(is_fixed, base, np.clip(base, lower, upper))
        return
    vb, c, masses, i_m, i_s, bkg_given, others, ready = first
    names = model.parameter_names
    plain: dict = {}
    candidates = [(mm, 1.0, True, True, plain) for mm in masses]
    if names[i_m] in given and not bkg_given:
        # a mass given (or held): no scan to offer other peaks, so the background is also
        # started from the whole window, not only from the sidebands of that mass (a held
        # mass stopped 1.1 above the lowest NLL from the sideband start alone)
        candidates.append((masses[0], 1.0, True, False, plain))
    # A free width can have several minima around one excess (a narrow and a wide solution;
    # on 5 sigma toys 0.5 % of fits from one width stopped up to 0.49 in -2 ln L above the
    # lower one), so the other widths are minimised too whenever a width can vary (its
    # start given or not) -- in a binned fit of a Gaussian only where the profile over the
    # width says another minimum can be (:func:`.start_widths.other_widths`)
    free_widths = [i for i in i_s if not is_fixed[i]]
    vary = bool(free_widths)
    widths = [(masses[0], f, vary, True, plain, k)
              for k, f in enumerate((0.4, 2.5, 1.5)[:retries])]
    # the dips and spikes come after the other widths when those are essential (so those
    # scale the best peak's minimum, as without them), before them when they are not (the
    # fit stops at the first inessential start once it has a valid minimum)
    candidates = [(*c, -1) for c in candidates]
    others = [(*c, -1) for c in others]
    candidates += (widths + others) if vary else (others + widths)
    sl0 = model.blocks[0][1]
    other_shape = [i for i in range(sl0.start, sl0.stop) if i != i_m and i not in i_s
                   and names[i] not in given]
    profile = WidthProfile(model, fine, i_m, free_widths, is_fixed, lower, upper, retries)
    mass_given = names[i_m] in given
    for k, (mm, factor, essential, sideband, extra, rank) in enumerate(candidates):
        def make(near: np.ndarray | None = None, mm: float = mm, factor: float = factor,
                 sideband: bool = sideband, extra: dict = extra, rank: int = rank,
                 ready: np.ndarray | None = ready if k == 0 else None) -> np.ndarray | None:
            if ready is not None:  # the first start, made by the first look's compiled call
                return ready.copy()
            if near is not None and factor != 1.0 and free_widths:
                # another width at the best minimum so far: that minimum with its widths
                # scaled (background and yields already fitted), not a fresh sideband fit
                found = profile.take(near) if rank >= 0 else None
                if found is not None and not found and mass_given:
                    # no other minimum on the profile; but it follows the mass from the
                    # best minimum's, and a narrower minimum can sit at another mass (0.24
                    # lower, 1 GeV away, in a given-mass fit): with a mass given there are
                    # no spikes to find it, so the width is scaled as without a profile
                    found = None
                elif found is not None:  # only where the width's profile has a minimum
                    if not found:
                        return None
                    factor = found[0]
                s = np.asarray(near, float).copy()
                for i in free_widths:
                    s[i] = _clip(s[i] * factor, lower[i], upper[i])
                for i in other_shape:  # tails etc. from their own starts, as a fresh start
                    s[i] = _clip(base[i], lower[i], upper[i])
                if found is not None:  # the yields profiled at that width
                    iy, biy = model.blocks[0][2], model.blocks[-1][2]
                    s[iy] = _clip(found[1], lower[iy], upper[iy])
                    s[biy] = _clip(s[biy] * found[2], lower[biy], upper[biy])
                    s[i_m] = _clip(found[3], lower[i_m], upper[i_m])  # and the mass
                return s
            with np.errstate(all="ignore"):
                return _one_start(model, edges, n, scale, base, vb, c, mm, factor, i_m, i_s,
                                  given, is_fixed, lower, upper, total,
                                  bkg_given or not sideband, **extra)

        yield essential, make


def _median_bin(edges: np.ndarray) -> float:
    """``np.median(np.diff(edges))`` (the same number: the middle width, or the mean of the
    two middle ones) from one sort, without ``median``'s ~30 us of dispatch; kept for the
    last read-only edges array (a kept setup's start bins: toys in the same bins)."""
    seen = _MEDIAN_BIN[0]
    if seen is not None and seen[0] is edges:
        return seen[1]
    d = np.sort(np.diff(edges))
    k = d.size // 2
    out = float(d[k]) if d.size % 2 else float((d[k - 1] + d[k]) / 2.0)
    if isinstance(edges, np.ndarray) and not edges.flags.writeable:
        _MEDIAN_BIN[0] = (edges, out)
    return out


#: [(read-only edges, their median bin width)] of the last call (holds the array, so its
#: identity stays valid)
_MEDIAN_BIN: list = [None]


def _background_or_base(model, edges, n, scale, base, is_fixed, given, lower, upper):
    return _background_or_base_counts(model, edges, n, scale, base, is_fixed, given, lower,
                                      upper, False)[0]


def _background_or_base_counts(model, edges, n, scale, base, is_fixed, given, lower, upper,
                               counts=True):
    """``(the background-only start or the base, its expected counts in every bin)`` (the
    counts only with ``counts``, else None)."""
    if all(k in given for k in model.parameter_names[model.blocks[-1][1]]):
        vb = base.copy()
    else:
        try:
            if counts:
                return background_start_counts(model, edges, n, scale, None, base.copy(),
                                               is_fixed, lower, upper)
            vb = background_start(model, edges, n, scale, None, base.copy(), is_fixed,
                                  lower, upper)
        except _NUMERIC:
            vb = base.copy()
    return vb, (background_counts(model, edges, vb) if counts else None)


def _first_look(model, edges, n, scale, base, is_fixed, given, lower, upper, fine, total):
    """Background-only start, the candidate peak masses, the further candidates (dips,
    spikes) as ``fit_starts`` lists them, and the first candidate's start where the first
    look's compiled calls made it (else None; :mod:`.first_look`); None without a free
    signal."""
    names = model.parameter_names
    blocks = model.blocks
    yields = [iy for _, _, iy in blocks]
    if not any(not is_fixed[iy] for iy in yields[:-1]):
        return None
    bsl = blocks[-1][1]
    bkg_given = all(k in given for k in names[bsl])
    shape, sl, iy = blocks[0]
    i_m = sl.start + shape.parameter_names.index("mass")
    i_s = [sl.start + shape.parameter_names.index(k) for k in shape.width_parameters()]
    width = max(float(base[i_s[-1]]) if i_s else (edges[-1] - edges[0]) / 40,
                _median_bin(edges))
    fused = fused_starts(model, edges, n, scale, is_fixed, given, fine)
    got = None if fused is None else fused.first_look(
        base, lower, upper, _grid(edges, lower[i_m], upper[i_m], width)[2],
        bool(lower[iy] < 0))
    if got is None:
        vb, bexp = _background_or_base_counts(model, edges, n, scale, base, is_fixed, given,
                                              lower, upper)
        gains = None
    else:
        vb, bexp, gains = got
    c = _centres(edges)
    if names[i_m] in given:
        return vb, c, [float(base[i_m])], i_m, i_s, bkg_given, [], None
    # a negative yield only where its bounds allow one and the caller did not set it
    negative = bool(lower[iy] < 0) and names[iy] not in given
    masses, dips, q_top = _scan_masses(model, edges, n, scale, base, bexp, i_m, lower, upper,
                                       width, dips=negative, gains=gains)
    others = [(mm, 1.0, True, True, {"sign": -1.0}) for mm in dips]
    ready = None
    if fine is not None and any(not is_fixed[i] for i in i_s):
        found = None
        if got is not None:
            found, ready = fused.first_start(base, vb, lower, upper, c, masses[0], total,
                                             q_top, _near(masses, width, q_top))
        others += _spike_starts(model, fine, vb, q_top, lower, upper, i_m, negative, masses,
                                width, found)
    return vb, c, masses, i_m, i_s, bkg_given, others, ready


def _centres(edges: np.ndarray) -> np.ndarray:
    """The bins' centres, kept for the last read-only edges array (as :func:`_median_bin`)."""
    seen = _CENTRES[0]
    if seen is not None and seen[0] is edges:
        return seen[1]
    c = 0.5 * (edges[1:] + edges[:-1])
    if isinstance(edges, np.ndarray) and not edges.flags.writeable:
        c.flags.writeable = False
        _CENTRES[0] = (edges, c)
    return c


#: [(read-only edges, their centres)] of the last call (holds the array)
_CENTRES: list = [None]


def _near(masses, width, q_top):
    """The intervals the narrow candidates leave out: within 3 start widths of the coarse
    scan's peaks beside a clear peak (see :func:`_spike_starts`)."""
    return tuple((mm - 3 * width, mm + 3 * width) for mm in masses) if (
        q_top > CANDIDATE_MARGIN) else ()


def _spike_starts(model, fine, vb, q_top, lower, upper, i_m, negative, masses, width,
                  found=None):
    """Starts of a peak about as narrow as a bin on the data's own bins
    (:func:`narrow_candidates`, against the best candidate of the coarse scan).  Beside a
    clear peak (a coarse gain above ``CANDIDATE_MARGIN``) the bins within 3 start widths of
    the coarse scan's peaks are left out: a narrow copy of a peak cannot beat it, and the
    other start widths cover a narrower solution there (on a power law of 1,350 bins they
    were most of the narrow scan's cost, 0.75 of ~7 ms).  ``found``: the narrow candidates
    where the first look's compiled call found them."""
    fe, fn, fsc = fine
    if found is None:
        try:
            b = background_counts(model, fe, vb)
            found = narrow_candidates(fe, fn, fsc, b, q_top,
                                      exclude=_near(masses, width, q_top))
        except _NUMERIC:
            return []
    return [(mass, 1.0, True, False,
             {"sign": math.copysign(1.0, amount), "narrow": width, "amount": amount})
            for mass, width, amount, _ in found
            if (amount > 0 or negative)
            and lower[i_m] <= mass <= upper[i_m]]


#: a candidate peak whose coarse-scan gain 2 dNLL trails the best one's by more than
#: max(CANDIDATE_MARGIN, best / 2) is not minimised: at 5 sigma (best ~ 25) every local
#: maximum is still tried, while above ~7 sigma the hopeless ones (fluctuations far below the
#: peak) no longer multiply the cost of a fit
CANDIDATE_MARGIN = 25.0


def worth_trying(q: float, q_best: float) -> bool:
    """Whether a candidate of coarse-scan gain ``q`` can plausibly beat one of ``q_best``."""
    return q_best - q <= max(CANDIDATE_MARGIN, 0.5 * q_best)


def _grid(edges, lower, upper, width):
    """``(lo, hi, trial masses)`` of the coarse scan: steps of half the start width (at
    most 400) across the window inside the mass's bounds; kept (read-only) for the last
    inputs."""
    lo = max(edges[0], lower)
    hi = min(edges[-1], upper)
    step = max(0.5 * width, (hi - lo) / 400)
    key = (float(lo), float(hi), float(step))
    seen = _GRID[0]
    if seen is not None and seen[0] == key:
        return lo, hi, seen[1]
    grid = np.arange(lo + 0.5 * step, hi, step) if hi - lo > step else np.array([0.5 * (lo + hi)])
    grid.flags.writeable = False
    _GRID[0] = (key, grid)
    return lo, hi, grid


#: [((lo, hi, step), trial masses)] of the last call
_GRID: list = [None]


def _scan_masses(model, edges, n, scale, v, bexp, i_m, lower, upper, width,
                 dips: bool = False, gains=None) -> tuple[list[float], list[float], float]:
    """(peak masses, dip masses, the best gain 2 dNLL of either) of the coarse scan: the
    separated local maxima worth trying; the two deepest dips only when ``dips``.
    ``gains``: the scan's ``(peaks, dips)`` where the first look's compiled call made
    them."""
    shape, sl, _ = model.blocks[0]
    lo, hi, grid = _grid(edges, lower[i_m], upper[i_m], width)
    if gains is not None:
        peaks, lows = gains
    else:
        p: list = [float(q) for q in v[sl]]
        p[shape.parameter_names.index("mass")] = grid[:, None]  # every trial mass at once
        try:
            peaks, lows = coarse_gains(shape, edges, n, scale, grid, p, model.window, bexp,
                                       dips)
        except _NUMERIC:
            peaks, lows = [], []
    q_top = max([q for _, q in peaks + lows], default=0.0)
    masses: list[float] = []
    for i, q in peaks:
        if (all(abs(grid[i] - mm) > 3 * width for mm in masses)
                and worth_trying(q, peaks[0][1])):
            masses.append(float(grid[i]))
    if not masses:  # no excess anywhere: start at the largest bin excess
        c = 0.5 * (edges[1:] + edges[:-1])
        masses = [float(np.clip(c[int(np.argmax(n - bexp))], lo, hi))]
    # a dip is minimised only near the best gain, as a narrow candidate: a negative peak
    # as wide as the start width gains little more than the scan says, and the narrow
    # ones are the narrow candidates' (on 5 sigma toys every dip would be minimised
    # under worth_trying's margin, never winning)
    down = [float(grid[i]) for i, q in lows if q >= q_top - NARROW_MARGIN]
    if len(down) == 2 and abs(down[0] - down[1]) <= 3 * width:
        down = down[:1]
    return masses, down, q_top


def _one_start(model, edges, n, scale, v, vb, c, mm, factor, i_m, i_s, given, is_fixed,
               lower, upper, total, bkg_given, sign=1.0, narrow=None, amount=None):
    """One start at mass ``mm``: widths ``factor`` times their starts (or ``narrow``), the
    background from the sidebands (unless ``bkg_given``), the yield from the excess
    (``sign`` -1: the deficit) or ``amount``."""
    names = model.parameter_names
    shape, sl, iy = model.blocks[0]
    bsl, biy = model.blocks[-1][1:]
    s = vb.copy()
    s[i_m] = _clip(mm, lower[i_m], upper[i_m])
    for i in i_s:
        if not is_fixed[i]:
            s[i] = _clip(v[i] * factor if narrow is None else narrow, lower[i], upper[i])
    # sideband background: exclude +-3 widths around the candidate peak
    hw = 3.0 * max((s[i] for i in i_s), default=(edges[-1] - edges[0]) / 40)
    mask = np.abs(c - s[i_m]) > hw
    kept = int(np.count_nonzero(mask))  # (mask.sum()'s count, without its wrapper)
    bfr = None
    if not bkg_given and kept > len(names) and kept < mask.size:
        try:
            sb, bfr = background_start_counts(model, edges, n, scale, mask, s, is_fixed,
                                              lower, upper)
            s[bsl] = sb[bsl]
            s[biy] = sb[biy]  # (bfr: the counts there, those of s)
        except _NUMERIC:
            bfr = None
    if bfr is None:
        bfr = background_counts(model, edges, s)
    sel = ~mask
    excess = n[sel] - bfr[sel]
    resid = np.maximum(sign * excess, 0.0)  # np.clip(.., 0, None)
    scanned = False
    i_sig = sl.start + shape.parameter_names.index("sigma") if (
        "sigma" in shape.parameter_names and shape.name in ("gaussian", "crystalball")) else None
    if (i_sig is not None and factor == 1.0 and narrow is None and names[i_sig] not in given
            and resid.sum() > 0):
        # a Gaussian's width from a coarse likelihood scan of widths at the candidate mass
        # (a start near the minimum saves the Newton steps a poor one is rejected on: on a
        # power law of 1,350 bins 4 of the first start's 10 evaluations); else from the
        # second moment of the excess (truncated at +-3 start widths, so it errs low;
        # bounded to a factor 2 of the start)
        w = scan_width(shape, edges, n, scale, bfr, float(s[i_m]), float(s[i_sig]),
                       lower[i_sig], upper[i_sig], model.window, sign)
        scanned = w is not None
        if w is None:
            d2 = float(resid @ (c[sel] - s[i_m]) ** 2 / resid.sum())
            w = _clip(math.sqrt(max(d2, 1e-12)), 0.5 * s[i_sig], 2.0 * s[i_sig])
        s[i_sig] = w
    if names[iy] not in given:
        floor = 0.05 * math.sqrt(max(total, 1.0)) + 1.0
        if amount is not None:
            y = amount
        elif sign > 0:
            y = max(float(np.sum(excess)), floor)
        else:
            y = min(float(np.sum(excess)), -floor)
            # a deficit no deeper than 90 % of the background under it anywhere, so that
            # every bin's expectation stays positive at the start
            f = shape.bin_fractions(edges, list(s[sl]), model.window)
            room = np.divide(bfr, f, out=np.full_like(bfr, np.inf), where=f > 1e-12)
            y = max(y, -0.9 * float(np.min(room)))
        s[iy] = _clip(y, lower[iy], upper[iy])
        if names[biy] not in given:
            s[biy] = _clip(max(total - s[iy], 1.0), lower[biy], upper[biy])
            if scanned and sign < 0 and len(model.blocks) == 2:
                _dip_along_width(model, edges, n, scale, s, i_m, i_sig, iy, biy, is_fixed,
                                 lower, upper)
    # later signal components: small positive yield at their given start
    for _, _, iy2 in model.blocks[1:-1]:
        if names[iy2] not in given:
            s[iy2] = _clip(max(0.01 * total, 1.0), lower[iy2], upper[iy2])
    s = np.minimum(np.maximum(s, lower), upper)
    for k in given:  # given starts and fixed values are used as given (but other widths)
        i = names.index(k)
        if not ((factor != 1.0 or narrow is not None) and i in i_s and not is_fixed[i]):
            s[i] = v[i]
    return s


def _dip_along_width(model, edges, n, scale, s, i_m, i_sig, iy, biy, is_fixed, lower, upper):
    """A dip's start ``s`` moved, in place, to the lowest point of its profile along wider
    widths with the mass free and the background's shape relaxed
    (:func:`.start_widths.lowest_width`), where that lies below the scanned width's: the
    width scan holds the mass, and a deficit centred on the window's edge (wider, its
    mass at the edge) lay 2.1 in NLL below the narrow minimum that scan's start ended in
    (``check_fit_minima``'s gauss_exp_z2/88; 0.12 below the fit's best minimum)."""
    try:
        found = lowest_width(model.blocks[0][0], edges, n, scale,
                             background_rows(model, edges, s, is_fixed), float(s[i_m]),
                             float(s[i_sig]), float(s[iy]), lower[i_sig], upper[i_sig],
                             lower[i_m], upper[i_m], model.window, -1.0)
    except _NUMERIC:
        return
    if found:
        factor, y, ratio, mass = found
        s[i_sig] = _clip(s[i_sig] * factor, lower[i_sig], upper[i_sig])
        s[iy] = _clip(y, lower[iy], upper[iy])
        s[biy] = _clip(s[biy] * ratio, lower[biy], upper[biy])
        s[i_m] = _clip(mass, lower[i_m], upper[i_m])
