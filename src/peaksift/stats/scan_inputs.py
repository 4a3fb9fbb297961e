"""What a scan works on: the spectrum, the signal's parameters at each hypothesis, the background's starts, and the prepared model."""

from __future__ import annotations

import math
import pickle
import threading
import warnings
from collections import OrderedDict
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import DataWarning, FitError
from ..likelihood import (
    binned_gradient,
    binned_information,
    binned_nll,
    minimize,
)
from ..likelihood.poisson import use_compiled
from ..resolution import resolution_from
from .bounds import check_plan
from .scan_plan import _signal_params, input_digest, window_plan  # noqa: F401 -- _signal_params: imported from here by scan, channels, limits_systematics
from .scan_prepared import keep_prepared, kept_prepared, prepared_key
from .toys import ScanModel, bkg_fractions, bkg_gradients, fit_background


# ---------------------------------------------------------------------- data input
@dataclass(frozen=True)
class _Spectrum:
    edges: np.ndarray      # bins in the window
    counts: np.ndarray     # effective counts k_i values_i (window bins)
    scale: float           # overall factor sum(w)/sum(w^2) (1 unweighted), for information
    window: tuple[float, float]
    unit: str
    bin_scale: np.ndarray | None = None  # per-bin k_i = values_i/variances_i (None unweighted)


def _spectrum(data: Any, window: Any, bins: Any, min_sigma: Callable[[], float]) -> _Spectrum:
    """The window's bins as the likelihood sees them, from a MassHistogram or from masses.

    Masses are histogrammed with :meth:`MassHistogram.from_masses` on the window (default:
    their range) and then go the histogram's way, so an array and the histogram built from
    it give the same spectrum; the edge rule is the histogram's (a mass equal to the top of
    the window is in the last bin)."""
    from ..histogram import MassHistogram

    if isinstance(data, MassHistogram):
        hist = data if window is None else data.restrict(window)
    else:
        x, w = data  # as_spectrum's (masses, weights)
        if x.size == 0:
            raise FitError("scan: no masses given")
        if not np.all(np.isfinite(x)):
            raise FitError("scan: masses contain NaN or infinite values; drop them first")
        lo, hi = (float(x.min()), float(x.max())) if window is None else (float(window[0]),
                                                                        float(window[1]))
        if not hi > lo:
            raise FitError(f"scan: the window ({lo:g}, {hi:g}) is empty; give window=(lo, hi) "
                           "with lo < hi")
        if bins is None:
            nb = int(np.clip(math.ceil((hi - lo) / (0.25 * min_sigma())), 50, 2000))
        else:
            nb = int(bins)
            check_plan(2, nb)  # before the histogram is allocated
        hist = MassHistogram.from_masses(x, w, bins=nb, range=(lo, hi))
    weight_sum = np.asarray(hist.values(), float)
    edges = np.array(hist.edges, float)
    edges.flags.writeable = False  # shapes keep per-edges work (logarithms) for this array
    total = float(weight_sum.sum())
    # a finite total and no negative bin: every bin finite and non-negative (one test of
    # two reductions; the full one only where it may fail, a total overflowing included)
    if not (math.isfinite(total) and (weight_sum.size == 0 or weight_sum.min() >= 0)) and not (
            np.all(np.isfinite(weight_sum)) and np.all(weight_sum >= 0)):
        raise FitError("scan: bin contents in the window must be finite and non-negative")
    if total <= 0:
        raise FitError(f"scan: the window ({edges[0]:g}, {edges[-1]:g}) is empty")
    scale = 1.0
    bin_scale = None
    variances = hist.variances()
    # unweighted bins are equal exactly: np.allclose's ~50 us only for weighted ones
    if not (np.array_equal(weight_sum, variances) or np.allclose(weight_sum, variances)):
        scale = float(weight_sum.sum() / variances.sum())
        bin_scale = hist.scaled_poisson_factors()
        warnings.warn(
            f"scan: weighted spectrum; significances use scaled-Poisson effective counts "
            f"k_i sum(w) per bin, k_i = sum(w)/sum(w^2) of the bin (overall {scale:.4g}); "
            f"an approximation for unequal weights (exact for equal ones)",
            DataWarning, stacklevel=3)
    return _Spectrum(edges, weight_sum * (1.0 if bin_scale is None else bin_scale), scale,
                     (float(edges[0]), float(edges[-1])), hist.unit, bin_scale)


