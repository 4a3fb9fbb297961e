"""A free fit's outcome: the :class:`~peaksift.fitting.result.FitResult` of the lowest
minimum -- errors and correlations (the sandwich covariance for weighted unbinned fits), the
reasons a minimum is not valid, notes (a parameter within one error of a bound, intervals
that under-cover), optional profile-likelihood intervals, the peak summary and the goodness
of fit.  :func:`peaksift.fitting.fit` finds the minimum; this module describes it.
"""

from __future__ import annotations

import math
import warnings
from types import MappingProxyType
from typing import Any

import numpy as np
from scipy import special

from .._values import Measurement
from ..errors import FitError
from ..likelihood import Minimum, baker_cousins_chi2, new_minuit
from ..likelihood.minimum import bound_tolerance, distance_to_bound
from ..shapes import Shape
from .checks import tie_indices
from .data import FitData, gof_binning
from .result import FitResult

__all__ = ["FLOOR_FRACTION", "at_floor", "problems_at", "result_of"]

#: numerical failures of iminuit's restart for the intervals
_NUMERIC = (ArithmeticError, np.linalg.LinAlgError, ValueError)
#: below this signal yield / error the 68 % intervals of a free peak under-cover: on ~5 sigma
#: toys the symmetric errors and the profile-likelihood intervals alike, 61-64 % for mass and
#: yield (tests/test_fit_toys.py, scripts/study_fit_toys.py)
_UNDERCOVER_Z = 6.0

#: a binned fit's Gaussian sigma is kept above this fraction of the narrowest bin: below it
#: the peak fits inside one bin and the likelihood cannot tell its width, so a free sigma
#: could collapse into a one-bin spike on any upward fluctuation
FLOOR_FRACTION = 0.1


def _floor_problem(name: str, value: float, error: float, floor: float, unit: str) -> str:
    """What a width at or within one error of its floor means: narrower than the narrowest
    bin (``floor / FLOOR_FRACTION``), the peak is a spike the binning cannot resolve; wider,
    its error reaches down to the floor -- the data do not measure the width (a wide, weak
    term: finer bins would not help, fixing or constraining the width would)."""
    head = (f"{name} at or within one error of its floor (a bound) {floor:g} {unit}, "
            f"{FLOOR_FRACTION:g} of the narrowest bin")
    if value < floor / FLOOR_FRACTION:
        return (f"{head}: the peak is narrower than the binning resolves; use finer bins or "
                "an unbinned fit")
    return (f"{head}: {name} = {value:.3g} +- {error:.2g} {unit} is not measured by the "
            "data; fix or constrain it by name (fit's fixed= / constraints=, [model] fix / "
            "constrain in a config)")


def at_floor(value: float, error: float, floor: float) -> bool:
    """A width at its floor, or within one error of it: not measured, the fit invalid (a NaN
    error, a singular Hessian flagged on its own, says nothing of the floor)."""
    return value <= floor * (1.0 + 1e-3) or (math.isfinite(error) and error >= value - floor)


def problems_at(mo: Minimum, x: np.ndarray, posdef: bool, lower: np.ndarray, upper: np.ndarray,
              names: list[str]) -> list[str]:
    out = []
    if not mo.converged:
        out.append("minimiser did not converge" + (" (call limit reached)"
                                                  if mo.call_limit else ""))
    # as Python floats (the same values, ~10x cheaper arithmetic than numpy scalars')
    xs, los, his = np.asarray(x, float).tolist(), lower.tolist(), upper.tolist()
    for i, name in enumerate(names):
        if distance_to_bound(xs[i], los[i], his[i])[0] <= bound_tolerance(
                xs[i], los[i], his[i]):
            out.append(f"{name} at a bound ({xs[i]:.6g})")
    if not posdef:
        out.append("covariance not positive definite (Hessian of the NLL not invertible)")
    return out


