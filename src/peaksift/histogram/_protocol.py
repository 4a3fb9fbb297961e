"""The cross-library histogram protocol, both ways, and what fit/scan/limits accept as data.

The protocol (shared by general-purpose histogram libraries and plotting tools) asks a
histogram for ``kind`` (``"COUNT"`` or ``"MEAN"``), ``axes`` (each with ``len``,
``axis[i] -> (lo, hi)``, ``traits.circular``/``traits.discrete``), ``values()``,
``variances()`` (None when unknown) and ``counts()``.  :class:`MassAxis` is our axis;
:func:`from_protocol` reads any histogram that speaks it; :func:`from_counts` reads
``numpy.histogram``'s ``(counts, edges)``; :func:`as_spectrum` decides what a user handed
to a fit, scan or limit and refuses what it cannot interpret.
"""

from __future__ import annotations

from types import SimpleNamespace
from typing import Any

import numpy as np

from ..errors import FitError, InputError
from .binning import check_edges

__all__ = ["MassAxis", "as_spectrum", "from_counts", "from_protocol", "speaks_protocol"]


class MassAxis:
    """The mass axis of a :class:`MassHistogram`, as the protocol describes an axis."""

    __slots__ = ("edges", "label", "unit")

    traits = SimpleNamespace(circular=False, discrete=False)

    def __init__(self, edges: np.ndarray, label: str = "m", unit: str = "GeV") -> None:
        self.edges = edges
        self.label = label
        self.unit = unit

    @property
    def name(self) -> str:
        return self.label

    def __len__(self) -> int:
        return self.edges.size - 1

    def __getitem__(self, i: int) -> tuple[float, float]:
        n = len(self)
        j = i + n if i < 0 else i
        if not 0 <= j < n:
            raise IndexError(f"bin {i} of an axis with {n} bins")
        return float(self.edges[j]), float(self.edges[j + 1])

    def __iter__(self):
        return (self[i] for i in range(len(self)))

    def __eq__(self, other: object) -> bool:
        e = getattr(other, "edges", None)
        return e is not None and np.array_equal(np.asarray(e), self.edges)

    __hash__ = None  # type: ignore[assignment]

    def __repr__(self) -> str:
        return f"MassAxis({len(self)} bins on [{self.edges[0]:g}, {self.edges[-1]:g}] {self.unit})"


def speaks_protocol(obj: Any) -> bool:
    """True when ``obj`` has the protocol's ``values()`` method and ``axes``."""
    return callable(getattr(obj, "values", None)) and hasattr(obj, "axes") and hasattr(
        obj, "kind") and not isinstance(obj, dict)


def _axis_edges(axis: Any) -> np.ndarray:
    traits = getattr(axis, "traits", None)
    if getattr(traits, "discrete", False) or getattr(traits, "circular", False):
        raise InputError("histogram protocol: the axis is categorical or circular; a mass "
                         "spectrum needs a continuous axis of bin edges")
    e = getattr(axis, "edges", None)
    if e is None:
        bins = [axis[i] for i in range(len(axis))]
        try:
            e = [float(b[0]) for b in bins] + [float(bins[-1][1])]
        except (TypeError, IndexError, ValueError):
            raise InputError("histogram protocol: axis bins are not (lo, hi) pairs of "
                             "numbers") from None
    return check_edges(e)


def _flows(arr: np.ndarray, n: int, axis: Any) -> tuple[np.ndarray, float, float]:
    """Split ``values(flow=True)``: (bins, underflow, overflow) by the axis' flow traits."""
    if arr.shape == (n,):
        return arr, 0.0, 0.0
    if arr.shape == (n + 2,):
        return arr[1:-1], float(arr[0]), float(arr[-1])
    if arr.shape == (n + 1,):
        if getattr(getattr(axis, "traits", None), "underflow", False):
            return arr[1:], float(arr[0]), 0.0
        return arr[:-1], 0.0, float(arr[-1])
    raise InputError(f"histogram protocol: {arr.size} values for an axis of {n} bins")


