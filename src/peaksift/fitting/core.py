"""The free fit: signal(s) plus background by an extended likelihood, from any start.

:func:`fit` builds the cost from :mod:`peaksift.likelihood`, minimises it from every
starting point the coarse likelihood scan suggests and keeps the lowest minimum (validity is a
property of that minimum, never a reason to prefer a worse one), then derives errors, optional
profile-likelihood intervals, the peak summary and the goodness of fit.  It returns a
:class:`~peaksift.fitting.result.FitResult` for every fit it can set up: one that cannot be
made is returned flagged invalid with its reasons.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from ..errors import FitError, closest
from ..likelihood import (
    BinnedCost,
    Constraint,
    Minimum,
    Model,
    NearMinimum,
    TiedCost,
    UnbinnedCost,
    minimize,
    refine,
)
from ..likelihood.starts import fit_starts
from .checks import (
    as_limits,
    as_retries,
    as_values,
    check_fixed,
    check_support,
    note_lower_minimum,
    tie_rows,
)
from .data import FitData, prepare, start_bins
from .outcome import FLOOR_FRACTION, problems_at, result_of
from .result import FitResult

__all__ = ["fit"]

#: numerical failures of one start: that start is given up, the others still count
_NUMERIC = (ArithmeticError, np.linalg.LinAlgError, ValueError)


def fit(
    data: Any,
    signal: Any = "gaussian",
    background: Any = "exponential",
    window: tuple[float, float] | None = None,
    *,
    weights: Any = None,
    binned: bool | None = None,
    bins: Any = None,
    start: Mapping[str, float] | None = None,
    fixed: Mapping[str, float] | None = None,
    limits: Mapping[str, tuple[float, float]] | None = None,
    constraints: Mapping[str, Any] | None = None,
    intervals: bool | Sequence[str] = False,
    minos: bool | Sequence[str] | None = None,
    retries: int = 3,
    tied: Mapping[str, Any] | None = None,
) -> FitResult:
    """Fit signal(s) + background with an extended likelihood.

    Parameters
    ----------
    data : histogram, array of masses, or (masses, weights)
        A MassHistogram; any histogram speaking the cross-library histogram protocol
        (``values()``, ``variances()``, ``axes``, ``kind``); ``numpy.histogram``'s
        ``(counts, edges)``; a 1-d array of masses in GeV; or ``(masses, weights)``.
        Anything else is refused with a FitError (:func:`peaksift.histogram.as_spectrum`).
    signal : shape name, Shape, or a list of them (several peaks)
    background : shape name or Shape
    window : (lo, hi), optional
        Fit window in GeV (default: the histogram's range / the masses' range).  For a
        histogram, only bins completely inside the window are used and the window snaps
        to their edges.
    weights : array, optional
        Per-mass weights (unbinned data).
    binned : bool or None
        None chooses: histograms binned; arrays unbinned up to ``UNBINNED_LIMIT`` masses in
        the window, binned in ``bins`` (default ``DEFAULT_BINS``) bins above.  The choice and
        its reason are in ``FitResult.binned`` / ``binned_reason``.
    start : dict, optional
        Starting values by parameter name (others are found automatically).
    fixed : dict, optional
        Parameters held at the given values.  Fixing every ``signal_yield`` to 0 also fixes
        that component's shape parameters (they have no effect then).
    limits : dict, optional
        ``name -> (lower, upper)`` replacing the default bounds.
    constraints : dict, optional
        ``name -> Constraint`` (:class:`peaksift.likelihood.Constraint`: Gaussian or
        log-normal) or ``name -> (center, width)`` for a Gaussian.
    intervals : bool or list of names
        Profile-likelihood (MINOS-type) intervals for all free (True) or the named
        parameters.  ``minos=`` is an older spelling of the same.
    tied : dict, optional
        ``name -> Tie`` (:class:`peaksift.likelihood.Tie`): parameters computed from another
        at every step of the minimisation, e.g. ``{"sigma": Tie("sigma", "mass",
        resolution.sigma, resolution.slope)}`` ties the peak's sigma to the resolution at
        the fitted mass (exact at the minimum; its error follows from the mass's).
    retries : int
        Further starting widths at the best candidate peak: minimised in every fit whose
        peak width can vary (the lowest minimum wins), else tried while the best fit is not
        valid.

    Returns
    -------
    FitResult

    Raises
    ------
    FitError
        Empty window, fewer events than free parameters, non-finite data, inconsistent
        bounds or starts, unknown shape or parameter names.

    Notes
    -----
    Binned: :math:`-\\ln L = \\sum_i [\\mu_i - n_i + n_i \\ln(n_i/\\mu_i)]` with
    :math:`\\mu_i` the bin integrals of the model (Baker and Cousins, Nucl. Instrum. Meth. 221
    (1984) 437, eq. 11), so ``2 nll`` at the minimum is the goodness-of-fit chi-square and
    differences of ``nll`` are profile likelihood ratios.  Weighted bins: scaled Poisson
    (Bohm and Zech, Nucl. Instrum. Meth. A 748 (2014) 1; from memory).  Unbinned:
    :math:`-\\ln L = \\sum_k \\nu_k - \\sum_j w_j \\ln \\sum_k \\nu_k f_k(x_j)`; weighted
    unbinned fits get the sandwich covariance :math:`H^{-1} D H^{-1}` (Langenbruch, Eur. Phys.
    J. C 82 (2022) 393; from memory).  See :mod:`peaksift.likelihood`.
    """
    if minos is not None:
        intervals = minos
    d = prepare(data, weights, window, binned, bins)
    model = Model(signal, background, d.window)
    names = list(model.parameter_names)
    fixed = as_values("fixed", fixed)
    start = as_values("start", start)
    limits = as_limits(limits)
    retries = as_retries(retries)
    cons = {k: Constraint.coerce(c, k) for k, c in dict(constraints or {}).items()}
    for label, dct in (("fixed", fixed), ("start", start), ("limits", limits),
                       ("constraints", cons)):
        for k in dct:
            if k not in names:
                hint = closest(k, names)
                raise FitError(f"{label}: unknown parameter {k!r}"
                               f"{f' (did you mean {hint!r}?)' if hint else ''}; "
                               f"parameters are {', '.join(names)}")
    if d.total <= 0:
        raise FitError(f"the fit window {d.window} holds no events (sum of weights "
                       f"{d.total:g}); widen the window or check the selection")
    lower, upper = _bounds(model, d.total, limits)
    for k, c in cons.items():
        if c.kind == "lognormal" and lower[names.index(k)] < 0:
            raise FitError(f"constraints: a log-normal constraint on {k!r} needs a parameter "
                           f"that cannot be negative, but {k} may range down to "
                           f"{lower[names.index(k)]:g}; use a Gaussian constraint, or set "
                           f"limits={{{k!r}: (0, ...)}}")
    check_fixed(model, fixed)
    base, is_fixed = _base_values(model, d, start, fixed, lower, upper)
    # a tied parameter is held in the bookkeeping and recomputed inside the cost ("live")
    # while its source floats; with the source held it is simply held at func(source)
    ties = tie_rows(tied, names, fixed, cons)
    live = [(i_t, i_s, tie) for i_t, i_s, tie in ties if not is_fixed[i_s]]
    for i_t, i_s, tie in ties:
        is_fixed[i_t] = True
        base[i_t] = tie.func(float(base[i_s]))
    floors = _width_floors(model, d, lower, upper, limits)
    for i, floor in floors.items():  # a start below the floor begins at it
        if not is_fixed[i]:
            base[i] = max(base[i], floor)
    check_support(model, base, is_fixed)
    free_idx = np.flatnonzero(~is_fixed)
    nfree = int(free_idx.size)
    n_entries = (float(np.sum(d.n)) if d.binned and not d.weighted else
                 float(np.sum(d.n**2 / np.where(d.n2 > 0, d.n2, 1))) if d.binned else
                 float(d.x.size))
    too_few = n_entries < nfree

    cons_idx = [(names.index(k), c) for k, c in cons.items()]
    inner_free = (np.union1d(free_idx, [i_t for i_t, _, _ in live]).astype(int) if live
                  else free_idx)  # flatnonzero's: sorted already
    if d.binned:
        # read-only arrays shared by every start's cost: their per-bin work is kept
        scale = _read_only(d.hist.scaled_poisson_factors())
        edges, counts = _read_only(d.edges), _read_only(d.n)

        first: list = []

        def plain_cost(v: np.ndarray) -> Any:
            if first:  # the other starts: the first start's cost at their fixed values
                return first[0].at_values(v)
            first.append(BinnedCost(model, v, inner_free, cons_idx, edges, counts, scale))
            return first[0]
    else:
        def plain_cost(v: np.ndarray) -> Any:
            return UnbinnedCost(model, v, inner_free, cons_idx, d.x, d.w)

    def make_cost(v: np.ndarray) -> Any:
        if not live:
            return plain_cost(v)
        row = {int(i): k for k, i in enumerate(inner_free)}
        return TiedCost(plain_cost(v), [(row[i_t], row[i_s], t) for i_t, i_s, t in live])
    given = {**start, **fixed}
    if nfree == 0:  # nothing to minimise: the likelihood at the given values
        cost = make_cost(base)
        f = float(cost.value_grad_info(np.empty(0), info=False)[0])
        mo = Minimum(np.empty(0), f, True, False, np.empty(0), "none (every parameter fixed)")
        return result_of(model, d, names, base, is_fixed, free_idx, lower, upper, cons, mo,
                       cost, [], np.empty(0), f, np.zeros((0, 0)), True, intervals, (f,),
                       cost.ncall, floors)
    se, sn, ssc = start_bins(d)
    starts = fit_starts(model, _read_only(se), _read_only(sn), _read_only(ssc), base,
                        is_fixed, given, lower, upper, d.total, retries,
                        fine=(edges, counts, scale) if d.binned else None)
    lo_f, hi_f = lower[free_idx], upper[free_idx]
    free_names = [names[i] for i in free_idx]
    best, tried, calls = None, [], 0
    if too_few:  # nothing to minimise: the result at the starting values, flagged invalid
        s0 = next(iter(starts))[1]()
        cost = make_cost(s0)
        why = (f"not fitted: only {n_entries:g} events in the window for {nfree} free "
               "parameters (widen the window or fix parameters)")
        best = (math.inf, None, cost, [why], s0[free_idx], cost(*s0[free_idx]), None, False)
        starts = iter(())
    # [full vector, free x, nll, covariance, observed Hessian or None] of the best minimum
    near = None
    superseded = None  # NLL of the first valid minimum a later start went below
    for essential, make_start in starts:
        if not essential and best is not None and not best[3]:
            break  # every candidate peak tried and the best is valid: other widths not needed
        s0 = make_start(None if near is None else near[0])
        if s0 is None:  # a start the best minimum so far makes pointless
            continue
        cost = make_cost(s0)
        try:
            # beat: a later start that stalls above the best minimum so far cannot win
            mo = minimize(cost, s0[free_idx], lo_f, hi_f, free_names,
                          stop=None if near is None else _joins(near),
                          beat=None if best is None else best[0])
            if mo.joined:  # on its way into the best minimum: nothing new to learn
                tried.append(float(mo.fval))
                calls += cost.ncall
                continue
            if best is not None and not (math.isfinite(mo.fval) and mo.fval < best[0] - 1e-9):
                # not better: no errors needed (refine's Newton step only polishes by ~1e-9)
                tried.append(float(mo.fval))
                calls += cost.ncall
                continue
            x, f, cov, posdef = refine(cost, mo, lo_f, hi_f)
        except _NUMERIC as exc:
            tried.append(math.nan)
            calls += cost.ncall
            if best is None:
                best = (math.inf, None, cost, [f"minimisation failed ({type(exc).__name__})"],
                        s0[free_idx], math.nan, None, False)
            continue
        calls += cost.ncall
        tried.append(float(f))
        problems = problems_at(mo, x, posdef, lo_f, hi_f, free_names)
        if not math.isfinite(f):
            problems.append("negative log-likelihood not finite at the minimum")
        if best is None or (math.isfinite(f) and f < best[0] - 1e-9):
            if best is not None and best[1] is not None and not best[3] and superseded is None:
                superseded = float(best[0])  # an earlier valid minimum, now beaten
            best = (f if math.isfinite(f) else math.inf, mo, cost, problems, x, f, cov, posdef)
            if posdef and math.isfinite(f):
                full = s0.copy()
                full[free_idx] = x
                near = [full, np.asarray(x, float), float(f), cov, None]
    _, mo, cost, problems, xbest, fbest, free_cov, posdef = best
    if free_cov is None:
        free_cov = np.full((nfree, nfree), np.nan)
    fr = result_of(model, d, names, base, is_fixed, free_idx, lower, upper, cons, mo, cost,
                 problems, np.asarray(xbest, float), fbest, free_cov, posdef, intervals,
                 tuple(tried), calls, floors, scale if d.binned else None)
    return note_lower_minimum(fr, superseded)


def _read_only(a: np.ndarray) -> np.ndarray:
    """A read-only float copy of ``a``: costs built on it share their per-bin work (a
    shape's logarithms of the edges, the compiled kernels' clipped edges, the counts'
    saturated term)."""
    out = np.array(a, float)
    out.flags.writeable = False
    return out


#: a start whose path comes within this squared distance (in units of the best minimum's
#: errors, d^T H d) of the best minimum, no more than JOIN_NLL above it, is following that
#: minimum: two minima that close would differ in NLL by less than ~0.01, below anything the
#: fit reports, so the start is abandoned there (it saves most of the other-width starts)
JOIN_DISTANCE = 0.02
JOIN_NLL = 0.05


def _joins(near: list) -> NearMinimum:
    if near[4] is None:  # the Hessian when a later start needs it (most fits minimise none)
        near[4] = np.linalg.inv(near[3])
    return NearMinimum(near[1], near[2], near[4], JOIN_NLL, JOIN_DISTANCE)


def _bounds(model: Model, total: float, limits: dict[str, tuple[float, float]]):
    names = model.parameter_names
    lower = np.array([p.lower for p in model.parameters], float)
    upper = np.array([p.upper for p in model.parameters], float)
    tot = max(total, 1.0)
    yields = [iy for _, _, iy in model.blocks]
    for iy in yields[:-1]:
        lower[iy], upper[iy] = -0.5 * tot - 10.0, 5.0 * tot + 10.0
    lower[yields[-1]], upper[yields[-1]] = 0.0, 5.0 * tot + 10.0
    for k, (a, b) in limits.items():
        i = names.index(k)
        lower[i], upper[i] = float(a), float(b)
    for i, k in enumerate(names):
        if not lower[i] < upper[i]:
            raise FitError(f"inconsistent bounds for {k!r}: lower {lower[i]:g} is not below "
                           f"upper {upper[i]:g}; fix limits={{{k!r}: (lo, hi)}}")
    return lower, upper




def _width_floors(model: Model, d: FitData, lower: np.ndarray, upper: np.ndarray,
                  limits: Mapping[str, tuple[float, float]]) -> dict[int, float]:
    """Raise the lower bound of every signal's ``sigma`` in a binned fit to
    ``FLOOR_FRACTION`` of the narrowest bin (unless the caller set its limits); returns
    ``{index: floor}`` of the bounds raised."""
    if not d.binned:
        return {}
    floor = FLOOR_FRACTION * float(np.diff(d.edges).min())  # (np.min's wrapper: ~10 us)
    out = {}
    for shape, sl, _ in model.blocks[:-1]:
        if "sigma" not in shape.parameter_names:
            continue
        i = sl.start + shape.parameter_names.index("sigma")
        name = model.parameter_names[i]
        if name in limits or not lower[i] < floor < upper[i]:
            continue
        lower[i] = floor
        out[i] = floor
    return out


def _base_values(model: Model, d: FitData, start: dict, fixed: dict, lower: np.ndarray,
                 upper: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    names = list(model.parameter_names)
    for k, v in {**start, **fixed}.items():
        i = names.index(k)
        if not math.isfinite(float(v)):
            raise FitError(f"value for {k!r} is not finite ({v!r})")
        if k in start and not lower[i] <= float(v) <= upper[i]:
            raise FitError(f"start value {k}={v:g} is outside its bounds "
                           f"[{lower[i]:g}, {upper[i]:g}]; change the start or limits={{...}}")
    is_fixed = np.zeros(len(names), bool)
    for k in fixed:
        is_fixed[names.index(k)] = True
    for _, sl, iy in model.blocks[:-1]:
        if names[iy] in fixed and float(fixed[names[iy]]) == 0.0:
            is_fixed[sl] = True
    yields = [iy for _, _, iy in model.blocks]
    base = np.array([p.start for p in model.parameters], float)
    for i in range(len(names)):
        if not math.isfinite(base[i]) and i not in yields:
            base[i] = 0.5 * (lower[i] + upper[i])
    for k, v in start.items():
        base[names.index(k)] = float(v)
    base = np.clip(base, lower, upper)
    for k, v in fixed.items():  # fixed values are used as given, even outside the bounds
        base[names.index(k)] = float(v)
    for iy in yields[:-1]:
        if not math.isfinite(base[iy]):
            base[iy] = 0.0
    if not math.isfinite(base[yields[-1]]):
        base[yields[-1]] = d.total
    return base, is_fixed
