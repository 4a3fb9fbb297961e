"""The scan's mass grid against the resolution: :func:`coarse_grid_note` says where the
hypotheses stand too far apart for a peak between them to be seen at its full strength.

numpy alone (the search's warnings use it without loading the fits)."""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["COARSE_GRID_SIGMA", "coarse_grid_note"]


#: a step between neighbouring mass hypotheses above this many resolution widths flags the
#: scan: on a flat background q0 scales as the squared overlap of the template with the
#: peak, exp(-d^2 / 2 sigma^2) for two Gaussians d apart, so a peak midway between two
#: hypotheses keeps exp(-step^2 / 8 sigma^2) of its q0 (88 % at one width, 61 % at two),
#: and the up-crossings of the global correction are undercounted alike (a search's default
#: grid steps half a width: 97 %)
COARSE_GRID_SIGMA = 1.0


def coarse_grid_note(masses: Any, sigma: Any) -> str | None:
    """A note when the mass grid steps more than :data:`COARSE_GRID_SIGMA` resolution
    widths somewhere (the widest step quoted, in widths at its two ends' mean), else None."""
    m = np.asarray(masses, float)
    s = np.broadcast_to(np.asarray(sigma, float), m.shape)
    if m.size < 2:
        return None
    order = np.argsort(m)
    m, s = m[order], s[order]
    width = 0.5 * (s[1:] + s[:-1])
    ok = np.isfinite(width) & (width > 0)
    if not ok.any():
        return None
    ratio = np.where(ok, np.diff(m) / np.where(ok, width, 1.0), 0.0)
    j = int(np.argmax(ratio))
    if ratio[j] <= COARSE_GRID_SIGMA:
        return None
    return (f"the mass grid steps up to {ratio[j]:.1f} resolution widths (between "
            f"{m[j]:g} and {m[j + 1]:g}): a peak between hypotheses loses local significance "
            f"and the global correction counts too few up-crossings; step at most one width "
            f"(half a width is the search's default)")
