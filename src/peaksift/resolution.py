"""The detector mass resolution: the Gaussian width sigma(m) of a narrow peak at mass m.

:class:`Resolution` is the one way peaksift is told the resolution, in the API and in the
configuration (``[model.resolution]``).  Say which kind of number you have:

* ``Resolution.relative(0.01)``  -- sigma = 1% of the mass (a fraction sigma/m, in (0, 1]);
* ``Resolution.absolute(2.0)``   -- sigma = 2 GeV at every mass;
* ``Resolution.table([(90, 0.99), (150, 1.98), (200, 2.8)])`` -- measured points
  ``(mass, sigma)`` in GeV, interpolated linearly in mass; masses outside the table are
  refused (extend the table rather than let peaksift guess);
* ``Resolution.function(f)``     -- any callable ``f(m) -> sigma`` in GeV.

A bare number is never guessed: ``scan(..., resolution=2.0)`` is refused with a message that
names the two readings.  :func:`resolution_from` turns the keyword forms of
:func:`peaksift.scan` and :func:`peaksift.upper_limits` (``resolution=``,
``relative_resolution=``, ``absolute_resolution=``) into a :class:`Resolution`.

:func:`check_resolved` refuses a sigma far below the bin width (e.g. an absolute resolution
of 1e-9 GeV): the signal would sit inside one bin, masses in that bin could not be told
apart, and a grid of hypotheses half a sigma apart would never end.

The module sits in the models layer beside ``shapes`` (it needs only numpy), so fits,
statistics, the configuration and the search all use this one declaration.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from .errors import FitError

__all__ = [
    "MIN_SIGMA_PER_BIN",
    "RELATIVE_MAX",
    "Resolution",
    "check_resolved",
    "relative_problem",
    "resolution_from",
]

#: the largest relative resolution sigma/m accepted (a peak as wide as its mass is no peak)
RELATIVE_MAX = 1.0
#: sigma must be at least this fraction of the width of the bin that holds the mass
MIN_SIGMA_PER_BIN = 0.01

# a mass this close (relative) to the first or last table row counts as inside the table
_TABLE_TOLERANCE = 1e-9

_KINDS = ("relative", "absolute", "table", "function")


def relative_problem(value: Any) -> str | None:
    """What is wrong with ``value`` as a relative resolution sigma/m, or None when it is fine.

    The one check of a relative resolution: :meth:`Resolution.relative` and the
    configuration key ``model.resolution.relative`` both use it.  A relative resolution must
    be a finite number with 0 < value <= :data:`RELATIVE_MAX`.
    """
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        return f"must be a number (a fraction sigma/m, e.g. 0.01 for 1%), got {value!r}"
    v = float(value)
    if not math.isfinite(v) or v <= 0:
        return (f"must be a finite fraction sigma/m > 0 and <= {RELATIVE_MAX:g}, got {v!r}; "
                "e.g. 0.01 for 1%")
    if v > RELATIVE_MAX:
        return (f"= {v:g} is sigma/m above {RELATIVE_MAX:g} (a width larger than the mass); "
                f"it must be > 0 and <= {RELATIVE_MAX:g}. If {v:g} is a width in GeV, give it as "
                "the absolute resolution instead")
    return None


def _positive_width(value: Any, what: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise FitError(f"{what} must be a number in GeV, got {value!r}")
    v = float(value)
    if not (math.isfinite(v) and v > 0):
        raise FitError(f"{what} must be a finite width > 0 in GeV, got {v!r}")
    return v


def _table_points(masses: Any, sigmas: Any) -> tuple[tuple[float, float], ...]:
    if sigmas is None:
        if isinstance(masses, Mapping):
            try:
                masses, sigmas = masses["mass"], masses["sigma"]
            except KeyError as exc:
                raise FitError(f"resolution table needs keys 'mass' and 'sigma', missing "
                               f"{exc}") from None
        else:
            try:
                rows = np.asarray(masses, dtype=float)
            except (TypeError, ValueError):
                raise FitError("resolution table: give rows [(mass, sigma), ...] or two "
                               "sequences masses, sigmas (GeV)") from None
            if rows.ndim != 2 or rows.shape[1] != 2:
                raise FitError(f"resolution table: rows must be (mass, sigma) pairs, got an "
                               f"array of shape {rows.shape}")
            masses, sigmas = rows[:, 0], rows[:, 1]
    try:
        m = np.asarray(masses, dtype=float)
        s = np.asarray(sigmas, dtype=float)
    except (TypeError, ValueError):
        raise FitError("resolution table: masses and sigmas must be numbers (GeV)") from None
    if m.ndim != 1 or m.shape != s.shape or m.size < 2:
        raise FitError(f"resolution table: masses and sigmas must be 1-d of the same length "
                       f">= 2, got shapes {m.shape} and {s.shape}")
    if not (np.all(np.isfinite(m)) and np.all(np.isfinite(s))):
        raise FitError("resolution table: masses and sigmas must be finite numbers")
    if np.any(np.diff(m) <= 0):
        raise FitError("resolution table: masses must increase strictly from row to row")
    if np.any(s <= 0):
        i = int(np.flatnonzero(s <= 0)[0])
        raise FitError(f"resolution table: every sigma must be > 0 GeV; row {i} has "
                       f"({m[i]:g}, {s[i]:g})")
    return tuple((float(a), float(b)) for a, b in zip(m, s))


@dataclass(frozen=True, repr=False)
class Resolution:
    """The detector mass resolution sigma(m) in GeV (a frozen value; ``==`` works).

    Build it with one of the constructors, which say what the number means:
    :meth:`relative` (sigma/m), :meth:`absolute` (GeV), :meth:`table` ((mass, sigma) points
    in GeV, linear interpolation) or :meth:`function` (a callable m -> sigma in GeV).

    Attributes
    ----------
    kind : str
        ``"relative"``, ``"absolute"``, ``"table"`` or ``"function"``.
    value : float or None
        sigma/m for ``relative``, sigma in GeV for ``absolute``.
    points : tuple of (mass, sigma) or None
        The table rows (GeV) for ``table``.
    func : callable or None
        The callable for ``function``.
    """

    kind: str
    value: float | None = None
    points: tuple[tuple[float, float], ...] | None = None
    func: Callable[..., Any] | None = None

    def __post_init__(self) -> None:
        # direct construction is validated the same way as the named constructors
        if self.kind not in _KINDS:
            raise FitError(f"Resolution kind must be one of {', '.join(_KINDS)}, got "
                           f"{self.kind!r}; use Resolution.relative(0.01) or "
                           "Resolution.absolute(2.0)")
        given = {"value": self.value is not None, "points": self.points is not None,
                 "func": self.func is not None}
        need = {"relative": "value", "absolute": "value", "table": "points",
                "function": "func"}[self.kind]
        if not given[need] or sum(given.values()) != 1:
            raise FitError(f"a {self.kind} Resolution holds exactly its {need}; build it "
                           f"with Resolution.{self.kind}(...)")
        if self.kind == "relative":
            problem = relative_problem(self.value)
            if problem:
                raise FitError(f"relative resolution {problem}")
            object.__setattr__(self, "value", float(self.value))  # type: ignore[arg-type]
        elif self.kind == "absolute":
            object.__setattr__(self, "value",
                               _positive_width(self.value, "absolute resolution"))
        elif self.kind == "table":
            object.__setattr__(self, "points", _table_points(self.points, None))
        elif not callable(self.func):
            raise FitError(f"Resolution.function needs a callable m -> sigma (GeV), got "
                           f"{type(self.func).__name__}")

    # ------------------------------------------------------------ constructors
    @classmethod
    def relative(cls, fraction: float) -> Resolution:
        """sigma = ``fraction`` x m, with 0 < fraction <= 1 (e.g. 0.01 for 1%)."""
        return cls("relative", value=fraction)

    @classmethod
    def absolute(cls, sigma: float) -> Resolution:
        """sigma = ``sigma`` GeV at every mass."""
        return cls("absolute", value=sigma)

    @classmethod
    def table(cls, masses: Any, sigmas: ArrayLike | None = None) -> Resolution:
        """sigma(m) interpolated linearly between measured points (GeV).

        ``masses`` holds rows ``[(mass, sigma), ...]`` (or a mapping with keys ``"mass"`` and
        ``"sigma"``), or the masses with the sigmas in ``sigmas``.  Masses must increase;
        at least two rows.  Masses outside the table are refused when evaluated.
        """
        return cls("table", points=_table_points(masses, sigmas))

    @classmethod
    def function(cls, func: Callable[..., Any]) -> Resolution:
        """sigma(m) = ``func(m)`` in GeV; ``func`` should accept an array of masses (a
        function of one float is called mass by mass)."""
        return cls("function", func=func)

    # ------------------------------------------------------------- evaluation
    @property
    def mass_range(self) -> tuple[float, float] | None:
        """The masses a table covers, ``(first, last)``; None for the other kinds."""
        if self.points is None:
            return None
        return (self.points[0][0], self.points[-1][0])

    def sigma(self, mass: ArrayLike) -> Any:
        """sigma in GeV at ``mass`` (GeV): a float for a scalar mass, else an array.

        Raises
        ------
        FitError
            A mass outside a table, or a function giving a non-finite or non-positive sigma.
        """
        m = np.asarray(mass, dtype=float)
        if self.kind == "relative":
            out = self.value * m  # type: ignore[operator]
        elif self.kind == "absolute":
            out = np.full(m.shape, self.value, dtype=float)
        elif self.kind == "table":
            t = np.asarray(self.points, dtype=float)
            lo, hi = t[0, 0], t[-1, 0]
            tol = _TABLE_TOLERANCE * max(abs(lo), abs(hi))
            outside = (m < lo - tol) | (m > hi + tol)
            if np.any(outside):
                bad = float(m[outside].ravel()[0])
                raise FitError(f"mass {bad:g} GeV is outside the resolution table "
                               f"({lo:g}-{hi:g} GeV); extend the table to cover every mass "
                               "used (the whole fit window), or narrow the window")
            out = np.interp(m, t[:, 0], t[:, 1])
        else:
            out = self._call(m)
        return float(out) if out.ndim == 0 else out

    def slope(self, mass: float) -> float:
        """d sigma / d mass at ``mass`` (a tie of sigma to the fitted mass needs it): exact
        for relative, absolute and table resolutions (a table's segment slope, the upper
        segment at a knot), a five-point central difference for a function."""
        m = float(mass)
        if self.kind == "relative":
            return float(self.value)  # type: ignore[arg-type]
        if self.kind == "absolute":
            return 0.0
        if self.kind == "table":
            t = np.asarray(self.points, dtype=float)
            k = int(np.clip(np.searchsorted(t[:, 0], m, side="right") - 1, 0, len(t) - 2))
            return float((t[k + 1, 1] - t[k, 1]) / (t[k + 1, 0] - t[k, 0]))
        h = 1e-3 * max(abs(m), 1.0)
        f = self.sigma(np.array([m - 2 * h, m - h, m + h, m + 2 * h]))
        return float((f[0] - 8 * f[1] + 8 * f[2] - f[3]) / (12 * h))

    def curvature(self, mass: float) -> float:
        """d^2 sigma / d mass^2 at ``mass``: 0 for the piecewise-linear kinds, a central
        second difference for a function."""
        if self.kind != "function":
            return 0.0
        m = float(mass)
        h = 1e-3 * max(abs(m), 1.0)
        f = self.sigma(np.array([m - h, m, m + h]))
        return float((f[0] - 2 * f[1] + f[2]) / (h * h))

    def _call(self, m: np.ndarray) -> np.ndarray:
        f = self.func
        try:
            out = np.asarray(f(m), dtype=float)  # type: ignore[misc]
            if out.shape != m.shape:
                out = np.broadcast_to(out, m.shape).astype(float)
        except (TypeError, ValueError):  # a function of one float
            try:
                out = np.array([float(f(float(v))) for v in m.ravel()]).reshape(m.shape)  # type: ignore[misc]
            except (TypeError, ValueError) as exc:
                raise FitError(f"the resolution function {self._func_name()} failed: "
                               f"{exc}; it must map a mass in GeV to sigma in GeV") from None
        bad = ~(np.isfinite(out) & (out > 0))
        if np.any(bad):
            k = np.flatnonzero(bad.ravel())[0]
            raise FitError(f"the resolution function {self._func_name()} gave sigma = "
                           f"{float(out.ravel()[k])!r} at m = {m.ravel()[k]:g} GeV; it must give a "
                           "finite sigma > 0 in GeV")
        return out

    def _func_name(self) -> str:
        return getattr(self.func, "__qualname__", None) or type(self.func).__name__

    # ------------------------------------------------------------- describing
    def describe(self) -> str:
        """One line for summaries: ``sigma = 1% of m``, ``sigma = 2 GeV``, ..."""
        if self.kind == "relative":
            return f"sigma = {100.0 * self.value:.4g}% of m"  # type: ignore[operator]
        if self.kind == "absolute":
            return f"sigma = {self.value:.4g} GeV"
        if self.kind == "table":
            lo, hi = self.mass_range  # type: ignore[misc]
            return (f"sigma(m) interpolated in a table of {len(self.points)} points, "  # type: ignore[arg-type]
                    f"{lo:g}-{hi:g} GeV")
        return f"sigma(m) = {self._func_name()}(m) GeV"

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready: ``{"kind": ..., and "relative" / "absolute" (numbers), "table" (rows)
        or "function" (its name)}``."""
        if self.kind in ("relative", "absolute"):
            return {"kind": self.kind, self.kind: self.value}
        if self.kind == "table":
            return {"kind": "table", "table": [list(r) for r in self.points]}  # type: ignore[union-attr]
        return {"kind": "function", "function": self._func_name()}

    @classmethod
    def from_dict(cls, d: Any, *, function: Callable[..., Any] | None = None) -> Resolution:
        """The Resolution :meth:`to_dict` wrote.  A ``function`` resolution is stored by its
        name only (code is not data): give the callable as ``function=``; its name must be
        the stored one, so that a result is not read back with another sigma(m)."""
        try:
            kind = d["kind"]
            if kind in ("relative", "absolute"):
                return cls(kind, value=float(d[kind]))
            if kind == "table":
                return cls.table(d["table"])
            if kind != "function":
                raise ValueError(f"kind {kind!r}")
            name = str(d["function"])
        except (KeyError, TypeError, ValueError) as exc:
            raise FitError(f"Resolution.from_dict: not a resolution written by "
                           f"Resolution.to_dict ({exc!r})") from None
        if function is None:
            raise FitError(f"this resolution is the function {name}(m), stored by name only; "
                           f"pass it: Resolution.from_dict(d, function={name})")
        res = cls.function(function)
        if res._func_name() != name:
            raise FitError(f"Resolution.from_dict: the function given is "
                           f"{res._func_name()}, the stored one {name}; pass {name}")
        return res

    def __repr__(self) -> str:
        if self.kind in ("relative", "absolute"):
            return f"Resolution.{self.kind}({self.value!r})"
        if self.kind == "table":
            return f"Resolution.table({[list(r) for r in self.points]!r})"  # type: ignore[union-attr]
        return f"Resolution.function({self._func_name()})"