def from_signal_model(signal_model: Any, signal: Any, resolution: Any, relative: Any,
                      absolute: Any, signal_params: Any) -> tuple[Any, Any, dict[str, Any]]:
    """The signal shape, resolution and shape parameters (functions of the hypothesised
    mass) a :class:`~peaksift.stats.signal_model.SignalModel` provides; refuses a second
    source for any of them."""
    from .signal_model_result import SignalModel

    if not isinstance(signal_model, SignalModel):
        raise FitError(f"signal_model must be a peaksift SignalModel (from signal_model() or "
                       f"SignalModel.from_dict), got {type(signal_model).__name__}")
    if any(v is not None for v in (resolution, relative, absolute)):
        raise FitError("give the resolution either through signal_model= or through "
                       "resolution=/relative_resolution=/absolute_resolution=, not both")
    if signal_params:
        raise FitError("signal_params= cannot be combined with signal_model= (the model "
                       "gives every shape parameter as a function of mass)")
    if signal is not None:
        from .. import shapes

        if shapes.get(signal).name != signal_model.shape:
            raise FitError(f"signal shape {shapes.get(signal).name!r} differs from the signal "
                           f"model's {signal_model.shape!r}; pass signal=None")
    return signal_model.shape, signal_model.resolution, signal_model.shape_functions()


def _background_start(background: Any, window: tuple[float, float]) -> tuple[np.ndarray,
                                                                            np.ndarray,
                                                                            np.ndarray]:
    pars = background.parameters_for(window)
    start = np.array([p.start for p in pars], float)
    lower = np.array([p.lower for p in pars], float)
    upper = np.array([p.upper for p in pars], float)
    start = np.where(np.isfinite(start), start, 0.0)
    return start, lower, upper


def _start_grid(start: np.ndarray, lower: np.ndarray, upper: np.ndarray,
                product: bool = True) -> np.ndarray:
    """Starting points for the data's background fit: the default start and, per parameter,
    points across its bounded range (10%, 50%, 90%) or start +- max(1, |start|) when
    unbounded; all combinations for up to 3 parameters (``product``), else one parameter at
    a time."""
    options = []
    for k, s0 in enumerate(start):
        lo, hi = lower[k], upper[k]
        if np.isfinite(lo) and np.isfinite(hi):
            vals = [s0, lo + 0.1 * (hi - lo), lo + 0.5 * (hi - lo), lo + 0.9 * (hi - lo)]
        else:
            d = max(1.0, abs(s0))
            vals = [s0, s0 - d, s0 + d]
        options.append(np.clip(vals, lo, hi))
    if product and start.size <= 3:
        grid = np.array(np.meshgrid(*options, indexing="ij")).reshape(start.size, -1).T
    else:
        rows = [start]
        for k, vals in enumerate(options):
            for v in vals[1:]:
                r = start.copy()
                r[k] = v
                rows.append(r)
        grid = np.array(rows)
    return np.unique(grid, axis=0)


#: steps of the background fit from every start before the hopeless starts (NLL more than
#: HOPELESS above the best) are dropped; the others get the remaining steps of 60
_FIRST_STEPS = 8
HOPELESS = 1000.0


#: ``_prepare_model``'s ``key`` when the caller made none: made there
ASK = object()


#: background-only fits of data made in this process, by their inputs (see
#: :func:`_fit_data_background`), the newest last; at most _FITS_KEPT
_FITS: OrderedDict[bytes, tuple[tuple[np.ndarray, ...], list[Any]]] = OrderedDict()
_FITS_KEPT = 32
_FITS_LOCK = threading.Lock()


#: shape attributes that only cache work (the integration cache, the power law's edge logs,
#: the per-edges terms of the compiled Bernstein and power-sum rows)
_SHAPE_CACHES = ("_cache", "_lx", "_edge_terms")


