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
import math
import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .._json import plain
from .._values import FrozenValue
from ..blinding import blinded_bins
from ..errors import DataWarning, FitError, PeaksiftError
from ..likelihood import (
    SignalNuisances,
    binned_gradient,
    binned_information,
    binned_nll,
    minimize,
)
from ..resolution import check_resolved, resolution_from
from . import lee
from .bounds import check_fit_bins, check_plan, check_widths
from .shape_profile import profile_with_nuisances, run_nuisance_toy_batch, with_nuisances
from .significance import p_from_q0, z_from_q0
from .toys import ScanModel, bkg_fractions, bkg_gradients, fit_background, profile_signal, run_toys

__all__ = ["ScanResult", "scan"]


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
    edges = np.asarray(hist.edges, float)
    if not (np.all(np.isfinite(weight_sum)) and np.all(weight_sum >= 0)):
        raise FitError("scan: bin contents in the window must be finite and non-negative")
    if weight_sum.sum() <= 0:
        raise FitError(f"scan: the window ({edges[0]:g}, {edges[-1]:g}) is empty")
    scale = 1.0
    bin_scale = None
    if not np.allclose(weight_sum, hist.variances()):
        scale = float(weight_sum.sum() / hist.variances().sum())
        bin_scale = hist.scaled_poisson_factors()
        warnings.warn(
            f"scan: weighted spectrum; significances use scaled-Poisson effective counts "
            f"k_i sum(w) per bin, k_i = sum(w)/sum(w^2) of the bin (overall {scale:.4g}); "
            f"an approximation for unequal weights (exact for equal ones)",
            DataWarning, stacklevel=3)
    return _Spectrum(edges, weight_sum * (1.0 if bin_scale is None else bin_scale), scale,
                     (float(edges[0]), float(edges[-1])), hist.unit, bin_scale)


def _signal_params(shape: Any, window: tuple[float, float], masses: np.ndarray,
                   sigma: np.ndarray, natural_width: Any,
                   signal_params: Mapping[str, float] | None) -> list[Any]:
    names = shape.parameter_names
    given = dict(signal_params or {})
    unknown = set(given) - set(names)
    if unknown:
        raise FitError(f"signal_params: shape {shape.name!r} has no parameter "
                       f"{min(unknown)!r}; its parameters are {', '.join(names)}")
    width = None
    if natural_width is not None:
        if "width" not in names:
            raise FitError(f"natural_width given but signal shape {shape.name!r} has no natural "
                           "width; use 'voigt' (width with resolution) or 'breitwigner'")
        width = (np.asarray(natural_width(masses), float) if callable(natural_width)
                 else np.full(masses.shape, float(natural_width)))
    out: list[Any] = []
    for p in shape.parameters_for(window):
        if callable(given.get(p.name)):  # a function of the hypothesised mass (signal model)
            out.append(np.asarray(given[p.name](masses), float)[:, None])
        elif p.name == "mass":
            out.append(masses[:, None])
        elif p.name == "sigma":
            out.append(sigma[:, None])
        elif p.name == "width":
            if width is None and "sigma" in names:
                raise FitError(f"signal shape {shape.name!r} needs natural_width= (GeV, or a "
                               "callable of mass) for its Breit-Wigner part")
            out.append((sigma if width is None else width)[:, None])
        elif p.name in given:
            out.append(float(given[p.name]))
        else:
            out.append(float(p.start))
    return out


def from_signal_model(signal_model: Any, signal: Any, resolution: Any, relative: Any,
                      absolute: Any, signal_params: Any) -> tuple[Any, Any, dict[str, Any]]:
    """The signal shape, resolution and shape parameters (functions of the hypothesised
    mass) a :class:`~peaksift.stats.signal_model.SignalModel` provides; refuses a second
    source for any of them."""
    from .signal_model import SignalModel

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


