"""Extended likelihood fits of signal-plus-background models to a mass spectrum.

Which piece to use
------------------
* :func:`fit` -- the one call: ``fit(hist_or_masses, "gaussian", "exponential", (lo, hi))``.
  It finds starting values itself (background from the sidebands, the peak at the largest
  local excess), retries from other starts if the minimiser fails, and never reports an
  invalid fit as valid.
* :class:`Model` -- signal(s) + background with extended yields, for code that needs the
  expected bin contents of many parameter sets cheaply (``Model.expected(edges, values)``,
  ``Model.grad_expected``), e.g. batched toys.
* :class:`FitResult` -- values, errors, covariance, validity, peak summary, goodness of fit,
  pulls, ``to_dict()`` for results.json, ``plot()``.

Likelihoods
-----------
* binned (``MassHistogram`` data, or many masses): extended Poisson likelihood of the bin
  contents with bin-integrated expectations :math:`\\mu_i = \\sum_k \\nu_k [F_k(e_{i+1}) -
  F_k(e_i)]` (CDF differences, never the density at bin centres).  The value reported is
  the Baker-Cousins saturated form :math:`\\sum_i \\mu_i - n_i + n_i\\ln(n_i/\\mu_i)`, so
  twice it is the goodness-of-fit chi-square (Baker and Cousins, Nucl. Instrum. Meth. 221
  (1984) 437, eq. 11).
* unbinned (an array of masses): :math:`-\\ln L = \\sum_k \\nu_k - \\sum_j w_j \\ln
  \\sum_k \\nu_k f_k(x_j)`.

Minimisation and errors
-----------------------
Damped Fisher scoring with the analytic gradient (a few evaluations from the automatic
starts), iminuit's variable-metric minimiser as the fallback (``FitResult.minimizer`` is
``"fisher-scoring"`` or ``"iminuit-migrad"``); errors from the observed Hessian of the
negative log-likelihood at the minimum, see DEVELOPERS.md "Shapes and fits in detail".

Weighted data
-------------
* binned: each bin is treated as a scaled Poisson variable, :math:`\\tilde n_i = n_i s_i`,
  :math:`\\tilde\\mu_i = \\mu_i s_i`, :math:`s_i = \\sum w / \\sum w^2` in the bin (bins
  with no entries use the global ratio); errors from the Hessian of this likelihood are
  asymptotically correct for weighted events (Bohm and Zech, "Statistics of weighted
  Poisson events and its applications", Nucl. Instrum. Meth. A 748 (2014) 1; from memory).
* unbinned: weighted likelihood with the sandwich covariance
  :math:`C = H^{-1} D H^{-1}`, :math:`D = \\sum_j w_j^2\\, \\nabla\\ln\\mu(x_j)\\,
  \\nabla\\ln\\mu(x_j)^T` (Langenbruch, "Parameter uncertainties in weighted unbinned
  maximum likelihood fits", Eur. Phys. J. C 82 (2022) 393, sect. 2; from memory).

Parameter names: each signal shape's names (``mass``, ``sigma``, ...) and
``signal_yield``; a second/third signal component gets ``_2``/``_3`` suffixes
(``mass_2``, ``signal_yield_2``); then the background's names (never colliding) and
``background_yield``.  Yields are expected numbers of events (sum of weights) in the window.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from . import shapes as _shapes
from .errors import FitError
from .shapes import Parameter, Shape

__all__ = ["FitResult", "Model", "fit"]

#: arrays with at most this many masses in the window are fitted unbinned by default
UNBINNED_LIMIT = 20000
#: number of bins used when a large array is fitted binned by default
DEFAULT_BINS = 400


# ======================================================================== Model
class Model:
    """Signal component(s) plus a background, with extended yields, on a window.

    Parameters
    ----------
    signal : str, Shape or sequence of them
        Signal shape(s); names are resolved with :func:`peaksift.shapes.get`.
    background : str or Shape
    window : (float, float)

    Attributes
    ----------
    parameter_names : tuple of str
        All parameters in order: per signal component its shape parameters then
        ``signal_yield`` (suffix ``_2``, ``_3`` for later components), then the
        background parameters and ``background_yield``.
    parameters : tuple of Parameter
        The same with window-dependent starts/bounds (yields: start NaN, set by :func:`fit`).
    """

    def __init__(self, signal: Any, background: Any, window: tuple[float, float]) -> None:
        from .shapes._base import _as_window

        self.window = _as_window(window)
        sig = signal if isinstance(signal, (list, tuple)) else [signal]
        self.signals: list[Shape] = [_shapes.get(s) for s in sig]
        self.background: Shape = _shapes.get(background)
        for s in self.signals:
            if s.kind != "signal":
                raise FitError(f"{s.name!r} is a {s.kind} shape but was given as the signal")
        if self.background.kind != "background":
            raise FitError(f"{self.background.name!r} is a {self.background.kind} shape but "
                           "was given as the background")
        pars: list[Parameter] = []
        self._blocks: list[tuple[Shape, slice, int]] = []  # shape, its params, its yield index
        for k, s in enumerate(self.signals):
            suffix = "" if k == 0 else f"_{k + 1}"
            first = len(pars)
            for p in s.parameters_for(self.window):
                pars.append(Parameter(p.name + suffix, p.start, p.lower, p.upper, p.unit))
            pars.append(Parameter("signal_yield" + suffix, math.nan, unit="events"))
            self._blocks.append((s, slice(first, len(pars) - 1), len(pars) - 1))
        first = len(pars)
        pars.extend(self.background.parameters_for(self.window))
        pars.append(Parameter("background_yield", math.nan, 0.0, unit="events"))
        self._blocks.append((self.background, slice(first, len(pars) - 1), len(pars) - 1))
        names = [p.name for p in pars]
        dup = {n for n in names if names.count(n) > 1}
        if dup:
            raise FitError(f"parameter names collide: {sorted(dup)}")
        self.parameters = tuple(pars)
        self.parameter_names = tuple(names)

    def __repr__(self) -> str:
        sig = " + ".join(s.name for s in self.signals)
        return f"<Model {sig} + {self.background.name} on {self.window}>"

    def _values(self, values: Any) -> list[Any]:
        if isinstance(values, Mapping):
            missing = [n for n in self.parameter_names if n not in values]
            if missing:
                raise FitError(f"model values missing {missing}; need {list(self.parameter_names)}")
            return [values[n] for n in self.parameter_names]
        vals = list(values)
        if len(vals) != len(self.parameter_names):
            raise FitError(f"model takes {len(self.parameter_names)} values "
                           f"({', '.join(self.parameter_names)}), got {len(vals)}")
        return vals

    def expected(self, edges: Any, values: Any) -> np.ndarray:
        """Expected bin contents ``sum_k yield_k * bin_fractions_k`` (bins on the last axis).

        ``values`` is a mapping name -> value or a sequence in ``parameter_names`` order;
        values may be arrays broadcasting against ``edges`` (e.g. shape ``(ntoys, 1)``).
        ``edges`` must lie inside the model window.
        """
        v = self._values(values)
        out = 0.0
        for shape, sl, iy in self._blocks:
            out = out + v[iy] * shape.bin_fractions(edges, v[sl], self.window)
        return out

    def grad_expected(self, edges: Any, values: Any) -> np.ndarray:
        """Derivatives of :meth:`expected` w.r.t. every parameter, stacked on axis 0
        (analytic for yields and for shapes with analytic derivatives)."""
        v = self._values(values)
        parts: list[Any] = [None] * len(v)
        for shape, sl, iy in self._blocks:
            f = shape.bin_fractions(edges, v[sl], self.window)
            parts[iy] = f
            if sl.stop > sl.start:
                g = shape.grad_bin_fractions(edges, v[sl], self.window)
                for j, i in enumerate(range(sl.start, sl.stop)):
                    parts[i] = v[iy] * g[j]
        return np.array(np.broadcast_arrays(*parts))

    def density(self, x: Any, values: Any) -> np.ndarray:
        """Expected events per unit mass, ``sum_k yield_k * pdf_k(x)``."""
        v = self._values(values)
        return sum(v[iy] * shape.pdf(x, v[sl], self.window) for shape, sl, iy in self._blocks)

    def components(self, x: Any, values: Any) -> dict[str, np.ndarray]:
        """Events per unit mass of each component: ``signal``, ``signal_2``, ..., ``background``."""
        v = self._values(values)
        out = {}
        for k, (shape, sl, iy) in enumerate(self._blocks):
            key = "background" if shape is self.background else (
                "signal" if k == 0 else f"signal_{k + 1}")
            out[key] = v[iy] * shape.pdf(x, v[sl], self.window)
        return out


# ============================================================== cost functions
class _Cost:
    """Shared bookkeeping: free-parameter vector -> full vector, constraints, caching."""

    errordef = 0.5

    def __init__(self, model: Model, full: np.ndarray, free: np.ndarray,
                 constraints: list[tuple[int, float, float]]) -> None:
        self.model = model
        self.full = full.astype(float).copy()
        self.free = free
        self.constraints = constraints
        self._last: tuple[bytes, float, np.ndarray] | None = None
        self.ncall = 0

    def _expand(self, x: Sequence[float]) -> np.ndarray:
        v = self.full.copy()
        v[self.free] = x
        return v

    def _constraint(self, v: np.ndarray) -> tuple[float, np.ndarray]:
        val, grad = 0.0, np.zeros(v.size)
        for i, c, s in self.constraints:
            val += 0.5 * ((v[i] - c) / s) ** 2
            grad[i] += (v[i] - c) / s**2
        return val, grad

    def _eval(self, x: Sequence[float]) -> tuple[float, np.ndarray]:
        key = np.asarray(x, dtype=float).tobytes()
        if self._last is not None and self._last[0] == key:
            return self._last[1], self._last[2]
        self.ncall += 1
        v = self._expand(x)
        val, g = self._value_grad(v)
        cv, cg = self._constraint(v)
        val, g = val + cv, (g + cg)[self.free]
        if not np.isfinite(val):
            val = 1e300
            g = np.zeros_like(g)
        self._last = (key, val, g)
        return val, g

    def __call__(self, *x: float) -> float:
        return self._eval(x)[0]

    def grad(self, *x: float) -> np.ndarray:
        return self._eval(x)[1]


class _BinnedCost(_Cost):
    def __init__(self, model, full, free, constraints, edges, n, scale, mask=None):
        super().__init__(model, full, free, constraints)
        self.edges = edges
        self.mask = None if mask is None or mask.all() else mask
        m = slice(None) if self.mask is None else self.mask
        self.s = scale[m]
        self.unit_scale = bool(np.all(self.s == 1.0))
        self.n = (n * scale)[m]  # effective counts
        nz = self.n > 0
        sat = np.zeros_like(self.n)
        sat[nz] = self.n[nz] * np.log(self.n[nz])
        sat -= self.n
        if not self.unit_scale:
            sat -= self.n * np.log(self.s)  # so that the value is sum(s mu - n~ ln(s mu)) + sat
        self._satsum = float(sat.sum())
        free = np.asarray(free)
        row = {int(i): k for k, i in enumerate(free)}
        self._plan = []
        for shape, sl, iy in model._blocks:
            rows = [row.get(i, -1) for i in range(sl.start, sl.stop)]
            self._plan.append((shape, sl, iy, any(r >= 0 for r in rows), rows, row.get(iy, -1)))
        self._jac = np.zeros((free.size, self.n.size))
        self._cons = [(row[i], c, sd) for i, c, sd in constraints if i in row]

    def expected_and_grad(self, v: np.ndarray):
        """Expected contents and d(mu)/d(parameter) per model parameter (None if unused)."""
        model = self.model
        mu = 0.0
        parts = [None] * v.size
        for shape, sl, iy, need, _, _ in self._plan:
            p = list(v[sl])
            if need:
                f, g = shape.fractions_and_grad(self.edges, p, model.window)
                if self.mask is not None:
                    f, g = f[self.mask], g[:, self.mask]
                for j, i in enumerate(range(sl.start, sl.stop)):
                    parts[i] = v[iy] * g[j]
            else:
                f = shape.bin_fractions(self.edges, p, model.window)
                if self.mask is not None:
                    f = f[self.mask]
            mu = mu + v[iy] * f
            parts[iy] = f
        return mu, parts

    def value_grad_info(self, x: np.ndarray):
        """NLL, gradient and expected information (free parameters) at free values ``x``."""
        self.ncall += 1
        v = self.full.copy()
        v[self.free] = x
        jac = self._jac
        window = self.model.window
        mu = None
        blocks = []
        for shape, sl, iy, need, rows, ry in self._plan:
            y = float(v[iy])
            if ry < 0 and y == 0.0:  # a component fixed at zero yield contributes nothing
                continue
            p = [float(q) for q in v[sl]]
            g = None
            if need:
                f, g = shape.fractions_and_grad(self.edges, p, window)
                if self.mask is not None:
                    f, g = f[self.mask], g[:, self.mask]
                for j, r in enumerate(rows):
                    if r >= 0:
                        np.multiply(g[j], y, out=jac[r])
            else:
                f = shape.bin_fractions(self.edges, p, window)
                if self.mask is not None:
                    f = f[self.mask]
            if ry >= 0:
                jac[ry] = f
            mu = y * f if mu is None else mu + y * f
            blocks.append((shape, p, y, g, rows, ry))
        # what observed_hessian / the goodness of fit can reuse at this point
        self._state = (np.asarray(x, float).tobytes(), mu, blocks)
        if mu.min() <= 0.0:
            mu = np.maximum(mu, 1e-300 + 1e-12 * float(np.abs(mu).mean()))
        n = self.n
        if self.unit_scale:
            val = float(mu.sum() - n @ np.log(mu)) + self._satsum
            r = 1.0 - n / mu
            w = 1.0 / mu
        else:
            val = float(self.s @ mu - n @ np.log(mu)) + self._satsum
            r = self.s - n / mu
            w = self.s / mu
        g = jac @ r
        info = (jac * w) @ jac.T
        for k, c, sd in self._cons:
            xv = float(x[k])
            val += 0.5 * ((xv - c) / sd) ** 2
            g[k] += (xv - c) / sd**2
            info[k, k] += 1.0 / sd**2
        return val, g, info

    def observed_hessian(self, x: np.ndarray, steps: np.ndarray) -> np.ndarray:
        """Observed Hessian of the NLL at free values ``x``:
        sum_i n~_i/mu_i^2 dmu dmu^T + sum_i (s_i - n~_i/mu_i) d^2mu, with d^2mu exact for
        yield pairs (0) and yield-shape pairs (dF/dtheta), and by forward differences of the
        analytic shape gradients (step ``steps``) for shape-shape pairs of one component."""
        v = self.full.copy()
        v[self.free] = x
        window = self.model.window
        nfree = self.free.size
        state = getattr(self, "_state", None)
        if state is not None and state[0] == np.asarray(x, float).tobytes():
            mu, blocks, jac = state[1], state[2], self._jac.copy()
            plan = ()
        else:
            jac = np.zeros((nfree, self.n.size))
            blocks = []
            mu = None
            plan = self._plan
        for shape, sl, iy, need, rows, ry in plan:
            p = [float(q) for q in v[sl]]
            y = float(v[iy])
            if need:
                f, g = shape.fractions_and_grad(self.edges, p, window)
                if self.mask is not None:
                    f, g = f[self.mask], g[:, self.mask]
                for j, r in enumerate(rows):
                    if r >= 0:
                        jac[r] = y * g[j]
            else:
                f, g = shape.bin_fractions(self.edges, p, window), None
                if self.mask is not None:
                    f = f[self.mask]
            if ry >= 0:
                jac[ry] = f
            mu = y * f if mu is None else mu + y * f
            blocks.append((shape, p, y, g, rows, ry))
        mu = np.maximum(mu, 1e-300)
        n = self.n
        w2 = n / (mu * mu)
        r = (1.0 if self.unit_scale else self.s) - n / mu
        hess = (jac * w2) @ jac.T
        for shape, p, y, g, rows, ry in blocks:
            if g is None:
                continue
            for j, rj in enumerate(rows):
                if rj < 0:
                    continue
                if ry >= 0:  # d2 mu / d yield d theta_j = dF/dtheta_j
                    t = float(r @ g[j])
                    hess[ry, rj] += t
                    hess[rj, ry] += t
                h = float(steps[rj])
                par = shape.parameters[j]
                central = (shape._primitive_grad is None and p[j] + h <= par.upper
                           and p[j] - h >= par.lower)  # gradients by differences: be careful
                q = list(p)
                q[j] = p[j] + h
                if q[j] > par.upper:
                    h = -h
                    q[j] = p[j] + h
                _, g2 = shape.fractions_and_grad(self.edges, q, window)
                if central:
                    q[j] = p[j] - h
                    g1 = shape.fractions_and_grad(self.edges, q, window)[1]
                    h = 2.0 * h
                else:
                    g1 = g
                if self.mask is not None:
                    g2 = g2[:, self.mask]
                    if central:
                        g1 = g1[:, self.mask]
                d2 = y * (g2 - g1) / h  # row k: d2 F / d theta_k d theta_j
                for k, rk in enumerate(rows):
                    if rk >= 0:
                        hess[rk, rj] += float(r @ d2[k])
        for k, _, sd in self._cons:
            hess[k, k] += 1.0 / sd**2
        return 0.5 * (hess + hess.T)

    def _eval(self, x: Sequence[float]) -> tuple[float, np.ndarray]:
        key = np.asarray(x, dtype=float).tobytes()
        if self._last is not None and self._last[0] == key:
            return self._last[1], self._last[2]
        val, g, _ = self.value_grad_info(np.asarray(x, dtype=float))
        if not np.isfinite(val):
            val, g = 1e300, np.zeros_like(g)
        self._last = (key, val, g)
        return val, g


class _UnbinnedCost(_Cost):
    """Extended unbinned NLL, evaluated in chunks of ``_CHUNK`` masses so temporaries stay
    in cache (several times faster than whole-array numpy expressions for 1M masses)."""

    _CHUNK = 32768

    def __init__(self, model, full, free, constraints, x, w):
        super().__init__(model, full, free, constraints)
        self.x = x
        self.w = w
        self.sumw = float(x.size if w is None else w.sum())
        fr = set(np.asarray(free).tolist())
        self._need = [any(i in fr for i in range(sl.start, sl.stop)) for _, sl, _ in model._blocks]
        self._yields = [iy for _, _, iy in model._blocks]

    def _chunks(self):
        n = self.x.size
        for a in range(0, n, self._CHUNK):
            b = min(a + self._CHUNK, n)
            yield self.x[a:b], None if self.w is None else self.w[a:b]

    def per_event(self, v: np.ndarray, x: np.ndarray):
        model = self.model
        mu = None
        dens = [None] * v.size
        for (shape, sl, iy), need in zip(model._blocks, self._need):
            p = [float(q) for q in v[sl]]
            y = float(v[iy])
            if need:
                f, g = shape.pdf_and_grad(x, p, model.window)
                for j, i in enumerate(range(sl.start, sl.stop)):
                    dens[i] = (y, g[j])
            else:
                f = shape.pdf(x, p, model.window)
            mu = y * f if mu is None else mu + y * f
            dens[iy] = (1.0, f)
        return mu, dens

    def _value_grad(self, v):
        val = float(sum(v[iy] for iy in self._yields))
        g = np.zeros(v.size)
        for iy in self._yields:
            g[iy] = 1.0
        for x, w in self._chunks():
            mu, dens = self.per_event(v, x)
            np.maximum(mu, 1e-300, out=mu)
            inv = 1.0 / mu
            if w is None:
                val += float(np.log(inv).sum())
            else:
                val -= float(w @ np.log(mu))
                inv *= w
            for i, d in enumerate(dens):
                if d is not None:
                    g[i] -= d[0] * float(inv @ d[1])
        return val, g

    def value_grad_info(self, x: np.ndarray):
        """NLL, gradient and the outer-product (BHHH) information sum_j w_j s_j s_j^T,
        s_j = grad ln mu(x_j), over the free parameters at free values ``x``."""
        self.ncall += 1
        v = self.full.copy()
        v[self.free] = x
        free = self.free
        val = float(sum(v[iy] for iy in self._yields))
        g = np.zeros(v.size)
        for iy in self._yields:
            g[iy] = 1.0
        info = np.zeros((free.size, free.size))
        with np.errstate(over="ignore", invalid="ignore"):
            val, g, info = self._accumulate(v, free, val, g, info)
        cv, cg = self._constraint(v)
        for i, _, sd in self.constraints:
            k = np.flatnonzero(free == i)
            if k.size:
                info[k[0], k[0]] += 1.0 / sd**2
        return val + cv, (g + cg)[free], info

    def _accumulate(self, v, free, val, g, info):
        for xc, w in self._chunks():
            mu, dens = self.per_event(v, xc)
            np.maximum(mu, 1e-300, out=mu)
            inv = 1.0 / mu
            if w is None:
                val += float(np.log(inv).sum())
            else:
                val -= float(w @ np.log(mu))
            sc = np.array([np.zeros_like(mu) if dens[i] is None else (dens[i][0] * inv) * dens[i][1]
                           for i in free])
            if w is None:
                g[free] -= sc.sum(axis=1)
                info += sc @ sc.T
            else:
                g[free] -= sc @ w
                info += (sc * w) @ sc.T
        return val, g, info

    def score_outer(self, v: np.ndarray, free: np.ndarray) -> np.ndarray:
        """D = sum_j w_j^2 grad(ln mu_j) grad(ln mu_j)^T over the free parameters."""
        d = np.zeros((free.size, free.size))
        for x, w in self._chunks():
            mu, dens = self.per_event(v, x)
            mu = np.maximum(mu, 1e-300)
            wm = (1.0 if w is None else w) / mu
            g = np.array([np.zeros_like(mu) if dens[i] is None else dens[i][0] * dens[i][1] * wm
                          for i in free])
            d += g @ g.T
        return d


# ================================================================== FitResult
@dataclass(frozen=True, repr=False)
class FitResult:
    """Outcome of :func:`fit` (a frozen value; ``minuit`` holds the iminuit object).

    Attributes
    ----------
    parameters : tuple of str
        Parameter names in model order.
    values, errors : dict
        Best-fit values and errors from the Hessian of the negative log-likelihood at the
        minimum (sandwich errors for weighted unbinned fits;
        fixed parameters have error 0).
    minos : dict or None
        ``name -> (lower, upper)`` MINOS errors (negative, positive) when requested.
    covariance, correlations : ndarray
        Over all parameters in order (rows/columns of fixed parameters are zero).
    nll : float
        Minimum of the negative log-likelihood (binned: in the saturated form).
    valid : bool
        True only when the minimiser converged, no free parameter sits at a bound, and the
        covariance is accurate and positive definite.  ``problems`` says what failed.
    peak_mass, peak_mass_error, peak_width, peak_width_error, fwhm, fwhm_error : float
        Of the first signal component (``peak_width`` is its natural ``width`` if it has
        one, else ``sigma``; its name in ``width_parameter``).
    gof_chi2, gof_ndf, gof_p_value : float, int, float
        Baker-Cousins saturated-model chi-square of the binned data (for unbinned fits the
        masses are histogrammed in ``edges``), its ndf (bins - free parameters) and the
        chi-square p-value.  Approximate: for an unbinned fit the parameters were estimated
        from the unbinned masses, not from the bins the chi-square uses, so the statistic
        is not exactly chi-square(ndf) distributed; it lies between chi-square(ndf) and
        chi-square(bins - 1) (Chernoff and Lehmann, Ann. Math. Statist. 25 (1954) 579;
        from memory), and the p-value is then somewhat too small.  Parameters with a
        Gaussian constraint are counted as free in ndf although the constraint adds
        information.  Weighted bins use the scaled-Poisson effective counts, again
        asymptotic.  ``gof_note`` (``to_dict()["gof"]["note"]``) says which applies.
    minimizer : str
        What found the minimum: ``"fisher-scoring"`` (peaksift's damped Fisher scoring) or
        ``"iminuit-migrad"`` (the fallback, iminuit's variable-metric minimiser).
    edges, observed, observed_sumw2, expected, pulls : ndarray
        Binning used for the goodness of fit and plots; pulls are (n - mu)/sqrt(var),
        var = mu * sumw2/sumw for weighted bins.
    """

    parameters: tuple[str, ...]
    values: dict[str, float]
    errors: dict[str, float]
    fixed: tuple[str, ...]
    covariance: np.ndarray
    correlations: np.ndarray
    minos: dict[str, tuple[float, float]] | None
    nll: float
    valid: bool
    problems: tuple[str, ...]
    flags: dict[str, bool]
    binned: bool
    binned_reason: str
    weighted: bool
    weight_treatment: str
    window: tuple[float, float]
    n_events: float
    peak_mass: float
    peak_mass_error: float
    peak_width: float
    peak_width_error: float
    width_parameter: str
    fwhm: float
    fwhm_error: float
    gof_chi2: float
    gof_ndf: int
    gof_p_value: float
    edges: np.ndarray
    observed: np.ndarray
    observed_sumw2: np.ndarray
    expected: np.ndarray
    pulls: np.ndarray
    model: Model = field(compare=False)
    attempts: int = 1
    n_calls: int = 0
    unit: str = "GeV"
    minimizer: str = "fisher-scoring"
    gof_note: str = ""
    _minuit_factory: Any = field(default=None, compare=False)
    _cache: dict = field(default_factory=dict, compare=False)

    @property
    def minuit(self) -> Any:
        """The ``iminuit.Minuit`` object of the fit, set up at the minimum with the model's
        cost function and bounds (iminuit's minimiser has run on it only when
        ``minimizer`` is ``"iminuit-migrad"``; call its ``.migrad()``, ``.hesse()``,
        ``.minos()`` methods for more)."""
        if "minuit" not in self._cache and self._minuit_factory is not None:
            self._cache["minuit"] = self._minuit_factory()
        return self._cache.get("minuit")

    # ---------------------------------------------------------------- summary
    @property
    def signal_yield(self) -> tuple[float, float]:
        return self.values["signal_yield"], self.errors["signal_yield"]

    @property
    def background_yield(self) -> tuple[float, float]:
        return self.values["background_yield"], self.errors["background_yield"]

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict with the results.json ``fit`` keys, plus everything else."""

        def ve(v: float, e: float) -> dict[str, float]:
            return {"value": _num(v), "error": _num(e)}

        return {
            "valid": bool(self.valid),
            "peak_mass": ve(self.peak_mass, self.peak_mass_error),
            "width": ve(self.peak_width, self.peak_width_error),
            "signal_yield": ve(*self.signal_yield),
            "background_yield": ve(*self.background_yield),
            "gof": {"chi2": _num(self.gof_chi2), "ndf": int(self.gof_ndf),
                    "p_value": _num(self.gof_p_value), "note": self.gof_note},
            "width_parameter": self.width_parameter,
            "fwhm": ve(self.fwhm, self.fwhm_error),
            "problems": list(self.problems),
            "flags": {k: bool(v) for k, v in self.flags.items()},
            "signal_shapes": [s.name for s in self.model.signals],
            "background_shape": self.model.background.name,
            "window": [float(self.window[0]), float(self.window[1])],
            "binned": bool(self.binned),
            "binned_reason": self.binned_reason,
            "weighted": bool(self.weighted),
            "weight_treatment": self.weight_treatment,
            "n_events": _num(self.n_events),
            "nll": _num(self.nll),
            "parameters": {n: ve(self.values[n], self.errors[n]) | {"fixed": n in self.fixed}
                           for n in self.parameters},
            "minos": None if self.minos is None else
            {k: [_num(a), _num(b)] for k, (a, b) in self.minos.items()},
            "covariance": [[_num(c) for c in row] for row in self.covariance],
            "unit": self.unit,
        }

    def __repr__(self) -> str:
        head = (f"FitResult({'valid' if self.valid else 'INVALID'}; "
                f"{' + '.join(s.name for s in self.model.signals)} + "
                f"{self.model.background.name}, {'binned' if self.binned else 'unbinned'}, "
                f"window {self.window[0]:g}-{self.window[1]:g} {self.unit})")
        lines = [head]
        if self.problems:
            lines.append("  problems: " + "; ".join(self.problems))
        w = max(len(n) for n in self.parameters)
        for n in self.parameters:
            tag = " (fixed)" if n in self.fixed else ""
            lines.append(f"  {n:<{w}} = {_fmt(self.values[n], self.errors[n])}{tag}")
        lines.append(f"  peak: mass {_fmt(self.peak_mass, self.peak_mass_error)} {self.unit}, "
                     f"FWHM {_fmt(self.fwhm, self.fwhm_error)} {self.unit}")
        lines.append(f"  GoF (Baker-Cousins): chi2/ndf = {self.gof_chi2:.1f}/{self.gof_ndf}, "
                     f"p = {self.gof_p_value:.3g}")
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        import html

        status = ("<b style='color:#1f6f8b'>valid</b>" if self.valid else
                  "<b style='color:#d1495b'>INVALID</b>: " + html.escape("; ".join(self.problems)))
        rows = "".join(
            f"<tr><td>{html.escape(n)}</td><td>{self.values[n]:.6g}</td>"
            f"<td>{self.errors[n]:.3g}</td><td>{'fixed' if n in self.fixed else ''}</td></tr>"
            for n in self.parameters)
        return (f"<div><p>Fit {status}; {'binned' if self.binned else 'unbinned'} "
                f"({html.escape(self.binned_reason)}); GoF chi2/ndf = {self.gof_chi2:.1f}/"
                f"{self.gof_ndf}, p = {self.gof_p_value:.3g}</p>"
                f"<table><tr><th>parameter</th><th>value</th><th>error</th><th></th></tr>"
                f"{rows}</table><p>peak mass {_fmt(self.peak_mass, self.peak_mass_error)} "
                f"{self.unit}; FWHM {_fmt(self.fwhm, self.fwhm_error)} {self.unit}</p></div>")

    # ------------------------------------------------------------------- plot
    def plot(self, path: Any = None, *, ax: Any = None, title: str | None = None) -> Any:
        """Data with Poisson error bars, total model, signal and (dashed) background, and a
        pulls panel underneath.  Returns the matplotlib Figure (saved to ``path`` if given).

        Unweighted counts get central 68.3 % Garwood intervals
        (``chi2.ppf(0.1587, 2n)/2``, ``chi2.ppf(0.8413, 2n+2)/2``; Garwood, Biometrika 28
        (1936) 437); weighted bins get sqrt(sum w^2).
        """
        from ._style import COLORS, figure_style, use_headless_backend

        use_headless_backend()
        import matplotlib.pyplot as plt
        from scipy import stats

        e, n = self.edges, self.observed
        c = 0.5 * (e[1:] + e[:-1])
        bw = np.diff(e)
        if self.weighted:
            lo_err = hi_err = np.sqrt(self.observed_sumw2)
        else:
            lower = np.where(n > 0, stats.chi2.ppf(0.15865, 2 * n) / 2.0, 0.0)
            upper = stats.chi2.ppf(0.84135, 2 * n + 2) / 2.0
            lo_err, hi_err = n - lower, upper - n
        xs = np.linspace(self.window[0], self.window[1], 800)
        vals = [self.values[k] for k in self.parameters]
        ref_bw = float(np.median(bw))
        comps = self.model.components(xs, vals)
        total = sum(comps.values())
        with figure_style():
            fig, (a1, a2) = plt.subplots(2, 1, sharex=True, figsize=(7.0, 5.6),
                                         gridspec_kw={"height_ratios": [3.2, 1], "hspace": 0.05})
            scale_n = ref_bw / bw
            a1.errorbar(c, n * scale_n, yerr=[lo_err * scale_n, hi_err * scale_n], fmt="o",
                        ms=2.8, lw=0.9, color=COLORS["data"], label="data", zorder=3)
            a1.plot(xs, total * ref_bw, color=COLORS["total"], label="signal + background")
            a1.plot(xs, comps["background"] * ref_bw, color=COLORS["background"], ls="--",
                    label="background")
            styles = iter(["-", "-.", ":", (0, (5, 1, 1, 1))] * 4)
            for k, v in comps.items():
                if k.startswith("signal"):
                    a1.plot(xs, v * ref_bw, color=COLORS["signal"], lw=1.2, ls=next(styles),
                            label=k.replace("_", " "))
            a1.set_ylabel(f"events / {ref_bw:.3g} {self.unit}")
            top = max(float(np.max((n + hi_err) * scale_n)), float(np.max(total * ref_bw)))
            a1.set_ylim(0, 1.45 * top)  # headroom for the legend and the numbers
            txt = (f"m = {_fmt(self.peak_mass, self.peak_mass_error)} {self.unit}\n"
                   f"{self.width_parameter} = {_fmt(self.peak_width, self.peak_width_error)} "
                   f"{self.unit}\n"
                   f"N_sig = {_fmt(*self.signal_yield)}\n"
                   f"chi2/ndf = {self.gof_chi2:.1f}/{self.gof_ndf}")
            if not self.valid:
                txt += "\nINVALID FIT"
            a1.text(0.03, 0.96, txt, transform=a1.transAxes, va="top", fontsize=9)
            a1.legend(loc="upper right")
            if title:
                a1.set_title(title)
            a2.axhline(0, color=COLORS["background"], lw=0.8)
            for lvl in (-2, 2):
                a2.axhline(lvl, color=COLORS["background"], lw=0.6, ls=":")
            a2.bar(c, self.pulls, width=bw, color=COLORS["total"], alpha=0.75)
            lim = max(3.5, float(np.nanmax(np.abs(self.pulls))) * 1.1 if self.pulls.size else 3.5)
            a2.set_ylim(-lim, lim)
            a2.set_ylabel("pull")
            a2.set_xlabel(f"m [{self.unit}]")
            a2.set_xlim(self.window)
            if path is not None:
                fig.savefig(path)
        return fig


def _num(x: Any) -> float | None:
    x = float(x)
    return x if math.isfinite(x) else None


def _fmt(v: float, e: float) -> str:
    if not (math.isfinite(e) and e > 0):
        return f"{v:.6g}"
    digits = max(0, 1 - math.floor(math.log10(e)))
    return f"{v:.{digits}f} ± {e:.{digits}f}"


# ======================================================================== fit
@dataclass
class _Data:
    binned: bool
    reason: str
    weighted: bool
    edges: np.ndarray | None
    n: np.ndarray | None
    n2: np.ndarray | None
    x: np.ndarray | None
    w: np.ndarray | None
    window: tuple[float, float]
    total: float
    unit: str


def _prepare(data: Any, weights: Any, window: Any, binned: bool | None, bins: Any) -> _Data:
    from .histogram import MassHistogram
    from .shapes._base import _as_window

    if isinstance(data, MassHistogram):
        if weights is not None:
            raise FitError("weights= given with a MassHistogram; the histogram already holds them")
        if binned is False:
            raise FitError("an unbinned fit needs the masses themselves, not a MassHistogram; "
                           "pass the array of masses or use binned=True")
        e = np.asarray(data.edges, float)
        lo, hi = _as_window(window) if window is not None else (e[0], e[-1])
        tol = 1e-9 * (e[-1] - e[0])
        keep = (e[:-1] >= lo - tol) & (e[1:] <= hi + tol)
        if not keep.any():
            raise FitError(f"fit window ({lo:g}, {hi:g}) contains no complete bin of the "
                           f"histogram (range {e[0]:g}-{e[-1]:g}); choose a window inside it")
        idx = np.flatnonzero(keep)
        edges = e[idx[0]: idx[-1] + 2]
        n = np.asarray(data.sumw, float)[idx[0]: idx[-1] + 1]
        n2 = np.asarray(data.sumw2, float)[idx[0]: idx[-1] + 1]
        if not (np.all(np.isfinite(n)) and np.all(np.isfinite(n2))):
            raise FitError("the histogram has non-finite bin contents in the fit window")
        weighted = bool(data.is_weighted)
        return _Data(True, "data is a histogram", weighted, edges, n, n2, None, None,
                     (float(edges[0]), float(edges[-1])), float(n.sum()),
                     getattr(data, "unit", "GeV"))
    if isinstance(data, tuple) and len(data) == 2 and weights is None:
        data, weights = data
    x = np.asarray(data, dtype=float).ravel()
    bad = ~np.isfinite(x)
    if bad.any():
        raise FitError(f"{int(bad.sum())} of {x.size} masses are not finite (first at index "
                       f"{int(np.flatnonzero(bad)[0])}); drop NaN/inf masses before fitting")
    w = None
    if weights is not None:
        w = np.asarray(weights, dtype=float).ravel()
        if w.shape != x.shape:
            raise FitError(f"{x.size} masses but {w.size} weights; give one weight per mass")
        badw = ~np.isfinite(w)
        if badw.any():
            raise FitError(f"{int(badw.sum())} weights are not finite (first at index "
                           f"{int(np.flatnonzero(badw)[0])})")
    if window is None:
        if x.size == 0:
            raise FitError("no masses given and no window; nothing to fit")
        lo, hi = float(x.min()), float(x.max())
        if hi <= lo:
            raise FitError("all masses are equal; give a window=(lo, hi)")
    else:
        lo, hi = _as_window(window)
    sel = (x >= lo) & (x <= hi)
    x = x[sel]
    if w is not None:
        w = w[sel]
        if np.all(w == 1.0):
            w = None
    if x.size == 0:
        raise FitError(f"no masses inside the fit window ({lo:g}, {hi:g}); "
                       "check the window and the mass units (GeV)")
    weighted = w is not None
    total = float(x.size if w is None else w.sum())
    if binned is None:
        if x.size <= UNBINNED_LIMIT:
            binned, reason = False, (f"{x.size} masses <= {UNBINNED_LIMIT}: unbinned uses all "
                                     "the information at small cost")
        else:
            binned, reason = True, (f"{x.size} masses > {UNBINNED_LIMIT}: binned in "
                                    f"{DEFAULT_BINS if bins is None else bins} bins for speed")
    else:
        reason = "requested"
    if binned:
        edges = (np.linspace(lo, hi, (DEFAULT_BINS if bins is None else int(bins)) + 1)
                 if bins is None or np.ndim(bins) == 0 else np.asarray(bins, float))
        idx = np.clip(np.searchsorted(edges, x, side="right") - 1, 0, edges.size - 2)
        nb = edges.size - 1
        n = np.bincount(idx, weights=w, minlength=nb).astype(float)
        n2 = n.copy() if w is None else np.bincount(idx, weights=w * w, minlength=nb)
        return _Data(True, reason, weighted, edges, n, n2, None, None, (lo, hi), total, "GeV")
    return _Data(False, reason, weighted, None, None, None, x, w, (lo, hi), total, "GeV")


def _gof_binning(d: _Data) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    if d.binned:
        return d.edges, d.n, d.n2
    nb = int(np.clip(d.x.size // 20, 5, 100))
    edges = np.linspace(d.window[0], d.window[1], nb + 1)
    idx = np.clip(np.searchsorted(edges, d.x, side="right") - 1, 0, nb - 1)
    n = np.bincount(idx, weights=d.w, minlength=nb).astype(float)
    n2 = n.copy() if d.w is None else np.bincount(idx, weights=d.w**2, minlength=nb)
    return edges, n, n2


def _coarse(edges: np.ndarray, n: np.ndarray, n2: np.ndarray, most: int):
    """Merge groups of adjacent bins so at most ``most`` remain (for finding starts)."""
    k = math.ceil(n.size / most)
    if k <= 1:
        return edges, n, n2
    idx = np.arange(0, n.size, k)
    return (np.append(edges[idx], edges[-1]), np.add.reduceat(n, idx),
            np.add.reduceat(n2, idx))


def _scale(n: np.ndarray, n2: np.ndarray) -> np.ndarray:
    """Scaled-Poisson factor sum(w)/sum(w^2) per bin (1 for unweighted bins)."""
    if np.array_equal(n, n2):
        return np.ones_like(n)
    glob = n.sum() / n2.sum() if n2.sum() > 0 else 1.0
    with np.errstate(invalid="ignore", divide="ignore"):
        s = np.where(n2 > 0, n / np.where(n2 > 0, n2, 1.0), glob)
    return np.where(s > 0, s, glob)


@dataclass
class _MinOut:
    x: np.ndarray
    fval: float
    converged: bool
    call_limit: bool
    errors: np.ndarray
    minuit: Any
    method: str


def _new_minuit(cost: _Cost, start: np.ndarray, lower: np.ndarray, upper: np.ndarray,
                names: list[str], steps: np.ndarray | None = None):
    from iminuit import Minuit

    m = Minuit(cost, *start, grad=cost.grad, name=names)
    m.strategy = 0
    m.print_level = 0
    for i, n in enumerate(names):
        lo = None if not math.isfinite(lower[i]) else float(lower[i])
        hi = None if not math.isfinite(upper[i]) else float(upper[i])
        m.limits[n] = (lo, hi)
        if steps is not None and math.isfinite(steps[i]) and steps[i] > 0:
            m.errors[n] = float(steps[i])
        else:
            span = (upper[i] - lower[i]) if math.isfinite(upper[i] - lower[i]) else abs(start[i])
            m.errors[n] = max(abs(start[i]) * 0.05, 1e-3 * span, 1e-6)
    return m


def _fisher_scoring(cost: _Cost, x0: np.ndarray, lower: np.ndarray,
                    upper: np.ndarray, max_iter: int = 60, edm_goal: float = 1e-7):
    """Damped Fisher scoring (Levenberg-Marquardt on the information matrix I returned by
    ``cost.value_grad_info``).  Returns (x, f, converged, I^-1); converged when
    EDM = g^T I^-1 g / 2 < ``edm_goal`` (read off the undamped Newton step)."""
    x = np.clip(np.asarray(x0, float), lower, upper)
    lam = 0.0  # undamped first: from good starts Newton steps are accepted
    stalled = 0
    f, g, info = cost.value_grad_info(x)
    solve = np.linalg.solve
    for _ in range(max_iter):
        for _ in range(14):
            a = info if lam == 0.0 else info + lam * np.diag(info.diagonal())
            try:
                step = -solve(a, g)
            except np.linalg.LinAlgError:
                return x, f, False, None
            if lam == 0.0:
                edm = -0.5 * float(g @ step)
                if not np.isfinite(edm):
                    return x, f, False, None
                if edm < edm_goal:
                    try:
                        return x, f, True, np.linalg.inv(info)
                    except np.linalg.LinAlgError:
                        return x, f, False, None
            xn = np.clip(x + step, lower, upper)
            fn, gn, infon = cost.value_grad_info(xn)
            if np.isfinite(fn) and fn <= f + 1e-12 * abs(f):
                stalled = stalled + 1 if f - fn < 1e-10 * max(1.0, abs(f)) else 0
                x, f, g, info = xn, fn, gn, infon
                lam = 0.0 if lam <= 1e-3 else lam / 10.0
                break
            lam = 1e-3 if lam == 0.0 else lam * 10.0
        else:
            return x, f, False, None
        if stalled >= 3:  # no progress (e.g. pressing on a bound): let iminuit decide
            return x, f, False, None
    return x, f, False, None


def _minimize(cost: _Cost, start: np.ndarray, lower: np.ndarray, upper: np.ndarray,
              names: list[str], edm_goal: float = 1e-7) -> _MinOut:
    """Fisher scoring first (few calls: expected information for binned fits, the
    outer-product information for unbinned ones); iminuit's migrad (strategy 0, analytic
    gradient) when that does not converge.  Returns a :class:`_MinOut`."""
    if hasattr(cost, "value_grad_info"):
        x, f, ok, inv = _fisher_scoring(cost, start, lower, upper, edm_goal=edm_goal)
        if ok:
            errs = np.sqrt(np.clip(np.diag(inv), 0, None))

            def make(cost=cost, x=x, errs=errs):
                return _new_minuit(cost, x, lower, upper, names, errs)

            return _MinOut(x, f, True, False, errs, make, "fisher-scoring")
    m = _new_minuit(cost, start, lower, upper, names)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        m.migrad(ncall=20000)
    fm = m.fmin
    return _MinOut(np.asarray(m.values, float), float(m.fval), bool(fm.is_valid),
                   bool(fm.has_reached_call_limit), np.asarray(m.errors, float), lambda: m,
                   "iminuit-migrad")


def _background_start(model: Model, edges: np.ndarray, n: np.ndarray, scale: np.ndarray,
                      mask: np.ndarray | None, bstart: np.ndarray, is_fixed: np.ndarray,
                      lower: np.ndarray, upper: np.ndarray) -> np.ndarray:
    """Background-only binned fit (on ``mask`` bins; fixed background parameters stay
    fixed) -> full parameter vector."""
    v = bstart.copy()
    for _, _, iy in model._blocks[:-1]:
        v[iy] = 0.0
    _, bsl, biy = model._blocks[-1]
    free = np.array([i for i in [*range(bsl.start, bsl.stop), biy] if not is_fixed[i]], int)
    if free.size == 0:
        return v
    m = mask if mask is not None else np.ones(n.size, bool)
    if not is_fixed[biy]:
        v[biy] = max(float(n[m].sum()), 1.0)
    cost = _BinnedCost(model, v, free, [], edges, n, scale, mask)
    lo, hi = lower[free].copy(), upper[free].copy()
    mo = _minimize(cost, np.clip(v[free], lo, hi), lo, hi,
                   [model.parameter_names[i] for i in free], edm_goal=1e-2)
    out = v.copy()
    out[free] = mo.x
    return out


def _smooth_excess(c: np.ndarray, n: np.ndarray, b: np.ndarray, sigma: float) -> np.ndarray:
    d = c[:, None] - c[None, :]
    k = np.exp(-0.5 * (d / sigma) ** 2)
    num = k @ (n - b)
    den = np.sqrt(np.maximum(k @ np.maximum(b, 1e-9), 1e-9))
    return num / den


def fit(
    data: Any,
    signal: Any = "gaussian",
    background: Any = "exponential",
    window: tuple[float, float] | None = None,
    *,
    weights: Any = None,
    binned: bool | None = None,
    bins: Any = None,
    start: Mapping[str, float] | None = None,
    fixed: Mapping[str, float] | None = None,
    limits: Mapping[str, tuple[float, float]] | None = None,
    constraints: Mapping[str, tuple[float, float]] | None = None,
    minos: bool | Sequence[str] = False,
    retries: int = 3,
) -> FitResult:
    """Fit signal(s) + background with an extended likelihood.

    Parameters
    ----------
    data : MassHistogram, array of masses, or (masses, weights)
    signal : shape name, Shape, or a list of them (several peaks)
    background : shape name or Shape
    window : (lo, hi), optional
        Fit window in GeV (default: the histogram's range / the masses' range).  For a
        histogram, only bins completely inside the window are used and the window snaps
        to their edges.
    weights : array, optional
        Per-mass weights (unbinned data).
    binned : bool or None
        None chooses: histograms binned; arrays unbinned up to ``UNBINNED_LIMIT`` masses in
        the window, binned in ``bins`` (default ``DEFAULT_BINS``) bins above.  The choice and
        its reason are in ``FitResult.binned`` / ``binned_reason``.
    start : dict, optional
        Starting values by parameter name (others are found automatically).
    fixed : dict, optional
        Parameters held at the given values.  Fixing every ``signal_yield`` to 0 also fixes
        that component's shape parameters (they have no effect then).
    limits : dict, optional
        ``name -> (lower, upper)`` replacing the default bounds.
    constraints : dict, optional
        ``name -> (mean, sigma)`` Gaussian constraints, adding
        ``0.5 ((value - mean)/sigma)^2`` to the negative log-likelihood.
    minos : bool or list of names
        Run MINOS for all free (True) or the named parameters (valid fits only; ``minos``
        stays None for an invalid fit).
    retries : int
        Further starting points tried when a fit is not valid.

    Returns
    -------
    FitResult

    Raises
    ------
    FitError
        Empty window, fewer events than free parameters, non-finite data, inconsistent
        bounds or starts, unknown shape or parameter names.

    Notes
    -----
    Binned (extended Poisson likelihood of the bin contents :math:`n_i`): the expectation
    of each bin is its integral, from CDF differences, never the density at the bin centre,

    .. math:: \\mu_i = \\sum_k \\nu_k \\,[F_k(e_{i+1}) - F_k(e_i)], \\qquad
              -\\ln L = \\sum_i \\left[\\mu_i - n_i + n_i \\ln(n_i/\\mu_i)\\right]

    (:math:`\\nu_k` the yields, :math:`F_k` the shapes' CDFs on the window).  This is the
    Poisson likelihood ratio to the saturated model :math:`\\mu_i = n_i`, so :math:`2(-\\ln
    L)` at the minimum is the goodness-of-fit chi-square (Baker and Cousins, Nucl. Instrum.
    Meth. 221 (1984) 437, eq. 11) and differences of ``nll`` between fits are profile
    likelihood ratios.

    Unbinned (extended likelihood of the masses :math:`x_j`, weights :math:`w_j = 1` when
    unweighted): :math:`-\\ln L = \\sum_k \\nu_k - \\sum_j w_j \\ln \\sum_k \\nu_k f_k(x_j)`.
    The goodness of fit bins the masses afterwards and is therefore approximate (see
    :class:`FitResult`, ``gof_chi2``).

    Weighted bins: scaled Poisson, :math:`\\tilde n_i = s_i n_i`, :math:`\\tilde\\mu_i = s_i
    \\mu_i`, :math:`s_i = \\sum w/\\sum w^2` in the bin, in the same saturated form, so the
    errors from its Hessian are asymptotically right for weighted events (Bohm and Zech,
    Nucl. Instrum. Meth. A 748 (2014) 1; from memory).

    Weighted unbinned: the weighted likelihood above with the sandwich covariance
    :math:`C = H^{-1} D H^{-1}`, :math:`D = \\sum_j w_j^2 \\nabla \\ln\\mu(x_j) \\nabla
    \\ln\\mu(x_j)^T`, :math:`H` the Hessian of :math:`-\\ln L` (Langenbruch, Eur. Phys. J. C
    82 (2022) 393; from memory).

    Gaussian constraints add :math:`\\tfrac12((\\theta - c)/s)^2` to :math:`-\\ln L` (common
    practice).
    """
    d = _prepare(data, weights, window, binned, bins)
    model = Model(signal, background, d.window)
    names = list(model.parameter_names)
    npar = len(names)
    fixed = dict(fixed or {})
    start = dict(start or {})
    limits = dict(limits or {})
    constraints = dict(constraints or {})
    for label, dct in (("fixed", fixed), ("start", start), ("limits", limits),
                       ("constraints", constraints)):
        for k in dct:
            if k not in names:
                from .errors import closest

                hint = closest(k, names)
                raise FitError(f"{label}: unknown parameter {k!r}"
                               f"{f' (did you mean {hint!r}?)' if hint else ''}; "
                               f"parameters are {', '.join(names)}")
    if d.total <= 0:
        raise FitError(f"the fit window {d.window} holds no events (sum of weights "
                       f"{d.total:g}); widen the window or check the selection")

    # ---- bounds
    lower = np.array([p.lower for p in model.parameters], float)
    upper = np.array([p.upper for p in model.parameters], float)
    tot = max(d.total, 1.0)
    yields = [iy for _, _, iy in model._blocks]
    for iy in yields[:-1]:
        lower[iy], upper[iy] = -0.5 * tot - 10.0, 5.0 * tot + 10.0
    lower[yields[-1]], upper[yields[-1]] = 0.0, 5.0 * tot + 10.0
    for k, (a, b) in limits.items():
        i = names.index(k)
        lower[i], upper[i] = float(a), float(b)
    for i, k in enumerate(names):
        if not lower[i] < upper[i]:
            raise FitError(f"inconsistent bounds for {k!r}: lower {lower[i]:g} is not below "
                           f"upper {upper[i]:g}; fix limits={{{k!r}: (lo, hi)}}")
    for k, v in {**start, **fixed}.items():
        i = names.index(k)
        if not math.isfinite(float(v)):
            raise FitError(f"value for {k!r} is not finite ({v!r})")
        if k in start and not lower[i] <= float(v) <= upper[i]:
            raise FitError(f"start value {k}={v:g} is outside its bounds "
                           f"[{lower[i]:g}, {upper[i]:g}]; change the start or limits={{...}}")
    for k, (mean, sig) in constraints.items():
        if not (math.isfinite(mean) and math.isfinite(sig) and sig > 0):
            raise FitError(f"constraint on {k!r} needs a finite mean and a positive sigma, "
                           f"got ({mean!r}, {sig!r})")

    # ---- which parameters float
    is_fixed = np.zeros(npar, bool)
    for k in fixed:
        is_fixed[names.index(k)] = True
    for shape, sl, iy in model._blocks[:-1]:
        if names[iy] in fixed and float(fixed[names[iy]]) == 0.0:
            is_fixed[sl] = True
    nfree = int((~is_fixed).sum())
    n_entries = (float(np.sum(d.n)) if d.binned and not d.weighted else
                 float(np.sum(d.n**2 / np.where(d.n2 > 0, d.n2, 1))) if d.binned else
                 float(d.x.size))
    if n_entries < nfree:
        raise FitError(f"only {n_entries:g} events in the window {d.window} for {nfree} free "
                       "parameters; widen the window, fix parameters or use fewer")

    # ---- starting values
    pars = model.parameters
    base = np.array([p.start for p in pars], float)
    for i, p in enumerate(pars):
        if not math.isfinite(base[i]) and i not in yields:
            base[i] = 0.5 * (lower[i] + upper[i])
    for k, v in start.items():
        base[names.index(k)] = float(v)
    base = np.clip(base, lower, upper)
    for k, v in fixed.items():  # fixed values are used as given, even outside the bounds
        base[names.index(k)] = float(v)
    for iy in yields[:-1]:
        if not math.isfinite(base[iy]):
            base[iy] = 0.0
    if not math.isfinite(base[yields[-1]]):
        base[yields[-1]] = d.total
    if d.binned:
        se, sn, sn2 = _coarse(d.edges, d.n, d.n2, 100)
    else:
        se, sn, sn2 = _gof_binning(d)
    sscale = _scale(sn, sn2)
    starts = _auto_starts(model, se, sn, sscale, base, is_fixed, start, fixed, lower, upper,
                          d.total, retries)

    # ---- cost
    cons = [(names.index(k), float(a), float(b)) for k, (a, b) in constraints.items()]
    free_idx = np.flatnonzero(~is_fixed)
    if d.binned:
        scale = _scale(d.n, d.n2)
        def make_cost(v):
            return _BinnedCost(model, v, free_idx, cons, d.edges, d.n, scale)
    else:
        def make_cost(v):
            return _UnbinnedCost(model, v, free_idx, cons, d.x, d.w)

    best = None
    attempts = 0
    total_calls = 0
    for s0 in starts:
        attempts += 1
        cost = make_cost(s0)
        mo = _minimize(cost, s0[free_idx], lower[free_idx], upper[free_idx],
                       [names[i] for i in free_idx])
        xbest, fbest, hcov, posdef = _polish(cost, mo, lower[free_idx], upper[free_idx])
        total_calls += cost.ncall
        problems = _problems(mo, xbest, hcov, posdef, lower[free_idx], upper[free_idx],
                             [names[i] for i in free_idx])
        rank = (len(problems) > 0, fbest)
        if best is None or rank < best[0]:
            best = (rank, mo, cost, problems, xbest, fbest, hcov, posdef)
        if not problems:
            break
    _, mo, cost, problems, xbest, fbest, free_cov, posdef = best
    vals = base.copy()
    vals[free_idx] = xbest
    treatment = "none (unweighted)"
    if d.weighted:
        if d.binned:
            treatment = ("scaled Poisson bins (Bohm and Zech 2014): errors from the Hessian "
                         "of the effective-count likelihood")
        else:
            treatment = "sandwich covariance H^-1 D H^-1 (Langenbruch 2022)"
            free_cov = _sandwich(cost, vals, free_idx, free_cov)
    cov = np.zeros((npar, npar))
    cov[np.ix_(free_idx, free_idx)] = free_cov
    err = np.sqrt(np.clip(np.diag(cov), 0, None))
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = cov / np.outer(err, err)
    corr[~np.isfinite(corr)] = 0.0
    np.fill_diagonal(corr, np.where(err > 0, 1.0, 0.0))

    minos_out = None
    if minos and not problems:
        which = [names[i] for i in free_idx] if minos is True else list(minos)
        minos_out = {}
        mi = mo.minuit()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            mi.values = list(xbest)
            mi.migrad()
            for k in which:
                if k not in names or is_fixed[names.index(k)]:
                    raise FitError(f"minos: {k!r} is not a free parameter")
                mi.minos(k)
                me = mi.merrors[k]
                minos_out[k] = (float(me.lower), float(me.upper))

    # ---- summary quantities
    values = dict(zip(names, (float(v) for v in vals)))
    errors = dict(zip(names, (float(e) for e in err)))
    sig0, sl0, _ = model._blocks[0]
    p0 = list(vals[sl0])
    loc = sig0.location(p0)
    i_m = sl0.start + sig0.parameter_names.index("mass")
    wpars = sig0.width_parameters()
    wname = wpars[0] if wpars else ""
    i_w = sl0.start + sig0.parameter_names.index(wname) if wname else None
    fw, fw_err = _fwhm_with_error(sig0, p0, cov[sl0, sl0])
    ge, gn, gn2 = _gof_binning(d)
    state = getattr(cost, "_state", None)
    if d.binned and state is not None and state[0] == np.asarray(xbest, float).tobytes():
        mu = np.asarray(state[1])  # the expectation at the minimum, already computed
    else:
        mu = model.expected(ge, vals)
    gsc = _scale(gn, gn2)
    chi2 = _baker_cousins(gn * gsc, mu * gsc)
    ndf = int(gn.size - free_idx.size)
    if d.binned:
        gof_note = ("saturated-model (Baker-Cousins) chi-square of the fitted bins, "
                    "asymptotically chi-square(ndf)")
    else:
        gof_note = ("approximate: parameters fitted unbinned, the masses then binned for the "
                    "chi-square, which lies between chi-square(ndf) and chi-square(bins - 1) "
                    "(Chernoff-Lehmann), so the p-value is somewhat too small")
    if d.weighted:
        gof_note += "; weighted bins as scaled-Poisson effective counts"
    n_con = sum(1 for k in constraints if not is_fixed[names.index(k)])
    if n_con:
        gof_note += (f"; {n_con} Gaussian-constrained parameter{'s' if n_con > 1 else ''} "
                     "counted as free in ndf")
    from scipy import special

    pval = float(special.chdtrc(ndf, chi2)) if ndf > 0 else math.nan
    with np.errstate(invalid="ignore", divide="ignore"):
        pulls = np.where(mu > 0, (gn - mu) / np.sqrt(mu / gsc), 0.0)
    flags = {
        "converged": bool(mo.converged),
        "at_bound": any("bound" in p for p in problems),
        "posdef_covariance": bool(posdef),
    }
    return FitResult(
        parameters=tuple(names), values=values, errors=errors,
        fixed=tuple(n for n, f in zip(names, is_fixed) if f),
        covariance=cov, correlations=corr, minos=minos_out, nll=float(fbest),
        valid=not problems, problems=tuple(problems), flags=flags,
        binned=d.binned, binned_reason=d.reason, weighted=d.weighted,
        weight_treatment=treatment, window=d.window, n_events=d.total,
        peak_mass=float(loc), peak_mass_error=float(err[i_m]),
        peak_width=float(vals[i_w]) if i_w is not None else math.nan,
        peak_width_error=float(err[i_w]) if i_w is not None else math.nan,
        width_parameter=wname, fwhm=fw, fwhm_error=fw_err,
        gof_chi2=float(chi2), gof_ndf=ndf, gof_p_value=pval,
        edges=np.asarray(ge), observed=np.asarray(gn), observed_sumw2=np.asarray(gn2),
        expected=np.asarray(mu), pulls=np.asarray(pulls), model=model, attempts=attempts,
        n_calls=total_calls, unit=d.unit, minimizer=mo.method, gof_note=gof_note,
        _minuit_factory=mo.minuit,
    )


def _baker_cousins(n: np.ndarray, mu: np.ndarray) -> float:
    """2 sum(mu - n + n ln(n/mu)) (Baker and Cousins 1984, eq. 11)."""
    mu = np.maximum(mu, 1e-300)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(n > 0, n * np.log(n / mu), 0.0)
    return float(2.0 * np.sum(mu - n + t))


def _problems(mo: _MinOut, x: np.ndarray, cov: np.ndarray, posdef: bool, lower: np.ndarray,
              upper: np.ndarray, names: list[str]) -> list[str]:
    out = []
    if not mo.converged:
        out.append("minimiser did not converge" + (" (call limit reached)"
                                                  if mo.call_limit else ""))
    for i, name in enumerate(names):
        span = upper[i] - lower[i]
        tol = 1e-4 * span if math.isfinite(span) else 1e-8 * max(abs(x[i]), 1.0)
        if (math.isfinite(lower[i]) and x[i] - lower[i] <= tol) or \
           (math.isfinite(upper[i]) and upper[i] - x[i] <= tol):
            out.append(f"{name} at a bound ({x[i]:.6g})")
    if not posdef:
        out.append("covariance not positive definite (Hessian of the NLL not invertible)")
    return out


def _polish(cost: _Cost, mo: _MinOut, lower: np.ndarray, upper: np.ndarray):
    """Hessian by central differences of the analytic gradient at the minimum found, one
    Newton step to refine the minimum, and the covariance H^-1 (errordef 0.5).

    Returns (x, nll, covariance, positive_definite).
    """
    x0 = np.asarray(mo.x, float)
    f0 = mo.fval
    n = x0.size
    errs = np.asarray(mo.errors, float)
    h = np.where(np.isfinite(errs) & (errs > 0), 1e-3 * errs, 1e-6 * np.maximum(np.abs(x0), 1.0))
    if isinstance(cost, _BinnedCost):
        hess = cost.observed_hessian(x0, h)
    else:
        g0 = cost.grad(*x0)
        hess = np.empty((n, n))
        for i in range(n):  # forward differences of the analytic gradient (backward at a bound)
            xs = x0.copy()
            step = h[i] if not (math.isfinite(upper[i]) and x0[i] + h[i] > upper[i]) else -h[i]
            xs[i] = x0[i] + step
            hess[:, i] = (cost.grad(*xs) - g0) / step
    hess = 0.5 * (hess + hess.T)
    if not np.all(np.isfinite(hess)):
        return x0, f0, np.full((n, n), np.nan), False
    try:
        ev = np.linalg.eigvalsh(hess)
    except np.linalg.LinAlgError:
        return x0, f0, np.full((n, n), np.nan), False
    if not np.all(ev > 1e-12 * max(abs(ev).max(), 1e-300)):
        return x0, f0, np.full((n, n), np.nan), False
    cov = np.linalg.inv(hess)
    if mo.method == "iminuit-migrad":  # one Newton step refines iminuit's minimum
        x1 = np.clip(x0 - cov @ cost.grad(*x0), lower, upper)
        f1 = cost(*x1)
        if np.isfinite(f1) and f1 < f0:
            x0, f0 = x1, f1
    return x0, f0, cov, True


def _sandwich(cost: _UnbinnedCost, vals: np.ndarray, free_idx: np.ndarray,
              cov: np.ndarray) -> np.ndarray:
    """H^-1 D H^-1 with D = sum w^2 grad(ln mu) grad(ln mu)^T (Langenbruch 2022)."""
    dmat = cost.score_outer(vals, free_idx)
    return cov @ dmat @ cov


def _fwhm_with_error(shape: Shape, p: list[float], cov: np.ndarray) -> tuple[float, float]:
    try:
        f0 = shape.fwhm(p)
    except (FitError, ValueError):
        return math.nan, math.nan
    if not np.all(np.isfinite(cov)):
        return float(f0), math.nan
    grad = np.zeros(len(p))
    try:
        for i in range(len(p)):
            if cov[i, i] <= 0:
                continue
            h = 1e-4 * math.sqrt(cov[i, i])
            q1, q2 = list(p), list(p)
            q1[i] += h
            q2[i] -= h
            grad[i] = (shape.fwhm(q1) - shape.fwhm(q2)) / (2 * h)
    except (FitError, ValueError):
        return float(f0), math.nan
    return float(f0), float(math.sqrt(max(grad @ cov @ grad, 0.0)))


def _auto_starts(model, edges, n, scale, base, is_fixed, start, fixed, lower, upper,
                 total, retries):
    """Starting points (lazily): background from sidebands, peak at the largest excess."""
    names = model.parameter_names
    yields = [iy for _, _, iy in model._blocks]
    sig_free = any(not is_fixed[iy] for iy in yields[:-1])
    bkg_given = all(k in start or k in fixed for k in names[model._blocks[-1][1]])
    v = base.copy()
    try:
        vb = v if bkg_given else _background_start(model, edges, n, scale, None, v,
                                                   is_fixed, lower, upper)
    except Exception:  # noqa: BLE001 - a failed helper fit only costs a worse start
        vb = v
    c = 0.5 * (edges[1:] + edges[:-1])
    bexp = model._blocks[-1][0].bin_fractions(edges, list(vb[model._blocks[-1][1]]),
                                              model.window) * vb[yields[-1]]
    candidates = []
    if sig_free:
        shape, sl, iy = model._blocks[0]
        i_m = sl.start + shape.parameter_names.index("mass")
        wp = shape.width_parameters()
        i_s = [sl.start + shape.parameter_names.index(k) for k in wp]
        scale_w = max(float(v[i_s[-1]]) if i_s else (edges[-1] - edges[0]) / 40,
                      float(np.median(np.diff(edges))))
        if names[i_m] in start or names[i_m] in fixed:
            masses = [float(v[i_m])]
        else:
            z = _smooth_excess(c, n, bexp, scale_w)
            order = np.argsort(z)[::-1]
            masses = []
            for j in order:
                if all(abs(c[j] - mm) > 3 * scale_w for mm in masses):
                    masses.append(float(c[j]))
                if len(masses) >= 2:
                    break
        for mm in masses:
            candidates.append((mm, 1.0))
        for f in (0.4, 2.5):
            candidates.append((masses[0], f))
        for mm, f in candidates[: retries + 1]:
            s = vb.copy()
            s[i_m] = np.clip(mm, lower[i_m], upper[i_m])
            for i in i_s:
                if names[i] not in start and names[i] not in fixed:
                    s[i] = np.clip(v[i] * f, lower[i], upper[i])
            # sideband background: exclude +-3 widths around the candidate peak
            hw = 3.0 * max(s[i] for i in i_s) if i_s else 3.0 * scale_w
            mask = np.abs(c - s[i_m]) > hw
            if not bkg_given and mask.sum() > len(names) and (~mask).sum() > 0:
                try:
                    sb = _background_start(model, edges, n, scale, mask, s, is_fixed,
                                           lower, upper)
                    s[model._blocks[-1][1]] = sb[model._blocks[-1][1]]
                    s[yields[-1]] = sb[yields[-1]]
                except Exception:  # noqa: BLE001, S110 - keep the full-window background start
                    pass
            bfr = model._blocks[-1][0].bin_fractions(edges, list(s[model._blocks[-1][1]]),
                                                     model.window) * s[yields[-1]]
            sel = ~mask
            resid = np.clip(n[sel] - bfr[sel], 0.0, None)
            i_sig = sl.start + shape.parameter_names.index("sigma") if (
                shape.name in ("gaussian", "crystalball")) else None
            if (i_sig is not None and f == 1.0 and names[i_sig] not in start
                    and names[i_sig] not in fixed and resid.sum() > 0):
                # width from the second moment of the excess (truncated at +-3 start widths,
                # so it errs low; bounded to a factor 2 of the start)
                d2 = float(resid @ (c[sel] - s[i_m]) ** 2 / resid.sum())
                s[i_sig] = np.clip(math.sqrt(max(d2, 1e-12)), 0.5 * s[i_sig], 2.0 * s[i_sig])
            if names[iy] not in start and names[iy] not in fixed:
                excess = float(np.sum(n[sel] - bfr[sel]))
                s[iy] = np.clip(max(excess, 0.05 * math.sqrt(max(total, 1.0)) + 1.0),
                                lower[iy], upper[iy])
                s[yields[-1]] = np.clip(max(total - s[iy], 1.0), lower[yields[-1]],
                                        upper[yields[-1]])
            for k, kv in {**start, **fixed}.items():
                s[names.index(k)] = float(kv)
            # later signal components: small positive yield at their given start
            for shape2, sl2, iy2 in model._blocks[1:-1]:
                if names[iy2] not in start and names[iy2] not in fixed:
                    s[iy2] = np.clip(max(0.01 * total, 1.0), lower[iy2], upper[iy2])
            s = np.clip(s, lower, upper)
            for k, kv in fixed.items():
                s[names.index(k)] = float(kv)
            yield s
    else:
        yield np.where(is_fixed, base, np.clip(vb, lower, upper))
        if retries > 0:
            yield np.where(is_fixed, base, np.clip(base, lower, upper))