def _fit_key(proto: ScanModel, counts: np.ndarray, start: np.ndarray) -> bytes | None:
    """Everything the background fit's result depends on, as a digest: the shape's class
    and options (its instance state but its caches), the bins, the window, the bounds, the
    counts, the start, and the numpy-or-compiled switch; None when the shape does not
    pickle (then the fit is not kept).

    Only the small parts are pickled; the arrays go into the digest as their raw bytes
    (with dtype and shape).  The caches (``_SHAPE_CACHES``) stay out: pickling the power
    law's edge logarithms cost ~0.1 ms a scan, and they made the key depend on the edges
    last seen.  Every bin
    used (no blinding) is written as the count alone."""
    shape = proto.background
    state = {k: v for k, v in vars(shape).items() if k not in _SHAPE_CACHES}
    used = proto.used
    every_bin = used.size == proto.edges.size - 1  # strictly increasing: then 0..n-1
    try:
        head = pickle.dumps((type(shape).__module__, type(shape).__qualname__, state,
                             proto.window, every_bin, use_compiled()), protocol=4)
    except Exception:  # noqa: BLE001 -- any pickling failure: just fit again
        return None
    return input_digest(head, (proto.edges, None if every_bin else used, proto.lower,
                               proto.upper, proto.bin_scale, counts, start))


def _fit_data_background(proto: ScanModel, counts: np.ndarray, start: np.ndarray
                         ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Background-only fit of the data, robust to poor starting values.

    All starts of :func:`_start_grid` are fitted together (stacked Levenberg-Marquardt); the
    two best are refined by the likelihood core's minimiser (:func:`peaksift.likelihood.minimize`
    on :class:`_BackgroundCost`) and polished again; the lowest minimum is kept.

    A search fits the same function to the same spectrum several times (its order test,
    envelope scan, limits and limits with systematics, each from its own model): the
    result is kept by its inputs (:func:`_fit_key`) and given again (copies; warnings
    raised again), the same bits as fitting anew.
    """
    key = _fit_key(proto, counts, start)
    with _FITS_LOCK:
        hit = _FITS.get(key) if key is not None else None
        if hit is not None:
            _FITS.move_to_end(key)
    if hit is None:
        with warnings.catch_warnings(record=True) as seen:
            warnings.simplefilter("always")
            fitted = _fit_data_background_anew(proto, counts, start)
        hit = (tuple(np.array(a, copy=True) for a in fitted),
               [(w.message, w.category, w.filename, w.lineno) for w in seen])
        if key is not None:
            with _FITS_LOCK:
                _FITS[key] = hit
                while len(_FITS) > _FITS_KEPT:
                    _FITS.popitem(last=False)
    for message, category, filename, lineno in hit[1]:
        warnings.warn_explicit(message, category, filename, lineno)
    th, b, nll = (np.array(a, copy=True) for a in hit[0])
    return th, b, nll


def _fit_data_background_anew(proto: ScanModel, counts: np.ndarray, start: np.ndarray
                              ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    if start.size == 0:
        return fit_background(proto, counts[None, :], start[None, :])
    # numerically integrated shapes cost one integration per start: fewer starts for them
    grid = _start_grid(start, proto.lower, proto.upper,
                       product=bool(getattr(proto.background, "_has_primitive", True)))
    with np.errstate(all="ignore"):
        th_g, b_g, nll_g = fit_background(proto, np.broadcast_to(counts, (len(grid),
                                                                         counts.size)),
                                          grid, steps=_FIRST_STEPS)
        # only starts still within HOPELESS of the best go on: a start far up a wall of the
        # likelihood (a rising power law on a falling spectrum) otherwise takes every one of
        # the 60 steps and made the background fit most of a 100-bin scan's time
        nll_g = np.where(np.isfinite(nll_g), nll_g, np.inf)
        go = np.flatnonzero(nll_g <= np.min(nll_g) + HOPELESS)
        if go.size < min(2, nll_g.size):
            go = np.argsort(nll_g)[:2]
        th2, b2, nll2 = fit_background(proto, np.broadcast_to(counts, (go.size, counts.size)),
                                       th_g[go], steps=60 - _FIRST_STEPS)
        th_g[go], b_g[go], nll_g[go] = th2, b2, nll2
    order = np.argsort(nll_g)
    candidates = [(th_g[i:i + 1], b_g[i:i + 1], nll_g[i:i + 1]) for i in order[:1]]
    cost = _BackgroundCost(proto, counts)
    lower = np.concatenate([[0.0], proto.lower])
    upper = np.concatenate([[np.inf], proto.upper])
    names = ["background_yield"] + [f"theta_{k}" for k in range(proto.theta.size)]
    for rank, i in enumerate(order[:2]):
        if not np.isfinite(nll_g[i]):
            continue
        if rank and _same_minimum(th_g[i], nll_g[i], th_g[order[0]], nll_g[order[0]]):
            continue  # the grid's two best starts ended in one minimum: polish it once
        x0 = np.concatenate([[b_g[i]], th_g[i]])
        try:
            mo = minimize(cost, x0, lower, upper, names)
        except (ArithmeticError, ValueError, np.linalg.LinAlgError):
            continue
        if np.all(np.isfinite(mo.x)):
            candidates.append(fit_background(proto, counts[None, :], mo.x[None, 1:],
                                             steps=200))
    return min(candidates, key=lambda c: float(c[2][0]))


def _same_minimum(th: np.ndarray, nll: float, th0: np.ndarray, nll0: float) -> bool:
    """Whether two background fits ended in the same minimum (NLL within 1e-6, every
    parameter within 1e-6 of its scale)."""
    return bool(abs(nll - nll0) < 1e-6
                and np.all(np.abs(th - th0) <= 1e-6 * np.maximum(np.abs(th0), 1.0)))


class _BackgroundCost:
    """Background-only NLL of one spectrum over (yield, shape parameters), built on the
    likelihood core's Poisson functions, for :func:`peaksift.likelihood.minimize`."""

    errordef = 0.5

    def __init__(self, proto: ScanModel, counts: np.ndarray) -> None:
        self.proto, self.counts = proto, counts

    def value_grad_info(self, x: np.ndarray, info: bool = True):
        b, th = float(x[0]), x[None, 1:]
        with np.errstate(all="ignore"):
            g = bkg_fractions(self.proto, th)[0]
            dmu = np.vstack([g[None, :], b * bkg_gradients(self.proto, th)[0]])
            mu = b * g
            val = float(binned_nll(self.counts, mu, saturated=False))
            return (val, binned_gradient(self.counts, mu, dmu),
                    binned_information(mu, dmu) if info else None)

    def __call__(self, *x: float) -> float:
        v = self.value_grad_info(np.asarray(x, float), info=False)[0]
        return v if np.isfinite(v) else 1e300

    def grad(self, *x: float) -> np.ndarray:
        g = self.value_grad_info(np.asarray(x, float), info=False)[1]
        return np.where(np.isfinite(g), g, 0.0)


