"""The common vocabulary of every shape: :class:`Parameter` and :class:`Shape`.

A shape is a density in the invariant mass ``x`` normalised on a fit window
``(lo, hi)``.  Every shape answers the same questions, the way every
``scipy.stats`` distribution answers ``pdf``/``cdf``:

* ``name`` (short lowercase registry name), ``kind`` (``"signal"`` / ``"background"``);
* ``parameters``: a tuple of :class:`Parameter` (name, start, lower, upper, unit);
  ``parameters_for(window)`` gives the same with window-dependent starts/bounds filled in;
* ``pdf(x, params, window)``, ``cdf(x, params, window)``, ``bin_fractions(edges, params, window)``;
* ``grad_pdf`` and ``grad_bin_fractions``: derivatives with respect to each parameter
  (analytic where the shape provides them, central finite differences otherwise).

``params`` is a sequence of values in ``parameters`` order.  Each value may be a
numpy array that broadcasts against ``x``: e.g. parameters of shape ``(ntoys, 1)``
against ``edges`` of shape ``(nedges,)`` give ``bin_fractions`` of shape
``(ntoys, nbins)`` (bins always run along the last axis).

Writing a shape: subclass :class:`Shape`, declare ``name``, ``kind``, ``parameters``,
implement ``_density(x, p, window)`` (unnormalised, vectorised) and, if there is one,
``_primitive(x, p, window)`` (any antiderivative of ``_density``).  Without a
primitive the base class integrates numerically: Gauss-Legendre with 10 nodes on
panels chosen by ``_panels`` (uniform by default, denser at a peak for signals),
cached per parameter set and window; accurate to better than 1e-10 relative for
the shapes shipped here (checked against ``scipy.integrate.quad`` in the tests).
"""

from __future__ import annotations

import contextlib
import math
from collections import OrderedDict
from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from ..errors import FitError

__all__ = ["Parameter", "Shape", "as_window"]

_GL_NODES, _GL_WEIGHTS = np.polynomial.legendre.leggauss(10)
_CACHE_SIZE = 256


def _scalar(v: Any) -> bool:
    """``np.ndim(v) == 0``, a Python float answered first (a fit asks ~100,000 times,
    np.ndim's dispatch was ~10% of a Crystal Ball fit)."""
    return type(v) is float or np.ndim(v) == 0


@dataclass(frozen=True)
class Parameter:
    """One shape parameter.

    Attributes
    ----------
    name : str
        Name used in fit results, ``start=``/``fixed=``/``constraints=`` dictionaries.
    start : float
        Default starting value (NaN when it depends on the window; see
        :meth:`Shape.parameters_for`).
    lower, upper : float
        Bounds (``-inf``/``inf`` for none).
    unit : str
        Unit of the value (``"GeV"``, ``"1/GeV"``, ``""``).
    """

    name: str
    start: float
    lower: float = -math.inf
    upper: float = math.inf
    unit: str = ""


def as_window(window: Any) -> tuple[float, float]:
    """A fit window ``(lo, hi)`` as two floats, checked: finite, ``hi > lo``.

    Raises
    ------
    peaksift.errors.FitError
        When ``window`` is not a pair of finite numbers with ``hi > lo``.
    """
    try:
        lo, hi = (float(window[0]), float(window[1]))
    except (TypeError, IndexError, ValueError):
        raise FitError(f"window must be a pair (lo, hi) of numbers, got {window!r}") from None
    if not (math.isfinite(lo) and math.isfinite(hi) and hi > lo):
        raise FitError(f"window must be finite with hi > lo, got ({lo!r}, {hi!r}); "
                       "pass e.g. window=(70, 110)")
    return lo, hi