def result_of(model, d, names, base, is_fixed, free_idx, lower, upper, cons, mo, cost, problems,
              xbest, fbest, free_cov, posdef, intervals, tried, calls, floors,
              gof_scale=None) -> FitResult:
    """The FitResult of the minimum ``xbest`` (``gof_scale``: the scaled-Poisson factors of
    the goodness-of-fit bins, when the caller has them)."""
    npar = len(names)
    vals = base.copy()
    vals[free_idx] = xbest
    ties = tie_indices(cost)
    for i_t, i_s, tie in ties:
        vals[i_t] = tie.func(float(vals[i_s]))
    treatment = "none (unweighted)"
    if d.weighted:
        if d.binned:
            treatment = ("scaled Poisson bins (Bohm and Zech 2014): errors from the Hessian "
                         "of the effective-count likelihood")
        else:
            treatment = "sandwich covariance H^-1 D H^-1 (Langenbruch 2022)"
            if posdef:
                free_cov = free_cov @ cost.score_outer(xbest) @ free_cov
    if free_idx.size == npar:  # every parameter free (free_idx is sorted): no scatter
        # (the minimum's own array, which nothing changes: the result keeps a copy)
        cov = np.asarray(free_cov, float)
    else:
        cov = np.zeros((npar, npar))
        cov[np.ix_(free_idx, free_idx)] = free_cov
    for i_t, i_s, tie in ties:  # a tied parameter's errors follow its source's
        k = tie.slope(float(vals[i_s]))
        cov[i_t, :], cov[:, i_t] = k * cov[i_s, :], k * cov[:, i_s]
        cov[i_t, i_t] = k * k * cov[i_s, i_s]
    # the errors sqrt(max(variance, 0)), NaN for a variance not finite, as Python floats
    # (np.sqrt's numbers, ~4 numpy calls fewer): arithmetic on numpy scalars costs ~10x more
    errs = [(math.sqrt(v) if v >= 0.0 else 0.0) if math.isfinite(v) else math.nan
            for v in cov.diagonal().tolist()]
    xs, los, his = xbest.tolist(), lower.tolist(), upper.tolist()
    vs, held = vals.tolist(), is_fixed.tolist()
    for i, floor in floors.items():
        # at the floor, or within one error of it: the width is not measured, the peak is a
        # spike inside a bin -- a doubt the fit must carry as invalid, not a side note
        # (a NaN error -- a singular Hessian, flagged on its own -- says nothing of the floor)
        # before the intervals: an invalid fit has none (their ends would read as errors)
        if not held[i] and at_floor(vs[i], errs[i], floor):
            problems = [*problems, _floor_problem(names[i], vs[i], errs[i], floor, d.unit)]
    asked: list[str] = []  # the intervals' notes (made now, when they are asked for)
    ivals = _intervals(intervals, mo, cost, names, is_fixed, free_idx, xbest,
                       np.array(errs), lower, upper, problems, asked) if intervals else None
    sig0, sl0, iy0 = model.blocks[0]
    p0 = vs[sl0]
    i_m = sl0.start + sig0.parameter_names.index("mass")
    wpars = sig0.width_parameters()
    wname = wpars[0] if wpars else ""
    i_w = sl0.start + sig0.parameter_names.index(wname) if wname else None

    def notes_of() -> tuple[str, ...]:
        notes: list[str] = [d.note] if d.note else []
        notes += [f"{names[i_t]} = {tie.description or 'a function of ' + names[i_s]}, "
                  f"recomputed from the fitted {names[i_s]} (tied; its error follows from "
                  f"{names[i_s]}'s)" for i_t, i_s, tie in ties]
        for k, i in enumerate(free_idx.tolist()):
            dist, bnd = distance_to_bound(xs[k], los[i], his[i])
            if (math.isfinite(dist) and dist > bound_tolerance(xs[k], los[i], his[i])
                    and math.isfinite(errs[i]) and dist < errs[i]):
                notes.append(f"{names[i]} lies within one standard error of its bound "
                             f"{bnd:g}: its symmetric error is not meaningful, use the "
                             "interval")
        notes += asked
        if (not held[iy0] and (i_w is not None and not held[i_w])
                and errs[iy0] > 0 and abs(vs[iy0]) / errs[iy0] < _UNDERCOVER_Z):
            notes.append("free mass and width at a modest significance: the 68 % intervals "
                         "under-cover, symmetric errors and profile-likelihood intervals "
                         "alike (61-64 % for mass and yield on ~5 sigma toys)")
        return tuple(notes)

    ge, gn, gn2 = (a.copy() if a.flags.writeable else a for a in gof_binning(d))
    mu = cost.expected_at(xbest) if d.binned and hasattr(cost, "expected_at") else None
    if mu is None:
        mu = model.expected(ge, vals)
    gsc = d.hist.scaled_poisson_factors() if gof_scale is None else gof_scale
    ndf = int(gn.size - free_idx.size)
    problems = tuple(problems)

    def later() -> dict:
        """The fields read less often than made (a toy study reads none): notes, covariance
        and correlations, FWHM, goodness of fit, the bins of the figure, bounds, flags.
        From values nothing changes."""
        notes = notes_of()
        flags = {
            "converged": bool(mo is not None and mo.converged),
            "at_bound": any("bound" in p for p in problems),
            "near_bound": any("of its bound" in n for n in notes),
            "posdef_covariance": bool(posdef),
        }
        err = np.array(errs)
        with np.errstate(invalid="ignore", divide="ignore"):
            corr = cov / np.outer(err, err)
        corr[~np.isfinite(corr)] = 0.0
        corr.flat[:: npar + 1] = np.where(err > 0, 1.0, 0.0)  # np.fill_diagonal's assignment
        fw, fw_err = _fwhm_with_error(sig0, p0, cov[sl0, sl0])
        # a binned fit's NLL is the saturated form over these very bins: twice it is the
        # chi-square (no second pass of logarithms); constraint terms would be in it
        chi2 = (2.0 * float(fbest) if d.binned and not cons and math.isfinite(fbest) else
                float(baker_cousins_chi2(gn, mu, gsc)))
        pval = float(special.chdtrc(ndf, chi2)) if ndf > 0 else math.nan
        with np.errstate(invalid="ignore", divide="ignore"):
            pulls = np.where(mu > 0, (gn - mu) / np.sqrt(mu / gsc), 0.0)
        return {"covariance": cov, "correlations": corr, "fwhm": fw, "fwhm_error": fw_err,
                "gof_chi2": chi2, "gof_p_value": pval,
                "gof_note": _gof_note(d, cons, held, names), "edges": ge, "observed": gn,
                "observed_weight_sq_sum": gn2, "expected": mu, "pulls": pulls,
                "flags": flags, "bounds": {n: (los[i], his[i]) for i, n in enumerate(names)},
                "constraints": cons, "notes": notes}

    # the fields made now in the result's own form (fresh read-only mappings, the peak's
    # numbers as Measurements: FitResult._in_parts' ``normal``), the form its __init__
    # leaves, without copying each mapping twice more
    m_err = errs[i_m]
    w_val = vs[i_w] if i_w is not None else math.nan
    w_err = errs[i_w] if i_w is not None else math.nan
    return FitResult._in_parts({
        "parameters": tuple(names), "values": MappingProxyType(dict(zip(names, vs))),
        "errors": MappingProxyType(dict(zip(names, errs))),
        "fixed": tuple(n for n, h in zip(names, held) if h),
        "intervals": None if ivals is None else MappingProxyType(dict(ivals)),
        "nll": float(fbest), "valid": not problems, "problems": problems,
        "binned": d.binned, "binned_reason": d.reason, "weighted": d.weighted,
        "weight_treatment": treatment, "window": d.window, "n_events": d.total,
        "peak_mass": Measurement(float(sig0.location(p0)), m_err), "peak_mass_error": m_err,
        "peak_width": Measurement(w_val, w_err), "peak_width_error": w_err,
        "width_parameter": wname, "gof_ndf": ndf, "model": model,
        "starts_tried": len(tried), "starts_nll": tried, "n_calls": calls, "unit": d.unit, "minimizer": "none" if mo is None else mo.method,
        "cost": cost, "lower_minimum": None,
        # every signal yield held at 0: the background-only fit (named so by every output)
        "kind": "background_only" if all(held[iy] and vs[iy] == 0.0
                                         for _, _, iy in model.blocks[:-1]) else "free_fit"},
        later, normal=True)


