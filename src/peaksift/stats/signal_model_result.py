"""The signal model's frozen result, :class:`SignalModel`: its polynomials evaluated at any
mass inside the sampled range (``value``, ``band``, ``efficiency``, ``sigma``,
``parameters_at``, ``resolution``), ``to_dict``/``from_dict`` and its figures.  Built by
:func:`peaksift.stats.signal_model.signal_model`, whose module guide gives the conventions
(polynomials in ``x = (m - centre) / half_range``, the scale factor of their covariance,
masses outside the samples refused)."""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from .._json import plain
from .._values import FrozenValue
from ..errors import FitError

__all__ = ["SignalModel"]

_RANGE_TOLERANCE = 1e-9          # relative: a mass this close to the range counts as inside


def _quantity(name: str) -> str:
    """The modelled quantity of a shape parameter: the peak position ``mass`` is modelled as
    its shift from the generated mass, ``mass_shift``."""
    return "mass_shift" if name == "mass" else name


def _poly_eval(c: np.ndarray, cov: np.ndarray, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    v = np.vander(np.ravel(x), c.size, increasing=True)
    val = v @ c
    band = np.sqrt(np.maximum(np.einsum("ij,jk,ik->i", v, cov, v), 0.0))
    return val.reshape(np.shape(x)), band.reshape(np.shape(x))



@dataclass(frozen=True, repr=False, eq=False)
class SignalModel(FrozenValue):
    """The signal model derived from simulated samples (a frozen value, see the module guide).

    Attributes
    ----------
    shape : str
        Signal shape name.
    sample_masses : ndarray
        Generated masses of the samples (the valid range of the model).
    fixed : mapping
        Shape parameters held constant.
    points : mapping
        Per modelled quantity (``mass_shift``, the other free shape parameters,
        ``efficiency``): the per-sample ``value`` and ``error``.
    efficiency_interval : ndarray
        ``(n_samples, 2)``: the 68.27% interval of each sample's efficiency.
    polynomials : mapping
        Per quantity: ``order``, ``coefficients`` (in ``x = (m - centre)/half_range``),
        ``covariance``, ``chi2``, ``ndf``.
    closure : mapping
        Per quantity: leave-one-out ``deviation`` per sample (point minus the polynomial
        fitted to the other samples, in units of the point's fitted error combined with the
        interpolation's unscaled band), ``max_deviation``.
    notes : tuple of str
        Fits that were not valid, closure deviations above 3 errors.
    """

    shape: str
    sample_masses: np.ndarray
    fixed: Any
    centre: float
    half_range: float
    points: Any
    efficiency_interval: np.ndarray
    polynomials: Any
    closure: Any
    windows: np.ndarray
    histograms: tuple
    fit_values: tuple
    fits_valid: np.ndarray
    weighted: bool = False
    notes: tuple[str, ...] = ()

    @property
    def quantities(self) -> tuple[str, ...]:
        """The modelled quantities: ``mass_shift``, free shape parameters, ``efficiency``."""
        return tuple(self.polynomials)

    @property
    def max_closure_deviation(self) -> float:
        """The largest leave-one-out deviation over every quantity, in errors."""
        return float(max(c["max_deviation"] for c in self.closure.values()))

    @property
    def doubtful(self) -> bool:
        return bool(self.notes)

    def _x(self, mass: ArrayLike) -> np.ndarray:
        m = np.asarray(mass, float)
        lo, hi = float(self.sample_masses[0]), float(self.sample_masses[-1])
        tol = _RANGE_TOLERANCE * max(abs(lo), abs(hi))
        bad = (m < lo - tol) | (m > hi + tol) | ~np.isfinite(m)
        if np.any(bad):
            raise FitError(f"mass {float(m[bad].ravel()[0]):g} GeV is outside the signal "
                           f"model's samples ({lo:g}-{hi:g} GeV); add a simulated sample "
                           "there or keep the hypotheses inside that range")
        return (m - self.centre) / self.half_range

    def value(self, name: str, mass: ArrayLike) -> Any:
        """One quantity at ``mass``: a shape parameter (``mass`` gives the peak position
        m + shift), ``mass_shift`` or ``efficiency``; fixed parameters are constants."""
        m = np.asarray(mass, float)
        if name in self.fixed:
            x = self._x(m)
            out = np.full(np.shape(x), float(self.fixed[name]))
        else:
            key = _quantity(name)
            if key not in self.polynomials:
                raise FitError(f"the signal model has no {name!r}; it models "
                               f"{', '.join(self.quantities)} (fixed: {', '.join(self.fixed)})")
            p = self.polynomials[key]
            out = _poly_eval(np.asarray(p["coefficients"]), np.asarray(p["covariance"]),
                             self._x(m))[0]
            if name == "mass":
                out = out + m
        return float(out) if np.ndim(out) == 0 else out

    def band(self, name: str, mass: ArrayLike) -> Any:
        """The 1-sigma uncertainty of :meth:`value` from the polynomial's covariance."""
        key = _quantity(name)
        if name in self.fixed:
            out = np.zeros(np.shape(self._x(mass)))
        else:
            p = self.polynomials[key]
            out = _poly_eval(np.asarray(p["coefficients"]), np.asarray(p["covariance"]),
                             self._x(mass))[1]
        return float(out) if np.ndim(out) == 0 else out

    def efficiency(self, mass: ArrayLike) -> Any:
        """Efficiency x acceptance at ``mass`` (the smooth polynomial)."""
        return self.value("efficiency", mass)

    def sigma(self, mass: ArrayLike) -> Any:
        """The shape's ``sigma`` (or ``width``) at ``mass``: the resolution in GeV."""
        shape_names = self.shape_parameter_names
        return self.value("sigma" if "sigma" in shape_names else "width", mass)

    @property
    def shape_parameter_names(self) -> tuple[str, ...]:
        from .. import shapes

        return shapes.get(self.shape).parameter_names

    @property
    def resolution(self) -> Any:
        """The model's sigma(m) as a :class:`peaksift.Resolution`."""
        from ..resolution import Resolution

        return Resolution.function(self.sigma)

    def parameters_at(self, mass: ArrayLike) -> dict[str, Any]:
        """Every shape parameter at ``mass`` (the peak position included)."""
        return {n: self.value(n, mass) for n in self.shape_parameter_names}

    def shape_functions(self) -> dict[str, Any]:
        """Shape parameters other than sigma (which the scan takes from :attr:`resolution`)
        as callables of the hypothesised mass; ``mass`` gives the peak position m + shift."""
        return {n: (lambda m, n=n: self.value(n, m)) for n in self.shape_parameter_names
                if n != "sigma"}

    def __repr__(self) -> str:
        m = self.sample_masses
        return (f"SignalModel({self.shape}, {m.size} samples {m[0]:g}-{m[-1]:g} GeV, "
                f"closure max {self.max_closure_deviation:.2f} errors"
                f"{', doubtful' if self.doubtful else ''})")

    # ------------------------------------------------------------ to and from JSON
    def to_dict(self) -> dict[str, Any]:
        """JSON-ready; :meth:`from_dict` rebuilds an equal model."""
        return plain({
            "shape": self.shape, "sample_masses": self.sample_masses,
            "fixed": dict(self.fixed), "centre": self.centre, "half_range": self.half_range,
            "points": {k: dict(v) for k, v in self.points.items()},
            "efficiency_interval": self.efficiency_interval,
            "polynomials": {k: dict(v) for k, v in self.polynomials.items()},
            "closure": {k: dict(v) for k, v in self.closure.items()},
            "max_closure_deviation": self.max_closure_deviation,
            "windows": self.windows,
            "histograms": [{"edges": e, "counts": c} for e, c in self.histograms],
            "fit_values": [dict(v) for v in self.fit_values], "fits_valid": self.fits_valid,
            "weighted": self.weighted, "notes": list(self.notes), "doubtful": self.doubtful})

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> SignalModel:
        """The model saved by :meth:`to_dict` (e.g. the ``signal_model`` of results.json)."""
        def arr(v: Any) -> np.ndarray:
            return np.array([np.nan if x is None else x for x in np.ravel(v)], float
                            ).reshape(np.shape(v)) if v is not None else np.array([])

        def nested(v: Any) -> np.ndarray:
            return np.array([[np.nan if x is None else x for x in row] for row in v], float)

        try:
            polys = {k: {"order": int(p["order"]), "coefficients": arr(p["coefficients"]),
                         "covariance": nested(p["covariance"]),
                         "chi2": float(p["chi2"]) if p["chi2"] is not None else math.nan,
                         "ndf": int(p["ndf"])} for k, p in d["polynomials"].items()}
            closure = {k: {"deviation": arr(c["deviation"]),
                           "max_deviation": (math.nan if c["max_deviation"] is None
                                             else float(c["max_deviation"])),
                           "worst_index": int(c["worst_index"])}
                       for k, c in d["closure"].items()}
            return cls(
                shape=str(d["shape"]), sample_masses=arr(d["sample_masses"]),
                fixed={k: float(v) for k, v in d["fixed"].items()},
                centre=float(d["centre"]), half_range=float(d["half_range"]),
                points={k: {"value": arr(v["value"]), "error": arr(v["error"])}
                        for k, v in d["points"].items()},
                efficiency_interval=nested(d["efficiency_interval"]),
                polynomials=polys, closure=closure, windows=nested(d["windows"]),
                histograms=tuple((arr(h["edges"]), arr(h["counts"])) for h in d["histograms"]),
                fit_values=tuple({k: (math.nan if x is None else float(x)) for k, x in v.items()}
                                 for v in d["fit_values"]),
                fits_valid=np.array(d["fits_valid"], bool), weighted=bool(d["weighted"]),
                notes=tuple(d["notes"]))
        except (KeyError, TypeError, ValueError) as exc:
            raise FitError(f"not a saved signal model ({type(exc).__name__}: {exc}); give the "
                           "'signal_model' entry of a peaksift results.json") from None

    # ------------------------------------------------------------ figures
    def plot(self, path: Any = None, *, which: str = "parameters", run: Any = None,
             symbol: str = "m") -> Any:
        """The Figure of ``which``: ``"parameters"`` (each quantity against mass: points,
        curve, 1-sigma band) or ``"shapes"`` (each sample's histogram with its fitted shape,
        normalised, overlaid); saved to ``path`` when given.  ``run``: the run label above
        the axes; ``symbol``: the pair's mass symbol (mathtext).  No pyplot: the user's
        matplotlib backend is left alone."""
        from .signal_model_plot import plot_parameters, plot_shapes

        draw = {"parameters": plot_parameters, "shapes": plot_shapes}.get(which)
        if draw is None:
            raise FitError(f"SignalModel.plot: which must be 'parameters' or 'shapes', got "
                           f"{which!r}")
        return draw(self, path, run=run, symbol=symbol)

    def save_figures(self, directory: Any, *, prefix: str = "signal_model", run: Any = None,
                     symbol: str = "m") -> list[Any]:
        """Write ``<prefix>_parameters.png`` and ``<prefix>_shapes.png`` (see :meth:`plot`)
        to ``directory``; returns the paths."""
        from pathlib import Path

        d = Path(directory)
        d.mkdir(parents=True, exist_ok=True)
        paths = [d / f"{prefix}_{w}.png" for w in ("parameters", "shapes")]
        for w, p in zip(("parameters", "shapes"), paths):
            self.plot(p, which=w, run=run, symbol=symbol)
        return paths
