"""The free fit: signal(s) plus background by an extended likelihood, from any start.

:func:`fit` builds the cost from :mod:`peaksift.likelihood`, minimises it from every
starting point the coarse likelihood scan suggests and keeps the lowest minimum (validity is a
property of that minimum, never a reason to prefer a worse one; an invalid one is restarted
where it shows another basin may lie lower, :mod:`.restarts`, and continued to the lowest
point of its valley, :mod:`.polish`), then derives errors, optional
profile-likelihood intervals, the peak summary and the goodness of fit.  It returns a
:class:`~peaksift.fitting.result.FitResult` for every fit it can set up: one that cannot be
made is returned flagged invalid with its reasons.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from ..errors import FitError
from ..likelihood import Minimum, NearMinimum, minimize, refine
from ..likelihood.starts import fit_starts
from .checks import note_lower_minimum
from .elsewhere import given_masses, with_lower_minimum
from .outcome import problems_at, result_of
from .polish import continue_invalid, is_invalid
from .restarts import restart_points
from .result import FitResult
from .setup import setup_of
from .setup_kept import kept_setup

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
    su = None
    if (start is None and fixed is None and limits is None and constraints is None
            and tied is None and weights is None):
        su = kept_setup(data, signal, background, window, binned, bins, retries)
    if su is None:
        su = setup_of(data, signal, background, window, weights, binned, bins, start, fixed,
                      limits, constraints, tied, retries)
    retries = int(retries)
    d, model, names, lower, upper = su.d, su.model, su.names, su.lower, su.upper
    base, is_fixed, floors, cons, free_idx = su.base, su.is_fixed, su.floors, su.cons, su.free_idx
    nfree = int(free_idx.size)
    n_entries = su.n_entries
    too_few = n_entries < nfree
    make_cost = su.cost_at
    if d.binned:
        edges, counts, scale = su.binned_arrays
    given = su.given
    if nfree == 0:  # nothing to minimise: the likelihood at the given values
        cost = make_cost(base)
        f = float(cost.value_grad_info(np.empty(0), info=False)[0])
        mo = Minimum(np.empty(0), f, True, False, np.empty(0), "none (every parameter fixed)")
        return result_of(model, d, names, base, is_fixed, free_idx, lower, upper, cons, mo,
                       cost, [], np.empty(0), f, np.zeros((0, 0)), True, intervals, (f,),
                       cost.ncall, floors, scale if d.binned else None)
    se, sn, ssc = su.start_arrays
    starts = fit_starts(model, se, sn, ssc, base,
                        is_fixed, given, lower, upper, d.total, retries,
                        fine=(edges, counts, scale) if d.binned else None)
    lo_f, hi_f = lower[free_idx], upper[free_idx]
    free_names = [names[i] for i in free_idx.tolist()]
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
    first: list[np.ndarray] = []  # the first start (its widths start a Crystal Ball's core)
    n_starts: list[int] = []  # how many starts were tried before the restarts
    valid_best: list = []  # the best minimum the restarts found valid (none to continue)

    def restarts():
        """Starts of another kind from an invalid best minimum (:mod:`.restarts`), made
        once every start above is minimised.  Like the continuation (:mod:`.polish`) they
        take an invalid minimum further: their evaluations count in ``n_calls``, but they
        are not starts of ``starts_tried`` / ``starts_nll`` (the start finder's)."""
        n_starts.append(len(tried))
        if best is None or best[1] is None:
            return
        if not is_invalid(best, floors, free_idx):
            valid_best.append(best)
            return
        for s in restart_points(model, np.asarray(best[4], float), best[6],
                                first[0] if first else None, base, is_fixed, free_idx,
                                lower, upper, floors):
            yield True, lambda near=None, s=s: s

    def finder():
        """The start finder's starts, up to the first inessential one once the best minimum
        so far has no problems (every candidate peak tried: other widths not needed).  The
        restarts come after it either way: a minimum with no problems can still be invalid
        (a width within one error of its floor), and theirs is that test."""
        for essential, make_start in starts:
            if not essential and best is not None and not best[3]:
                return
            yield essential, make_start

    for _, make_start in itertools.chain(finder(), restarts()):
        s0 = make_start(None if near is None else near[0])
        if s0 is None:  # a start the best minimum so far makes pointless
            continue
        if not first:
            first.append(s0.copy())
        cost = make_cost(s0)
        try:
            # beat: a later start that stalls above the best minimum so far cannot win
            # refine_below: the refinement below made in the same compiled call
            mo = minimize(cost, s0[free_idx], lo_f, hi_f, free_names,
                          stop=None if near is None else _joins(near),
                          beat=None if best is None else best[0],
                          refine_below=math.inf if best is None else best[0] - 1e-9)
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
    if n_starts:
        del tried[n_starts[0]:]
    if not (valid_best and valid_best[0] is best):  # (a valid minimum is not continued)
        best, calls = continue_invalid(best, calls, lo_f, hi_f, free_names, floors, free_idx)
    _, mo, cost, problems, xbest, fbest, free_cov, posdef = best
    if free_cov is None:
        free_cov = np.full((nfree, nfree), np.nan)
    fr = result_of(model, d, names, base, is_fixed, free_idx, lower, upper, cons, mo, cost,
                 problems, np.asarray(xbest, float), fbest, free_cov, posdef, intervals,
                 tuple(tried), calls, floors, scale if d.binned else None)
    fr = note_lower_minimum(fr, superseded)
    started = given_masses(model, start, fixed, tied) if not too_few else []
    if started:  # a fit of the given peak: is there a lower minimum elsewhere? (.elsewhere)
        try:
            ref = fit(data, signal, background, window, weights=weights, binned=binned,
                      bins=bins, start={k: v for k, v in start.items() if k not in started}
                      or None, fixed=fixed, limits=limits, constraints=constraints,
                      retries=retries, tied=tied)
        except FitError:  # (cannot happen where this fit was set up; never a crash)
            return fr
        fr = with_lower_minimum(fr, ref)
    return fr


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
