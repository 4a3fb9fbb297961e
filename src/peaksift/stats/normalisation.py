"""From a limit on signal events to one on sigma x B: the luminosity, the efficiency and their
relative uncertainties (the conversion, its checks, and what it assumed).

The ranges are the configuration's (:data:`peaksift._vocabulary.NORMALISATION_RANGES`,
declared once for both), so a call refuses what a config file would.  The module guide of
:mod:`peaksift.stats.limits` gives the constraint's formulae.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from .._vocabulary import NORMALISATION_RANGES
from ..errors import FitError

__all__ = ["check_normalisation", "normalisation"]


def check_normalisation(**values: Any) -> None:
    """Refuse a luminosity, efficiency or relative uncertainty outside the range the
    configuration allows (:data:`peaksift._vocabulary.NORMALISATION_RANGES`, declared once
    for both); None (not given) and an efficiency as a function of mass pass."""
    for name, v in values.items():
        if v is None or (name == "efficiency" and callable(v)):
            continue
        lo, hi, lo_open = NORMALISATION_RANGES[name]
        ok = (isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, bool)
              and math.isfinite(v) and (v > lo if lo_open else v >= lo)
              and (hi is None or v <= hi))
        if not ok:
            rng = f"{'>' if lo_open else '>='} {lo:g}" + ("" if hi is None else f" and <= {hi:g}")
            hint = ("; it is relative: 0.02 for 2 %" if name.endswith("_uncertainty") else
                    "; efficiency x acceptance, 0.55 for 55 %" if name == "efficiency" else "")
            raise FitError(f"{name} must be a number {rng}, got {v!r}{hint}")


def normalisation(masses: np.ndarray, *, luminosity: float | None, efficiency: Any,
                  unit: str, luminosity_uncertainty: float, efficiency_uncertainty: float,
                  constraint: str
                  ) -> tuple[np.ndarray, str, float, str | None, np.ndarray | None]:
    """Events per unit of the parameter of interest at each mass, the limit's unit, the
    combined relative normalisation uncertainty and its constraint kind (see the guide of
    :mod:`peaksift.stats.limits`), and the efficiencies used (None without a luminosity)."""
    nm = masses.size
    if luminosity is None:
        if luminosity_uncertainty or efficiency_uncertainty:
            raise FitError("luminosity/efficiency uncertainties need luminosity=...")
        return np.ones(nm), "events", 0.0, None, None
    if not luminosity > 0:
        raise FitError(f"luminosity must be > 0, got {luminosity!r}")
    eff = (np.asarray(efficiency(masses), float) if callable(efficiency)
           else np.full(nm, float(efficiency)))
    if np.any(~np.isfinite(eff) | (eff <= 0)):
        raise FitError("signal efficiency must be > 0 at every scan mass")
    if constraint == "lognormal":
        delta = math.sqrt(math.log1p(luminosity_uncertainty) ** 2
                          + math.log1p(efficiency_uncertainty) ** 2)
    else:
        delta = math.hypot(luminosity_uncertainty, efficiency_uncertainty)
    return float(luminosity) * eff, unit, delta, constraint, eff


def _assumptions(luminosity: float | None, lumi_unc: float, efficiency: Any, eff_unc: float,
                 eff_values: np.ndarray | None, kind: str | None,
                 assumed: bool = False) -> dict[str, Any]:
    """What the conversion from signal events to the limit's unit assumed, for the figure,
    the report and results.json (relative uncertainties); ``efficiency_assumed`` when the
    efficiency was not given (1 taken)."""
    if luminosity is None:
        return {}
    eff: Any = float(efficiency) if not callable(efficiency) else None
    out: dict[str, Any] = {"luminosity": float(luminosity),
                           "luminosity_uncertainty": float(lumi_unc),
                           "efficiency": eff, "efficiency_uncertainty": float(eff_unc),
                           "constraint": kind}
    if eff is None and eff_values is not None and eff_values.size:
        out["efficiency_range"] = [float(np.min(eff_values)), float(np.max(eff_values))]
    if assumed:
        out["efficiency_assumed"] = True
    return out
