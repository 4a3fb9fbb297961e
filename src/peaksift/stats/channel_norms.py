"""The luminosity and efficiency uncertainties of a combination's channels as the
normalisation nuisances of the joint likelihood (:mod:`peaksift.stats.joint`, ``norms``):
:func:`signal_norms`."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from ..errors import FitError

__all__ = ["signal_norms"]


def signal_norms(channels: Sequence[Any]) -> tuple[np.ndarray | None, tuple[str, ...]]:
    """The channels' normalisation nuisances: ``(a, names)`` with ``a[c, j] = ln(1 + d)``
    the log-normal scale of nuisance ``j`` on channel ``c``'s signal (see
    :mod:`peaksift.stats.joint`); ``(None, ())`` when no channel has an uncertainty.
    Names: ``efficiency_<channel>`` and ``luminosity_<group>`` (group: the channel's
    ``luminosity_group`` or its name)."""
    chans = list(channels)
    cols: list[np.ndarray] = []
    names: list[str] = []
    for c, ch in enumerate(chans):
        for what in ("luminosity_uncertainty", "efficiency_uncertainty"):
            d = getattr(ch, what)
            if not (isinstance(d, (int, float)) and 0 <= d < 10):
                raise FitError(f"channel {ch.name!r}: {what} must be a relative uncertainty "
                               f">= 0 (e.g. 0.02), got {d!r}")
        if ch.efficiency_uncertainty > 0:
            col = np.zeros(len(chans))
            col[c] = np.log1p(ch.efficiency_uncertainty)
            cols.append(col)
            names.append(f"efficiency_{ch.name}")
    groups: dict[str, list[int]] = {}
    for c, ch in enumerate(chans):
        groups.setdefault(ch.luminosity_group or ch.name, []).append(c)
    for g, members in groups.items():
        ds = {float(chans[c].luminosity_uncertainty) for c in members}
        if len(ds) > 1:
            raise FitError(f"channels {[chans[c].name for c in members]} share the luminosity "
                           f"group {g!r} but give different luminosity_uncertainty "
                           f"{sorted(ds)}; one luminosity has one uncertainty")
        d = ds.pop()
        if d > 0:
            col = np.zeros(len(chans))
            col[members] = np.log1p(d)
            cols.append(col)
            names.append(f"luminosity_{g}")
    if not cols:
        return None, ()
    return np.stack(cols, axis=1), tuple(names)
