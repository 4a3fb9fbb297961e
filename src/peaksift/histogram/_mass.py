"""Weighted invariant-mass histograms.

:class:`MassHistogram` is the one spectrum object peaksift passes between layers:
bin edges, per bin the sum of weights (its *values*) and the sum of squared weights (its
*variances*), plus under- and overflow.  Use it when

* you fill a spectrum from candidates (``h.fill(cands.mass, cands.weight)``);
* you merge partial spectra from chunks or workers (``h1 + h2``; for unweighted data
  the merged counts equal one pass exactly, for weighted data to rounding);
* you hand a spectrum to :func:`peaksift.fit` or :func:`peaksift.scan`, which take the bins
  inside their window (:meth:`~MassHistogram.restrict`) and, for weighted spectra, the
  scaled-Poisson factor of each bin (:meth:`~MassHistogram.scaled_poisson_factors`);
* you keep a spectrum on disk (``save``/``load``; ``.npz`` or ``.json``, both exact);
* you hand it to another histogram or plotting library: it speaks the cross-library
  histogram protocol (``values()``, ``variances()``, ``counts()``, ``axes``, ``kind``).

:meth:`MassHistogram.from_masses` builds and fills one in a call;
:meth:`MassHistogram.from_counts` takes a ``(counts, edges)`` pair (``numpy.histogram``'s
return); :meth:`MassHistogram.from_protocol` converts any histogram that speaks the protocol.

The edge rule is :mod:`peaksift.histogram.binning`'s (``numpy.histogram``'s, the last bin
closed); the overflow holds masses above the last edge, the underflow masses below the
first.  NaN values are not filled; they are counted in ``n_nan``.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from ..errors import InputError
from ._display import html_table, plot
from ._protocol import MassAxis, from_counts, from_protocol, speaks_protocol
from ._regroup import rebin, restrict
from ._storage import from_dict, load, save, to_dict
from .binning import bin_index, check_edges, is_regular

__all__ = ["MassHistogram"]

class MassHistogram:
    """A weighted one-dimensional histogram of invariant masses.

    Parameters
    ----------
    edges : array_like, optional
        Bin edges, strictly increasing (variable binning allowed).
    bins, range : int and (float, float), optional
        Regular binning: ``bins`` equal bins on ``range``; used when ``edges`` is None.
    unit : str
        Unit of the mass axis, for labels (default ``"GeV"``).
    label : str
        Axis label of the mass (default ``"m"``).

    Attributes
    ----------
    edges : ndarray
        Read-only bin edges (``nbins + 1``).
    weight_sum, weight_sq_sum : ndarray
        The arrays ``values()`` and ``variances()`` return: sum of weights and of squared
        weights per bin (kept for code written against these names).
    underflow, overflow : float
        Sum of weights below the first / above the last edge (a value equal to the last
        edge is in the last bin); ``underflow_variance`` and ``overflow_variance`` likewise.
    n_nan : int
        Number of NaN values offered to :meth:`fill` and not filled.
    """

    __slots__ = (
        "_regular",
        "_values",
        "_variances",
        "edges",
        "label",
        "n_nan",
        "overflow",
        "overflow_variance",
        "underflow",
        "underflow_variance",
        "unit",
    )

    def __init__(
        self,
        edges: Any = None,
        *,
        bins: int | None = None,
        range: tuple[float, float] | None = None,  # mirrors numpy.histogram
        unit: str = "GeV",
        label: str = "m",
    ) -> None:
        if edges is None:
            if bins is None or range is None:
                raise InputError(
                    "MassHistogram needs either edges=... or both bins=... and range=(lo, hi)"
                )
            if int(bins) != bins or bins < 1:
                raise InputError(f"bins must be a positive integer, got {bins!r}")
            lo, hi = float(range[0]), float(range[1])
            if not (np.isfinite(lo) and np.isfinite(hi) and hi > lo):
                raise InputError(f"range must be finite with hi > lo, got {range!r}")
            edges = np.linspace(lo, hi, int(bins) + 1)
        elif bins is not None or range is not None:
            raise InputError("give either edges=... or bins=/range=, not both")
        self.edges = check_edges(edges)
        n = self.edges.size - 1
        self._values = np.zeros(n)
        self._variances = np.zeros(n)
        self.underflow = 0.0
        self.overflow = 0.0
        self.underflow_variance = 0.0
        self.overflow_variance = 0.0
        self.n_nan = 0
        self.unit = str(unit)
        self.label = str(label)
        self._regular = is_regular(self.edges)

    @classmethod
    def _on_checked_edges(cls, edges: np.ndarray, unit: str, label: str,
                          regular: bool | None = None) -> MassHistogram:
        """An empty histogram on ``edges`` taken from a checked histogram's (a run or a
        subset of them, still increasing and finite): the checks of ``__init__`` skipped
        (restricting and rebinning run in every fit)."""
        h = cls.__new__(cls)
        e = np.array(edges, dtype=float)
        e.setflags(write=False)
        h.edges = e
        h._values = np.zeros(e.size - 1)
        h._variances = np.zeros(e.size - 1)
        h.underflow = h.overflow = h.underflow_variance = h.overflow_variance = 0.0
        h.n_nan = 0
        h.unit = str(unit)
        h.label = str(label)
        h._regular = is_regular(e) if regular is None else bool(regular)
        return h

    # ------------------------------------------------------------------ basics
    @property
    def nbins(self) -> int:
        return self.edges.size - 1

    @property
    def centers(self) -> np.ndarray:
        return 0.5 * (self.edges[1:] + self.edges[:-1])

    @property
    def widths(self) -> np.ndarray:
        return np.diff(self.edges)

    @property
    def lo(self) -> float:
        return float(self.edges[0])

    @property
    def hi(self) -> float:
        return float(self.edges[-1])

    @property
    def is_regular(self) -> bool:
        return self._regular

    # ---------------------------------------------- cross-library histogram protocol
    @property
    def kind(self) -> str:
        """``"COUNT"``: the bins hold sums of weights (the protocol's other kind, a mean per
        bin, is not a spectrum)."""
        return "COUNT"

    @property
    def axes(self) -> tuple[MassAxis]:
        """The one mass axis (protocol axis: ``len``, ``axis[i] -> (lo, hi)``, ``traits``,
        ``edges``, ``label``)."""
        return (MassAxis(self.edges, self.label, self.unit),)

    def values(self, flow: bool = False) -> np.ndarray:
        """Sum of weights per bin (with ``flow``: underflow first, overflow last).  Without
        ``flow`` this is the histogram's own array: writing into it changes the histogram."""
        if flow:
            return np.concatenate([[self.underflow], self._values, [self.overflow]])
        return self._values

    def variances(self, flow: bool = False) -> np.ndarray:
        """Sum of squared weights per bin, the variance of each bin's sum of weights (with
        ``flow``: underflow first, overflow last)."""
        if flow:
            return np.concatenate([[self.underflow_variance], self._variances,
                                   [self.overflow_variance]])
        return self._variances

    def counts(self, flow: bool = False) -> np.ndarray:
        """Entries per bin: the values for unweighted fills; for weighted ones the effective
        number of entries ``values**2 / variances`` (0 where the variance is 0), the
        protocol's definition."""
        v, var = self.values(flow), self.variances(flow)
        if not self.is_weighted:
            return v.copy()
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(var > 0, v * v / np.where(var > 0, var, 1.0), 0.0)

    @property
    def weight_sum(self) -> np.ndarray:
        return self._values

    @weight_sum.setter
    def weight_sum(self, a: Any) -> None:
        self._values = np.asarray(a, dtype=float)

    @property
    def weight_sq_sum(self) -> np.ndarray:
        return self._variances

    @weight_sq_sum.setter
    def weight_sq_sum(self, a: Any) -> None:
        self._variances = np.asarray(a, dtype=float)

    @property
    def errors(self) -> np.ndarray:
        """Per-bin uncertainty ``sqrt(variances)``."""
        return np.sqrt(self._variances)

    @property
    def is_weighted(self) -> bool:
        """True when any bin's sum of squared weights differs from its sum of weights."""
        return not (
            np.array_equal(self._values, self._variances)
            and self.underflow == self.underflow_variance
            and self.overflow == self.overflow_variance
        )

    def total(self, *, flow: bool = False) -> float:
        """Sum of weights in the bins (and under/overflow when ``flow``)."""
        s = float(self._values.sum())
        return s + self.underflow + self.overflow if flow else s

    def copy(self) -> MassHistogram:
        h = MassHistogram(self.edges, unit=self.unit, label=self.label)
        h._values = self._values.copy()
        h._variances = self._variances.copy()
        h.underflow, h.overflow = self.underflow, self.overflow
        h.underflow_variance, h.overflow_variance = self.underflow_variance, self.overflow_variance
        h.n_nan = self.n_nan
        return h

    def empty_like(self) -> MassHistogram:
        return MassHistogram(self.edges, unit=self.unit, label=self.label)

    # -------------------------------------------------------------------- fill
    def fill(self, mass: Any, weight: Any = None) -> MassHistogram:
        """Add values (with optional per-value weights); returns ``self``.

        Raises
        ------
        InputError
            When ``weight`` does not match ``mass`` in length or holds non-finite values.
        """
        try:
            m = np.asarray(mass, dtype=float).ravel()
            w = None if weight is None else np.asarray(weight, dtype=float)
        except (TypeError, ValueError):
            raise InputError(
                "fill: masses and weights must be numbers (a flat array, e.g. cands.mass)"
            ) from None
        if w is not None:
            if w.ndim == 0:
                w = np.full(m.shape, float(w))
            w = w.ravel()
            if w.shape != m.shape:
                raise InputError(
                    f"fill: {m.size} masses but {w.size} weights; give one weight per mass"
                )
            if not np.all(np.isfinite(w)):
                raise InputError("fill: weights must be finite; found NaN or infinite weights")
        nan = np.isnan(m)
        if nan.any():
            self.n_nan += int(nan.sum())
            keep = ~nan
            m = m[keep]
            if w is not None:
                w = w[keep]
        if m.size == 0:
            return self
        n = self.nbins
        idx = bin_index(self.edges, m, self._regular)  # 0 underflow, 1..n, n+1 overflow
        if w is None:
            s1 = s2 = np.bincount(idx, minlength=n + 2).astype(float)
        else:
            s1 = np.bincount(idx, weights=w, minlength=n + 2)
            s2 = np.bincount(idx, weights=w * w, minlength=n + 2)
        self._values += s1[1 : n + 1]
        self._variances += s2[1 : n + 1]
        self.underflow += s1[0]
        self.overflow += s1[n + 1]
        self.underflow_variance += s2[0]
        self.overflow_variance += s2[n + 1]
        return self

    @classmethod
    def from_masses(
        cls,
        mass: ArrayLike,
        weight: ArrayLike | None = None,
        *,
        edges: ArrayLike | None = None,
        bins: int | None = None,
        range: tuple[float, float] | None = None,  # mirrors numpy.histogram
        unit: str = "GeV",
        label: str = "m",
    ) -> MassHistogram:
        """A new histogram (``edges``, or ``bins`` equal bins on ``range``) filled with
        ``mass`` and optional ``weight``: ``MassHistogram(edges).fill(mass, weight)``."""
        return cls(edges, bins=bins, range=range, unit=unit, label=label).fill(mass, weight)

    @classmethod
    def from_counts(
        cls,
        counts: ArrayLike,
        edges: ArrayLike,
        variances: ArrayLike | None = None,
        *,
        underflow: float = 0.0,
        overflow: float = 0.0,
        unit: str = "GeV",
        label: str = "m",
    ) -> MassHistogram:
        """A histogram from bin contents and edges, e.g. ``numpy.histogram``'s return
        ``(counts, edges)``: ``MassHistogram.from_counts(*np.histogram(m, bins=90))``.

        ``variances`` (sums of squared weights per bin) default to the counts themselves,
        which is right for unweighted counts; give them for sums of weights.  Flow
        variances equal the flow contents.

        Raises
        ------
        InputError
            Counts and edges do not match (``len(edges) == len(counts) + 1``), contents are
            not finite, or counts are negative without variances.
        """
        return from_counts(cls, counts, edges, variances, underflow, overflow, unit, label)

    @classmethod
    def from_protocol(cls, hist: Any, *, unit: str = "GeV", label: str | None = None
                      ) -> MassHistogram:
        """Convert any one-dimensional histogram that speaks the cross-library histogram
        protocol (``values()``, ``variances()``, ``axes``, ``kind``), e.g. one from a
        general-purpose histogram library, keeping its flow bins when it has them.

        The other library's edge rule may differ at the last edge (a value equal to it may
        sit in the overflow there); the contents are taken as they are.

        Raises
        ------
        InputError
            Not one-dimensional, a categorical or circular axis, a histogram of means, or
            weighted contents without variances (fill with a storage that keeps the sum of
            squared weights).
        """
        return from_protocol(cls, hist, unit, label)

    # ------------------------------------------------------- window, likelihood
    def restrict(self, window: tuple[float, float]) -> MassHistogram:
        """The bins lying completely inside ``window = (lo, hi)``, as a new histogram.

        The window snaps to the edges of those bins (an edge closer to ``lo`` or ``hi`` than
        1e-9 of the histogram's range counts as on it); bins cut by the window are left out
        and their contents join the under- or overflow, so no weight is lost.  A value equal to
        an inner edge was counted in the bin above it and stays there: it is inside a
        window starting at that edge and outside one ending there.

        Raises
        ------
        InputError
            ``window`` is not two finite numbers with lo < hi, or no bin lies completely
            inside it (the message names the nearest edges to choose).
        """
        return restrict(MassHistogram, self, window)

    def scaled_poisson_factors(self) -> np.ndarray:
        """The scaled-Poisson factor of every bin, ``s_i = values_i / variances_i``.

        A bin of weighted entries is treated as a Poisson count of ``s_i values_i`` effective
        entries with expectation ``s_i mu_i`` (Bohm and Zech, "Statistics of weighted
        Poisson events and its applications", NIM A 748 (2014) 1): the scale makes the
        effective count's variance equal its mean.  Bins with no usable ratio (``variances = 0``,
        or ``values <= 0`` from negative weights) take the ratio of the totals over the bins,
        ``sum(values) / sum(variances)`` (1 when that is undefined).  Unweighted histograms give 1
        in every bin.
        """
        n, n2 = self._values, self._variances
        if np.array_equal(n, n2):
            return np.ones_like(n)
        total2 = float(n2.sum())
        overall = float(n.sum()) / total2 if total2 > 0 else 1.0
        with np.errstate(invalid="ignore", divide="ignore"):
            s = np.where(n2 > 0, n / np.where(n2 > 0, n2, 1.0), overall)
        return np.where(s > 0, s, overall)

    # ------------------------------------------------------------------- merge
    def _compatible(self, other: Any) -> MassHistogram:
        """``other`` as a MassHistogram with this binning (edges equal to 1e-12 of the
        range, so another library's regular edges match ``numpy.linspace``'s)."""
        if not isinstance(other, MassHistogram):
            if not speaks_protocol(other):
                raise InputError(
                    f"can only add a histogram to a MassHistogram (a MassHistogram or an object "
                    f"speaking the histogram protocol: values(), variances(), axes), not "
                    f"{type(other).__name__}")
            other = MassHistogram.from_protocol(other, unit=self.unit, label=self.label)
        if other.edges.shape != self.edges.shape or not np.allclose(
                other.edges, self.edges, rtol=0.0, atol=1e-12 * (self.hi - self.lo)):
            raise InputError(
                f"cannot add histograms with different binning ({self.nbins} bins on "
                f"[{self.lo:g}, {self.hi:g}] vs {other.nbins} bins on [{other.lo:g}, {other.hi:g}]); "
                "fill both with the same edges, or rebin one to the other's edges first"
            )
        return other

    def __add__(self, other: Any) -> MassHistogram:
        if isinstance(other, int) and other == 0:  # lets sum([...]) work
            return self.copy()
        h = self.copy()
        h += other
        return h

    __radd__ = __add__

    def __iadd__(self, other: Any) -> MassHistogram:  # noqa: PYI034 - py3.10
        other = self._compatible(other)
        self._values += other._values
        self._variances += other._variances
        self.underflow += other.underflow
        self.overflow += other.overflow
        self.underflow_variance += other.underflow_variance
        self.overflow_variance += other.overflow_variance
        self.n_nan += other.n_nan
        return self

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, MassHistogram):
            return NotImplemented
        return (
            np.array_equal(self.edges, other.edges)
            and np.array_equal(self._values, other._values)
            and np.array_equal(self._variances, other._variances)
            and (self.underflow, self.overflow, self.underflow_variance, self.overflow_variance, self.n_nan)
            == (other.underflow, other.overflow, other.underflow_variance, other.overflow_variance, other.n_nan)
        )

    __hash__ = None  # type: ignore[assignment]

    # ------------------------------------------------------------------- rebin
    def rebin(self, factor: int | None = None, *, edges: Any = None) -> MassHistogram:
        """Merge bins: by an integer ``factor`` or onto ``edges`` chosen among the current ones.

        Contents outside new ``edges`` (when they do not span the old range) move to the
        under/overflow, so no weight is lost.
        """
        return rebin(MassHistogram, self, factor, edges)

    # -------------------------------------------------------------- save/load
    def to_dict(self) -> dict[str, Any]:
        """A JSON-ready dict (the ``spectrum.json`` format, version 2: ``values`` and
        ``variances`` per bin); :meth:`from_dict` reads it back exactly."""
        return to_dict(self)

    @classmethod
    def from_dict(cls, d: dict[str, Any], *, where: str = "histogram") -> MassHistogram:
        """Read :meth:`to_dict`'s dict; a version 1 dict (``weight_sum``/``weight_sq_sum``)
        still loads, with a DeprecationWarning."""
        return from_dict(cls, d, where)

    def save(self, path: str | os.PathLike[str]) -> Path:
        """Write to ``path``: JSON when it ends in ``.json``, otherwise NumPy ``.npz``.

        Both round-trip exactly.  The file is written under a temporary name and renamed,
        so a failure never leaves a half-written histogram.
        """
        return save(self, Path(path))

    @classmethod
    def load(cls, path: str | os.PathLike[str]) -> MassHistogram:
        """Read a histogram written by :meth:`save` (either version)."""
        return load(cls, Path(path))

    # -------------------------------------------------------------------- plot
    def plot(self, ax: Any = None, *, density: bool = False, **kwargs: Any) -> Any:
        """Draw the spectrum as points with ``sqrt(variances)`` error bars; returns the
        Figure (``ax.figure`` when an Axes is given, else a new Figure made without pyplot,
        so the matplotlib backend is left alone).

        With ``density=True`` (and always for variable bins) the contents are divided by
        the bin width (candidates per GeV).  Drawn in the peaksift figure style.
        """
        return plot(self, ax, density, kwargs)

    # ------------------------------------------------------------------- repr
    def __repr__(self) -> str:
        kind = "regular" if self._regular else "variable"
        return (
            f"MassHistogram({self.nbins} {kind} bins on [{self.lo:g}, {self.hi:g}] {self.unit}, "
            f"sum of weights {self.total():.6g}, underflow {self.underflow:.6g}, "
            f"overflow {self.overflow:.6g})"
        )

    def _repr_html_(self) -> str:
        return html_table(self)