def _intervals(which, mo, cost, names, is_fixed, free_idx, xbest, err, lower, upper,
               problems, notes):
    if not which:
        return None
    if problems:
        notes.append("profile-likelihood intervals not made: the fit is not valid")
        return None
    wanted = ([names[i] for i in free_idx] if which is True else
              [which] if isinstance(which, str) else list(which))
    for k in wanted:
        if k not in names or is_fixed[names.index(k)]:
            raise FitError(f"intervals: {k!r} is not a free parameter")
    free_names = [names[i] for i in free_idx]
    lo_f, hi_f = lower[free_idx], upper[free_idx]
    out = {}
    with warnings.catch_warnings(), np.errstate(all="ignore"):
        warnings.simplefilter("ignore")
        try:
            m = new_minuit(cost, xbest, lo_f, hi_f, free_names, err[free_idx])
            # strategy 1: with new_minuit's strategy 0, MINOS stops early on the flat,
            # non-parabolic profiles of ~5 sigma peaks and can call a wrong end valid (a mass
            # end at 2 dNLL = 0.5 instead of 1 on a toy)
            m.strategy = 1
            m.migrad()
        except _NUMERIC + (RuntimeError,):
            notes.append("profile-likelihood intervals failed (iminuit could not restart)")
            return None
        for k in wanted:
            try:
                m.minos(k)
                me = m.merrors[k]
                if not me.is_valid:
                    # MINOS's own path decides on these flat profiles: from a minimum 4e-4 of
                    # an error away, a 5 sigma toy's yield lost its lower end; strategy 2
                    # (its Hessian at every step) found it again
                    m.strategy = 2
                    m.minos(k)
                    m.strategy = 1
                    me = m.merrors[k]
                # a side MINOS did not validate is no measurement: NaN (null in JSON,
                # "?" in every text), its reason in the notes below
                out[k] = (float(me.lower) if me.lower_valid else math.nan,
                          float(me.upper) if me.upper_valid else math.nan)
                i = names.index(k)
                for side, at, b in (("lower", me.at_lower_limit, lower[i]),
                                    ("upper", me.at_upper_limit, upper[i])):
                    if at:  # MINOS stopped at the bound: the distance to it is no error
                        notes.append(f"profile-likelihood interval of {k}: its {side} end is "
                                     f"the bound {b:g} (-ln L has not risen by 1/2 there)")
                if not me.is_valid:
                    sides = [w for w, ok in (("lower", me.lower_valid),
                                             ("upper", me.upper_valid)) if not ok] or ["both"]
                    notes.append(f"profile-likelihood interval of {k} is not valid "
                                 f"({' and '.join(sides)} side{'s' if len(sides) > 1 else ''}; "
                                 "left out)")
            except _NUMERIC + (RuntimeError,):
                notes.append(f"profile-likelihood interval of {k} could not be made")
    return out


