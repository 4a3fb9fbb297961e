"""The peaksift figure style, shared by every layer that draws (no peaksift imports here).

What to use when
----------------
* :func:`new_figure` -- a Figure with its axes, made without pyplot: the user's matplotlib
  backend is never switched, the figure saves to any format and shows in a notebook; its
  unlabelled minor ticks are drawn as plain tick marks (the same pixels, a fraction of the
  cost: :func:`_figure_class`).
* :func:`figure_style` -- context manager with the rc settings; wrap any drawing in it.
* :func:`target_axes` -- the axes a result's ``plot(fig=, ax=)`` draws on;
  :func:`margins` -- the fixed frame every figure gets.
* what a figure says beside its data (mass symbols and labels, particle names, the run
  label and header, plain log ticks, the blinded range) is in :mod:`peaksift._annotations`;
  the fitted numbers' table and the test of where a box may go in
  :mod:`peaksift._value_table`.

The look: a white canvas, thin dark axes, ticks inside, a muted slate/teal/amber palette,
the run label as a teal name followed by its conditions in grey.
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterator
from typing import Any

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
    "blind": "#e9e9ee",       # blinded region: pale fill
    "blind_edge": "#9a9aa6",  # and its hatching
    "label": "#1f6f8b",       # the run's name in the run label
    "muted": "#55585f",       # secondary text
    "table": "#f4f6f8",       # background of the value table
    "mark": "#6b4c9a",        # muted violet: a fitted position marked on the axis
}

_RC = {
    "figure.figsize": (7.0, 5.0),
    "figure.dpi": 110,
    "savefig.dpi": 150,
    "savefig.bbox": None,  # fixed margins (see new_figure): "tight" draws every figure twice
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
    # one minor tick between majors on linear axes: every tick is a matplotlib object of
    # five artists, and four per interval made ticks ~30% of a figure's drawing time
    "xtick.minor.ndivs": 2,
    "ytick.minor.ndivs": 2,
    "legend.frameon": False,
    "legend.fontsize": 9.5,
    "lines.linewidth": 1.6,
    "mathtext.default": "regular",  # subscripts and names upright, as in running text
    "hatch.linewidth": 0.6,
}



# rc keys of the user's session rather than of a figure's look: left as the user has them
_SESSION_KEYS = ("backend", "interactive", "toolbar", "timezone", "webagg.", "tk.", "macosx.",
                 "keymap.", "savefig.directory", "figure.raise_window", "figure.hooks",
                 "figure.max_open_warning", "animation.", "pdf.", "ps.", "svg.", "pgf.")
_STYLE: list[dict[str, Any]] = []  # matplotlib's own defaults with _RC over them
_DEPTH = [0]  # figure_style blocks open: an inner one has nothing to set


@contextlib.contextmanager
def figure_style() -> Iterator[None]:
    """Apply the peaksift rc settings for the duration of a ``with`` block: matplotlib's
    own defaults with ours over them, so a user's rcParams or matplotlibrc (a serif font,
    ``mathtext.fontset``, a dark theme) do not reach our figures; the user's rcParams are
    restored on leaving, and session keys (backend, PDF font type, ...) are not touched."""
    import matplotlib as mpl

    if _DEPTH[0]:
        yield
        return
    if not _STYLE:
        _STYLE.append({**{k: v for k, v in mpl.rcParamsDefault.items()
                          if not k.startswith(_SESSION_KEYS)}, **_RC})
    rc = mpl.rcParams  # only what differs is set: each key set is validated (~5 us)
    with mpl.rc_context({k: v for k, v in _STYLE[0].items() if rc[k] != v}):
        _DEPTH[0] += 1
        try:
            yield
        finally:
            _DEPTH[0] -= 1


def new_figure(figsize: tuple[float, float] = (7.0, 4.6), nrows: int = 1, ncols: int = 1,
               **subplots: Any) -> tuple[Any, Any]:
    """``(Figure, axes)`` made without pyplot, in the peaksift style.

    The figure carries its own Agg canvas, so ``fig.savefig`` works and nothing changes the
    backend the user chose (an interactive session keeps showing its windows).  A notebook
    shows a returned Figure as usual.
    """
    import numpy as np
    from matplotlib.ticker import AutoMinorLocator

    with figure_style():
        fig = _figure_class()(figsize=figsize)
        _canvas_class()(fig)
        axes = fig.subplots(nrows, ncols, **subplots)
        margins(fig)
        for ax in np.ravel(axes):  # the rc's one minor tick per interval, fixed here: a
            # locator first asked outside the style would keep matplotlib's four
            ax.xaxis.set_minor_locator(AutoMinorLocator(_RC["xtick.minor.ndivs"]))
            ax.yaxis.set_minor_locator(AutoMinorLocator(_RC["ytick.minor.ndivs"]))
    return fig, axes


_FIGURE: list[Any] = []  # the figure class, made at the first figure (matplotlib loaded)
_CANVAS: list[Any] = []  # the canvas class, made at the first figure (matplotlib loaded)
_MATH: list[Any] = []    # the process's one mathtext parser, shared by every renderer


def _canvas_class() -> Any:
    """An Agg canvas whose renderers share one mathtext parser (and so its cache of parsed
    expressions): matplotlib gives every renderer a parser of its own, so the run label,
    the mass axis and the log-axis labels were typeset again for every figure (a fifth of
    a figure's drawing time).  The parser is the first renderer's own, of whatever kind
    this matplotlib uses; what it returns for an expression is the same each time."""
    if not _CANVAS:
        from matplotlib.backends.backend_agg import FigureCanvasAgg

        class _SharedMathCanvas(FigureCanvasAgg):
            # drawn and saved in our style however the figure is saved (fig.savefig by the
            # user, a notebook's display): text and math are laid out with the rc settings
            # in force when they are drawn, which are the user's outside figure_style
            def draw(self) -> None:
                with figure_style():
                    super().draw()

            def print_figure(self, *args: Any, **kwargs: Any) -> Any:
                with figure_style():
                    return super().print_figure(*args, **kwargs)

            def print_png(self, filename_or_obj: Any, **kwargs: Any) -> None:
                # print_figure passes every writer its options for other formats too
                # (matplotlib's own writers drop those they do not take)
                if set(kwargs) - _OTHER_FORMATS_OPTIONS or kwargs.get("metadata") \
                        or kwargs.get("pil_kwargs"):
                    mine = {k: v for k, v in kwargs.items() if k not in _OTHER_FORMATS_OPTIONS}
                    return super().print_png(filename_or_obj, **mine)
                super().draw()
                _write_png(self, filename_or_obj)
                return None

            def get_renderer(self) -> Any:
                r = super().get_renderer()
                if not _MATH:
                    _MATH.append(r.mathtext_parser)
                r.mathtext_parser = _MATH[0]
                return r

        _CANVAS.append(_SharedMathCanvas)
    return _CANVAS[0]


#: what matplotlib's print_figure passes to every format's writer (Agg's PNG writer takes none)
_OTHER_FORMATS_OPTIONS = {"dpi", "facecolor", "edgecolor", "orientation", "bbox_inches_restore"}


def _write_png(canvas: Any, filename_or_obj: Any) -> None:
    """The drawn canvas as a PNG, as matplotlib writes it (its Software note, the dpi), but
    without the alpha channel when every pixel is opaque (our white canvas): the same
    pixels, ~10% smaller.  A transparent figure keeps it.

    Encoded by :func:`peaksift._png.png_bytes`, not by Pillow: unfiltered rows, ~10%
    smaller on our figures and a third of Pillow's encoding time (~25 ms less a figure)."""
    import matplotlib as mpl
    import numpy as np

    from ._png import png_bytes

    rgba = np.asarray(canvas.buffer_rgba())
    opaque = bool(np.all(rgba[..., 3] == 255))
    data = png_bytes(rgba[..., :3] if opaque else rgba, canvas.figure.dpi, {
        "Software": f"Matplotlib version{mpl.__version__}, https://matplotlib.org/"})
    if hasattr(filename_or_obj, "write"):
        filename_or_obj.write(data)
    else:
        with open(filename_or_obj, "wb") as f:
            f.write(data)


def _figure_class() -> Any:
    """A Figure that draws the unlabelled minor ticks of each axis as one line of tick
    marks per side instead of one matplotlib Tick each (five artists made, styled and
    drawn per tick: a log axis over eight decades has 64 of them; the ticks were about a
    third of a figure's drawing time).  The marks are the ticks' own markers, at the
    positions, in the style and in the drawing order the ticks would have: the pixels are
    the same.  Minor ticks with labels or grid lines are left to matplotlib."""
    if not _FIGURE:
        import matplotlib.figure

        # named Figure too: a user sees the Figure they expect (type name, repr)
        class Figure(matplotlib.figure.Figure):
            def draw(self, renderer: Any) -> None:
                # every axis's marks first: shared axes share one locator, which the
                # swap sets aside for the draw
                swaps = [u for ax in self.axes for axis in (ax.xaxis, ax.yaxis)
                         if (u := _minor_marks(ax, axis)) is not None]
                undo = [swap() for swap in swaps]
                try:
                    super().draw(renderer)
                finally:
                    for u in reversed(undo):
                        u()

            def savefig(self, fname: Any, *args: Any, **kwargs: Any) -> None:
                # a folder that does not exist or a format matplotlib does not know (a
                # typo in a notebook) is the user's to fix: said as peaksift says it
                from .errors import OutputError

                try:
                    super().savefig(fname, *args, **kwargs)
                except (OSError, ValueError) as exc:
                    raise OutputError(f"cannot save the figure to {fname}: {exc}; give a "
                                      "path in an existing folder ending in .png, .pdf or "
                                      ".svg") from None

            def __setstate__(self, state: Any) -> None:
                # matplotlib gives an unpickled figure its base canvas; ours writes the
                # same PNG as before the round trip (its RGB file of an opaque figure)
                super().__setstate__(state)
                if type(self.canvas).__name__ == "FigureCanvasBase":
                    _canvas_class()(self)

        # found by pickle under this module's name (see __getattr__ below)
        Figure.__module__ = __name__
        Figure.__qualname__ = "Figure"
        _FIGURE.append(Figure)
    return _FIGURE[0]


def __getattr__(name: str) -> Any:  # a pickled figure of ours finds its class here
    if name == "Figure":
        return _figure_class()
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def _minor_marks(ax: Any, axis: Any) -> Any:
    """A function that swaps ``axis``'s unlabelled minor ticks for marks for one draw and
    returns the function that swaps them back (None: nothing to swap)."""
    import numpy as np
    from matplotlib.lines import Line2D
    from matplotlib.ticker import NullLocator

    locator = axis.get_minor_locator()
    if ax.name != "rectilinear" or isinstance(locator, NullLocator):
        return None  # (a polar axis turns each tick's marker: left to matplotlib)
    if not (ax.axison and axis.get_visible()):
        return None
    locs = np.asarray(axis.get_minorticklocs(), dtype=float)
    if locs.size == 0 or any(axis.minor.formatter.format_ticks(locs)):
        return None
    tick = axis.get_minor_ticks(1)[0]  # the style every minor tick of the axis gets
    if tick.gridline.get_visible() or not tick.get_visible():
        return None
    # the ones matplotlib draws: inside the view interval (its tolerance, 1e-10 of it)
    tr = axis.get_transform()
    with np.errstate(all="ignore"):
        lo, hi = sorted(np.ravel(tr.transform(np.sort(axis.get_view_interval()))))
        t = np.ravel(tr.transform(locs))
        tol = (hi - lo) * 1e-10
        locs = locs[(t >= lo - tol) & (t <= hi + tol)]
    lines = []
    for line in (tick.tick1line, tick.tick2line):
        if not line.get_visible():
            continue
        m = Line2D([], [])
        m.update_from(line)  # marker, size, width, colour, transform, clipping
        m.set_figure(ax.get_figure(root=False))
        if axis.axis_name == "x":
            m.set_data(locs, np.full(locs.size, line.get_ydata()[0]))
        else:
            m.set_data(np.full(locs.size, line.get_xdata()[0]), locs)
        lines.append(m)

    def swap() -> Any:
        default = axis.isDefault_minloc
        axis.set_minor_locator(NullLocator())

        def draw(renderer: Any) -> None:  # the marks right after the axis's own ticks
            type(axis).draw(axis, renderer)
            for m in lines:
                m.draw(renderer)

        axis.draw = draw  # this figure's draw only (an attribute of this axis)

        def undo() -> None:
            del axis.draw
            axis.set_minor_locator(locator)
            axis.isDefault_minloc = default

        return undo

    return swap


def target_axes(fig: Any = None, ax: Any = None,
                figsize: tuple[float, float] = (7.0, 4.6)) -> tuple[Any, Any]:
    """``(Figure, Axes)`` a result's ``plot(fig=, ax=)`` draws on: the caller's ``ax``, new
    axes on the caller's ``fig``, or a :func:`new_figure` of ``figsize``."""
    if ax is None:
        if fig is None:
            return new_figure(figsize)
        ax = fig.subplots()
    return ax.figure, ax


def margins(fig: Any, *, left: float = 0.85, right: float = 0.45, top: float = 0.62,
            bottom: float = 0.62) -> None:
    """Fixed margins in inches: room for the axis labels, the sigma labels on the right of a
    p-value scan and the two header lines above (a fixed frame draws each figure once,
    where a "tight" bounding box draws it twice)."""
    w, h = fig.get_size_inches()
    fig.subplots_adjust(left=left / w, right=1.0 - right / w, top=1.0 - top / h,
                        bottom=bottom / h)
