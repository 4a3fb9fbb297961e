"""The p-value figure's legend is not crossed by the curve of a huge excess.

A peak of 8,000 events over 50,000 (Z_local ~ 79): between two masses the local p-value
falls from 0.5 to 1e-300 (drawn at that floor), a near-vertical line through the whole
axis that ran through the legend in the lower left corner, where no sample of the curve
lies.  Reference: the drawn lines' own vertices in display coordinates (matplotlib's
``transData``) against the legend's box, intersected segment by segment by the
Liang-Barsky clipping written here (Liang and Barsky, Comm. ACM 27 (1984) 868; from
memory), exact to the renderer's pixels (no tolerance beyond 1 pixel).
"""

from __future__ import annotations

import numpy as np
import pytest

import peaksift
from peaksift.histogram import MassHistogram


def _crosses(p0, p1, box, pad=1.0) -> bool:
    """Whether the segment p0-p1 (display coordinates) meets the box (Liang-Barsky)."""
    (x0, y0), (x1, y1) = p0, p1
    dx, dy = x1 - x0, y1 - y0
    t0, t1 = 0.0, 1.0
    for p, q in ((-dx, x0 - (box.x0 - pad)), (dx, (box.x1 + pad) - x0),
                 (-dy, y0 - (box.y0 - pad)), (dy, (box.y1 + pad) - y0)):
        if p == 0:
            if q < 0:
                return False
            continue
        r = q / p
        if p < 0:
            t0 = max(t0, r)
        else:
            t1 = min(t1, r)
        if t0 > t1:
            return False
    return True


def _crossings(ax) -> int:
    leg = ax.get_legend()
    box = leg.get_window_extent(ax.figure.canvas.get_renderer())
    n = 0
    for line in ax.get_lines():
        if line.get_transform() != ax.transData or len(line.get_xdata()) < 2:
            continue
        x, y = (np.asarray(a, float) for a in line.get_data())
        d = ax.transData.transform(np.c_[x, y])
        n += sum(_crosses(d[i], d[i + 1], box) for i in range(len(d) - 1)
                 if np.isfinite(d[i]).all() and np.isfinite(d[i + 1]).all())
    return n


@pytest.fixture(scope="module")
def huge():
    rng = np.random.default_rng(5)
    x = np.concatenate([100 + rng.exponential(60, 50000), rng.normal(112, 2.0, 8000)])
    h = MassHistogram(bins=200, range=(100, 200))
    h.fill(x[(x > 100) & (x < 200)])
    return peaksift.scan(h, "gaussian", "exponential", np.arange(102, 199, 1.0),
                         relative_resolution=0.015)


def test_the_legend_goes_where_no_line_crosses_it(huge):
    assert np.nanmax(huge.z_local) > 50  # (the case: an excess far off the axis)
    fig = huge.plot()
    assert _crossings(fig.axes[0]) == 0


def test_where_every_place_is_crossed_the_legend_hides_the_lines(huge):
    """With the long expected-curve label no place is free: the legend stands on an
    opaque ground (above the lines), so no line runs through its text."""
    from peaksift.plotting.scan import scan_expectation, scan_figure

    fig = scan_figure(huge, {"mass": 112.0, "z_local": 78.6, "z_global": 77.6,
                             "global_method": "upcrossings"},
                      expected=scan_expectation(huge))
    ax = fig.axes[0]
    leg = ax.get_legend()
    if _crossings(ax):
        assert leg.get_frame_on() and leg.get_frame().get_alpha() > 0.9
        assert leg.get_zorder() > max(line.get_zorder() for line in ax.get_lines())
    # and the note of the clipped excess is not under it
    r = fig.canvas.get_renderer()
    note = next(t for t in ax.texts if "clipped" in t.get_text())
    assert not leg.get_window_extent(r).overlaps(note.get_window_extent(r))
