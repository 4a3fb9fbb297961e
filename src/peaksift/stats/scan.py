"""Mass scan: the local significance of a signal at each mass hypothesis.

Use :func:`scan` on a spectrum (a :class:`~peaksift.histogram.MassHistogram`, or an array of
masses which is histogrammed finely) to get a :class:`ScanResult`: q0, Z_local, p_local and
the fitted signal yield at every mass, the best hypothesis, a free refit there, the global
significance (:meth:`ScanResult.global_significance`, look-elsewhere effect included) and a
plot of p_local against mass.

At each hypothesis the signal shape is fixed by the detector resolution, given explicitly
(``relative_resolution=0.01`` for sigma/m, ``absolute_resolution=2.0`` for GeV, or
``resolution=`` a :class:`peaksift.Resolution`, a callable sigma(m) or a table; a bare number
is refused), optionally with a natural ``width``; the signal yield (free, may be negative) and
all background parameters are profiled in the extended binned Poisson likelihood (see
:mod:`peaksift.stats.toys` for the engine).  q0 = 0 when the fitted yield is negative (the
one-sided discovery test of Cowan, Cranmer, Gross, Vitells, EPJC 71 (2011) 1554).

Blinding: with ``blind=(lo, hi)`` every bin overlapping that mass range is left out of the
likelihood, no observed number is computed for hypotheses inside it (they are NaN in the
arrays, ``None`` in ``to_dict()``), the plot hides them, and no free refit is made (it would
look inside).  Only expected values (``expected_signal=``) are shown there.  To unblind,
call :func:`scan` again without ``blind``.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from typing import Any

import numpy as np

from ..errors import FitError, PeaksiftError
from ..likelihood import (
    SignalNuisances,
)
from ..likelihood.poisson import use_compiled
from .mass_grid import coarse_grid_note
from .scale_scan import profile_global, several_minima_note
from .scan_inputs import ASK, _prepare_model, _signal_params, _Spectrum
from .scan_kept import OWN, _all, kept_scan, quick_scan, remember, scan_arrays, significances
from .scan_prepared import prepared_key
from .scan_result import ScanResult, fresh_result
from .shape_profile import with_nuisances
from .toy_model import _compiled, _spectrum_saturated
from .toys import ScanModel, fit_background, profile_signal

__all__ = ["ScanResult", "scan"]


# -------------------------------------------------------------------------- scan
def scan(
    data: Any,
    signal: Any,
    background: Any,
    masses: Any,
    *,
    resolution: Any = None,
    relative_resolution: float | None = None,
    absolute_resolution: float | None = None,
    window: tuple[float, float] | None = None,
    natural_width: Any = None,
    blind: tuple[float, float] | None = None,
    signal_params: Mapping[str, float] | None = None,
    expected_signal: Any = None,
    bins: int | None = None,
    refit: bool = True,
    nuisances: Any = None,
    nuisance_toys: str = "fixed",
    signal_model: Any = None,
) -> ScanResult:
    """Scan the local significance of a signal over mass hypotheses.

    Parameters
    ----------
    data : histogram, array of masses, or (masses, weights)
        A MassHistogram, a histogram speaking the cross-library histogram protocol,
        ``numpy.histogram``'s ``(counts, edges)``, masses in GeV or ``(masses, weights)``;
        anything else is a FitError (:func:`peaksift.histogram.as_spectrum`).
        Arrays are histogrammed on the window (:meth:`MassHistogram.from_masses`, so a mass
        equal to the window's top is in the last bin) in bins of a quarter of the smallest
        resolution (50-2000 bins) unless ``bins`` is given; the scan of an array and of the
        histogram built from it are the same.  Weighted bins are scaled Poisson variables: effective
        counts ``k_i values_i`` with ``k_i = values_i / variances_i`` per bin (Bohm and Zech, NIM A
        748 (2014) 1; the same likelihood as the weighted binned :func:`peaksift.fit`, so
        q0 agrees with two such fits); yields are reported in weighted units.
    signal, background : shape name or Shape
        As in :func:`peaksift.fit` (e.g. ``"gaussian"``, ``"exponential"``).
    masses : array or int
        Mass hypotheses (GeV) or a number of evenly spaced points inside the window.  Space
        them by at most about half the resolution, or the scan (and every toy's) misses the
        top of narrow excesses and the look-elsewhere estimates disagree.
    resolution, relative_resolution, absolute_resolution :
        The detector resolution sigma(m), exactly one of: ``relative_resolution`` (sigma/m,
        0 < r <= 1), ``absolute_resolution`` (GeV), or ``resolution``: a
        :class:`peaksift.Resolution`, a callable m -> sigma (GeV) or a table
        ``(masses, sigmas)`` (GeV, interpolated linearly).  A bare number for
        ``resolution`` is refused, since it could mean either; so is a sigma below 1% of
        the bin width at a hypothesis (:func:`peaksift.resolution.check_resolved`).
    window : (lo, hi), optional
        Fit window (default the histogram's range, or the masses' range); a histogram keeps
        the bins lying completely inside it (:meth:`MassHistogram.restrict`).
    natural_width : float or callable, optional
        Natural width (GeV) for shapes with a ``width`` (voigt, breitwigner).
    blind : (lo, hi), optional
        Blinded mass range (see the module guide).
    signal_params : dict, optional
        Values of other signal shape parameters (e.g. Crystal Ball tails).
    expected_signal : float or callable, optional
        Signal yield (events) whose median expected significance (Asimov data from the
        background-only fit plus this signal) is reported in ``z_expected`` at every mass.
    refit : bool
        Refit at the best mass with mass and width free (:func:`peaksift.fit`).
    nuisances : SignalNuisances or mapping, optional
        Relative sizes of the signal's mass-scale and resolution nuisance parameters
        (:class:`peaksift.likelihood.SignalNuisances`), profiled at every hypothesis and in
        every toy of :meth:`ScanResult.global_significance` (:mod:`.shape_profile`); where
        the mass scale moves the peak further than its width, the lowest well of the
        profile in it (:mod:`.scale_scan`; ``notes`` names the masses where it was not
        the nearest).  Every size 0 (or None): exactly the scan without them.
    nuisance_toys : "fixed" or "sampled"
        Toys keep the constraints' centres at their nominal values (conditional ensemble),
        or draw them per toy from the constraints (unconditional ensemble).
    signal_model : SignalModel, optional
        The signal shape, its parameters and the resolution as functions of the
        hypothesised mass, from simulated samples (:func:`peaksift.stats.signal_model.signal_model`);
        then ``signal`` is None (or the model's shape) and no resolution is given.

    Returns
    -------
    ScanResult

    Notes
    -----
    q0 = 2 [NLL(s=0) - NLL(s_hat)] for s_hat > 0, else 0 (Cowan et al. 2011, eq. 12);
    Z_local = sqrt(q0), p_local = 1 - Phi(Z_local) (eqs. 52-53).
    """
    slots: list = []
    key = ASK
    if (not refit and blind is None and expected_signal is None and nuisances is None
            and nuisance_toys == "fixed"):
        # (the order remember() reads: the window 6th, the signal parameters 8th)
        options = (signal, background, resolution, relative_resolution, absolute_resolution,
                   window, natural_width, signal_params, bins, signal_model)
        done = quick_scan(data, masses, options)
        if done is not None:
            return done
        key = prepared_key(data, signal, background, masses, resolution, relative_resolution,
                           absolute_resolution, window, natural_width, blind, signal_params,
                           bins, None, signal_model, "scan")
        kept = kept_scan(key)
        if kept is not None:
            remember(data, masses, options, kept[1])
            return kept[0]
    model, spec, info = _prepare_model(
        data, signal, background, masses, resolution=resolution,
        relative_resolution=relative_resolution, absolute_resolution=absolute_resolution,
        window=window,
        natural_width=natural_width, blind=blind, signal_params=signal_params, bins=bins,
        signal_model=signal_model, slots=slots, key=key)
    return scan_prepared(data, model, spec, info, blind=blind, expected_signal=expected_signal,
                         natural_width=natural_width, refit=refit, nuisances=nuisances,
                         nuisance_toys=nuisance_toys, slot=slots[0] if slots else None)


def scan_prepared(data: Any, model: ScanModel, spec: _Spectrum, info: dict[str, Any], *,
                  blind: Any, expected_signal: Any, natural_width: Any,
                  refit: bool, nuisances: Any = None,
                  nuisance_toys: str = "fixed", fits: dict | None = None,
                  slot: list | None = None) -> ScanResult:
    """The scan of a model prepared by :func:`_prepare_model` (the channels of a
    combination prepare theirs once and scan them here, as :func:`scan` does).  ``fits``,
    a dict, receives the profile fits at the unblinded hypotheses (``s``, ``b``, ``theta``,
    ``hessian``: :func:`~peaksift.stats.toys.profile_signal`'s), from which a combination
    starts its joint fit.  ``slot``: the kept preparation's slot (:func:`_prepare_model`'s
    ``slots``) when ``model`` is the one it just handed out, unchanged: where the compiled
    call's own inputs are kept (:func:`_scan_table`)."""
    signal_params = info["signal_params"]
    m_all = info["masses"]
    bl = info["blinded_mass"]
    nm = m_all.size
    notes: list[str] = []
    if nuisances is None and nuisance_toys == "fixed":
        nuis, shape_active = _NO_NUISANCES, ()   # (its properties' calls, ~10 us cold)
    else:
        nuis = _nuisances(nuisances, nuisance_toys)
        shape_active = nuis.shape_active
    factors = {name: np.full(nm, np.nan) for name in shape_active} if shape_active else {}
    mb = model.masses.size
    # every hypothesis open (no blinding): the fits' arrays are the result's, no copies
    # into NaN-filled ones (a 100-bin scan's ~40 numpy calls were a third of its time)
    every = mb == nm
    table = None
    if mb and every and fits is None and not shape_active:
        table = _scan_table(model, slot)
    if table is not None:
        # the compiled fits and their table in one call: the same numbers as below
        arr, conv, z, p, best = scan_arrays(table, model.nll_background, bl, notes)
    elif mb:
        # every row starts at the background-only fit (the model's theta and yield)
        r = profile_signal(model, model.counts, model.fractions, steps=100)
        if fits is not None:
            fits.update(r)
        q0 = np.where(r["s"] > 0, np.maximum(2.0 * (model.nll_background - r["nll"]), 0.0), 0.0)
        if every and fits is None and not shape_active:
            arr = {"q0": q0, "s": r["s"], "se": r["s_error"], "b": r["b"]}
            conv = r["converged"]
        else:
            arr = {k: np.full(nm, np.nan) for k in ("q0", "s", "se", "b")}
            conv = np.zeros(nm, bool)
            arr["q0"][~bl] = q0
            # yields are in weighted units already (the per-bin k_i sits in the expectations)
            arr["s"][~bl] = r["s"]
            arr["se"][~bl] = r["s_error"]
            arr["b"][~bl] = r["b"]
            conv[~bl] = r["converged"]
        if shape_active:
            base = _signal_params(info["signal"], spec.window, model.masses, info["sigma"][~bl],
                                  natural_width, signal_params)
            # the lowest well of the mass scale where it reaches beyond the peak's width
            # (CCGV eq. 7: the profile is the global minimum), elsewhere the single fit
            rn = profile_global(model, model.counts, info["signal"], base, nuis, start=r)
            better = rn["nll"] <= r["nll"]  # started at r's minimum: never worse, to rounding
            if np.any(rn["moved"] & better):
                notes.append(several_minima_note(model.masses[rn["moved"] & better],
                                                 nuis.mass_scale, "q0"))
            q0 = np.where(rn["s"] > 0,
                          np.maximum(2.0 * (model.nll_background - rn["nll"]), 0.0), 0.0)
            arr["q0"][~bl] = np.where(better, q0, arr["q0"][~bl])
            arr["s"][~bl] = np.where(better, rn["s"], r["s"])
            arr["se"][~bl] = np.where(better, rn["s_error"], r["s_error"])
            arr["b"][~bl] = np.where(better, rn["b"], r["b"])
            conv[~bl] = rn["converged"]
            for j, name in enumerate(rn["names"]):
                factors[name][~bl] = np.where(better, rn["factors"][:, j], 1.0)
            model = with_nuisances(model, info["signal"], base, nuis, nuisance_toys)
        if not _all(r["converged"]):
            notes.append(f"{int((~r['converged']).sum())} hypotheses did not converge")
    else:
        arr = {k: np.full(nm, np.nan) for k in ("q0", "s", "se", "b")}
        conv = np.zeros(nm, bool)
        notes.append("every mass hypothesis is blinded")
    if table is None:
        z, p, best = significances(arr["q0"], every, bl)
    grid = coarse_grid_note(m_all, info["sigma"])
    if grid:
        notes.append(grid)
    z_exp = None
    if expected_signal is not None:
        z_exp = _expected_z(model, info, spec, expected_signal)
    fit_result = None
    if refit and blind is None and model.masses.size:
        fit_result = _refit(data, info, spec, best, signal_params, natural_width, notes)
    elif refit and blind is not None:
        notes.append("no free refit while blinded")
    values = {
        "masses": m_all, "sigma": info["sigma"], "q0": arr["q0"], "z_local": z, "p_local": p,
        "signal_yield": arr["s"], "signal_yield_error": arr["se"],
        "background_yield": arr["b"], "converged": conv, "best_index": best,
        "best_mass": float(m_all[best]), "refit": fit_result, "window": spec.window,
        "blind": None if blind is None else (float(blind[0]), float(blind[1])),
        "blinded": bl, "signal_shape": info["signal"].name,
        "background_shape": info["background"].name, "weight_scale": spec.scale,
        "z_expected": z_exp, "notes": tuple(notes), "unit": spec.unit, "model": model,
        "nuisances": None if nuis is _NO_NUISANCES or nuis.none else nuis.to_dict(),
        "nuisance_factors": factors or None}
    if table is not None:   # its arrays and those made from them: the result's alone
        return fresh_result(values, OWN)
    return ScanResult(**values)


def _scan_table(model: ScanModel, slot: list | None) -> tuple | None:
    """:func:`.profile_calls.scan_table` of a scan with every hypothesis open, no nuisance
    and nothing asked of the fits but the result's arrays (``s``, ``s_error``, ``b``,
    ``nll``, ``converged``, the count of unconverged rows, q0, Z, -Z, the best row,
    ``plain``), or None (``profile_signal`` answers: no compiled row kernel, or the
    compiled loop declined a row).  Its inputs are made once per kept preparation, into
    ``slot``, from the model as handed out: ~50 us of a 100-bin scan with cold caches
    went to making them again (the row kernel's and the saturated term's keys, the
    contiguous copies), ~40 us more to the table's numpy calls.  ``slot`` None (a
    preparation not kept: a 10,000-bin scan's): the inputs made for this call alone.
    Every scan this way runs one compiled function: a 100-bin scan right after a
    10,000-bin one found its code cold when that one ran another copy of the fits
    (``profile_calls.scan_rows`` for ``profile_signal``), ~25 us of its ~1 ms."""
    if not slot:
        call = None
        if model.theta.size == 1 and use_compiled():
            calls = _compiled()
            call = calls.scan_call(model, _spectrum_saturated(model.counts))
        if slot is None:
            slot = [call]
        else:
            slot.append(call)
    call = slot[0]
    if call is None:
        return None
    out = _compiled().scan_table(*call, 100, 1e-6)
    if out[0]:
        return None
    return out[1:]


#: no nuisance (a frozen value: one for every scan)
_NO_NUISANCES = SignalNuisances()


def _nuisances(spec: Any, toys: str) -> SignalNuisances:
    if toys not in ("fixed", "sampled"):
        raise FitError(f"nuisance_toys must be 'fixed' or 'sampled', got {toys!r}")
    if spec is None:
        return _NO_NUISANCES
    if isinstance(spec, SignalNuisances):
        return spec
    if isinstance(spec, Mapping):
        return SignalNuisances.make(spec)
    raise FitError(f"nuisances must be a SignalNuisances or a mapping of sizes, got {spec!r}")


def _expected_z(model: ScanModel, info: dict[str, Any], spec: _Spectrum,
                expected_signal: Any) -> np.ndarray:
    """Median expected Z (Asimov: background-only fit + the signal) at every mass."""
    m = info["masses"]
    s = (np.asarray(expected_signal(m), float) if callable(expected_signal)
         else np.full(m.shape, float(expected_signal)))
    f = info["window_fractions"]
    # expected values do not look at the data: the Asimov set covers the blinded bins too
    full = dataclasses.replace(model, masses=m, fractions=f,
                               used=np.arange(spec.edges.size - 1), counts=spec.counts)
    asimov = np.broadcast_to(full.expected_background, f.shape) + s[:, None] * f
    nm = m.size
    th = np.repeat(model.theta[None, :], nm, axis=0)
    _, _, nll0 = fit_background(full, asimov, th)
    r = profile_signal(full, asimov, f, s_start=s, theta_start=th,
                       b_start=np.full(nm, model.bkg_yield))
    q = np.where(r["s"] > 0, np.maximum(2.0 * (nll0 - r["nll"]), 0.0), 0.0)
    return np.sqrt(q)


def _refit(data: Any, info: dict[str, Any], spec: _Spectrum, best: int,
           signal_params: Any, natural_width: Any, notes: list[str]) -> Any:
    from ..fitting import fit

    sig = info["signal"]
    m = float(info["masses"][best])
    start = {"mass": m}
    names = sig.parameter_names
    if "sigma" in names:
        start["sigma"] = float(info["sigma"][best])
    if "width" in names:
        w = natural_width(m) if callable(natural_width) else natural_width
        start["width"] = float(w if w is not None else info["sigma"][best])
    # what the scan held fixed stays fixed: tails (given or default) and the natural width;
    # the mass and the resolution width float
    fixed = {}
    for p in sig.parameters_for(spec.window):
        if p.name in ("mass", "sigma") or (p.name == "width" and natural_width is None):
            continue
        given = (signal_params or {}).get(p.name, p.start)
        fixed[p.name] = start.get(p.name, float(given(m) if callable(given) else given))
    start = {k: v for k, v in start.items() if k not in fixed}
    try:
        return fit(data, sig, info["background"], spec.window, start=start, fixed=fixed)
    except PeaksiftError as exc:
        notes.append(f"refit at {m:g} failed: {exc}")
        return None
