"""The search's upper limits from its config: :func:`_limits` (``[limits]`` over
``limits.points`` masses of the scan, :func:`peaksift.upper_limits` with the configured
luminosity, efficiency, method and engine)."""

from __future__ import annotations

from typing import Any

import numpy as np

from ..config import Config
from ..errors import ConfigError
from .common import _toy_executor, _where


def _opt(**kw: Any) -> dict[str, Any]:
    """Keyword arguments whose value is not None (optional features of the layers)."""
    return {k: v for k, v in kw.items() if v is not None}


def _limit_masses(cfg: Config, masses: np.ndarray) -> np.ndarray:
    """The limits' mass points: ``limits.points`` evenly over the scan's masses."""
    n = min(cfg.limits.points, masses.size)
    return np.linspace(masses[0], masses[-1], n) if n > 1 else masses[:1]


def _limits(cfg: Config, hist: Any, sig: Any, bkg: Any, masses: np.ndarray,
            width: float | None, blind: Any, progress: bool, smodel: Any = None) -> Any:
    from ..stats.limits import upper_limits

    lm = _limit_masses(cfg, masses)
    L = cfg.limits
    half = (lm[-1] - lm[0]) / (2 * (lm.size - 1)) if lm.size > 1 else 0.0
    for i, m in enumerate(L.toy_masses):
        if not lm[0] - half <= m <= lm[-1] + half:
            raise ConfigError(
                f"{_where(cfg)}: limits.toy_masses[{i}] = {m:g} lies outside the limit scan "
                f"[{lm[0]:g}, {lm[-1]:g}] GeV (the scan keeps 3 resolution sigma inside the "
                "window unless scan.start / scan.stop say otherwise); choose masses inside it")
    if smodel is not None:  # the model gives shape, resolution and efficiency
        sig, width = None, None
    return upper_limits(
        hist, sig, bkg, lm,
        **({"signal_model": smodel} if smodel is not None
           else {"resolution": cfg.model.resolution.resolution}),
        window=cfg.spectrum.window, cl=L.cl,
        method=L.method,
        **_opt(toys=L.toys if L.method != "asymptotic" else None, seed=cfg.significance.seed,
               toy_masses=list(L.toy_masses) or None,
               natural_width=width, blind=blind, luminosity=L.luminosity,
               luminosity_uncertainty=L.luminosity_uncertainty or None,
               efficiency=L.efficiency if L.luminosity is not None and smodel is None
               else None,
               efficiency_uncertainty=L.efficiency_uncertainty or None,
               unit=L.cross_section_unit if L.luminosity is not None else None),
        constraint=L.constraint, progress=progress,
        executor=_toy_executor(cfg, "toy limits") if L.method != "asymptotic" else None,
    )