def _prepare_model(data: Any, signal: Any, background: Any, masses: Any, *,
                   resolution: Any = None, relative_resolution: Any = None,
                   absolute_resolution: Any = None, window: Any, natural_width: Any,
                   blind: Any, signal_params: Any, bins: Any,
                   background_start: Mapping[str, float] | None = None,
                   signal_model: Any = None, what: str = "scan",
                   background_fit: Callable[..., Any] | None = None,
                   slots: list | None = None, key: Any = ASK
                   ) -> tuple[ScanModel, _Spectrum, dict[str, Any]]:
    """The model, spectrum and plan of a scan (:func:`_prepare_model_anew`), kept by their
    inputs where those are plain values (:func:`.scan_prepared.prepared_key`) and given
    again as :func:`.scan_prepared.handed_out` copies: the same numbers, warnings raised
    again.  The background-only fit is :func:`_fit_data_background`'s, or
    ``background_fit(proto, counts, start) -> (theta (1, K), b (1,), nll (1,))`` (the
    spurious-signal test's nested fits; then nothing is kept).  ``slots``, a list, receives
    the kept entry's slot where the preparation is kept (:func:`.scan_prepared.keep_prepared`).
    ``key``: :func:`.scan_prepared.prepared_key`'s of these inputs where the caller made it
    already (``scan``'s kept call)."""
    if background_fit is not None:
        key = None
    elif key is ASK:
        key = prepared_key(data, signal, background, masses, resolution, relative_resolution,
                           absolute_resolution, window, natural_width, blind, signal_params,
                           bins, background_start, signal_model, what)
    hit = kept_prepared(key, slots)
    if hit is not None:
        return hit
    args = {"resolution": resolution, "relative_resolution": relative_resolution,
            "absolute_resolution": absolute_resolution, "window": window,
            "natural_width": natural_width, "blind": blind, "signal_params": signal_params,
            "bins": bins, "background_start": background_start,
            "signal_model": signal_model, "what": what, "background_fit": background_fit}
    if key is None:
        return _prepare_model_anew(data, signal, background, masses, **args)
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        prepared = _prepare_model_anew(data, signal, background, masses, **args)
    return keep_prepared(key, prepared, seen, slots)