def _fit_data_background(proto: ScanModel, counts: np.ndarray, start: np.ndarray
                         ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Background-only fit of the data, robust to poor starting values.

    All starts of :func:`_start_grid` are fitted together (stacked Levenberg-Marquardt); the
    two best are refined by the likelihood core's minimiser (:func:`peaksift.likelihood.minimize`
    on :class:`_BackgroundCost`) and polished again; the lowest minimum is kept.
    """
    if start.size == 0:
        return fit_background(proto, counts[None, :], start[None, :])
    # numerically integrated shapes cost one integration per start: fewer starts for them
    grid = _start_grid(start, proto.lower, proto.upper,
                       product=bool(getattr(proto.background, "_has_primitive", True)))
    with np.errstate(all="ignore"):
        th_g, b_g, nll_g = fit_background(proto, np.broadcast_to(counts, (len(grid),
                                                                         counts.size)),
                                          grid, steps=60)
    nll_g = np.where(np.isfinite(nll_g), nll_g, np.inf)
    order = np.argsort(nll_g)
    candidates = [(th_g[i:i + 1], b_g[i:i + 1], nll_g[i:i + 1]) for i in order[:1]]
    cost = _BackgroundCost(proto, counts)
    lower = np.concatenate([[0.0], proto.lower])
    upper = np.concatenate([[np.inf], proto.upper])
    names = ["background_yield"] + [f"theta_{k}" for k in range(proto.theta.size)]
    for i in order[:2]:
        if not np.isfinite(nll_g[i]):
            continue
        x0 = np.concatenate([[b_g[i]], th_g[i]])
        try:
            mo = minimize(cost, x0, lower, upper, names)
        except (ArithmeticError, ValueError, np.linalg.LinAlgError):
            continue
        if np.all(np.isfinite(mo.x)):
            candidates.append(fit_background(proto, counts[None, :], mo.x[None, 1:],
                                             steps=200))
    return min(candidates, key=lambda c: float(c[2][0]))


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
                   signal_model: Any = None, what: str = "scan"
                   ) -> tuple[ScanModel, _Spectrum, dict[str, Any]]:
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
    lo, hi = spec.window
    if m_arr is None:
        npts = int(masses)
        if npts < 2:
            raise FitError(f"scan needs at least 2 mass points, got {masses!r}")
        check_plan(npts, spec.edges.size - 1)
        pad = 0.05 * (hi - lo)
        m_arr = np.linspace(lo + pad, hi - pad, npts)
    if m_arr.ndim != 1 or m_arr.size == 0 or not np.all(np.isfinite(m_arr)):
        raise FitError("scan masses must be a non-empty 1-d array of finite numbers")
    outside = (m_arr <= lo) | (m_arr >= hi)
    if outside.any():
        raise FitError(f"scan mass {m_arr[outside][0]:g} is outside the window "
                       f"({lo:g}, {hi:g}); scan inside the window")
    check_plan(m_arr.size, spec.edges.size - 1)
    sigma = check_resolved(resolution, m_arr, spec.edges)
    gamma = natural_width(m_arr) if callable(natural_width) else natural_width
    check_widths((lo, hi), float(np.max(sigma)),
                 None if gamma is None else float(np.max(gamma)))
    blinded = blinded_bins(spec.edges, blind)
    used = np.flatnonzero(~blinded)
    try:
        check_fit_bins(used.size, len(bkg.parameters), n_blinded=int(blinded.sum()))
    except FitError as exc:
        raise FitError(f"scan: {exc}") from None
    blinded_mass = np.zeros(m_arr.size, bool)
    if blind is not None:
        blinded_mass = (m_arr >= float(blind[0])) & (m_arr <= float(blind[1]))
    fr_all = np.asarray(sig.bin_fractions(spec.edges, _signal_params(
        sig, spec.window, m_arr, sigma, natural_width, signal_params), spec.window), float)
    fr_all = np.broadcast_to(fr_all, (m_arr.size, spec.edges.size - 1))
    if spec.bin_scale is not None:
        fr_all = fr_all * spec.bin_scale   # expectations in effective counts, bin by bin
    fractions = np.ascontiguousarray(fr_all[:, used])
    start, lower, upper = _background_start(bkg, spec.window)
    if background_start:
        names = bkg.parameter_names
        for k, v in background_start.items():
            if k in names:
                start[names.index(k)] = float(v)
    counts = spec.counts[used]
    proto = ScanModel(edges=spec.edges, used=used, window=spec.window, counts=counts,
                      background=bkg, theta=start, bkg_yield=float(counts.sum()),
                      lower=lower, upper=upper, masses=m_arr[~blinded_mass],
                      fractions=fractions[~blinded_mass], bin_scale=spec.bin_scale)
    theta, b, nll0 = _fit_data_background(proto, counts, start)
    model = ScanModel(edges=spec.edges, used=used, window=spec.window, counts=counts,
                      background=bkg, theta=theta[0], bkg_yield=float(b[0]),
                      lower=lower, upper=upper, masses=m_arr[~blinded_mass],
                      fractions=fractions[~blinded_mass], nll_background=float(nll0[0]),
                      bin_scale=spec.bin_scale)
    info = {"signal": sig, "background": bkg, "sigma": sigma, "masses": m_arr,
            "signal_params": signal_params,
            "blinded_mass": blinded_mass, "window_fractions": np.ascontiguousarray(fr_all),
            "blinded_bins": blinded}
    return model, spec, info


# ------------------------------------------------------------------------ result
@dataclass(frozen=True, repr=False, eq=False)
class ScanResult(FrozenValue):
    """Outcome of :func:`scan` (a frozen value).

    Attributes
    ----------
    masses, sigma : ndarray
        Mass hypotheses and the resolution used at each (GeV).
    q0, z_local, p_local : ndarray
        Discovery statistic, local significance sqrt(q0) and asymptotic local p-value
        1 - Phi(sqrt(q0)); NaN inside a blinded range.
    signal_yield, signal_yield_error, background_yield : ndarray
        Profiled fit at each hypothesis (events; the signal yield may be negative).
    z_expected : ndarray or None
        Median expected local significance of ``expected_signal`` (Asimov), everywhere.
    best_index, best_mass : int, float
        Hypothesis with the largest q0 among the unblinded ones.
    refit : FitResult or None
        Fit at the best mass with mass and width free (None when blinded or if it failed).
    blind : (float, float) or None
        Blinded mass range; ``blinded`` marks the hypotheses inside it.
    weight_scale : float
        Weighted spectra: the overall ``sum w / sum w^2`` of the window, for information
        (1 unweighted).  The likelihood itself scales every bin by its own
        ``k_i = values_i / variances_i`` (scaled Poisson, as :func:`peaksift.fit`; empty bins get
        the overall value); yields are in weighted units.
    """

    masses: np.ndarray
    sigma: np.ndarray
    q0: np.ndarray
    z_local: np.ndarray
    p_local: np.ndarray
    signal_yield: np.ndarray
    signal_yield_error: np.ndarray
    background_yield: np.ndarray
    converged: np.ndarray
    best_index: int
    best_mass: float
    refit: Any
    window: tuple[float, float]
    blind: tuple[float, float] | None
    blinded: np.ndarray
    signal_shape: str
    background_shape: str
    weight_scale: float
    z_expected: np.ndarray | None = None
    notes: tuple[str, ...] = ()
    unit: str = "GeV"
    model: ScanModel | None = field(default=None, compare=False)
    nuisances: dict | None = None
    nuisance_factors: dict | None = None

    @property
    def mass(self) -> np.ndarray:
        """The mass hypotheses under their results.json name (the same array as ``masses``)."""
        return self.masses

    # --------------------------------------------------------------- summary
    @property
    def best(self) -> dict[str, float]:
        i = self.best_index
        return {"mass": float(self.best_mass), "z_local": float(self.z_local[i]),
                "p_local": float(self.p_local[i]), "q0": float(self.q0[i])}

    def __repr__(self) -> str:
        b = self.best
        blind = "" if self.blind is None else f", blinded {self.blind[0]:g}-{self.blind[1]:g}"
        return (f"ScanResult({self.masses.size} masses {self.masses[0]:g}-{self.masses[-1]:g} "
                f"{self.unit}, best {b['mass']:.4g} {self.unit}: Z_local = {b['z_local']:.2f}, "
                f"p_local = {b['p_local']:.3g}{blind})")

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict: the search's ``scan`` keys (``mass``, ``z_local``, ``p_local``,
        ``signal_yield``) as lists, plus errors, q0, sigma, blinding and the best point.
        Blinded entries are ``None``."""
        d = {
            "mass": self.masses, "z_local": self.z_local, "p_local": self.p_local,
            "signal_yield": self.signal_yield, "signal_yield_error": self.signal_yield_error,
            "background_yield": self.background_yield, "q0": self.q0, "sigma": self.sigma,
            "z_expected": self.z_expected, "blind": None if self.blind is None else
            list(self.blind), "blinded": [bool(v) for v in self.blinded],
            "best": self.best, "window": list(self.window), "signal_shape": self.signal_shape,
            "background_shape": self.background_shape, "weight_scale": self.weight_scale,
            "unit": self.unit, "notes": list(self.notes),
            "converged": [bool(v) for v in self.converged], "best_index": int(self.best_index),
            "refit": None if self.refit is None else self.refit.to_dict(),
        }
        if self.nuisances is not None:  # only with signal nuisances: old dicts stay as they were
            d["nuisances"] = self.nuisances
            d["nuisance_factors"] = self.nuisance_factors
        return plain(d)

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> ScanResult:
        """The ScanResult that :meth:`to_dict` wrote (or a results.json ``scan``), without
        the model: no toys or expected curves from it, everything else as it was."""
        from ..fitting.result import FitResult

        def arr(key: str) -> np.ndarray:
            return np.array([np.nan if v is None else v for v in d[key]], float)

        try:
            masses = arr("mass")
            blinded = np.array(d.get("blinded") or [False] * masses.size, bool)
            q0 = arr("q0")
            best = d.get("best_index")
            if best is None:
                best = int(np.nanargmax(np.where(blinded, -np.inf, np.nan_to_num(q0, nan=-1))))
            blind = d.get("blind")
            ze = d.get("z_expected")
            return cls(
                masses=masses, sigma=arr("sigma"), q0=q0, z_local=arr("z_local"),
                p_local=arr("p_local"), signal_yield=arr("signal_yield"),
                signal_yield_error=arr("signal_yield_error"),
                background_yield=arr("background_yield"),
                converged=np.array(d.get("converged") or [True] * masses.size, bool),
                best_index=int(best), best_mass=float(masses[int(best)]),
                refit=None if not d.get("refit") else FitResult.from_dict(d["refit"]),
                window=tuple(float(v) for v in d["window"]),
                blind=None if blind is None else (float(blind[0]), float(blind[1])),
                blinded=blinded, signal_shape=str(d["signal_shape"]),
                background_shape=str(d["background_shape"]),
                weight_scale=float(d.get("weight_scale") or 1.0),
                z_expected=None if ze is None else arr("z_expected"),
                notes=tuple(d.get("notes") or ()), unit=str(d.get("unit", "GeV")))
        except (KeyError, TypeError, ValueError, IndexError) as exc:
            raise FitError(f"not a scan result written by ScanResult.to_dict: {exc!r}") from None

    def _repr_html_(self) -> str:
        import html

        b = self.best
        rows = "".join(f"<tr><td>{html.escape(k)}</td><td>{html.escape(v)}</td></tr>" for k, v in (
            ("masses", (f"{self.masses.size}, {self.masses[0]:.2f}-{self.masses[-1]:.2f} "
                       f"{self.unit}")),
            ("model", f"{self.signal_shape} + {self.background_shape}"),
            ("best mass", f"{b['mass']:.2f} {self.unit}"),
            ("Z local", f"{b['z_local']:.2f} (p = {b['p_local']:.3g})"),
            ("blinded", "no" if self.blind is None else
             f"{self.blind[0]:g}-{self.blind[1]:g} {self.unit}")))
        return (f"<div><b>ScanResult</b> (a local significance is not a discovery; see "
                f"global_significance)<table>{rows}</table></div>")

    # ------------------------------------------------------ look-elsewhere
    def toy_scans(self, toys: int, *, seed: int = 0, workers: int | None = None,
                  progress: bool | None = None, executor: Any = None) -> np.ndarray:
        """q0 scans of ``toys`` background-only pseudo-experiments, ``(toys, n_unblinded)``."""
        if self.model is None:
            raise FitError("this ScanResult carries no model (rebuilt from a dict?); rerun scan")
        if self.model.masses.size == 0:
            raise FitError("every mass hypothesis of this scan is blinded; there is no "
                           "observed excess to assess (unblind, or scan outside the blind range)")
        unit = (run_nuisance_toy_batch if "signal_nuisances" in self.model.extras else None)
        return run_toys(self.model, toys, seed=seed, workers=workers, progress=progress,
                        executor=executor, batch_function=unit)

    def global_significance(self, method: str = "upcrossings", *, toys: int | None = None,
                            seed: int = 0, u0: float = 0.5, workers: int | None = None,
                            progress: bool | None = None, executor: Any = None
                            ) -> dict[str, Any]:
        """Global significance of the best excess (look-elsewhere effect in the scan range).

        Parameters
        ----------
        method : "upcrossings" or "toys"
            ``"toys"``: p_global is the fraction of background-only toys whose largest q0
            reaches the observed one (binomial error).  ``"upcrossings"``: Gross and Vitells,
            EPJC 70 (2010) 525, ``p_global = p_local + N0 exp(-(q0 - u0)/2)`` with the mean
            number of upcrossings N0 of the level ``u0`` estimated from toys.
        toys : int, optional
            Number of toys (default 1000 for ``"toys"``, 200 for ``"upcrossings"``; 0 with
            upcrossings counts N0 on the observed scan instead, stated in ``n0_source``).
        seed, workers, progress, executor :
            Passed to :func:`peaksift.stats.toys.run_toys` (``executor``: e.g.
            :func:`peaksift.execution.map_tasks` bound to an engine).

        Returns
        -------
        dict with ``mass``, ``z_local``, ``p_local``, ``z_global``, ``p_global``,
        ``global_method``, ``p_global_error``, ``n_toys`` (toys used), ``n_failed_toys``
        (toys left out because a fit failed, NaN q0) and, for upcrossings, ``u0``, ``N0``,
        ``N0_error``, ``n0_source``, ``p_global_capped`` (then ``p_global_error`` is None);
        for toys ``n_toys_above``, ``z_global_is_lower_bound``.

        Notes
        -----
        With a blinded range the unblinded hypotheses form separate contiguous segments;
        upcrossings are counted within each segment and summed (a pair of hypotheses on
        the two sides of the blinded range is not an upcrossing).
        """
        if method not in ("upcrossings", "toys"):
            raise FitError(f"global_significance method must be 'upcrossings' or 'toys', "
                           f"got {method!r}")
        q_obs = float(self.q0[self.best_index])
        mask = ~self.blinded
        # a blinded range splits the unblinded hypotheses into contiguous segments: no
        # upcrossing is counted across it (the two sides are not neighbours in mass)
        gaps = np.diff(np.flatnonzero(mask)) > 1
        if method == "toys":
            n = 1000 if toys is None else int(toys)
            scans = self.toy_scans(n, seed=seed, workers=workers, progress=progress,
                                       executor=executor)
            res = lee.global_from_toys(q_obs, scans.max(axis=1))
        else:
            n = 200 if toys is None else int(toys)
            if n > 0:
                scans = self.toy_scans(n, seed=seed, workers=workers, progress=progress,
                                       executor=executor)
                res = lee.global_from_upcrossings(q_obs, scans, u0=u0, gaps=gaps)
            else:
                res = lee.global_from_upcrossings(q_obs, self.q0[mask][None, :], u0=u0,
                                                  source="observed scan", gaps=gaps)
        out = {"mass": float(self.best_mass), "z_local": float(self.z_local[self.best_index]),
               "p_local": float(self.p_local[self.best_index])}
        out.update(res)
        return plain(out)

    def expected_z(self, signal_yield: float) -> np.ndarray:
        """Median expected local significance of a signal of ``signal_yield`` events at every
        mass hypothesis (Asimov data: the background-only fit plus that signal; Cowan et al.,
        EPJC 71 (2011) 1554, sec. 3.1), in the bins the scan used.  NaN where blinded.
        Needs the scan's model (not kept by :meth:`from_dict`)."""
        if self.model is None:
            raise FitError("this ScanResult carries no model (rebuilt from a dict?); rerun "
                           "scan with expected_signal= instead")
        m = self.model
        out = np.full(self.masses.size, np.nan)
        if m.masses.size == 0:
            return out
        s = np.full(m.masses.size, float(signal_yield))
        asimov = np.broadcast_to(m.expected_background, m.fractions.shape) + \
            s[:, None] * m.fractions
        th = np.repeat(m.theta[None, :], m.masses.size, axis=0)
        _, _, nll0 = fit_background(m, asimov, th)
        r = profile_signal(m, asimov, m.fractions, s_start=s, theta_start=th,
                           b_start=np.full(m.masses.size, m.bkg_yield))
        q = np.where(r["s"] > 0, np.maximum(2.0 * (nll0 - r["nll"]), 0.0), 0.0)
        out[~self.blinded] = np.sqrt(q)
        return out

    # ------------------------------------------------------------------ plot
    def plot(self, path: Any = None, *, ax: Any = None, fig: Any = None,
             title: str | None = None, global_result: Mapping[str, Any] | None = None,
             run: Any = None, symbol: str | None = None,
             expected: tuple[np.ndarray, str] | None = None) -> Any:
        """Local p-value against mass (log scale) with the whole-sigma levels (1 to 5) that
        fall in the axis range and the best hypothesis marked.

        Blinded hypotheses are not drawn (the range is hatched).  The expected p-value is
        drawn dashed: ``expected = (z_expected, label)`` when given, else the scan's own
        ``z_expected``.  ``global_result`` (from :meth:`global_significance`) is noted above
        the axes; ``run`` (a :class:`peaksift._style.RunLabel`) labels the run; ``symbol``
        is the mass symbol (mathtext).  Draws on ``ax`` or an empty ``fig`` when given, on
        a new Figure (made without pyplot) otherwise; saves to ``path``; returns the Figure.
        """
        from .._format import fixed
        from .._style import COLORS, draw_header, figure_style, new_figure, shade_blinded

        with figure_style():
            if ax is None:
                if fig is None:
                    fig, ax = new_figure((7.0, 4.6))
                else:
                    ax = fig.subplots()
            fig = ax.figure
            m = self.masses
            p = np.where(self.blinded, np.nan, np.maximum(self.p_local, 1e-300))
            ax.plot(m, p, color=COLORS["observed"], label="observed")
            pmin = float(np.nanmin(p)) if np.any(np.isfinite(p)) else 0.1
            if expected is None and self.z_expected is not None:
                expected = (self.z_expected, "expected for the signal hypothesis")
            if expected is not None:
                ze = np.asarray(expected[0], float)
                pe = np.maximum(p_from_q0(np.nan_to_num(ze) ** 2), 1e-300)
                pe = np.where(np.isfinite(ze), pe, np.nan)
                ax.plot(m, pe, ls="--", color=COLORS["expected"], label=expected[1])
                if np.any(np.isfinite(pe)):  # a strong expected curve may leave the axis
                    pmin = min(pmin, max(float(np.nanmin(pe)), float(p_from_q0(25.0))))
            # the axis reaches the whole-sigma level just below the lowest curve point
            z_low = min(max(math.ceil(_z_of_p(pmin) + 1e-9), 2), 8)
            lowest = max(float(p_from_q0(float(z_low * z_low))) * 0.4, float(p_from_q0(64.0)))
            ax.set_yscale("log")
            ax.set_ylim(lowest, 1.0)
            ax.set_xlim(m[0], m[-1])
            for k in range(1, 6):
                pk = float(p_from_q0(float(k * k)))
                if pk < lowest:
                    break
                ax.axhline(pk, color=COLORS["accent"], lw=0.8, ls=":", zorder=1)
                ax.text(1.0, pk, f" {k}$\\sigma$", va="center", ha="left",
                        color=COLORS["accent"], fontsize=9, clip_on=False,
                        transform=ax.get_yaxis_transform())
            if np.any(np.isfinite(p)):
                i = self.best_index
                pb = max(float(p[i]), lowest)
                ax.plot([m[i]], [pb], marker="o", ms=6, mfc="white", mec=COLORS["signal"],
                        mew=1.5, ls="none", zorder=5,
                        label=f"best: {fixed(m[i])} {self.unit}, $Z_{{local}}$ = "
                              f"{fixed(self.z_local[i])}")
            shade_blinded(ax, self.blind)
            ax.set_xlabel(f"${symbol or 'm'}$ hypothesis [{self.unit}]")
            ax.set_ylabel("local p-value")
            note = title or ""
            if global_result is not None and global_result.get("z_global") is not None:
                note = (f"best {fixed(global_result['mass'])} {self.unit}:  "
                        f"$Z_{{local}}$ = {fixed(global_result['z_local'])},  "
                        f"$Z_{{global}}$ = {fixed(global_result['z_global'])} "
                        f"({global_result['global_method']})")
            ax.legend(loc="lower left")
            draw_header(ax, run, note)
            if path is not None:
                fig.savefig(path)
        return fig


