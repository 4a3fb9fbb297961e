"""The peaksift figure style, shared by every layer that draws (no peaksift imports here).

Use :func:`figure_style` as a context manager around any drawing, and the colour names
below for data, model parts and bands, so every figure looks like one family:
a white canvas, thin dark axes, ticks inside, a muted slate/teal/amber palette.
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterator

COLORS = {
    "data": "#1b1b1f",        # near-black points
    "total": "#1f6f8b",       # deep teal: the full model
    "signal": "#d1495b",      # brick red: signal component
    "background": "#8a8f98",  # slate grey, dashed: background component
    "band1": "#8fb8d6",       # steel blue: +-1 sigma band
    "band2": "#d9e6f0",       # pale blue-grey: +-2 sigma band
    "observed": "#1b1b1f",
    "expected": "#1f6f8b",
    "accent": "#e0a458",
    "blind": "#e9e9ee",       # hatched/blinded region
}

_RC = {
    "figure.figsize": (7.0, 5.0),
    "figure.dpi": 110,
    "savefig.dpi": 150,
    "savefig.bbox": "tight",
    "font.size": 10.5,
    "axes.labelsize": 11,
    "axes.titlesize": 11,
    "axes.linewidth": 0.8,
    "axes.edgecolor": "#2b2b30",
    "axes.grid": False,
    "axes.spines.top": True,
    "axes.spines.right": True,
    "xtick.direction": "in",
    "ytick.direction": "in",
    "xtick.top": True,
    "ytick.right": True,
    "xtick.minor.visible": True,
    "ytick.minor.visible": True,
    "legend.frameon": False,
    "legend.fontsize": 9.5,
    "lines.linewidth": 1.6,
}


@contextlib.contextmanager
def figure_style() -> Iterator[None]:
    """Apply the peaksift rc settings for the duration of a ``with`` block."""
    import matplotlib as mpl

    with mpl.rc_context(_RC):
        yield


def use_headless_backend() -> None:
    """Select the non-interactive Agg backend unless a backend was already chosen."""
    import os

    import matplotlib

    if not os.environ.get("MPLBACKEND") and matplotlib.get_backend().lower() not in ("agg",):
        with contextlib.suppress(ValueError, ImportError):  # backend locked by the caller
            matplotlib.use("Agg")
