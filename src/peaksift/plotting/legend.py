"""Where a legend goes: :func:`place_legend` puts it in the first place, in a fixed order of
preference, where it covers none of the points and error bars given, raising the y axis
when no place is free.  Measured on the figure's own renderer, after the axis ranges and
margins are final."""

from __future__ import annotations

from typing import Any

import numpy as np

from .._value_table import touched

__all__ = ["place_legend"]

#: the places tried, in order (upper right first: where a falling spectrum leaves room)
_PLACES = ("upper right", "upper left", "upper center", "lower left", "lower right",
           "lower center", "center right", "center left")


def place_legend(ax: Any, x: Any, lo: Any, hi: Any | None = None, *, log: bool = False,
                 **kwargs: Any) -> Any:
    """The legend of ``ax`` in the first of :data:`_PLACES` where it touches none of the
    segments from ``(x, lo)`` to ``(x, hi)`` (data points with their error bars; ``hi``
    omitted: points, e.g. a curve's samples).  When every place is taken the y axis is
    raised (by 30% of its span, or a factor 3 on a log axis) until the upper right is
    free.  Returns the Legend."""
    x, lo = np.asarray(x, float), np.asarray(lo, float)
    hi = lo if hi is None else np.asarray(hi, float)
    ok = np.isfinite(x) & np.isfinite(lo) & np.isfinite(hi)
    x, lo, hi = x[ok], lo[ok], hi[ok]
    # one legend, moved from place to place: its entries are laid out once (a new legend
    # per place made and measured them again, ~10 ms a try)
    leg = ax.legend(loc=_PLACES[0], **kwargs)
    for place in _PLACES:
        leg = _moved(ax, leg, place, kwargs)
        if touched(ax, leg, x, lo, hi) == 0:
            return leg
    leg = _moved(ax, leg, _PLACES[0], kwargs)
    for _ in range(12):
        y0, y1 = ax.get_ylim()
        ax.set_ylim(y0, y1 * 3.0 if log else y1 + 0.3 * (y1 - y0))
        if touched(ax, leg, x, lo, hi) == 0:
            break
    return leg


def _moved(ax: Any, leg: Any, place: str, kwargs: dict[str, Any]) -> Any:
    """``leg`` moved to ``place`` (``Legend.set_loc`` is new in matplotlib 3.8; before it,
    a new legend is made there)."""
    if hasattr(leg, "set_loc"):
        leg.set_loc(place)
        return leg
    return ax.legend(loc=place, **kwargs)
