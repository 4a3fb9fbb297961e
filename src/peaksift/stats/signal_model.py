"""The signal model from simulated samples: shape parameters and efficiency as functions of mass.

Which piece when
----------------
* :class:`SignalSample`   -- one simulated sample at one generated mass: the masses of the
  candidates that passed the search's selection and pairing (with weights), and how many
  events were generated (or the sum of generator weights).
* :func:`signal_model`    -- fits the signal shape at every sample mass
  (:func:`peaksift.fit`, binned, signal alone), fits each shape parameter and the
  efficiency x acceptance with a smooth polynomial of mass, runs the leave-one-out closure
  check, and returns a :class:`SignalModel`.
* :class:`SignalModel`    -- the frozen result (:mod:`.signal_model_result`, importable
  from here too): ``parameters_at(m)``, ``efficiency(m)``, their bands, ``resolution``
  (a :class:`peaksift.Resolution`), ``to_dict``/``from_dict`` (a later search reuses it
  without the samples) and ``plot``.
  :func:`peaksift.scan` and :func:`peaksift.upper_limits` take it as ``signal_model=``.
* :func:`fit_polynomial`  -- the weighted least-squares polynomial with its covariance
  (a pure function).

Conventions
-----------
* The shape's ``mass`` parameter is modelled as the shift ``mass - generated mass``, so at
  a hypothesis ``m`` the peak sits at ``m + shift(m)``: the scan reports generated masses.
* Polynomials are in ``x = (m - centre) / half_range`` of the sample masses.  Their
  coefficient covariance is ``(V^T W V)^-1`` with ``W = 1/error^2``, multiplied by
  ``chi2/ndf`` when that exceeds 1 (the scale factor of the Particle Data Group's averages,
  PDG Review, "Introduction", sec. on averages; common practice), so a polynomial that does
  not describe the points widens its band rather than hiding the disagreement.
* Efficiency errors: unweighted samples get the central 68.27% Clopper--Pearson interval
  (Clopper, Pearson, Biometrika 26 (1934) 404; ``scipy.stats.beta.ppf``), and the
  polynomial uses its half-width; weighted samples the binomial error of a weighted
  efficiency, ``var = [(1-e)^2 sum_pass w^2 + e^2 sum_fail w^2] / W^2`` (common practice).
* Masses outside the sampled range are refused: add a sample rather than extrapolate.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from .._format import chi_square
from ..errors import FitError
from .signal_model_result import SignalModel, _poly_eval, _quantity

__all__ = ["ORDER_TEST_SIZE", "SignalModel", "SignalSample", "fit_polynomial", "signal_model"]

_ONE_SIGMA = 0.682689492137086   # central probability of +-1 sigma
_CLOSURE_FLAG = 3.0              # leave-one-out deviation (in errors) flagged as doubtful
ORDER_TEST_SIZE = 0.05           # raise_order: the next order while chi2's p-value is below
_NO_BACKGROUND = {"background_yield": 0.0, "b1": 0.0}  # a signal-only fit of the core


@dataclass(frozen=True)
class SignalSample:
    """One simulated signal sample after the search's selection and pairing.

    Parameters
    ----------
    mass : float
        The generated (true) mass, GeV.
    masses : array
        Masses of the selected candidates (one per selected event).
    generated : float
        Number of generated events, or the sum of generator weights when ``weights`` given.
    weights : array, optional
        Per-candidate weights (then ``generated`` is the sum of generator weights).
    generated_sq : float, optional
        Sum of squared generator weights over all generated events (weighted samples: needed
        for the efficiency's error; default ``generated``, i.e. unit weights).
    """

    mass: float
    masses: Any
    generated: float
    weights: Any = None
    generated_sq: float | None = None


# ------------------------------------------------------------------ polynomials
def fit_polynomial(x: ArrayLike, y: ArrayLike, err: ArrayLike, order: int, *,
                   scale: bool = True) -> tuple[np.ndarray, np.ndarray, float, int]:
    """Weighted least-squares polynomial ``y = sum_k c_k x^k`` (k = 0..order).

    Returns ``(c, cov, chi2, ndf)``; ``cov = (V^T W V)^-1`` scaled by ``chi2/ndf`` when that
    exceeds 1 and ``scale`` is true (see the module guide).  Points with a non-finite or non-positive error get the
    median of the others (or 1 when none is finite).
    """
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    e = np.asarray(err, float).copy()
    good = np.isfinite(e) & (e > 0)
    e[~good] = float(np.median(e[good])) if good.any() else 1.0
    v = np.vander(x, order + 1, increasing=True)
    w = 1.0 / e**2
    a = (v * w[:, None]).T @ v
    cov = np.linalg.pinv(a)
    c = cov @ ((v * w[:, None]).T @ y)
    chi2 = float(np.sum(w * (y - v @ c) ** 2))
    ndf = int(x.size - order - 1)
    if scale and ndf > 0 and chi2 / ndf > 1.0:
        cov = cov * (chi2 / ndf)
    return c, cov, chi2, ndf


# ------------------------------------------------------------------ efficiency
def _efficiency_point(s: SignalSample) -> tuple[float, float, float, float]:
    """(efficiency, symmetric error, lower, upper) of one sample."""
    from scipy import stats

    gen = float(s.generated)
    if not (math.isfinite(gen) and gen > 0):
        raise FitError(f"signal sample at {s.mass:g} GeV: generated = {s.generated!r}; give "
                       "the number of generated events (or sum of generator weights) > 0")
    if s.weights is None:
        k = float(np.size(s.masses))
        if k > gen:
            raise FitError(f"signal sample at {s.mass:g} GeV: {k:g} selected candidates but "
                           f"only {gen:g} generated events; keep one candidate per event")
        eff = k / gen
        a = 0.5 * (1.0 - _ONE_SIGMA)
        lo = 0.0 if k == 0 else float(stats.beta.ppf(a, k, gen - k + 1))
        hi = 1.0 if k == gen else float(stats.beta.ppf(1 - a, k + 1, gen - k))
        return eff, 0.5 * (hi - lo), lo, hi
    w = np.asarray(s.weights, float)
    pas, pas2 = float(w.sum()), float(np.sum(w * w))
    gen2 = gen if s.generated_sq is None else float(s.generated_sq)
    eff = pas / gen
    fail2 = max(gen2 - pas2, 0.0)
    err = math.sqrt(max((1 - eff) ** 2 * pas2 + eff**2 * fail2, 0.0)) / gen
    return eff, err, eff - err, eff + err


# ------------------------------------------------------------------ the fits per mass
def _sample_fit(s: SignalSample, shape: Any, fixed: Mapping[str, float], bins: int,
                half_width: float) -> dict[str, Any]:
    """Fit the shape to one sample (binned; the core's model with its background at zero
    yield: no background in a simulated signal sample)."""
    from ..fitting import fit
    from ..histogram import MassHistogram

    x = np.asarray(s.masses, float)
    w = None if s.weights is None else np.asarray(s.weights, float)
    if x.size < 20:
        raise FitError(f"signal sample at {s.mass:g} GeV has {x.size} selected candidates; "
                       "at least 20 are needed to fit a shape")
    q16, q50, q84 = np.percentile(x, [15.87, 50.0, 84.13])
    core = max(0.5 * (q84 - q16), 1e-6 * abs(s.mass))
    # no further than the sample's own extremes: far outside them the expected content of
    # a bin underflows and the likelihood's curvature there is meaningless
    window = (max(float(q50 - half_width * core), float(x.min()), 0.0),
              min(float(q50 + half_width * core), float(x.max())))
    hist = MassHistogram.from_masses(x, w, bins=bins, range=window)
    start = {"mass": float(q50), "sigma": float(core)}
    names = shape.parameter_names
    start = {k: v for k, v in start.items() if k in names and k not in fixed}
    res = fit(hist, shape, "exponential", window, start=start,
              fixed={**_NO_BACKGROUND, **fixed})
    return {"result": res, "window": window, "edges": np.asarray(hist.edges, float),
            "counts": np.asarray(hist.weight_sum, float)}


def _param_points(fits: list[dict[str, Any]], masses: np.ndarray, names: Sequence[str]
                  ) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    out = {}
    for n in names:
        val = np.array([f["result"].values[n] for f in fits], float)
        err = np.array([f["result"].errors[n] for f in fits], float)
        if n == "mass":
            val = val - masses
        out[_quantity(n)] = (val, err)
    return out


def signal_model(samples: Sequence[SignalSample], shape: Any = "crystalball", *,
                 order: int | Mapping[str, int] = 1, efficiency_order: int = 2,
                 fixed: Mapping[str, float] | None = None, bins: int = 200,
                 half_width: float = 10.0, raise_order: bool = False) -> SignalModel:
    """Build the signal model from simulated samples at several generated masses.

    Parameters
    ----------
    samples : sequence of SignalSample
        At least ``max(order) + 2`` samples at distinct masses (the leave-one-out closure
        check needs one point more than the polynomial has coefficients).
    shape : str or Shape
        Any signal shape (default the double-sided Crystal Ball, ``"crystalball"``).
    order : int or dict
        Polynomial order of every shape parameter, or per parameter name (``mass_shift``
        for the peak position).
    efficiency_order : int
        Polynomial order of the efficiency x acceptance.
    fixed : dict, optional
        Shape parameters held at a value in every per-mass fit (e.g. a tail the samples
        do not determine); they are constant in the model.
    bins, half_width :
        Each sample is fitted in ``bins`` bins over its median +- ``half_width`` core
        widths (the core width is half the central 68% range of its masses).
    raise_order : bool
        Take ``order`` and ``efficiency_order`` as the lowest orders and raise each
        quantity's order while its polynomial does not describe the points (chi2 p-value
        below ``ORDER_TEST_SIZE``, ``scipy.stats.chi2.sf``), up to ``samples - 2`` (the
        leave-one-out check keeps one point spare): precise samples resolve the curvature
        of a resolution or the turn-on of an efficiency that a low order misses.

    Returns
    -------
    SignalModel
    """
    from scipy import stats

    from .. import shapes

    sig = shapes.get(shape)
    if sig.kind != "signal":
        raise FitError(f"signal_model: {sig.name!r} is a {sig.kind} shape; give a signal shape "
                       "such as 'crystalball'")
    samples = sorted(samples, key=lambda s: float(s.mass))
    masses = np.array([float(s.mass) for s in samples])
    fixed = {k: float(v) for k, v in dict(fixed or {}).items()}
    unknown = set(fixed) - set(sig.parameter_names)
    if unknown:
        raise FitError(f"signal_model fixed: {sig.name!r} has no parameter {min(unknown)!r}; "
                       f"its parameters are {', '.join(sig.parameter_names)}")
    if "mass" in fixed:
        raise FitError("signal_model fixed: the peak position follows the sample's mass; "
                       "it cannot be fixed")
    free = [n for n in sig.parameter_names if n not in fixed]
    keys = [_quantity(n) for n in free]
    orders = {k: int(order.get(k, 1)) if isinstance(order, Mapping) else int(order)
              for k in keys}
    if isinstance(order, Mapping) and set(order) - set(keys):
        raise FitError(f"signal_model order: no free parameter {min(set(order) - set(keys))!r}; "
                       f"they are {', '.join(keys)}")
    need = max([*orders.values(), int(efficiency_order)]) + 2
    if masses.size < need or np.unique(masses).size != masses.size:
        raise FitError(f"signal_model needs at least {need} samples at distinct masses for "
                       f"polynomials of order {need - 2} and the leave-one-out check; got "
                       f"{masses.size} at {', '.join(f'{m:g}' for m in masses)}")
    fits = [_sample_fit(s, sig, fixed, int(bins), float(half_width)) for s in samples]
    points = _param_points(fits, masses, free)
    effs = [_efficiency_point(s) for s in samples]
    points["efficiency"] = (np.array([e[0] for e in effs]), np.array([e[1] for e in effs]))
    orders["efficiency"] = int(efficiency_order)
    centre = 0.5 * (masses[0] + masses[-1])
    half = 0.5 * (masses[-1] - masses[0])
    x = (masses - centre) / half
    polys, closure = {}, {}
    for k, (y, e) in points.items():
        if raise_order:  # the orders taken are in ``polynomials`` (not a doubt)
            orders[k] = _raised_order(x, y, e, orders[k], masses.size - 2)
        c, cov, chi2, ndf = fit_polynomial(x, y, e, orders[k])
        polys[k] = {"order": orders[k], "coefficients": c, "covariance": cov,
                    "chi2": chi2, "ndf": ndf}
        closure[k] = _leave_one_out(x, y, e, orders[k])
    notes = []
    for k, p in polys.items():
        if p["ndf"] > 0 and stats.chi2.sf(p["chi2"], p["ndf"]) < 0.01:
            notes.append(f"{k}: the order-{p['order']} polynomial describes the samples "
                         f"poorly (chi2/ndf = {chi_square(p['chi2'])}/{p['ndf']}); its band is "
                         "widened by sqrt(chi2/ndf)")
    for f, m in zip(fits, masses):
        r = f["result"]
        if not r.valid:
            notes.append(f"shape fit at {m:g} GeV not valid: {'; '.join(r.problems)}")
    worst = max(closure.items(), key=lambda kv: kv[1]["max_deviation"])
    if worst[1]["max_deviation"] > _CLOSURE_FLAG:
        notes.append(f"closure: {worst[0]} at {masses[worst[1]['worst_index']]:g} GeV deviates by "
                     f"{worst[1]['max_deviation']:.2f} errors from its leave-one-out "
                     "interpolation; raise its order or add samples")
    return SignalModel(
        shape=sig.name, sample_masses=masses, fixed=fixed, centre=centre, half_range=half,
        points={k: {"value": v, "error": e} for k, (v, e) in points.items()},
        efficiency_interval=np.array([[e[2], e[3]] for e in effs]),
        polynomials=polys, closure=closure,
        windows=np.array([f["window"] for f in fits]),
        histograms=tuple((f["edges"], f["counts"]) for f in fits),
        fit_values=tuple(dict(f["result"].values) for f in fits),
        fits_valid=np.array([f["result"].valid for f in fits]),
        weighted=any(s.weights is not None for s in samples), notes=tuple(notes))


def _raised_order(x: np.ndarray, y: np.ndarray, e: np.ndarray, order: int, top: int) -> int:
    """The lowest order from ``order`` up to ``top`` whose polynomial describes the points
    (chi2 p-value >= ORDER_TEST_SIZE); ``top`` when none does."""
    from scipy import stats

    while order < top:
        _, _, chi2, ndf = fit_polynomial(x, y, e, order)
        if ndf <= 0 or stats.chi2.sf(chi2, ndf) >= ORDER_TEST_SIZE:
            break
        order += 1
    return order


def _leave_one_out(x: np.ndarray, y: np.ndarray, e: np.ndarray, order: int) -> dict[str, Any]:
    """Leave each point out, refit, compare: (point - interpolation) in units of
    sqrt(error^2 + band^2), the point's fitted error and the interpolation's statistical
    band (the two are independent).  The band is the unscaled one: a polynomial that misses
    the points widens its band with the scale factor, which would hide the miss here."""
    dev = np.full(x.size, np.nan)
    for i in range(x.size):
        keep = np.arange(x.size) != i
        c, cov, _, _ = fit_polynomial(x[keep], y[keep], e[keep], order, scale=False)
        pred, band = _poly_eval(c, cov, x[i:i + 1])
        err = math.hypot(float(e[i]), float(band[0])) if np.isfinite(e[i]) else math.nan
        dev[i] = (y[i] - pred[0]) / err if np.isfinite(err) and err > 0 else np.nan
    k = int(np.nanargmax(np.abs(dev))) if np.isfinite(dev).any() else 0
    return {"deviation": dev, "max_deviation": float(np.nanmax(np.abs(dev)))
            if np.isfinite(dev).any() else math.nan, "worst_index": k}
