"""Weighted invariant-mass histograms.

:class:`MassHistogram` is the one spectrum object peaksift passes between layers:
bin edges, the sum of weights and the sum of squared weights per bin, plus under-
and overflow.  Use it when

* you fill a spectrum from candidates (``h.fill(cands.mass, cands.weight)``);
* you merge partial spectra from chunks or workers (``h1 + h2``; for unweighted data
  the merged counts equal one pass exactly, for weighted data to rounding);
* you hand a spectrum to :func:`peaksift.fit` or :func:`peaksift.scan`, which take the bins
  inside their window (:meth:`~MassHistogram.restrict`) and, for weighted spectra, the
  scaled-Poisson factor of each bin (:meth:`~MassHistogram.scaled_poisson_factors`);
* you keep a spectrum on disk (``save``/``load``; ``.npz`` or ``.json``, both exact).

:meth:`MassHistogram.from_masses` builds and fills one in a call.

The edge rule (``numpy.histogram``'s): bins are ``[edge[i], edge[i+1])`` except the last,
which is closed, ``[edge[n-1], edge[n]]``.  A mass equal to the top of the range is inside
the range, as a fit window ``lo <= m <= hi`` selects it (:func:`in_range` is that test for
raw masses); the overflow holds masses above the last edge, the underflow masses below the
first.  NaN values are not filled; they are counted in ``n_nan``.
"""

from __future__ import annotations

import io
import json
import os
import zipfile
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from ._files import atomic_write
from .errors import InputError

__all__ = ["MassHistogram", "in_range"]

_FORMAT = "peaksift-mass-histogram"
_FORMAT_VERSION = 1


def _check_edges(edges: Any) -> np.ndarray:
    try:
        e = np.array(edges, dtype=float)
    except (TypeError, ValueError):
        raise InputError(
            f"histogram edges must be numbers, got {edges!r:.80}; pass e.g. "
            "edges=np.linspace(60, 120, 121) or bins=120, range=(60, 120)"
        ) from None
    if e.ndim != 1 or e.size < 2:
        raise InputError(
            f"histogram edges must be a 1-d sequence of at least 2 numbers, got shape {e.shape}; "
            "pass e.g. edges=np.linspace(60, 120, 121) or bins=120, range=(60, 120)"
        )
    if not np.all(np.isfinite(e)):
        bad = int(np.flatnonzero(~np.isfinite(e))[0])
        raise InputError(
            f"histogram edge {bad} is {float(e[bad])!r}; all edges must be finite numbers"
        )
    d = np.diff(e)
    if np.any(d <= 0):
        bad = int(np.flatnonzero(d <= 0)[0])
        raise InputError(
            f"histogram edges must increase strictly, but edge {bad + 1} ({float(e[bad + 1])!r}) "
            f"is not above edge {bad} ({float(e[bad])!r}); sort the edges and remove duplicates"
        )
    e.setflags(write=False)
    return e


# below this many bins a binary search over the edges is as fast as the arithmetic index
_ARITHMETIC_INDEX_MIN_BINS = 128


def _regular_index(edges: np.ndarray, values: np.ndarray) -> np.ndarray:
    """``np.searchsorted(edges, values, side="right")`` for regular edges and values without
    NaN, exactly, by arithmetic: several times faster for unsorted values, since a binary
    search over hundreds of edges misses the cache for every value.  The arithmetic guess
    is checked against the actual edges and moved by one bin where rounding put it on the
    wrong side of an edge (index ``j`` holds ``edges[j-1] <= v < edges[j]``; the padding
    -inf and NaN make the tests false beyond the first and last edge)."""
    n = edges.size - 1
    lo, hi = float(edges[0]), float(edges[-1])
    ext = np.concatenate([[-np.inf], edges, [np.nan]])
    t = (values - lo) * (n / (hi - lo))
    np.clip(t, -1.0, float(n), out=t)
    k = np.floor(t, out=t).astype(np.intp)  # -1: underflow, n: overflow, else the bin
    k += 1  # now the searchsorted index, 0 .. n + 1
    for _ in range(3):  # rounding moves a guess by at most one bin
        down = values < ext[k]
        up = values >= ext[k + 1]
        if not (down.any() or up.any()):
            return k
        k -= down
        k += up
    wrong = (values < ext[k]) | (values >= ext[k + 1])  # never seen; exact either way
    k[wrong] = np.searchsorted(edges, values[wrong], side="right")
    return k


