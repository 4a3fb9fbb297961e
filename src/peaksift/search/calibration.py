"""The calibration of a search: the known resonance of ``[calibration]`` fitted in its own
window of the selected pairs, compared with the particle tables (:func:`calibrate`).

Fitted right after the read, before the statistics, so that its figure (the slowest of a
search's) is drawn beside them."""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from typing import Any

import numpy as np

from ..config import Config
from ..errors import FitError
from .common import _fill, _shape


def _sigma_near(cfg: Config, mass: float) -> float:
    """sigma at ``mass``, or at the nearest row of a resolution table that stops short of it:
    for the calibration peak, whose window may lie beyond the table (which must cover only
    the search window), where sigma is a fit's starting value or a matching tolerance."""
    r = cfg.model.resolution.resolution
    m = float(mass) if r.mass_range is None else float(np.clip(mass, *r.mass_range))
    return float(r.sigma(m))


def calibrate(cfg: Config, col: Any) -> tuple[dict[str, Any] | None, Any, Any]:
    """``(the results.json calibration block, its histogram, its FitResult)``, or three
    None when ``[calibration]`` is off."""
    c = cfg.calibration
    if not c.enabled:
        return None, None, None
    from ..fitting import fit
    from ..resonances import lookup

    ref = lookup(c.particle)
    lo, hi = c.window
    h = _fill(col, cfg, lo, hi, c.bins)
    sig = _shape(c.signal, c.signal_options)
    bkg = _shape(c.background, c.background_options)
    names = [p.name for p in sig.parameters]
    start: dict[str, float] = {"mass": ref.mass}
    fixed: dict[str, float] = {}
    if "sigma" in names:
        start["sigma"] = _sigma_near(cfg, ref.mass)
    if "width" in names:
        start["width"] = ref.width
        if c.fix_width:
            fixed["width"] = ref.width
    try:
        fr = fit(h, sig, bkg, (lo, hi), start=start, fixed=fixed or None)
    except FitError as exc:
        raise FitError(f"calibration fit of {c.particle} in [{lo:g}, {hi:g}] GeV: {exc}") from None
    fr = dataclasses.replace(fr, kind="calibration")  # named so in its repr and figure
    d = fr.to_dict()
    pm = d.get("peak_mass") or {}
    m, e = float(pm.get("value", np.nan)), float(pm.get("error") or np.nan)
    out = {
        "particle": ref.name,
        "pdgid": ref.pdgid,
        "table_mass": ref.mass,
        "table_mass_error": ref.mass_error,
        "table_width": ref.width,
        "window": [lo, hi],
        "signal_shape": c.signal,
        "background_shape": c.background,
        "width_fixed_to_table": bool(fixed),
        "valid": bool(d.get("valid")),
        "problems": list(d.get("problems") or []),
        "gof": d.get("gof"),
        "fitted_mass": {"value": m, "error": e},
        "fit": d,  # the whole fit (FitResult.to_dict): SearchResult.plot draws it
        "fitted_resolution": _value_error(d, "sigma"),
        "signal_yield": d.get("signal_yield"),
        "shift": m - ref.mass,
        "shift_relative_permille": 1000.0 * (m - ref.mass) / ref.mass,
        "shift_sigma": (m - ref.mass) / np.hypot(e, ref.mass_error) if e > 0 else None,
        "source": "particle package (PDG tables)",
    }
    from ..resonances import fitted_widths, match_known, pair_charge

    res_sigma = _sigma_near(cfg, m) if np.isfinite(m) else 0.0
    out["known_matches"] = [k.to_dict() for k in match_known(
        m, error=e if np.isfinite(e) else 0.0, resolution=res_sigma,
        charge=pair_charge(cfg.pairing.charge),
        **fitted_widths(d.get("parameters") or {}))] if np.isfinite(m) else []
    return out, h, fr


def _value_error(d: Mapping[str, Any], name: str) -> dict[str, Any] | None:
    """``{"value", "error"}`` of a fit parameter from ``FitResult.to_dict()``."""
    p = (d.get("parameters") or {}).get(name)
    if not isinstance(p, Mapping):
        return None
    return {"value": p.get("value"), "error": p.get("error")}