class Shape:
    """Base class of all shapes (see the module guide).

    Parameters
    ----------
    **options
        Parameter names set default starting values (``mass=91.0``); other options are
        shape-specific (``order=``, ``degree=``, ``sqrt_s=``, ``npar=``).
    """

    name: str = ""
    kind: str = ""
    parameters: tuple[Parameter, ...] = ()

    def __init__(self, **options: Any) -> None:
        self._cache: OrderedDict[tuple, tuple[np.ndarray, np.ndarray]] = OrderedDict()
        names = [p.name for p in self.parameters]
        pars = list(self.parameters)
        for key, value in options.items():
            if key not in names:
                raise FitError(
                    f"shape {self.name!r} has no parameter or option {key!r}; "
                    f"parameters are {', '.join(names)}"
                )
            i = names.index(key)
            pars[i] = replace(pars[i], start=float(value))
        self.parameters = tuple(pars)

    # ------------------------------------------------------------ description
    @property
    def parameter_names(self) -> tuple[str, ...]:
        # made once per parameters tuple (a fit asks ~15 times): kept beside the tuple it
        # was made from, so a shape whose parameters are replaced gets its new names
        pars = self.parameters
        memo = self.__dict__.get("_names_of")
        if memo is None or memo[0] is not pars:
            memo = self.__dict__["_names_of"] = (pars, tuple(p.name for p in pars))
        return memo[1]

    def parameters_for(self, window: tuple[float, float]) -> tuple[Parameter, ...]:
        """Parameters with starts and bounds made concrete for ``window``."""
        return self.parameters

    def __repr__(self) -> str:
        pars = ", ".join(p.name for p in self.parameters)
        return f"<{self.kind} shape {self.name!r} ({pars})>"

    # --------------------------------------------------------------- to write
    def _density(self, x: np.ndarray, p: Sequence[Any], window: tuple[float, float]) -> np.ndarray:
        raise NotImplementedError

    def _primitive(self, x: np.ndarray, p: Sequence[Any], window: tuple[float, float]) -> np.ndarray:
        """Antiderivative of ``_density``; shapes without one leave this out."""
        raise NotImplementedError

    _has_primitive = True  # set False in shapes that integrate numerically

    def _panels(self, p: Sequence[float], window: tuple[float, float]) -> np.ndarray:
        """Panel edges for numerical integration (uniform; signals refine at the peak)."""
        lo, hi = window
        return np.linspace(lo, hi, 129)

    # analytic derivatives (optional): lists with one array per parameter
    _density_grad = None
    _primitive_grad = None

    def _difference_scales(self, p: Sequence[Any]) -> list[Any]:
        """Scale over which each parameter changes the shape (finite-difference steps are
        1e-5 of it): the value itself by default.  A location (a peak's mass, a turn-on's
        threshold) must use the width it moves across instead, or a step of 1e-5 x 91 GeV
        across a 0.05 GeV wide peak is a visible fraction of the width."""
        return [np.maximum(np.abs(v), 1e-2) for v in p]

    # ------------------------------------------------------------- numerics
    def _table(self, p: tuple[float, ...], window: tuple[float, float]):
        key = (p, window)
        hit = self._cache.get(key)
        if hit is not None:
            with contextlib.suppress(KeyError):  # (another thread may have dropped it)
                self._cache.move_to_end(key)
            return hit
        e = self._panels(p, window)
        a, b = e[:-1], e[1:]
        half = 0.5 * (b - a)
        nodes = (0.5 * (a + b))[:, None] + half[:, None] * _GL_NODES[None, :]
        f = self._density(nodes, p, window)
        panel = half * (f @ _GL_WEIGHTS)
        cum = np.concatenate([[0.0], np.cumsum(panel)])
        self._cache[key] = (e, cum)
        if len(self._cache) > _CACHE_SIZE:
            with contextlib.suppress(KeyError):  # (emptied by another thread meanwhile)
                self._cache.popitem(last=False)
        return e, cum

    def _numeric_primitive_scalar(self, x: np.ndarray, p: tuple[float, ...],
                                  window: tuple[float, float]) -> np.ndarray:
        e, cum = self._table(p, window)
        x = np.clip(x, e[0], e[-1])
        k = np.clip(np.searchsorted(e, x, side="right") - 1, 0, e.size - 2)
        a = e[k]
        half = 0.5 * (x - a)
        nodes = (0.5 * (x + a))[..., None] + half[..., None] * _GL_NODES
        f = self._density(nodes, p, window)
        return cum[k] + half * (f @ _GL_WEIGHTS)

    def _prim(self, x: np.ndarray, p: Sequence[Any], window: tuple[float, float]) -> np.ndarray:
        if self._has_primitive:
            return self._primitive(x, p, window)
        return _by_parameter_set(self._numeric_primitive_scalar, x, p, window)

    @staticmethod
    def _params(params: Sequence[Any], n: int, name: str) -> list[Any]:
        if len(params) != n:
            raise FitError(f"shape {name!r} takes {n} parameters, got {len(params)}")
        return [v if type(v) is float else (v if np.ndim(v) else float(v))
                for v in params]

    # ------------------------------------------------------------- interface
    def pdf(self, x: Any, params: Sequence[Any], window: tuple[float, float]) -> np.ndarray:
        """Density normalised on ``window`` (zero outside it)."""
        lo, hi = as_window(window)
        p = self._params(params, len(self.parameters), self.name)
        x = np.asarray(x, dtype=float)
        edges = np.array([lo, hi])
        z = self._norm(edges, p, (lo, hi))
        inside = (x >= lo) & (x <= hi)
        return np.where(inside, self._density(x, p, (lo, hi)) / z, 0.0)

    def _norm(self, edges: np.ndarray, p: Sequence[Any], window: tuple[float, float]) -> np.ndarray:
        """Integral of ``_density`` over the window (broadcasts over parameter arrays)."""
        return self._prim(np.array(window[1]), p, window) - self._prim(np.array(window[0]), p, window)

    def cdf(self, x: Any, params: Sequence[Any], window: tuple[float, float]) -> np.ndarray:
        """Cumulative distribution on ``window``: 0 at ``lo``, 1 at ``hi``."""
        lo, hi = as_window(window)
        p = self._params(params, len(self.parameters), self.name)
        x = np.clip(np.asarray(x, dtype=float), lo, hi)
        plo = self._prim(np.array(lo), p, (lo, hi))
        phi = self._prim(np.array(hi), p, (lo, hi))
        return (self._prim(x, p, (lo, hi)) - plo) / (phi - plo)

    def bin_fractions(self, edges: Any, params: Sequence[Any],
                      window: tuple[float, float]) -> np.ndarray:
        """Fraction of the shape in each bin ``[edges[i], edges[i+1]]`` (last axis).

        Never negative: where the density is below the rounding of the CDF (e.g. far below a
        turn-on) neighbouring CDF values can come out in the wrong order by an ulp, and a
        negative fraction would make an empty bin's ``n ln(nu)`` undefined.
        """
        return np.maximum(np.diff(self.cdf(edges, params, window), axis=-1), 0.0)

    def grad_pdf(self, x: Any, params: Sequence[Any], window: tuple[float, float],
                 need: Sequence[bool] | None = None) -> np.ndarray:
        """Derivatives of :meth:`pdf` with respect to each parameter, stacked on axis 0.

        ``need`` (one flag per parameter) may mark derivatives the caller does not use
        (fixed parameters): finite differences skip them and leave zeros there."""
        lo, hi = as_window(window)
        p = self._params(params, len(self.parameters), self.name)
        x = np.asarray(x, dtype=float)
        if self._density_grad is not None and self._primitive_grad is not None:
            w = (lo, hi)
            e = np.array([lo, hi])
            pr = self._prim(e, p, w) if all(_scalar(v) for v in p) else None
            if pr is not None:
                z = pr[1] - pr[0]
                gz = [g[1] - g[0] for g in self._primitive_grad(e, p, w)]
                d = self._density(x, p, w)
                gd = self._density_grad(x, p, w)
                inside = (x >= lo) & (x <= hi)
                out = [np.where(inside, gdi / z - d * gzi / z**2, 0.0) for gdi, gzi in zip(gd, gz)]
                return np.array(out)
        return _finite_difference(lambda q: self.pdf(x, q, window), p, self.parameters,
                                  self._difference_scales(p), need)

    def grad_bin_fractions(self, edges: Any, params: Sequence[Any],
                           window: tuple[float, float]) -> np.ndarray:
        """Derivatives of :meth:`bin_fractions` w.r.t. each parameter, stacked on axis 0.

        Analytic for shapes with an analytic primitive gradient (gaussian, exponential of
        order 1, bernstein, powerlaw, crystalball); central finite differences otherwise.
        """
        return self.fractions_and_grad(edges, params, window)[1]

    def fractions_and_grad(self, edges: Any, params: Sequence[Any],
                           window: tuple[float, float],
                           need: Sequence[bool] | None = None) -> tuple[np.ndarray, np.ndarray]:
        """``(bin_fractions, grad_bin_fractions)`` computed together (shared work).

        ``need`` (one flag per parameter, default all) may mark derivatives the caller
        does not use (fixed parameters): shapes differentiated by finite differences skip
        them and leave zeros in their rows (a Crystal Ball with fixed tails then costs 2
        differences instead of 6); analytic gradients are computed whole."""
        lo, hi = as_window(window)
        p = self._params(params, len(self.parameters), self.name)
        edges = np.asarray(edges, dtype=float)
        if self._primitive_grad is None:
            frac = self.bin_fractions(edges, p, window)
            grad = _finite_difference(lambda q: self.bin_fractions(edges, q, window), p,
                                      self.parameters, self._difference_scales(p), need,
                                      frac)
            return frac, grad
        w = (lo, hi)
        x = np.clip(edges, lo, hi)
        ends = np.array([lo, hi])
        if all(_scalar(v) for v in p):
            pe = self._prim(ends, p, w)
            plo, phi = pe[0], pe[1]
            ge = self._primitive_grad(ends, p, w)
            glo = [np.asarray(g)[0] if np.ndim(g) else g for g in ge]
            ghi = [np.asarray(g)[1] if np.ndim(g) else g for g in ge]
        else:
            plo, phi = self._prim(np.array(lo), p, w), self._prim(np.array(hi), p, w)
            glo = self._primitive_grad(np.array(lo), p, w)
            ghi = self._primitive_grad(np.array(hi), p, w)
        px = self._prim(x, p, w)
        gx = self._primitive_grad(x, p, w)
        inv = 1.0 / (phi - plo)
        c = (px - plo) * inv
        out = []
        for a, b, gc in zip(glo, ghi, gx):
            out.append(np.diff((gc - a) * inv - c * ((b - a) * inv), axis=-1))
        frac = np.maximum(np.diff(c, axis=-1), 0.0)  # as in bin_fractions
        return frac, np.array(np.broadcast_arrays(frac, *out)[1:])

    def fit_fractions(self, edges: Any, params: Sequence[Any],
                      window: tuple[float, float]) -> np.ndarray:
        """The bin fractions :meth:`fractions_and_grad` gives (the same numbers), for a
        caller that needs no derivatives: a binned fit's value-only evaluations (MIGRAD's
        line searches, :meth:`peaksift.likelihood.BinnedCost.value_only`).  By default
        that method itself, derivatives by finite differences skipped; a shape whose
        analytic derivatives cost extra work overrides it."""
        return self.fractions_and_grad(edges, params, window,
                                       [False] * len(self.parameters))[0]

    def pdf_and_grad(self, x: np.ndarray, params: Sequence[float],
                     window: tuple[float, float],
                     need: Sequence[bool] | None = None) -> tuple[np.ndarray, np.ndarray]:
        """``(pdf, grad_pdf)`` for masses known to lie inside the window (not checked) and
        scalar parameters; the unbinned fit's hot path (shapes may fuse the work).
        ``need`` as in :meth:`fractions_and_grad`."""
        return self.pdf(x, params, window), self.grad_pdf(x, params, window, need)

    def pdf_near(self, x: np.ndarray, params: Sequence[float],
                 window: tuple[float, float]) -> np.ndarray:
        """:meth:`pdf` at a few masses inside the window for scalar parameters, from the
        compiled path where the shape has one: equal to ``pdf`` to ~1e-12 relative, not
        to the bit, so only for checks that do not depend on the last digits (the
        unbinned cost's sign check at a peak).  By default ``pdf`` itself."""
        return self.pdf(x, params, window)

    # ----------------------------------------------------- peak description
    def location(self, params: Sequence[Any]) -> float:
        """Peak location (signal shapes: the ``mass`` parameter)."""
        names = self.parameter_names
        if "mass" in names:
            return float(params[names.index("mass")])
        raise FitError(f"shape {self.name!r} has no location")

    def fwhm(self, params: Sequence[Any]) -> float:
        """Full width at half maximum (signal shapes)."""
        raise FitError(f"shape {self.name!r} does not define a FWHM")

    def width_parameters(self) -> tuple[str, ...]:
        """Names of the width-like parameters (``sigma``, ``width``) this shape has."""
        return tuple(n for n in ("width", "sigma") if n in self.parameter_names)