def _call_flow(method: Any) -> Any:
    try:
        return method(flow=True)
    except TypeError:  # the protocol's values() takes no arguments
        return method()


def from_protocol(cls: Any, hist: Any, unit: str, label: str | None) -> Any:
    """A ``cls`` (MassHistogram) from a histogram speaking the protocol; see
    :meth:`MassHistogram.from_protocol`."""
    what = type(hist).__name__
    if not speaks_protocol(hist):
        raise InputError(f"{what} does not speak the histogram protocol (values(), "
                         "variances(), axes, kind)")
    kind = str(getattr(hist, "kind", "COUNT")).upper().rsplit(".", 1)[-1]
    if kind != "COUNT":
        raise InputError(f"{what} holds a mean per bin (kind {kind}); a spectrum needs "
                         "counts or sums of weights (kind COUNT)")
    axes = list(hist.axes)
    if len(axes) != 1:
        raise InputError(f"{what} has {len(axes)} axes; a mass spectrum has one (project "
                         "it first, e.g. h.project(0))")
    axis = axes[0]
    edges = _axis_edges(axis)
    n = edges.size - 1
    vals, under, over = _flows(np.asarray(_call_flow(hist.values), dtype=float), n, axis)
    var_raw = _call_flow(hist.variances) if callable(getattr(hist, "variances", None)) else None
    if var_raw is None:
        raise InputError(f"{what}: its variances are unknown (weighted fills into a storage "
                         "that does not keep the sum of squared weights); fill it with a "
                         "weighted storage, or pass the masses and weights instead")
    var, under2, over2 = _flows(np.asarray(var_raw, dtype=float), n, axis)
    if label is None:
        label = str(getattr(axis, "label", "") or getattr(axis, "name", "") or "m")
    h = cls(edges, unit=unit, label=label)
    _set(h, vals, var, under, over, under2, over2, what)
    return h


def from_counts(cls: Any, counts: Any, edges: Any, variances: Any, underflow: float,
                overflow: float, unit: str, label: str) -> Any:
    """A ``cls`` (MassHistogram) from contents and edges; see
    :meth:`MassHistogram.from_counts`."""
    h = cls(edges, unit=unit, label=label)
    try:
        c = np.asarray(counts, dtype=float)
        v = c if variances is None else np.asarray(variances, dtype=float)
    except (TypeError, ValueError):
        raise InputError("from_counts: counts and variances must be numbers") from None
    if c.shape != (h.nbins,):
        raise InputError(f"from_counts: {h.nbins + 1} edges need {h.nbins} counts, got shape "
                         f"{c.shape}; pass (counts, edges) as numpy.histogram returns them")
    if variances is None and (np.any(c < 0) or underflow < 0 or overflow < 0):
        raise InputError("from_counts: negative counts need their variances (sums of squared "
                         "weights); pass variances=...")
    _set(h, c.copy(), v.copy(), float(underflow), float(overflow), float(underflow),
         float(overflow), "from_counts")
    return h


def _set(h: Any, vals: np.ndarray, var: np.ndarray, under: float, over: float, under2: float,
         over2: float, what: str) -> None:
    if vals.shape != (h.nbins,) or var.shape != (h.nbins,):
        raise InputError(f"{what}: {h.nbins} bins but {vals.size} values and {var.size} "
                         "variances")
    allv = np.concatenate([vals, var, [under, over, under2, over2]])
    if not np.all(np.isfinite(allv)):
        raise InputError(f"{what}: bin contents or variances are not finite")
    if np.any(var < 0) or under2 < 0 or over2 < 0:
        raise InputError(f"{what}: a variance is negative")
    h.weight_sum, h.weight_sq_sum = vals, var
    h.underflow, h.overflow = under, over
    h.underflow_variance, h.overflow_variance = under2, over2


_ACCEPTS = ("a MassHistogram, a histogram speaking the histogram protocol (values(), "
            "variances(), axes, kind), numpy.histogram's (counts, edges), a 1-d array of "
            "masses in GeV, or (masses, weights)")