def resolution_from(resolution: Any = None, *, relative: Any = None,
                    absolute: Any = None) -> Resolution:
    """The :class:`Resolution` meant by the keyword forms of :func:`peaksift.scan` and
    :func:`peaksift.upper_limits`: exactly one of

    * ``resolution``: a :class:`Resolution`, a callable m -> sigma (GeV), or a table
      ``(masses, sigmas)`` or ``{"mass": [...], "sigma": [...]}`` in GeV (rows
      ``[(mass, sigma), ...]`` go through :meth:`Resolution.table`); a bare number is
      refused (it could be sigma/m or GeV);
    * ``relative`` (``relative_resolution=``): sigma/m;
    * ``absolute`` (``absolute_resolution=``): sigma in GeV.
    """
    given = [k for k, v in (("resolution", resolution), ("relative_resolution", relative),
                            ("absolute_resolution", absolute)) if v is not None]
    if len(given) != 1:
        raise FitError(
            f"give exactly one of resolution=, relative_resolution= (sigma/m) or "
            f"absolute_resolution= (GeV); got {', '.join(given) if given else 'none'}. "
            "E.g. relative_resolution=0.01 for sigma = 1% of the mass")
    if relative is not None:
        return Resolution.relative(relative)
    if absolute is not None:
        return Resolution.absolute(absolute)
    if isinstance(resolution, Resolution):
        return resolution
    if isinstance(resolution, (bool, int, float, np.integer, np.floating)):
        v = resolution
        raise FitError(
            f"resolution={v!r} is ambiguous: a bare number could be sigma/m or a width in "
            f"GeV; write relative_resolution={v!r} for sigma = {v!r} x m, or "
            f"absolute_resolution={v!r} for sigma = {v!r} GeV (or pass "
            f"peaksift.Resolution.relative({v!r}) / .absolute({v!r}))")
    if callable(resolution):
        return Resolution.function(resolution)
    if isinstance(resolution, (str, bytes)):
        raise FitError(f"resolution must be a peaksift.Resolution, a callable or a table, "
                       f"got the string {resolution!r}")
    if isinstance(resolution, Mapping):
        return Resolution.table(resolution)
    try:
        masses, sigmas = resolution
    except (TypeError, ValueError):
        raise FitError(
            f"resolution must be a peaksift.Resolution, a callable m -> sigma (GeV) or a "
            f"table (masses, sigmas) in GeV, got {type(resolution).__name__}; or use "
            "relative_resolution= / absolute_resolution=") from None
    return Resolution.table(masses, sigmas)