def _z_of_p(p: float) -> float:
    """Z of a one-sided p-value (1 - Phi(Z) = p), for the axis range."""
    from scipy.special import ndtri

    return float(-ndtri(min(max(p, 1e-300), 0.5)))


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
        every toy of :meth:`ScanResult.global_significance` (:mod:`.shape_profile`).  Every
        size 0 (or None): exactly the scan without them.
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
    model, spec, info = _prepare_model(
        data, signal, background, masses, resolution=resolution,
        relative_resolution=relative_resolution, absolute_resolution=absolute_resolution,
        window=window,
        natural_width=natural_width, blind=blind, signal_params=signal_params, bins=bins,
        signal_model=signal_model)
    return scan_prepared(data, model, spec, info, blind=blind, expected_signal=expected_signal,
                         natural_width=natural_width, refit=refit, nuisances=nuisances,
                         nuisance_toys=nuisance_toys)


def scan_prepared(data: Any, model: ScanModel, spec: _Spectrum, info: dict[str, Any], *,
                  blind: Any, expected_signal: Any, natural_width: Any,
                  refit: bool, nuisances: Any = None,
                  nuisance_toys: str = "fixed") -> ScanResult:
    """The scan of a model prepared by :func:`_prepare_model` (the channels of a
    combination prepare theirs once and scan them here, as :func:`scan` does)."""
    signal_params = info["signal_params"]
    m_all = info["masses"]
    bl = info["blinded_mass"]
    nm = m_all.size
    notes: list[str] = []
    nuis = _nuisances(nuisances, nuisance_toys)
    factors = {name: np.full(nm, np.nan) for name in nuis.shape_active}
    arr = {k: np.full(nm, np.nan) for k in ("q0", "s", "se", "b")}
    conv = np.zeros(nm, bool)
    if model.masses.size:
        mb = model.masses.size
        r = profile_signal(model, model.counts, model.fractions,
                           theta_start=np.repeat(model.theta[None, :], mb, axis=0),
                           b_start=np.full(mb, model.bkg_yield), steps=100)
        q0 = np.where(r["s"] > 0, np.maximum(2.0 * (model.nll_background - r["nll"]), 0.0), 0.0)
        arr["q0"][~bl] = q0
        # yields are in weighted units already (the per-bin k_i sits in the expectations)
        arr["s"][~bl] = r["s"]
        arr["se"][~bl] = r["s_error"]
        arr["b"][~bl] = r["b"]
        conv[~bl] = r["converged"]
        if nuis.shape_active:
            base = _signal_params(info["signal"], spec.window, model.masses, info["sigma"][~bl],
                                  natural_width, signal_params)
            rn = profile_with_nuisances(model, model.counts, info["signal"], base, nuis,
                                        start=r)
            better = rn["nll"] <= r["nll"]  # started at r's minimum: never worse, to rounding
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
        if not r["converged"].all():
            notes.append(f"{int((~r['converged']).sum())} hypotheses did not converge")
    else:
        notes.append("every mass hypothesis is blinded")
    z = np.where(bl, np.nan, z_from_q0(np.nan_to_num(arr["q0"])))
    p = np.where(bl, np.nan, p_from_q0(np.nan_to_num(arr["q0"])))
    qsel = np.where(bl, -np.inf, np.nan_to_num(arr["q0"], nan=-np.inf))
    best = int(np.argmax(qsel)) if np.isfinite(qsel).any() else 0
    z_exp = None
    if expected_signal is not None:
        z_exp = _expected_z(model, info, spec, expected_signal)
    fit_result = None
    if refit and blind is None and model.masses.size:
        fit_result = _refit(data, info, spec, best, signal_params, natural_width, notes)
    elif refit and blind is not None:
        notes.append("no free refit while blinded")
    return ScanResult(
        masses=m_all, sigma=info["sigma"], q0=arr["q0"], z_local=z, p_local=p,
        signal_yield=arr["s"], signal_yield_error=arr["se"], background_yield=arr["b"],
        converged=conv, best_index=best, best_mass=float(m_all[best]), refit=fit_result,
        window=spec.window, blind=None if blind is None else (float(blind[0]), float(blind[1])),
        blinded=bl, signal_shape=info["signal"].name, background_shape=info["background"].name,
        weight_scale=spec.scale, z_expected=z_exp, notes=tuple(notes), unit=spec.unit,
        model=model, nuisances=None if nuis.none else nuis.to_dict(),
        nuisance_factors=factors or None)


def _nuisances(spec: Any, toys: str) -> SignalNuisances:
    if toys not in ("fixed", "sampled"):
        raise FitError(f"nuisance_toys must be 'fixed' or 'sampled', got {toys!r}")
    if spec is None:
        return SignalNuisances()
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
