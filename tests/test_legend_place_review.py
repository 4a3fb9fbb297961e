"""``peaksift.plotting.legend.place_legend`` within the matplotlib versions pyproject.toml
accepts.  ``Legend.set_loc`` is new in matplotlib 3.8 (its docstring: "versionadded::
3.8"); pyproject.toml accepts matplotlib >= 3.7, so the legend must also be placed where
a Legend has no ``set_loc`` (simulated: the axes hand out legends that hide it)."""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from peaksift._style import new_figure
from peaksift.plotting.legend import place_legend

REPO_DIR = Path(__file__).resolve().parents[1]


def _floor() -> tuple[int, int]:
    text = (REPO_DIR / "pyproject.toml").read_text()
    major, minor = re.search(r'"matplotlib>=(\d+)\.(\d+)', text).groups()
    return int(major), int(minor)


def _axes_with_points_upper_right():
    fig, ax = new_figure((4.0, 3.0))
    x = np.linspace(0.0, 10.0, 21)
    y = np.where(x > 6.0, 9.5, 0.5)  # points filling the upper right corner
    ax.plot(x, y, "o", label="points")
    ax.set_xlim(0, 10)
    ax.set_ylim(0, 10)
    return fig, ax, x, y


def test_legend_placed_without_set_loc(monkeypatch):
    """On a Legend without ``set_loc`` (matplotlib 3.7) the legend is still placed, and in
    the same place as with it (the upper right is taken by points: the next place, upper
    left, per the module's order)."""
    fig, ax, x, y = _axes_with_points_upper_right()
    want = _where(fig, place_legend(ax, x, y))
    assert want[0] < 0.5  # (left half: the upper right is taken)
    if _floor() >= (3, 8):
        return  # (the floor no longer accepts a matplotlib without set_loc)
    fig, ax, x, y = _axes_with_points_upper_right()
    made = ax.legend
    monkeypatch.setattr(ax, "legend", lambda *a, **k: _WithoutSetLoc(made(*a, **k)))
    assert _where(fig, place_legend(ax, x, y)) == want


class _WithoutSetLoc:
    """A Legend as matplotlib 3.7 has it: no ``set_loc``."""

    def __init__(self, leg):
        self._leg = leg

    def __getattr__(self, name):
        if name == "set_loc":
            raise AttributeError(name)
        return getattr(self._leg, name)


def _where(fig, leg) -> tuple[float, float]:
    """The legend's lower left corner, in figure fractions (2 decimals)."""
    box = leg.get_window_extent(fig.canvas.get_renderer())
    w, h = fig.canvas.get_width_height()
    return round(box.x0 / w, 2), round(box.y0 / h, 2)
