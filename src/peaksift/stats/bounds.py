"""How much work a scan may plan, and which widths make sense against its window.

A value that passes every type and sign check can still ask for an impossible job: a scan
step of 1e-12 GeV plans 1e14 hypotheses, a natural width of 1e6 GeV puts almost all of the
signal outside a 90 GeV window and the limits become meaningless numbers.  These checks
refuse such plans before any work, with the same rules for :func:`peaksift.scan`,
:func:`peaksift.upper_limits` and the configuration (which names its keys in ``what``).

* :data:`MAX_HYPOTHESES`, :data:`MAX_BINS`, :data:`MAX_SCAN_CELLS` -- the stated ceilings.
* :func:`check_plan`        -- a number of hypotheses and bins against the ceilings.
* :func:`check_widths`      -- resolution sigma and natural width against the window.
* :func:`default_grid_size` -- how many hypotheses half a local sigma apart a range holds.
* :func:`check_fit_bins`    -- enough bins outside any blinded range to fit the background.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from ..errors import FitError

__all__ = ["MAX_BINS", "MAX_HYPOTHESES", "MAX_SCAN_CELLS", "MAX_WIDTH_FRACTION", "SPARE_BINS",
           "check_fit_bins", "check_plan", "check_widths", "default_grid_size"]

#: most mass hypotheses one scan may hold (a scan costs about 1 ms per hypothesis and
#: several background-only toys repeat it)
MAX_HYPOTHESES = 100_000
#: most bins a spectrum may have
MAX_BINS = 100_000
#: most (hypothesis x bin) cells: the scan keeps a float64 signal template per cell, two
#: copies, so this is about 400 MB
MAX_SCAN_CELLS = 25_000_000
#: a resolution sigma or a natural width above this fraction of the window is refused: the
#: peak would not fit in the window, the background could not be told from it, and the
#: scan's limits would count signal that lies outside the window
MAX_WIDTH_FRACTION = 0.5
#: bins beyond the background's parameter count the scan needs (the background yield and
#: the signal yield, and one degree of freedom left to judge the fit)
SPARE_BINS = 3


def _key(what: str, default: str) -> str:
    return what or default


def check_plan(n_hypotheses: float, n_bins: float, *, masses_key: str = "",
               bins_key: str = "") -> None:
    """Refuse a scan of ``n_hypotheses`` hypotheses on ``n_bins`` bins above the ceilings.

    ``masses_key`` / ``bins_key`` name what set each number (a config key, an argument)."""
    mk, bk = _key(masses_key, "masses"), _key(bins_key, "bins")
    if not np.isfinite(n_hypotheses) or n_hypotheses > MAX_HYPOTHESES:
        raise FitError(f"{mk}: the scan would hold {n_hypotheses:.3g} mass hypotheses, more "
                       f"than {MAX_HYPOTHESES:,}; use a coarser step or fewer points")
    if not np.isfinite(n_bins) or n_bins > MAX_BINS:
        raise FitError(f"{bk}: {n_bins:.3g} bins is more than {MAX_BINS:,}; use wider bins")
    if n_hypotheses * n_bins > MAX_SCAN_CELLS:
        raise FitError(f"{mk} and {bk}: {n_hypotheses:.3g} hypotheses on {n_bins:.3g} bins "
                       f"need {n_hypotheses * n_bins:.3g} signal-template cells, more than "
                       f"{MAX_SCAN_CELLS:.3g} (about "
                       f"{16 * MAX_SCAN_CELLS / 1e9:.1f} GB); use fewer hypotheses or bins")


def check_widths(window: tuple[float, float], sigma_max: float | None = None,
                 natural_width: float | None = None, *, sigma_key: str = "",
                 width_key: str = "") -> None:
    """Refuse a resolution sigma (its largest value on the window) or a natural width above
    :data:`MAX_WIDTH_FRACTION` of the window's width, or a non-finite one."""
    lo, hi = float(window[0]), float(window[1])
    span = hi - lo
    top = MAX_WIDTH_FRACTION * span
    for value, key, name in ((sigma_max, _key(sigma_key, "resolution"), "resolution sigma"),
                             (natural_width, _key(width_key, "natural_width"),
                              "natural width")):
        if value is None:
            continue
        v = float(value)
        if not np.isfinite(v) or v > top:
            raise FitError(
                f"{key}: a {name} of {v:.4g} GeV is more than {MAX_WIDTH_FRACTION:g} of the "
                f"{span:.4g} GeV window [{lo:g}, {hi:g}]: the peak would not fit in the window "
                "and could not be told from the background; check the value and its unit "
                "(GeV), or widen the window")


def default_grid_size(sigma_of: Callable[[np.ndarray], np.ndarray], start: float,
                      stop: float, samples: int = 2001) -> float:
    """Number of hypotheses half a local sigma apart between ``start`` and ``stop``:
    the integral of dm / (sigma(m) / 2), by the trapezoid rule on ``samples`` points (a
    planning estimate, not the grid itself)."""
    m = np.linspace(float(start), float(stop), samples)
    s = np.asarray(sigma_of(m), dtype=float)
    if not np.all(np.isfinite(s)) or np.any(s <= 0):
        return float("inf")
    f = 2.0 / s
    return float(np.sum(0.5 * (f[1:] + f[:-1]) * np.diff(m))) + 1.0


def check_fit_bins(n_used: int, n_background_parameters: int, *, n_blinded: int = 0,
                   bins_key: str = "", blind_key: str = "") -> None:
    """Refuse fewer than ``n_background_parameters + SPARE_BINS`` bins to fit: with
    ``n_blinded`` > 0 the message blames the blinded range, otherwise the bin count."""
    need = int(n_background_parameters) + SPARE_BINS
    if n_used >= need:
        return
    if n_blinded:
        raise FitError(f"{_key(blind_key, 'blind')}: only {n_used} bin(s) lie outside the "
                       f"blinded range ({n_blinded} hidden), the background fit needs at least "
                       f"{need}; narrow the blinded range, widen the window or use finer bins")
    raise FitError(f"{_key(bins_key, 'bins')}: {n_used} bin(s) in the window, the background "
                   f"fit needs at least {need} ({n_background_parameters} background "
                   f"parameter(s) + {SPARE_BINS}); use more bins")
