"""The figures' minor ticks drawn as marks (``_style``): the same pixels as matplotlib's own
Tick objects give (source: matplotlib's ordinary drawing path, the same figure drawn by
``matplotlib.figure.Figure.draw``), tolerance: none, every pixel equal."""

from __future__ import annotations

import io

import numpy as np
import pytest

mpl = pytest.importorskip("matplotlib")

from matplotlib.figure import Figure

from peaksift._annotations import plain_log_ticks
from peaksift._style import figure_style, new_figure


def _build(kind: str):
    fig, (top, pulls) = new_figure((6.0, 4.5), 2, 1, sharex=True,
                                   gridspec_kw={"height_ratios": [3, 1]})
    with figure_style():
        x = np.linspace(110.0, 200.0, 91)
        top.stairs(np.exp(-x[:-1] / 30.0) * 1e4, x, fill=True, alpha=0.15)  # touches the axis
        top.plot(x, np.exp(-x / 30.0) * 1e4, label="model")
        if kind == "log8":     # eight decades: unlabelled minor ticks, 8 per decade
            top.set_yscale("log")
            top.set_ylim(1e-6, 1e2)
        elif kind == "short":  # a short log axis: labelled minor ticks stay matplotlib's
            top.set_yscale("log")
            top.set_ylim(2.0, 40.0)
            plain_log_ticks(top)
        top.legend(loc="best")
        pulls.bar(x[:-1] + 0.5, np.sin(x[:-1]), width=1.0)
        pulls.set_xlim(110.0, 200.0)
    return fig


def _pixels(fig) -> np.ndarray:
    buf = io.BytesIO()
    with figure_style():
        fig.savefig(buf, format="png", dpi=80)
    buf.seek(0)
    return np.asarray(mpl.image.imread(buf))


@pytest.mark.parametrize("kind", ["linear", "log8", "short"])
def test_minor_tick_marks_match_matplotlibs_ticks(kind):
    ours = _build(kind)
    reference = _build(kind)
    reference.__class__ = Figure  # matplotlib's own drawing, one Tick per minor tick
    a, b = _pixels(ours), _pixels(reference)
    assert a.shape == b.shape
    assert np.array_equal(a, b), f"{int((a != b).any(axis=2).sum())} pixels differ"
    # the minor ticks are there (a figure without them must differ) ...
    bare = _build(kind)
    bare.__class__ = Figure
    for ax in bare.axes:
        ax.minorticks_off()
    assert not np.array_equal(a, _pixels(bare))
    # ... and the figure is left as it was: its locators back, no marks left behind
    for ax in ours.axes:
        for axis in (ax.xaxis, ax.yaxis):
            assert "draw" not in vars(axis)
            assert type(axis.get_minor_locator()).__name__ != "NullLocator"
    assert np.array_equal(_pixels(ours), a)  # drawn again: the same


def test_figure_pickles_like_a_matplotlib_figure():
    # matplotlib figures pickle (source: matplotlib's Figure.__getstate__/__setstate__); ours
    # must too, and draw the same pixels after the round trip
    import pickle

    fig = _build("log8")
    again = pickle.loads(pickle.dumps(fig))
    assert isinstance(again, Figure)
    assert np.array_equal(_pixels(again), _pixels(fig))