def in_range(mass: ArrayLike, lo: float, hi: float) -> np.ndarray:
    """``lo <= mass <= hi`` (both ends closed): the masses a histogram on ``[lo, hi]`` puts
    in its bins, and the masses a fit window ``(lo, hi)`` uses.  NaN is outside."""
    m = np.asarray(mass, dtype=float)
    return (m >= lo) & (m <= hi)


def _bin_index(edges: np.ndarray, values: np.ndarray, regular: bool) -> np.ndarray:
    """0 for underflow, ``1..n`` for the bins, ``n + 1`` for overflow, by the module's edge
    rule: ``searchsorted(side="right")`` (half-open bins), then the last edge moved into the
    last bin, which is closed.  ``values`` holds no NaN."""
    n = edges.size - 1
    if regular and n >= _ARITHMETIC_INDEX_MIN_BINS:
        idx = _regular_index(edges, values)
    else:
        idx = np.searchsorted(edges, values, side="right")
    idx[values == edges[-1]] = n
    return idx


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
        Sum of weights and of squared weights per bin.
    underflow, overflow : float
        Sum of weights below the first / above the last edge (a value equal to the last
        edge is in the last bin); ``underflow_weight_sq_sum`` and ``overflow_weight_sq_sum`` likewise.
    n_nan : int
        Number of NaN values offered to :meth:`fill` and not filled.
    """

    __slots__ = (
        "_regular",
        "edges",
        "label",
        "n_nan",
        "overflow",
        "overflow_weight_sq_sum",
        "underflow",
        "underflow_weight_sq_sum",
        "unit",
        "weight_sq_sum",
        "weight_sum",
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
        self.edges = _check_edges(edges)
        n = self.edges.size - 1
        self.weight_sum = np.zeros(n)
        self.weight_sq_sum = np.zeros(n)
        self.underflow = 0.0
        self.overflow = 0.0
        self.underflow_weight_sq_sum = 0.0
        self.overflow_weight_sq_sum = 0.0
        self.n_nan = 0
        self.unit = str(unit)
        self.label = str(label)
        w = np.diff(self.edges)
        self._regular = bool(np.allclose(w, w[0], rtol=1e-12, atol=0.0))

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

    @property
    def errors(self) -> np.ndarray:
        """Per-bin uncertainty ``sqrt(weight_sq_sum)``."""
        return np.sqrt(self.weight_sq_sum)

    @property
    def is_weighted(self) -> bool:
        """True when any bin's sum of squared weights differs from its sum of weights."""
        return not (
            np.array_equal(self.weight_sum, self.weight_sq_sum)
            and self.underflow == self.underflow_weight_sq_sum
            and self.overflow == self.overflow_weight_sq_sum
        )

    def total(self, *, flow: bool = False) -> float:
        """Sum of weights in the bins (and under/overflow when ``flow``)."""
        s = float(self.weight_sum.sum())
        return s + self.underflow + self.overflow if flow else s

    def copy(self) -> MassHistogram:
        h = MassHistogram(self.edges, unit=self.unit, label=self.label)
        h.weight_sum = self.weight_sum.copy()
        h.weight_sq_sum = self.weight_sq_sum.copy()
        h.underflow, h.overflow = self.underflow, self.overflow
        h.underflow_weight_sq_sum, h.overflow_weight_sq_sum = self.underflow_weight_sq_sum, self.overflow_weight_sq_sum
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
        idx = _bin_index(self.edges, m, self._regular)  # 0 underflow, 1..n, n+1 overflow
        if w is None:
            s1 = s2 = np.bincount(idx, minlength=n + 2).astype(float)
        else:
            s1 = np.bincount(idx, weights=w, minlength=n + 2)
            s2 = np.bincount(idx, weights=w * w, minlength=n + 2)
        self.weight_sum += s1[1 : n + 1]
        self.weight_sq_sum += s2[1 : n + 1]
        self.underflow += s1[0]
        self.overflow += s1[n + 1]
        self.underflow_weight_sq_sum += s2[0]
        self.overflow_weight_sq_sum += s2[n + 1]
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
        try:
            lo, hi = (float(v) for v in window)
        except (TypeError, ValueError):
            raise InputError(f"window must be two numbers (lo, hi) in {self.unit}, got "
                             f"{window!r:.80}") from None
        if not (np.isfinite(lo) and np.isfinite(hi) and hi > lo):
            raise InputError(f"window must be finite with lo < hi, got ({lo!r}, {hi!r})")
        e = self.edges
        tol = 1e-9 * (self.hi - self.lo)
        keep = np.flatnonzero((e[:-1] >= lo - tol) & (e[1:] <= hi + tol))
        if keep.size == 0:
            i = int(np.clip(np.searchsorted(e, lo, side="left"), 0, self.nbins - 1))
            raise InputError(
                f"window ({lo:g}, {hi:g}) contains no complete bin of the histogram ({self.nbins} "
                f"bins on [{self.lo:g}, {self.hi:g}] {self.unit}); choose a window spanning "
                f"at least one whole bin, e.g. ({e[i]:g}, {e[i + 1]:g}), or refill the masses "
                "with finer bins")
        i0, i1 = int(keep[0]), int(keep[-1]) + 1
        h = MassHistogram(e[i0 : i1 + 1], unit=self.unit, label=self.label)
        h.weight_sum = self.weight_sum[i0:i1].copy()
        h.weight_sq_sum = self.weight_sq_sum[i0:i1].copy()
        h.underflow = self.underflow + float(self.weight_sum[:i0].sum())
        h.underflow_weight_sq_sum = self.underflow_weight_sq_sum + float(self.weight_sq_sum[:i0].sum())
        h.overflow = self.overflow + float(self.weight_sum[i1:].sum())
        h.overflow_weight_sq_sum = self.overflow_weight_sq_sum + float(self.weight_sq_sum[i1:].sum())
        h.n_nan = self.n_nan
        return h

    def scaled_poisson_factors(self) -> np.ndarray:
        """The scaled-Poisson factor of every bin, ``s_i = weight_sum_i / weight_sq_sum_i``.

        A bin of weighted entries is treated as a Poisson count of ``s_i weight_sum_i`` effective
        entries with expectation ``s_i mu_i`` (Bohm and Zech, "Statistics of weighted
        Poisson events and its applications", NIM A 748 (2014) 1): the scale makes the
        effective count's variance equal its mean.  Bins with no usable ratio (``weight_sq_sum = 0``,
        or ``weight_sum <= 0`` from negative weights) take the ratio of the totals over the bins,
        ``sum(weight_sum) / sum(weight_sq_sum)`` (1 when that is undefined).  Unweighted histograms give 1
        in every bin.
        """
        n, n2 = self.weight_sum, self.weight_sq_sum
        if np.array_equal(n, n2):
            return np.ones_like(n)
        total2 = float(n2.sum())
        overall = float(n.sum()) / total2 if total2 > 0 else 1.0
        with np.errstate(invalid="ignore", divide="ignore"):
            s = np.where(n2 > 0, n / np.where(n2 > 0, n2, 1.0), overall)
        return np.where(s > 0, s, overall)

    # ------------------------------------------------------------------- merge
    def _check_compatible(self, other: Any) -> None:
        if not isinstance(other, MassHistogram):
            raise InputError(f"can only add a MassHistogram to a MassHistogram, not {type(other).__name__}")
        if other.edges.shape != self.edges.shape or not np.array_equal(other.edges, self.edges):
            raise InputError(
                f"cannot add histograms with different binning ({self.nbins} bins on "
                f"[{self.lo:g}, {self.hi:g}] vs {other.nbins} bins on [{other.lo:g}, {other.hi:g}]); "
                "fill both with the same edges, or rebin one to the other's edges first"
            )

    def __add__(self, other: MassHistogram) -> MassHistogram:
        if isinstance(other, int) and other == 0:  # lets sum([...]) work
            return self.copy()
        h = self.copy()
        h += other
        return h

    __radd__ = __add__

    def __iadd__(self, other: MassHistogram) -> MassHistogram:  # noqa: PYI034 - py3.10
        self._check_compatible(other)
        self.weight_sum += other.weight_sum
        self.weight_sq_sum += other.weight_sq_sum
        self.underflow += other.underflow
        self.overflow += other.overflow
        self.underflow_weight_sq_sum += other.underflow_weight_sq_sum
        self.overflow_weight_sq_sum += other.overflow_weight_sq_sum
        self.n_nan += other.n_nan
        return self

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, MassHistogram):
            return NotImplemented
        return (
            np.array_equal(self.edges, other.edges)
            and np.array_equal(self.weight_sum, other.weight_sum)
            and np.array_equal(self.weight_sq_sum, other.weight_sq_sum)
            and (self.underflow, self.overflow, self.underflow_weight_sq_sum, self.overflow_weight_sq_sum, self.n_nan)
            == (other.underflow, other.overflow, other.underflow_weight_sq_sum, other.overflow_weight_sq_sum, other.n_nan)
        )

    __hash__ = None  # type: ignore[assignment]

    # ------------------------------------------------------------------- rebin
    def rebin(self, factor: int | None = None, *, edges: Any = None) -> MassHistogram:
        """Merge bins: by an integer ``factor`` or onto ``edges`` chosen among the current ones.

        Contents outside new ``edges`` (when they do not span the old range) move to the
        under/overflow, so no weight is lost.
        """
        if (factor is None) == (edges is None):
            raise InputError("rebin needs exactly one of factor=N or edges=[...]")
        if factor is not None:
            if int(factor) != factor or factor < 1:
                raise InputError(f"rebin factor must be a positive integer, got {factor!r}")
            factor = int(factor)
            if self.nbins % factor:
                raise InputError(
                    f"rebin factor {factor} does not divide the {self.nbins} bins; "
                    "choose a divisor or pass edges=[...]"
                )
            keep = np.arange(0, self.nbins + 1, factor)
        else:
            new = _check_edges(edges)
            # nearest current edge to each new one; it must agree to rounding
            right = np.clip(np.searchsorted(self.edges, new), 0, self.edges.size - 1)
            left = np.clip(right - 1, 0, self.edges.size - 1)
            closer_left = np.abs(self.edges[left] - new) < np.abs(self.edges[right] - new)
            keep = np.where(closer_left, left, right)
            ok = np.isclose(self.edges[keep], new, rtol=1e-12, atol=1e-12)
            if not ok.all():
                bad = new[~ok][0]
                raise InputError(
                    f"rebin edge {float(bad)!r} is not one of the current edges; new edges must be a "
                    "subset of the old ones"
                )
        h = MassHistogram(self.edges[keep], unit=self.unit, label=self.label)
        # exact per-group sums; reduceat's last group runs to the array end, so redo it
        starts = keep[:-1]
        h.weight_sum = np.add.reduceat(self.weight_sum, starts)
        h.weight_sq_sum = np.add.reduceat(self.weight_sq_sum, starts)
        h.weight_sum[-1] = self.weight_sum[keep[-2] : keep[-1]].sum()
        h.weight_sq_sum[-1] = self.weight_sq_sum[keep[-2] : keep[-1]].sum()
        h.underflow = self.underflow + float(self.weight_sum[: keep[0]].sum())
        h.underflow_weight_sq_sum = self.underflow_weight_sq_sum + float(self.weight_sq_sum[: keep[0]].sum())
        h.overflow = self.overflow + float(self.weight_sum[keep[-1] :].sum())
        h.overflow_weight_sq_sum = self.overflow_weight_sq_sum + float(self.weight_sq_sum[keep[-1] :].sum())
        h.n_nan = self.n_nan
        return h

    # -------------------------------------------------------------- save/load
    def to_dict(self) -> dict[str, Any]:
        return {
            "format": _FORMAT,
            "version": _FORMAT_VERSION,
            "unit": self.unit,
            "label": self.label,
            "edges": self.edges.tolist(),
            "weight_sum": self.weight_sum.tolist(),
            "weight_sq_sum": self.weight_sq_sum.tolist(),
            "underflow": self.underflow,
            "overflow": self.overflow,
            "underflow_weight_sq_sum": self.underflow_weight_sq_sum,
            "overflow_weight_sq_sum": self.overflow_weight_sq_sum,
            "n_nan": self.n_nan,
        }

    @classmethod
    def from_dict(cls, d: dict[str, Any], *, where: str = "histogram") -> MassHistogram:
        if not isinstance(d, dict):
            raise InputError(f"{where}: not a peaksift mass histogram (not a JSON object)")
        if d.get("format") != _FORMAT:
            raise InputError(f"{where}: not a peaksift mass histogram (format key is {d.get('format')!r})")
        try:
            h = cls(np.asarray(d["edges"], dtype=float), unit=str(d.get("unit", "GeV")),
                    label=str(d.get("label", "m")))
            weight_sum = np.asarray(d["weight_sum"], dtype=float)
            weight_sq_sum = np.asarray(d["weight_sq_sum"], dtype=float)
        except KeyError as exc:
            raise InputError(f"{where}: missing key {exc.args[0]!r}") from None
        if weight_sum.shape != (h.nbins,) or weight_sq_sum.shape != (h.nbins,):
            raise InputError(
                f"{where}: {h.nbins} bins but weight_sum has {weight_sum.size} and weight_sq_sum {weight_sq_sum.size} entries"
            )
        h.weight_sum, h.weight_sq_sum = weight_sum, weight_sq_sum
        h.underflow = float(d.get("underflow", 0.0))
        h.overflow = float(d.get("overflow", 0.0))
        h.underflow_weight_sq_sum = float(d.get("underflow_weight_sq_sum", 0.0))
        h.overflow_weight_sq_sum = float(d.get("overflow_weight_sq_sum", 0.0))
        h.n_nan = int(d.get("n_nan", 0))
        return h

    def save(self, path: str | os.PathLike[str]) -> Path:
        """Write to ``path``: JSON when it ends in ``.json``, otherwise NumPy ``.npz``.

        Both round-trip exactly.  The file is written under a temporary name and renamed,
        so a failure never leaves a half-written histogram.
        """
        path = Path(path)
        if path.suffix.lower() == ".json":
            data = json.dumps(self.to_dict(), indent=1).encode()
        else:
            buf = io.BytesIO()
            np.savez(
                buf,
                format=np.array(_FORMAT),
                version=np.array(_FORMAT_VERSION),
                unit=np.array(self.unit),
                label=np.array(self.label),
                edges=np.asarray(self.edges),
                weight_sum=self.weight_sum,
                weight_sq_sum=self.weight_sq_sum,
                flow=np.array([self.underflow, self.overflow,
                               self.underflow_weight_sq_sum, self.overflow_weight_sq_sum]),
                n_nan=np.array(self.n_nan),
            )
            data = buf.getvalue()
        atomic_write(path, data)
        return path

    @classmethod
    def load(cls, path: str | os.PathLike[str]) -> MassHistogram:
        """Read a histogram written by :meth:`save`."""
        path = Path(path)
        if not path.exists():
            raise InputError(f"histogram file {str(path)!r} does not exist")
        try:
            if path.suffix.lower() == ".json":
                return cls.from_dict(json.loads(path.read_text()), where=str(path))
            with np.load(path, allow_pickle=False) as z:
                flow = z["flow"]
                d = {
                    "format": str(z["format"]),
                    "unit": str(z["unit"]),
                    "label": str(z["label"]),
                    "edges": z["edges"],
                    "weight_sum": z["weight_sum"],
                    "weight_sq_sum": z["weight_sq_sum"],
                    "underflow": flow[0],
                    "overflow": flow[1],
                    "underflow_weight_sq_sum": flow[2],
                    "overflow_weight_sq_sum": flow[3],
                    "n_nan": int(z["n_nan"]),
                }
        except InputError:
            raise
        except (OSError, ValueError, KeyError, TypeError, EOFError, zipfile.BadZipFile) as exc:
            # corrupt file, wrong archive, missing arrays
            raise InputError(f"cannot read histogram file {str(path)!r}: {exc}") from None
        return cls.from_dict(d, where=str(path))

    # -------------------------------------------------------------------- plot
    def plot(self, ax: Any = None, *, density: bool = False, **kwargs: Any) -> Any:
        """Draw the spectrum as points with ``sqrt(weight_sq_sum)`` error bars; returns the
        Figure (``ax.figure`` when an Axes is given, else a new Figure made without pyplot,
        so the matplotlib backend is left alone).

        With ``density=True`` (and always for variable bins) the contents are divided by
        the bin width (candidates per GeV).  Drawn in the peaksift figure style.
        """
        from ._style import COLORS, figure_style, new_figure

        if ax is None:
            _, ax = new_figure((7, 4.5))
        scale = 1.0 / self.widths if (density or not self._regular) else 1.0
        y = self.weight_sum * scale
        yerr = self.errors * scale
        kwargs.setdefault("fmt", "o")
        kwargs.setdefault("ms", 3)
        kwargs.setdefault("color", COLORS["data"])
        kwargs.setdefault("elinewidth", 0.9)
        kwargs.setdefault("label", "data")
        with figure_style():
            ax.errorbar(self.centers, y, yerr=yerr,
                        xerr=0.5 * self.widths if self.nbins < 80 else None, **kwargs)
        ax.set_xlabel(f"${self.label}$ [{self.unit}]" if self.label.isalpha() else
                      f"{self.label} [{self.unit}]")
        if density or not self._regular:
            ax.set_ylabel(f"candidates / {self.unit}")
        else:
            ax.set_ylabel(f"candidates / {self.widths[0]:.3g} {self.unit}")
        ax.set_xlim(self.lo, self.hi)
        return ax.figure

    # ------------------------------------------------------------------- repr
    def __repr__(self) -> str:
        kind = "regular" if self._regular else "variable"
        return (
            f"MassHistogram({self.nbins} {kind} bins on [{self.lo:g}, {self.hi:g}] {self.unit}, "
            f"sum of weights {self.total():.6g}, underflow {self.underflow:.6g}, "
            f"overflow {self.overflow:.6g})"
        )

    def _repr_html_(self) -> str:
        import html

        kind = "regular" if self._regular else "variable"
        rows = (("bins", f"{self.nbins} {kind} on [{self.lo:g}, {self.hi:g}] {self.unit}"),
                ("sum of weights", f"{self.total():.6g}"),
                ("weighted", "yes" if self.is_weighted else "no"),
                ("underflow / overflow", f"{self.underflow:.6g} / {self.overflow:.6g}"))
        cells = "".join(f"<tr><td>{html.escape(k)}</td><td>{html.escape(v)}</td></tr>"
                        for k, v in rows)
        return f"<div><b>MassHistogram</b><table>{cells}</table></div>"