def _prepare_model_anew(data: Any, signal: Any, background: Any, masses: Any, *,
                        resolution: Any, relative_resolution: Any, absolute_resolution: Any,
                        window: Any, natural_width: Any, blind: Any, signal_params: Any,
                        bins: Any, background_start: Mapping[str, float] | None,
                        signal_model: Any, what: str,
                        background_fit: Callable[..., Any] | None
                        ) -> tuple[ScanModel, _Spectrum, dict[str, Any]]:
    """The scan's model, its spectrum and what the scan needs besides (see
    :func:`_prepare_model`)."""
    from .. import shapes
    from ..histogram import MassHistogram, as_spectrum

    data = as_spectrum(data, what=what)  # a MassHistogram or (masses, weights); else FitError

    if signal_model is not None:
        signal, resolution, signal_params = from_signal_model(
            signal_model, signal, resolution, relative_resolution, absolute_resolution,
            signal_params)
    sig = shapes.get(signal)
    bkg = shapes.get(background)
    if sig.kind != "signal":
        raise FitError(f"scan: {sig.name!r} is a {sig.kind} shape; give a signal shape "
                       f"such as 'gaussian'")
    if bkg.kind != "background":
        raise FitError(f"scan: {bkg.name!r} is a {bkg.kind} shape; give a background shape "
                       f"such as 'exponential'")
    resolution = resolution_from(resolution, relative=relative_resolution,
                                 absolute=absolute_resolution)
    sigma_of = resolution.sigma
    m_arr = None if np.ndim(masses) == 0 else np.asarray(masses, float)
    if m_arr is None and (isinstance(masses, (bool, np.bool_))
                          or not isinstance(masses, (int, np.integer))):
        # a lone 200.0 reads as "the mass 200 GeV" as easily as "200 points": refuse it
        # rather than guess (2.5 would silently become 2 points)
        raise FitError(f"{what}: masses={masses!r} is neither a number of points nor a list "
                       f"of masses; give an int (e.g. 200) for that many evenly spaced "
                       f"masses, or a list (e.g. [{_mass_hint(masses)}]) for given masses")

    def min_sigma() -> float:
        if m_arr is not None:
            return float(np.min(sigma_of(m_arr)))
        if window is not None:
            lo, hi = float(window[0]), float(window[1])
        elif isinstance(data, MassHistogram):
            lo, hi = data.lo, data.hi
        else:
            x = data[0]
            if x.size == 0:
                raise FitError(f"{what}: no masses given")
            lo, hi = float(np.min(x)), float(np.max(x))
        pad = 0.05 * (hi - lo)  # the default grid's range
        return float(np.min(sigma_of(np.linspace(lo + pad, hi - pad, 50))))

    spec = _spectrum(data, window, bins, min_sigma)
    plan = window_plan(sig, bkg, spec, masses, m_arr, resolution=resolution,
                       natural_width=natural_width, blind=blind, signal_params=signal_params)
    used = plan.used
    start, lower, upper = _background_start(bkg, spec.window)
    if background_start:
        names = bkg.parameter_names
        for k, v in background_start.items():
            if k in names:
                start[names.index(k)] = float(v)
    counts = spec.counts[used]
    proto = ScanModel(edges=spec.edges, used=used, window=spec.window, counts=counts,
                      background=bkg, theta=start, bkg_yield=float(counts.sum()),
                      lower=lower, upper=upper, masses=plan.open_masses,
                      fractions=plan.open_fractions, bin_scale=spec.bin_scale)
    theta, b, nll0 = (background_fit or _fit_data_background)(proto, counts, start)
    # the prototype with the fit's values (what dataclasses.replace makes, ~10 us sooner)
    model = ScanModel(edges=proto.edges, used=used, window=proto.window, counts=counts,
                      background=bkg, theta=theta[0], bkg_yield=float(b[0]), lower=lower,
                      upper=upper, masses=proto.masses, fractions=proto.fractions,
                      nll_background=float(nll0[0]), bin_scale=proto.bin_scale)
    info = {"signal": sig, "background": bkg, "sigma": plan.sigma, "masses": plan.masses,
            "signal_params": signal_params,
            "blinded_mass": plan.blinded_mass, "window_fractions": plan.window_fractions,
            "blinded_bins": plan.blinded}
    return model, spec, info


def _mass_hint(masses: Any) -> str:
    """``masses`` as it would read inside a list, for the error message."""
    try:
        return f"{float(masses):g}"
    except (TypeError, ValueError):
        return "200.0"