def as_spectrum(data: Any, weights: Any = None, *, what: str = "fit") -> Any:
    """What ``data`` (and ``weights``) handed to a fit, scan or limit mean: a MassHistogram,
    or a pair ``(masses, weights_or_None)`` of flat float arrays.

    The rules, in order: a MassHistogram as it is; an object speaking the histogram protocol
    converted (:meth:`MassHistogram.from_protocol`); a 2-tuple whose second array is one
    longer than the first is ``numpy.histogram``'s ``(counts, edges)``; a 2-tuple whose
    second array is as long as the first and evenly spaced increasing is ``(counts, bin
    centres)`` given by mistake and refused (weights are never an arithmetic progression;
    evenly spaced *masses* with weights, an Asimov-like sample, are accepted); another 2-tuple
    is ``(masses, weights)``; a 1-d array of real numbers is masses.  Anything else is refused
    rather than guessed at.

    Raises
    ------
    FitError
        ``data`` is none of these (the message lists what is accepted), or weights are given
        beside a histogram.
    """
    from ._mass import MassHistogram

    hist = None
    if isinstance(data, MassHistogram):
        hist = data
    elif speaks_protocol(data):
        try:
            hist = MassHistogram.from_protocol(data)
        except InputError as exc:
            raise FitError(f"{what}: {exc}") from None
    elif isinstance(data, tuple) and len(data) == 2:
        a, b = (_numbers(v, what) for v in data)
        if a is not None and b is not None and b.size == a.size + 1:
            hist = _counts_edges(a, b, what)
        elif a is not None and b is not None and b.size == a.size and _like_centres(b):
            raise FitError(
                f"{what}: data=(counts, x) with as many x as counts? the second array "
                f"({b[0]:g}, {b[1]:g}, ..., {b[-1]:g}) is evenly spaced and increasing like "
                "bin centres, so it is not read as weights; give the bin edges (len(counts) "
                "+ 1 values, numpy.histogram's (counts, edges)) or (masses, weights)")
        elif weights is not None:
            raise FitError(f"{what}: weights given twice (in data=(masses, weights) and "
                           "weights=); give one")
        else:
            data, weights = data
    if hist is not None:
        if weights is not None:
            raise FitError(f"{what}: weights= given with a histogram; the histogram already "
                           "holds them")
        return hist
    x = _numbers(data, what)
    if x is None:
        raise FitError(f"{what}: cannot read {type(data).__name__} as data; {what} accepts "
                       f"{_ACCEPTS}")
    w = None
    if weights is not None:
        w = _numbers(weights, what)
        if w is None:
            raise FitError(f"{what}: weights must be a 1-d array of real numbers, got "
                           f"{type(weights).__name__}")
    return x, w


def _like_centres(b: np.ndarray) -> bool:
    """Strictly increasing with equal steps (to rounding: centres computed from edges, even
    in float32, differ by a few ulps of the largest value), at least 3 values."""
    if b.size < 3 or not np.isfinite(b).all():
        return False
    d = np.diff(b)
    step = float(d.mean())
    return bool(step > 0 and (d > 0).all() and np.abs(d - step).max()
                <= 1e-4 * step + 1e-6 * float(np.abs(b).max()))


def _counts_edges(counts: np.ndarray, edges: np.ndarray, what: str) -> Any:
    from ._mass import MassHistogram

    try:
        return MassHistogram.from_counts(counts, edges)
    except InputError as exc:
        raise FitError(f"{what}: (counts, edges): {exc}") from None


def _numbers(data: Any, what: str) -> np.ndarray | None:
    """A flat float copy of a 1-d array of real numbers, else None (never a guess: records,
    strings, objects, nested lists and 2-d arrays are not masses)."""
    if data is None or isinstance(data, (str, bytes, dict)) or speaks_protocol(data):
        return None
    try:
        a = np.asarray(data)
    except (TypeError, ValueError):
        return None
    if a.ndim != 1 or a.dtype.kind not in "iuf":
        return None
    return a.astype(float)
