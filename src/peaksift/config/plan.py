"""The work a configuration plans, bounded at load time (:mod:`peaksift.stats.bounds`).

Called by :func:`peaksift.config.load_config` after each section's own checks, so a value
that would hang the scan planner or allocate terabytes is refused with its key named
before any file is read.  The same ceilings apply to :func:`peaksift.scan` and
:func:`peaksift.upper_limits` through their own arguments.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ..errors import ConfigError, FitError
from ..stats.bounds import MAX_BINS, check_fit_bins, check_plan, check_widths, default_grid_size

__all__ = ["check_background_bins", "check_bins", "check_scan_plan"]


def check_bins(spectrum: Mapping[str, Any], where: str) -> None:
    """``spectrum.bins`` (or the count ``spectrum.bin_width`` gives) within
    :data:`~peaksift.stats.bounds.MAX_BINS`; called before any array of edges is made."""
    n = spectrum["bins"]
    if n > MAX_BINS:
        key = "spectrum.bin_width" if spectrum.get("bin_width") is not None else "spectrum.bins"
        raise ConfigError(f"{where}: {key} gives {n:.3g} bins on the window, more than "
                          f"{MAX_BINS:,}; use wider bins")


def check_scan_plan(resolution: Any, res_keys: Mapping[str, Any], spectrum: Mapping[str, Any],
                    scan: Mapping[str, Any], where: str) -> None:
    """Widths against the window, then the number of hypotheses and template cells.

    ``resolution`` is the :class:`~peaksift.resolution.Resolution` the config describes,
    ``res_keys`` the ``[model.resolution]`` values (to name the key that was given)."""
    lo, hi = spectrum["window"]
    given = next(k for k in ("relative", "absolute", "table") if res_keys[k] is not None)
    sig_key = f"model.resolution.{given}"
    m = np.linspace(lo, hi, 201)
    sigma = np.asarray(resolution.sigma(m), dtype=float)
    gamma = float(res_keys.get("natural_width") or 0.0)
    try:
        check_widths((lo, hi), float(np.max(sigma)), gamma or None, sigma_key=sig_key,
                     width_key="model.resolution.natural_width")
    except FitError as exc:
        raise ConfigError(f"{where}: {exc}") from None
    s_lo, s_hi = float(sigma[0]), float(sigma[-1])
    start = scan["start"] if scan["start"] is not None else lo + 3.0 * s_lo
    stop = scan["stop"] if scan["stop"] is not None else hi - 3.0 * s_hi
    if not stop > start:
        raise ConfigError(
            f"{where}: the default scan range is empty (start {start:g}, stop {stop:g} GeV): "
            f"the window is narrower than six resolution widths ({sig_key}); widen "
            "spectrum.window or set scan.start and scan.stop")
    if scan["points"] is not None:
        n, key = float(scan["points"]), "scan.points"
    elif scan["step"] is not None:
        n, key = (stop - start) / float(scan["step"]) + 1.0, "scan.step"
    else:
        n = default_grid_size(resolution.sigma, start, stop)
        key = f"{sig_key} (hypotheses half a sigma apart; or set scan.step or scan.points)"
    bins_key = "spectrum.bin_width" if spectrum.get("bin_width") is not None \
        else "spectrum.bins"
    try:
        check_plan(n, spectrum["bins"], masses_key=key, bins_key=bins_key)
    except FitError as exc:
        raise ConfigError(f"{where}: {exc}") from None


def check_background_bins(model: Mapping[str, Any], spectrum: Mapping[str, Any],
                          blinding: Mapping[str, Any], where: str) -> None:
    """Enough bins outside the blinded window (when blinding is on) for the background fit:
    the scan's own rule (:func:`~peaksift.stats.bounds.check_fit_bins`), applied before
    any file is read."""
    from .. import shapes
    from ..blinding import blinded_bins

    try:
        n_par = len(shapes.get(model["background"], **dict(model["background_options"]))
                    .parameters)
    except Exception:  # noqa: BLE001 - a bad shape was reported by its own check
        return
    lo, hi = spectrum["window"]
    edges = np.linspace(lo, hi, int(spectrum["bins"]) + 1)
    hidden = 0
    if blinding["enabled"] and blinding["window"] is not None:
        hidden = int(np.count_nonzero(blinded_bins(edges, tuple(blinding["window"]))))
    bins_key = "spectrum.bin_width" if spectrum.get("bin_width") is not None \
        else "spectrum.bins"
    try:
        check_fit_bins(edges.size - 1 - hidden, n_par, n_blinded=hidden, bins_key=bins_key,
                       blind_key="blinding.window")
    except FitError as exc:
        raise ConfigError(f"{where}: {exc}") from None
