"""Starting values for fits: the background from the sidebands, peak masses from a coarse
likelihood scan of the window.

:func:`fit_starts` yields starting points lazily, best first.  The candidate masses are the
local maxima of a coarse profile-likelihood scan (signal and background yields profiled at
each mass on at most 100 bins, the background shape from a background-only fit), so a fit
starts at every plausible peak, not only at the largest excess; :func:`peaksift.fitting.fit`
then keeps the lowest minimum.  A local maximum far below the best one (see
:func:`worth_trying`) is not a candidate: in practice it is never the lowest minimum, and minimising
it cost most of a fit's time on strong peaks.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator

import numpy as np

from ..errors import PeaksiftError
from ..shapes import Gaussian
from .cost import BinnedCost
from .minimize import damped_step, minimize
from .model import Model
from .poisson import binned_gradient, binned_information, binned_nll, use_compiled

__all__ = ["CANDIDATE_MARGIN", "background_start", "fit_starts", "peak_candidates", "worth_trying"]

#: numerical failures a helper fit may meet; a failed helper fit only costs a worse start
_NUMERIC = (ArithmeticError, np.linalg.LinAlgError, ValueError, PeaksiftError)


def _clip(x: float, lo: float, hi: float) -> float:
    """``np.clip`` of one number (a NaN stays NaN), without its ~5 us of call overhead."""
    return min(max(x, lo), hi)


def background_start(model: Model, edges: np.ndarray, n: np.ndarray, scale: np.ndarray,
                     mask: np.ndarray | None, bstart: np.ndarray, is_fixed: np.ndarray,
                     lower: np.ndarray, upper: np.ndarray) -> np.ndarray:
    """Background-only binned fit (on ``mask`` bins; fixed background parameters stay
    fixed) -> full parameter vector with every signal yield at 0."""
    v = bstart.copy()
    for _, _, iy in model.blocks[:-1]:
        v[iy] = 0.0
    _, bsl, biy = model.blocks[-1]
    free = np.array([i for i in [*range(bsl.start, bsl.stop), biy] if not is_fixed[i]], int)
    if free.size == 0:
        return v
    m = mask if mask is not None else np.ones(n.size, bool)
    if not is_fixed[biy]:
        v[biy] = max(float(n[m].sum()), 1.0)
    cost = BinnedCost(model, v, free, [], edges, n, scale, mask)
    lo, hi = lower[free].copy(), upper[free].copy()
    mo = minimize(cost, np.minimum(np.maximum(v[free], lo), hi), lo, hi,
                  [model.parameter_names[i] for i in free], edm_goal=1e-2)
    out = v.copy()
    out[free] = mo.x
    return out


def peak_candidates(n: np.ndarray, scale: np.ndarray, signal_fractions: np.ndarray, background: np.ndarray,
                    most: int = 3) -> list[tuple[int, float]]:
    """Local maxima of a coarse profile-likelihood scan, best first.

    ``signal_fractions (M, N)`` are the signal's bin fractions at M trial masses,
    ``background (N,)`` the background expectation.  At each mass the signal yield and the
    background normalisation are profiled (a few stacked damped Newton steps on
    :func:`~peaksift.likelihood.poisson.binned_nll`); returns ``[(mass index, 2 dNLL)]`` for
    up to ``most`` separated local maxima with a positive signal.
    """
    f = np.asarray(signal_fractions, float)
    b0 = np.maximum(np.asarray(background, float), 1e-12)
    m = f.shape[0]
    btot = float(b0.sum())
    g = b0 / btot
    # differences of NLLs only: the saturated term is left out
    nll0 = binned_nll(n, btot * g, scale, saturated=False)
    x = np.column_stack([np.full(m, 0.1 * math.sqrt(max(btot, 1.0))), np.full(m, btot)])
    if use_compiled():
        from .kernels import profile_two_yields

        nll = np.empty(m)
        sc = np.broadcast_to(np.asarray(1.0 if scale is None else scale, float), g.shape)
        profile_two_yields(np.ascontiguousarray(n, float), np.ascontiguousarray(sc),
                           np.ascontiguousarray(f), g, x, nll, 25)
        return _local_maxima(x, nll, nll0, most)
    dmu = np.stack([f, np.broadcast_to(g, f.shape)], axis=1)  # (M, 2, N)
    lam = np.full(m, 1e-3)
    quiet = 0
    with np.errstate(all="ignore"):
        nll = binned_nll(n, x[:, :1] * f + x[:, 1:] * g, scale, saturated=False)
        for _ in range(25):
            mu = x[:, :1] * f + x[:, 1:] * g
            grad = binned_gradient(n, mu, dmu, scale)
            info = binned_information(mu, dmu, scale)
            trial = x + damped_step(info, grad, lam)
            mu_t = trial[:, :1] * f + trial[:, 1:] * g
            ok = np.all(mu_t > 0, axis=1)
            nt = np.where(ok, binned_nll(n, mu_t, scale, saturated=False), np.inf)
            better = nt <= nll
            gain = np.where(better, nll - nt, 0.0)
            x[better], nll[better] = trial[better], nt[better]
            lam = np.where(better, np.maximum(lam * 0.1, 1e-9), lam * 10.0)
            quiet = quiet + 1 if np.all(gain < 1e-6) else 0
            if quiet >= 2:
                break  # no mass gains any more (a coarse scan needs no more)
    return _local_maxima(x, nll, nll0, most)


def _local_maxima(x: np.ndarray, nll: np.ndarray, nll0: float, most: int):
    q = np.where((x[:, 0] > 0) & np.isfinite(nll), 2.0 * (nll0 - nll), 0.0)
    # q[i] > 0, not below either neighbour (the ends compare with their one neighbour)
    pad = np.concatenate([[-np.inf], q, [-np.inf]])
    peaks = np.flatnonzero((q > 0) & (q >= pad[:-2]) & (q >= pad[2:]))
    peaks = peaks[np.argsort(-q[peaks], kind="stable")]
    return [(int(i), float(q[i])) for i in peaks[:most]]


def fit_starts(model: Model, edges: np.ndarray, n: np.ndarray, scale: np.ndarray,
               base: np.ndarray, is_fixed: np.ndarray, given: dict[str, float],
               lower: np.ndarray, upper: np.ndarray, total: float,
               retries: int) -> Iterator[tuple[bool, Callable[[], np.ndarray]]]:
    """Starting points, best first, as ``(essential, make)`` with ``make(near=None)`` giving
    the full parameter vector: background from the sidebands of each candidate peak, the peak
    at each local maximum of the coarse likelihood scan (essential: every one is minimised),
    then other widths at the best candidate (essential too when a width is free to vary, else
    tried only while no valid fit is found).  Given ``near`` (the full vector of the best
    minimum so far), an other-width start is that minimum with its free widths scaled.  ``given`` holds the parameters whose starts
    (or fixed values) the caller set.

    Lazy: the coarse scan runs at the first step and each start (a sideband fit) only when
    ``make`` is called, so the other widths cost nothing once a valid minimum is found.
    """
    with np.errstate(all="ignore"):
        first = _first_look(model, edges, n, scale, base, is_fixed, given, lower, upper)
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
    vb, c, masses, i_m, i_s, bkg_given = first
    names = model.parameter_names
    candidates = [(mm, 1.0, True, True) for mm in masses]
    if names[i_m] in given and not bkg_given:
        # a mass given (or held): no scan to offer other peaks, so the background is also
        # started from the whole window, not only from the sidebands of that mass (a held
        # mass stopped 1.1 above the lowest NLL from the sideband start alone)
        candidates.append((masses[0], 1.0, True, False))
    # A free width can have several minima around one excess (a narrow and a wide solution;
    # on 5 sigma toys 0.5 % of fits from one width stopped up to 0.49 in -2 ln L above the
    # lower one), so the other widths are minimised too whenever a width can vary (its
    # start given or not).
    free_widths = [i for i in i_s if not is_fixed[i]]
    vary = bool(free_widths)
    candidates += [(masses[0], f, vary, True) for f in (0.4, 2.5, 1.5)[:retries]]
    sl0 = model.blocks[0][1]
    other_shape = [i for i in range(sl0.start, sl0.stop) if i != i_m and i not in i_s
                   and names[i] not in given]
    for mm, factor, essential, sideband in candidates:
        def make(near: np.ndarray | None = None, mm: float = mm, factor: float = factor,
                 sideband: bool = sideband) -> np.ndarray:
            if near is not None and factor != 1.0 and free_widths:
                # another width at the best minimum so far: that minimum with its widths
                # scaled (background and yields already fitted), not a fresh sideband fit
                s = np.asarray(near, float).copy()
                for i in free_widths:
                    s[i] = _clip(s[i] * factor, lower[i], upper[i])
                for i in other_shape:  # tails etc. from their own starts, as a fresh start
                    s[i] = _clip(base[i], lower[i], upper[i])
                return s
            with np.errstate(all="ignore"):
                return _one_start(model, edges, n, scale, base, vb, c, mm, factor, i_m, i_s,
                                  given, is_fixed, lower, upper, total,
                                  bkg_given or not sideband)

        yield essential, make


def _background_or_base(model, edges, n, scale, base, is_fixed, given, lower, upper):
    if all(k in given for k in model.parameter_names[model.blocks[-1][1]]):
        return base.copy()
    try:
        return background_start(model, edges, n, scale, None, base.copy(), is_fixed, lower,
                                upper)
    except _NUMERIC:
        return base.copy()


def _first_look(model, edges, n, scale, base, is_fixed, given, lower, upper):
    """Background-only start and the candidate peak masses (None without a free signal)."""
    names = model.parameter_names
    blocks = model.blocks
    yields = [iy for _, _, iy in blocks]
    if not any(not is_fixed[iy] for iy in yields[:-1]):
        return None
    bshape, bsl, biy = blocks[-1]
    bkg_given = all(k in given for k in names[bsl])
    vb = _background_or_base(model, edges, n, scale, base, is_fixed, given, lower, upper)
    c = 0.5 * (edges[1:] + edges[:-1])
    bexp = bshape.bin_fractions(edges, list(vb[bsl]), model.window) * vb[biy]
    shape, sl, _ = blocks[0]
    i_m = sl.start + shape.parameter_names.index("mass")
    i_s = [sl.start + shape.parameter_names.index(k) for k in shape.width_parameters()]
    width = max(float(base[i_s[-1]]) if i_s else (edges[-1] - edges[0]) / 40,
                float(np.median(np.diff(edges))))
    if names[i_m] in given:
        masses = [float(base[i_m])]
    else:
        masses = _scan_masses(model, edges, n, scale, base, bexp, i_m, lower, upper, width)
    return vb, c, masses, i_m, i_s, bkg_given


#: a candidate peak whose coarse-scan gain 2 dNLL trails the best one's by more than
#: max(CANDIDATE_MARGIN, best / 2) is not minimised: at 5 sigma (best ~ 25) every local
#: maximum is still tried, while above ~7 sigma the hopeless ones (fluctuations far below the
#: peak) no longer multiply the cost of a fit
CANDIDATE_MARGIN = 25.0


def worth_trying(q: float, q_best: float) -> bool:
    """Whether a candidate of coarse-scan gain ``q`` can plausibly beat one of ``q_best``."""
    return q_best - q <= max(CANDIDATE_MARGIN, 0.5 * q_best)


def _scan_masses(model, edges, n, scale, v, bexp, i_m, lower, upper, width) -> list[float]:
    shape, sl, _ = model.blocks[0]
    lo = max(edges[0], lower[i_m])
    hi = min(edges[-1], upper[i_m])
    step = max(0.5 * width, (hi - lo) / 400)
    grid = np.arange(lo + 0.5 * step, hi, step) if hi - lo > step else np.array([0.5 * (lo + hi)])
    p: list = [float(q) for q in v[sl]]
    p[shape.parameter_names.index("mass")] = grid[:, None]  # every trial mass in one call
    try:
        fr = _compiled_fractions(shape, edges, grid, p, model.window)
        if fr is None:
            fr = np.broadcast_to(shape.bin_fractions(edges, p, model.window),
                                 (grid.size, edges.size - 1))
        peaks = peak_candidates(n, scale, fr, bexp)
    except _NUMERIC:
        peaks = []
    masses: list[float] = []
    for i, q in peaks:
        if (all(abs(grid[i] - mm) > 3 * width for mm in masses)
                and worth_trying(q, peaks[0][1])):
            masses.append(float(grid[i]))
    if not masses:  # no excess anywhere: start at the largest bin excess
        c = 0.5 * (edges[1:] + edges[:-1])
        masses = [float(np.clip(c[int(np.argmax(n - bexp))], lo, hi))]
    return masses


def _compiled_fractions(shape, edges, grid, p, window) -> np.ndarray | None:
    """The coarse scan's Gaussian bin fractions at every trial mass in one compiled call
    (:func:`peaksift.shapes.compiled.gaussian_rows`; the numpy path costs ~15x more); None
    for other shapes."""
    if type(shape) is not Gaussian or not use_compiled():
        return None
    from ..shapes.compiled import gaussian_rows

    sigma = float(p[shape.parameter_names.index("sigma")])
    lo, hi = float(window[0]), float(window[1])
    x = np.clip(np.asarray(edges, float), lo, hi)
    out = np.empty((grid.size, x.size - 1))
    if not (sigma > 0 and gaussian_rows(x, np.ascontiguousarray(grid, float), sigma, lo, hi,
                                        out)):
        return None
    return out


#: the widths the start of a Gaussian peak is chosen among: its start width times these
#: (steps of sqrt 2 from 1/16 to 2), those below half a bin of the coarse histogram left
#: out (its bins cannot tell them apart: the narrowest would win on a bin's fluctuation)
WIDTH_FACTORS = 2.0 ** (np.arange(-8, 3) / 2)


def _scan_width(shape, edges, n, scale, bexp, mass, width, lo_w, hi_w, window):
    """The width among ``width * WIDTH_FACTORS`` (inside ``[lo_w, hi_w]``) with the lowest
    profile NLL of a Gaussian at ``mass`` on the background expectation ``bexp`` (signal
    and background yields profiled, :func:`.kernels.profile_two_yields`); None for other
    shapes, without the compiled path, or without a positive signal anywhere."""
    if type(shape) is not Gaussian or not use_compiled():
        return None
    from ..shapes.compiled import gaussian_rows
    from .kernels import profile_two_yields

    half_bin = 0.5 * (edges[-1] - edges[0]) / (edges.size - 1)  # of a mean bin
    widths = width * WIDTH_FACTORS
    widths = widths[(widths >= max(lo_w, half_bin)) & (widths <= hi_w)]
    b0 = np.maximum(bexp, 1e-12)
    btot = float(b0.sum())
    k = widths.size
    if not k or not btot > 0:
        return None
    lo, hi = float(window[0]), float(window[1])
    x = np.minimum(np.maximum(edges, lo), hi)  # np.clip
    rows = np.empty((k, x.size - 1))
    at = np.array([mass])
    for j in range(k):
        if not gaussian_rows(x, at, float(widths[j]), lo, hi, rows[j:j + 1]):
            return None
    y = np.empty((k, 2))
    y[:, 0] = 0.1 * math.sqrt(max(btot, 1.0))
    y[:, 1] = btot
    nll = np.empty(k)
    sc = np.ones(b0.size) if scale is None else np.ascontiguousarray(scale, float)
    profile_two_yields(np.ascontiguousarray(n, float), sc, rows, b0 / btot, y, nll, 25)
    nll[~((y[:, 0] > 0) & np.isfinite(nll))] = np.inf
    best = int(np.argmin(nll))
    return float(widths[best]) if math.isfinite(nll[best]) else None


def _one_start(model, edges, n, scale, v, vb, c, mm, factor, i_m, i_s, given, is_fixed,
               lower, upper, total, bkg_given):
    names = model.parameter_names
    shape, sl, iy = model.blocks[0]
    bshape, bsl, biy = model.blocks[-1]
    s = vb.copy()
    s[i_m] = _clip(mm, lower[i_m], upper[i_m])
    for i in i_s:
        if not is_fixed[i]:
            s[i] = _clip(v[i] * factor, lower[i], upper[i])
    # sideband background: exclude +-3 widths around the candidate peak
    hw = 3.0 * max((s[i] for i in i_s), default=(edges[-1] - edges[0]) / 40)
    mask = np.abs(c - s[i_m]) > hw
    if not bkg_given and mask.sum() > len(names) and (~mask).sum() > 0:
        try:
            sb = background_start(model, edges, n, scale, mask, s, is_fixed, lower, upper)
            s[bsl] = sb[bsl]
            s[biy] = sb[biy]
        except _NUMERIC:
            pass
    bfr = bshape.bin_fractions(edges, list(s[bsl]), model.window) * s[biy]
    sel = ~mask
    resid = np.clip(n[sel] - bfr[sel], 0.0, None)
    i_sig = sl.start + shape.parameter_names.index("sigma") if (
        "sigma" in shape.parameter_names and shape.name in ("gaussian", "crystalball")) else None
    if (i_sig is not None and factor == 1.0 and names[i_sig] not in given
            and resid.sum() > 0):
        # a Gaussian's width from a coarse likelihood scan of widths at the candidate mass
        # (a start near the minimum saves the Newton steps a poor one is rejected on: on a
        # power law of 1,350 bins 4 of the first start's 10 evaluations); else from the
        # second moment of the excess (truncated at +-3 start widths, so it errs low;
        # bounded to a factor 2 of the start)
        w = _scan_width(shape, edges, n, scale, bfr, float(s[i_m]), float(s[i_sig]),
                        lower[i_sig], upper[i_sig], model.window)
        if w is None:
            d2 = float(resid @ (c[sel] - s[i_m]) ** 2 / resid.sum())
            w = _clip(math.sqrt(max(d2, 1e-12)), 0.5 * s[i_sig], 2.0 * s[i_sig])
        s[i_sig] = w
    if names[iy] not in given:
        excess = float(np.sum(n[sel] - bfr[sel]))
        s[iy] = _clip(max(excess, 0.05 * math.sqrt(max(total, 1.0)) + 1.0),
                        lower[iy], upper[iy])
        if names[biy] not in given:
            s[biy] = _clip(max(total - s[iy], 1.0), lower[biy], upper[biy])
    # later signal components: small positive yield at their given start
    for _, _, iy2 in model.blocks[1:-1]:
        if names[iy2] not in given:
            s[iy2] = _clip(max(0.01 * total, 1.0), lower[iy2], upper[iy2])
    s = np.minimum(np.maximum(s, lower), upper)
    for k in given:  # given starts and fixed values are used as given (but other widths)
        i = names.index(k)
        if not (factor != 1.0 and i in i_s and not is_fixed[i]):
            s[i] = v[i]
    return s