def _gof_note(d: FitData, cons: dict, is_fixed: Any, names: list[str]) -> str:
    if d.binned:
        note = ("saturated-model (Baker-Cousins) chi-square of the fitted bins, "
                "asymptotically chi-square(ndf)")
    else:
        note = ("approximate: parameters fitted unbinned, the masses then binned for the "
                "chi-square, which lies between chi-square(ndf) and chi-square(bins - 1) "
                "(Chernoff-Lehmann), so the p-value is somewhat too small")
    if d.weighted:
        note += "; weighted bins as scaled-Poisson effective counts"
    n_con = sum(1 for k in cons if not is_fixed[names.index(k)])
    if n_con:
        note += (f"; {n_con} constrained parameter{'s' if n_con > 1 else ''} "
                 "counted as free in ndf")
    return note


def _fwhm_with_error(shape: Shape, p: list[float], cov: np.ndarray) -> tuple[float, float]:
    try:
        f0 = shape.fwhm(p)
    except (FitError, ValueError, ArithmeticError):
        return math.nan, math.nan
    if not np.isfinite(cov).all():
        return float(f0), math.nan
    grad = np.zeros(len(p))
    try:
        for i in range(len(p)):
            if cov[i, i] <= 0:
                continue
            h = 1e-4 * math.sqrt(cov[i, i])
            q1, q2 = list(p), list(p)
            q1[i] += h
            q2[i] -= h
            grad[i] = (shape.fwhm(q1) - shape.fwhm(q2)) / (2 * h)
    except (FitError, ValueError, ArithmeticError):
        return float(f0), math.nan
    return float(f0), float(math.sqrt(max(grad @ cov @ grad, 0.0)))