def check_resolved(resolution: Resolution, masses: ArrayLike, edges: ArrayLike, *,
                   what: str = "") -> np.ndarray:
    """sigma at ``masses`` (GeV), refused where it is below :data:`MIN_SIGMA_PER_BIN` of the
    width of the bin holding the mass (``edges``).

    Below that the signal sits inside a single bin: masses within the bin cannot be told
    apart, and a grid of hypotheses half a sigma apart grows without bound.  Usually the
    resolution's unit or form is wrong (GeV for a fraction, or the reverse).

    ``what`` (e.g. a config key) starts the error message when given.

    Returns
    -------
    ndarray
        sigma at every mass.
    """
    m = np.atleast_1d(np.asarray(masses, dtype=float))
    e = np.asarray(edges, dtype=float)
    sigma = np.atleast_1d(np.asarray(resolution.sigma(m), dtype=float))
    # np.minimum/np.maximum, not np.clip: the same indices, without clip's ~60 us of
    # Python wrapping (a 100-bin scan's 2%)
    k = np.minimum(np.maximum(np.searchsorted(e, m, side="right") - 1, 0), e.size - 2)
    width = e[k + 1] - e[k]
    small = sigma < MIN_SIGMA_PER_BIN * width
    if np.any(small):
        i = int(np.flatnonzero(small)[0])
        raise FitError(
            f"{what + ': ' if what else ''}the resolution ({resolution.describe()}) gives sigma = {sigma[i]:.3g} GeV "
            f"at {m[i]:g} GeV, below {MIN_SIGMA_PER_BIN:g} of the {width[i]:.3g} GeV bin "
            "there: the signal would sit inside one bin. Check the resolution's form and unit "
            "(relative is sigma/m, absolute is GeV), or use finer bins")
    return sigma
