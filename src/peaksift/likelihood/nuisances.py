r"""Nuisance parameters of the signal model: its mass scale, its resolution, its yield.

What is here
------------
:class:`SignalNuisances` declares the four nuisance parameters every hypothesis test of a
signal profiles, each a multiplicative factor :math:`k` with its own constraint term
(:class:`~peaksift.likelihood.constraints.Constraint`, centred on 1):

* ``mass_scale``      -- the peak sits at :math:`m\,k_m` (a relative shift of the position);
* ``mass_resolution`` -- the signal width is :math:`\sigma(m)\,k_r` (a relative change of the
  resolution; the natural width of shapes without a resolution parameter);
* ``luminosity``, ``efficiency`` -- the expected signal yield is
  :math:`\sigma\times B\;L\,k_L\;\epsilon\,k_\epsilon`; with the signal yield itself as the
  parameter of interest they are degenerate with it and drop out (they matter for limits on
  sigma x B, :func:`peaksift.stats.upper_limits`).

A size 0 removes the nuisance: it is not a parameter at all, so with every size 0 every
number is today's, bit for bit.  Sizes are relative (0.01 = 1%).  ``"gaussian"``:
:math:`\tfrac12((k-1)/\delta)^2`; ``"lognormal"``: :math:`\tfrac12(\ln k/\ln(1+\delta))^2`
(common practice; Cowan, Cranmer, Gross, Vitells, EPJC 71 (2011) 1554, sect. 2).

The stacked terms here (:meth:`SignalNuisances.constraint_terms`, :meth:`signal_parameters`)
are what every user of the core adds: the scan's and the toys' profiles
(:mod:`peaksift.stats.shape_profile`), the envelope, the limits.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import FitError
from .constraints import CONSTRAINT_KINDS, Constraint

__all__ = ["NUISANCE_NAMES", "SHAPE_NUISANCES", "YIELD_NUISANCES", "SignalNuisances"]

SHAPE_NUISANCES = ("mass_scale", "mass_resolution")
YIELD_NUISANCES = ("luminosity", "efficiency")
#: every signal nuisance, in the order parameters are laid out
NUISANCE_NAMES = SHAPE_NUISANCES + YIELD_NUISANCES

#: a Gaussian factor is kept within this many standard deviations (and positive)
_RANGE = 6.0


@dataclass(frozen=True)
class SignalNuisances:
    """Sizes (relative) and constraint kinds of the signal's nuisance parameters.

    Parameters
    ----------
    mass_scale, mass_resolution, luminosity, efficiency : float
        Relative sizes (>= 0; 0 = no such nuisance parameter).
    kinds : tuple of (name, kind) pairs
        Constraint kind per nuisance, ``"gaussian"`` (default) or ``"lognormal"``; build
        with :meth:`make` from a mapping.
    """

    mass_scale: float = 0.0
    mass_resolution: float = 0.0
    luminosity: float = 0.0
    efficiency: float = 0.0
    kinds: tuple[tuple[str, str], ...] = ()

    def __post_init__(self) -> None:
        for name in NUISANCE_NAMES:
            v = getattr(self, name)
            if not (isinstance(v, (int, float)) and math.isfinite(v) and 0 <= v < 1):
                raise FitError(f"signal nuisance {name} must be a relative size in [0, 1), "
                               f"got {v!r} (0.01 means 1%)")
        for name, kind in self.kinds:
            if name not in NUISANCE_NAMES:
                raise FitError(f"unknown signal nuisance {name!r}; use one of "
                               f"{', '.join(NUISANCE_NAMES)}")
            if kind not in CONSTRAINT_KINDS:
                raise FitError(f"constraint kind of {name} must be one of "
                               f"{', '.join(CONSTRAINT_KINDS)}, got {kind!r}")

    @classmethod
    def make(cls, sizes: Mapping[str, float] | None = None,
             kinds: Mapping[str, str] | None = None) -> SignalNuisances:
        """From mappings ``{"mass_scale": 0.01, ...}`` and ``{"mass_scale": "lognormal"}``."""
        sizes = dict(sizes or {})
        unknown = set(sizes) - set(NUISANCE_NAMES)
        if unknown:
            raise FitError(f"unknown signal nuisance {min(unknown)!r}; use one of "
                           f"{', '.join(NUISANCE_NAMES)}")
        # the default kind is left out, so that equal settings are equal values
        return cls(**{k: float(v) for k, v in sizes.items()},
                   kinds=tuple(sorted((k, v) for k, v in (kinds or {}).items()
                                      if v != "gaussian")))

    # ---------------------------------------------------------------- layout
    def kind(self, name: str) -> str:
        return dict(self.kinds).get(name, "gaussian")

    @property
    def active(self) -> tuple[str, ...]:
        """Names of the nuisances that exist (size > 0), in :data:`NUISANCE_NAMES` order."""
        return tuple(n for n in NUISANCE_NAMES if getattr(self, n) > 0)

    @property
    def shape_active(self) -> tuple[str, ...]:
        """The active nuisances that move or widen the signal shape."""
        return tuple(n for n in SHAPE_NUISANCES if getattr(self, n) > 0)

    @property
    def none(self) -> bool:
        return not self.active

    def constraint(self, name: str) -> Constraint:
        size = getattr(self, name)
        if not size > 0:
            raise FitError(f"signal nuisance {name} has size 0: it is not a parameter")
        kind = self.kind(name)
        return (Constraint.lognormal(1.0, size) if kind == "lognormal"
                else Constraint.gaussian(1.0, size))

    def bounds(self, name: str) -> tuple[float, float]:
        """Range of the factor: +- 6 standard deviations (log-normal: in ln k), positive."""
        size = getattr(self, name)
        if self.kind(name) == "lognormal":
            w = math.log1p(size)
            return math.exp(-_RANGE * w), math.exp(_RANGE * w)
        return max(1.0 - _RANGE * size, 1e-3), 1.0 + _RANGE * size

    # ---------------------------------------------------------- stacked terms
    def constraint_terms(self, names: Sequence[str], k: Any, centers: Any = None
                         ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Sum of the constraint terms of ``names`` at factors ``k (..., J)``, their gradient
        ``(..., J)`` and (diagonal) second derivatives ``(..., J)``.

        ``centers (..., J)`` moves each constraint's centre (its auxiliary measurement; the
        toys of an unconditional ensemble draw it, :meth:`sample_centers`); default 1.
        A log-normal centre c enters as ``ln(k/c)``, a Gaussian one as ``k - c``."""
        k = np.asarray(k, float)
        c = np.ones_like(k) if centers is None else np.broadcast_to(np.asarray(centers, float),
                                                                     k.shape)
        val = np.zeros(k.shape[:-1])
        grad = np.zeros_like(k)
        hess = np.zeros_like(k)
        for j, name in enumerate(names):
            con = self.constraint(name)
            if con.kind == "lognormal":  # the term depends on k/c only: rescale
                kc = k[..., j] / c[..., j]
                val = val + con.nll(kc)
                grad[..., j] = con.gradient(kc) / c[..., j]
                hess[..., j] = con.hessian(kc) / c[..., j] ** 2
            else:
                kk = k[..., j] - c[..., j] + 1.0
                val = val + con.nll(kk)
                grad[..., j] = con.gradient(kk)
                hess[..., j] = con.hessian(kk)
        return val, grad, hess

    def sample_centers(self, names: Sequence[str], rng: np.random.Generator,
                       count: int) -> np.ndarray:
        """Auxiliary measurements drawn from the constraints, ``(count, J)`` (unconditional
        toy ensembles: the centre of each constraint fluctuates like a measurement)."""
        out = np.ones((count, len(names)))
        for j, name in enumerate(names):
            size = getattr(self, name)
            z = rng.standard_normal(count)
            out[:, j] = (np.exp(z * math.log1p(size)) if self.kind(name) == "lognormal"
                         else 1.0 + z * size)
        return out

    @staticmethod
    def signal_parameters(parameter_names: Sequence[str], params: Sequence[Any],
                          names: Sequence[str], k: Any) -> list[Any]:
        """Signal shape parameters with the shape nuisances applied: ``mass`` times
        ``k[mass_scale]``; ``sigma`` (else ``width``) times ``k[mass_resolution]``.

        ``params`` are the shape's values in ``parameter_names`` order (arrays broadcast
        over hypotheses, e.g. ``(B, 1)``); ``k (B, J)`` the factors of ``names``."""
        k = np.asarray(k, float)
        out = list(params)
        target = {"mass_scale": "mass",
                  "mass_resolution": "sigma" if "sigma" in parameter_names else "width"}
        for j, name in enumerate(names):
            if name not in target:
                continue
            if target[name] not in parameter_names:
                raise FitError(f"signal nuisance {name} needs a signal shape with a "
                               f"{target[name]!r} parameter")
            i = list(parameter_names).index(target[name])
            out[i] = np.asarray(out[i], float) * k[:, j : j + 1]
        return out

    def mass_interval(self, value: float, error_minus: float, error_plus: float
                      ) -> tuple[float, float]:
        r"""The errors of a fitted peak position with the mass scale profiled.

        A fit measures the position :math:`m = M\,k_m` of a peak of true mass :math:`M`.
        Its profile NLL in :math:`m` is taken as the two-sided parabola
        :math:`P(m) = \tfrac12((m - \hat m)/e_\pm)^2` of the fit's interval (``error_minus``
        below, ``error_plus`` above); with the mass scale's constraint :math:`C(k)` the
        profile in :math:`M` is :math:`\min_k[P(Mk) + C(k)]`, and the errors are where it
        rises by 1/2.  For a Gaussian constraint this is :math:`\sqrt{e^2 + (\hat m\delta)^2}`
        to first order (the errors of :math:`m/k` added in quadrature).  Without a mass
        scale the errors come back unchanged.  Returns ``(error_minus, error_plus)``.
        """
        from ..shapes.roots import bounded_minimum, brentq  # scipy's, without its import

        em, ep = float(error_minus), float(error_plus)
        if not self.mass_scale > 0:
            return em, ep
        if not (math.isfinite(value) and em > 0 and ep > 0):
            raise FitError(f"mass_interval needs a finite value and positive errors, got "
                           f"{value!r} -{error_minus!r} +{error_plus!r}")
        con = self.constraint("mass_scale")
        lo_k, hi_k = self.bounds("mass_scale")

        def profile(mass: float) -> float:
            def f(k: float) -> float:
                d = mass * k - value
                return 0.5 * (d / (ep if d > 0 else em)) ** 2 + float(con.nll(k))

            return bounded_minimum(f, lo_k, hi_k, xatol=1e-10)[1]

        reach = 10.0 * (max(em, ep) + abs(value) * self.mass_scale)
        lower = brentq(lambda m: profile(m) - 0.5, value - reach, value, xtol=1e-9)
        upper = brentq(lambda m: profile(m) - 0.5, value, value + reach, xtol=1e-9)
        return value - lower, upper - value

    def yield_uncertainty(self) -> tuple[float, float]:
        """The luminosity and efficiency sizes (for the limits' normalisation nuisance)."""
        return float(self.luminosity), float(self.efficiency)

    def to_dict(self) -> dict[str, Any]:
        return {n: {"size": float(getattr(self, n)), "kind": self.kind(n)}
                for n in NUISANCE_NAMES}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> SignalNuisances:
        return cls.make({n: v["size"] for n, v in d.items()},
                        {n: v["kind"] for n, v in d.items()})