def _finite_difference(func, p: Sequence[Any], pars: Sequence[Parameter],
                       scales: Sequence[Any], need: Sequence[bool] | None = None,
                       at: Any = None) -> np.ndarray:
    """Central differences (one-sided at a bound) of ``func`` in each parameter; rows whose
    ``need`` flag is False are zeros (shaped like ``at``, the value at ``p``, if given)."""
    out = []
    zero = None
    for i, par in enumerate(pars):
        if need is not None and not need[i]:
            if zero is None:
                zero = np.zeros_like(np.asarray(func(list(p)) if at is None else at,
                                                dtype=float))
            out.append(zero)
            continue
        v = np.asarray(p[i], dtype=float)
        h = 1e-5 * np.asarray(scales[i], dtype=float)
        up = v + h
        dn = v - h
        # stay inside the bounds: one-sided difference at a bound
        up = np.where(up > par.upper, v, up)
        dn = np.where(dn < par.lower, v, dn)
        q1 = list(p)
        q2 = list(p)
        q1[i] = up if np.ndim(up) else float(up)
        q2[i] = dn if np.ndim(dn) else float(dn)
        out.append((func(q1) - func(q2)) / (up - dn))
    return np.array(np.broadcast_arrays(*out))


def _by_parameter_set(func, x: np.ndarray, p: Sequence[Any], window: tuple[float, float]):
    """Evaluate ``func(x, scalar_params, window)`` for broadcast parameter arrays.

    The distinct parameter sets are found among the parameters alone (typically one per
    toy or mass hypothesis), not among the rows of the full broadcast with ``x``: the
    latter costs a sort of (sets x masses) rows and dominated stacked scans.
    """
    if all(_scalar(v) for v in p):
        return func(np.asarray(x, dtype=float), tuple(float(v) for v in p), window)
    x = np.asarray(x, dtype=float)
    pars = np.broadcast_arrays(*[np.asarray(v, float) for v in p])
    shape = np.broadcast_shapes(x.shape, pars[0].shape)
    stack = np.stack([a.ravel() for a in pars], axis=1)
    uniq, inverse = np.unique(stack, axis=0, return_inverse=True)
    which = np.broadcast_to(inverse.reshape(pars[0].shape), shape).ravel()
    xr = np.broadcast_to(x, shape).ravel()
    order = np.argsort(which, kind="stable")
    cuts = np.searchsorted(which[order], np.arange(uniq.shape[0] + 1))
    out = np.empty(xr.size)
    for j, row in enumerate(uniq):
        sel = order[cuts[j]:cuts[j + 1]]
        out[sel] = func(xr[sel], tuple(float(v) for v in row), window)
    return out.reshape(shape)
