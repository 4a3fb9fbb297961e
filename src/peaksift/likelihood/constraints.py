r"""Constraint terms for nuisance parameters and for parameters a user pins by a measurement.

A :class:`Constraint` adds a term to the negative log-likelihood of one parameter:

* ``Constraint.gaussian(center, width)`` -- :math:`\tfrac12 ((\theta - c)/w)^2`: an
  auxiliary measurement :math:`c \pm w` (common practice; e.g. Cowan, Cranmer, Gross,
  Vitells, Eur. Phys. J. C 71 (2011) 1554, sect. 2).
* ``Constraint.lognormal(median, relative)`` -- Gaussian in :math:`\ln\theta`:
  :math:`\tfrac12 ((\ln\theta - \ln c)/\ln(1 + r))^2` for a positive quantity known to a
  relative uncertainty :math:`r` (a luminosity, an efficiency, a width scale); it never lets
  the quantity reach zero (common practice).

Each constraint gives its value, gradient and expected information, so the minimiser adds
them to the Poisson part the same way for every fit, scan and limit.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import FitError

__all__ = ["CONSTRAINT_KINDS", "Constraint"]

#: the kinds a config or an API call may name
CONSTRAINT_KINDS = ("gaussian", "lognormal")


@dataclass(frozen=True)
class Constraint:
    """A constraint term on one parameter (see the module guide for the formulae)."""

    kind: str
    center: float
    width: float

    def __post_init__(self) -> None:
        if self.kind not in CONSTRAINT_KINDS:
            raise FitError(f"unknown constraint kind {self.kind!r}; use one of "
                           f"{', '.join(CONSTRAINT_KINDS)}")
        if not (math.isfinite(self.center) and math.isfinite(self.width) and self.width > 0):
            raise FitError(f"a {self.kind} constraint needs a finite center and a positive "
                           f"width, got ({self.center!r}, {self.width!r})")
        if self.kind == "lognormal" and self.center <= 0:
            raise FitError(f"a lognormal constraint needs a positive median, got {self.center!r}")

    @classmethod
    def gaussian(cls, center: float, width: float) -> Constraint:
        return cls("gaussian", float(center), float(width))

    @classmethod
    def lognormal(cls, median: float, relative: float) -> Constraint:
        return cls("lognormal", float(median), float(relative))

    @classmethod
    def coerce(cls, spec: Any, name: str = "parameter") -> Constraint:
        """A Constraint from itself, a ``(center, width)`` pair (Gaussian) or a mapping
        ``{"kind": ..., "center": ..., "width": ...}``."""
        if isinstance(spec, Constraint):
            return spec
        if isinstance(spec, dict):
            try:
                return cls(str(spec.get("kind", "gaussian")), float(spec["center"]),
                           float(spec["width"]))
            except (KeyError, TypeError, ValueError) as exc:
                raise FitError(f"constraint on {name!r}: give kind, center and width "
                               f"({exc})") from None
        try:
            center, width = spec
            return cls.gaussian(float(center), float(width))
        except (TypeError, ValueError):
            raise FitError(f"constraint on {name!r} must be a Constraint or (center, width), "
                           f"got {spec!r}") from None

    @property
    def _log_width(self) -> float:
        return math.log1p(self.width)

    def nll(self, x: Any) -> np.ndarray:
        x = np.asarray(x, float)
        if self.kind == "gaussian":
            return 0.5 * ((x - self.center) / self.width) ** 2
        with np.errstate(divide="ignore", invalid="ignore"):
            z = (np.log(np.maximum(x, 1e-300)) - math.log(self.center)) / self._log_width
        return 0.5 * z * z

    def gradient(self, x: Any) -> np.ndarray:
        x = np.asarray(x, float)
        if self.kind == "gaussian":
            return (x - self.center) / self.width**2
        xs = np.maximum(x, 1e-300)
        return (np.log(xs) - math.log(self.center)) / (self._log_width**2 * xs)

    def hessian(self, x: Any) -> np.ndarray:
        """Second derivative of the term (exact)."""
        x = np.asarray(x, float)
        if self.kind == "gaussian":
            return np.full_like(x, 1.0 / self.width**2)
        xs = np.maximum(x, 1e-300)
        z = np.log(xs) - math.log(self.center)
        return (1.0 - z) / (self._log_width**2 * xs * xs)

    def information(self, x: Any) -> np.ndarray:
        """Expected information (second derivative of the term at its center's scale)."""
        x = np.asarray(x, float)
        if self.kind == "gaussian":
            return np.full_like(x, 1.0 / self.width**2)
        return 1.0 / (self._log_width**2 * np.maximum(x, 1e-300) ** 2)

    def to_dict(self) -> dict[str, Any]:
        return {"kind": self.kind, "center": self.center, "width": self.width}
