"""The background fitted on the sidebands of a blinded spectrum: :func:`sideband_fit`.

While a search is blinded no fit may look inside the blinded window, yet the group wants
to see how well the background function describes the data around it.  The background-only
model is fitted with the blinded bins left out of the likelihood (the same extended binned
Poisson NLL as every fit, :class:`peaksift.likelihood.BinnedCost` with a bin mask); the
background shape stays normalised on the whole window, so its fitted yield is the
normalisation extrapolated under the blinded region too.  The result,
:class:`SidebandFit`, carries the goodness of fit on the sidebands (Baker-Cousins
chi-square over the used bins), the background expected inside the blinded window with its
error (linear propagation of the fit's covariance), and what the figure draws.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from typing import Any

import numpy as np

from .._format import chi_square
from .._values import FrozenValue, Measurement

__all__ = ["SidebandFit", "sideband_fit"]


@dataclasses.dataclass(frozen=True, eq=False, repr=False)
class SidebandFit(FrozenValue):
    """A background-only fit on the sidebands of a blinded window (see the module guide).

    Every attribute is a results.json key of the same name (``to_dict``)."""

    background_shape: str
    window: tuple[float, float]
    blind: tuple[float, float]
    parameters: tuple[str, ...]
    values: Mapping[str, float]
    errors: Mapping[str, float]
    covariance: np.ndarray
    edges: np.ndarray
    observed: np.ndarray  # NaN in the blinded bins: never shown, never used
    expected: np.ndarray  # every bin, the blinded ones extrapolated
    blinded: np.ndarray  # bool per bin
    background_yield: Measurement  # over the whole window
    blinded_yield: Measurement  # expected inside the blinded bins
    sideband_events: float
    gof_chi2: float
    gof_ndf: int
    gof_p_value: float
    nll: float
    valid: bool
    problems: tuple[str, ...] = ()
    minimizer: str = ""
    unit: str = "GeV"

    @property
    def pulls(self) -> np.ndarray:
        """(n - mu) / sqrt(mu) on the sidebands, NaN in the blinded bins."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.blinded | (self.expected <= 0), np.nan,
                            (self.observed - self.expected) / np.sqrt(self.expected))

    def __repr__(self) -> str:
        return (f"SidebandFit({self.background_shape} on the sidebands of "
                f"{self.blind[0]:g}-{self.blind[1]:g} {self.unit}: background "
                f"{self.background_yield} in the window, {self.blinded_yield} expected in the "
                f"blinded bins; chi2/ndf = {chi_square(self.gof_chi2)}/{self.gof_ndf}, "
                f"p = {self.gof_p_value:.3g}{'' if self.valid else '; NOT VALID'})")

    def plot(self, path: Any = None, *, run: Any = None, symbol: str | None = None,
             note: str | None = None, log: bool = False) -> Any:
        """The sidebands' data (the blinded bins hidden and hatched), the background fitted
        to them (dashed where extrapolated under the blinded window) and the pulls beneath,
        as a matplotlib Figure drawn without pyplot (the user's backend is left alone).
        ``run``: the run label; ``symbol``: the pair's mass symbol (mathtext); ``note``:
        the line above the axes (default: the background expected in the blinded bins);
        saved to ``path`` when given.  The data's error bars are sqrt(n) (the fit keeps the
        counts, not the variances of a weighted spectrum)."""
        from .. import plotting
        from ..histogram import MassHistogram

        h = MassHistogram(self.edges, unit=self.unit)
        h.weight_sum = np.nan_to_num(np.asarray(self.observed, float))
        h.weight_sq_sum = h.weight_sum.copy()
        if note is None:
            note = (f"blinded {self.blind[0]:g}-{self.blind[1]:g} {self.unit}: "
                    f"{self.blinded_yield} background events expected inside")
        fig = plotting.spectrum_figure(h, log=log, blind=self.blind, title=note,
                                       labels=plotting.FigureLabels(run, symbol or "m"),
                                       background=self)
        if path is not None:
            fig.savefig(path)
        return fig

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready, every key the attribute of the same name (``kind`` says what it is)."""
        from .._json import plain

        return plain({
            "kind": "sideband_fit",
            **{f.name: getattr(self, f.name) for f in dataclasses.fields(self)},
            "background_yield": self.background_yield.to_dict(),
            "blinded_yield": self.blinded_yield.to_dict(),
            "pulls": self.pulls,
        })

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> SidebandFit:
        """The SidebandFit that :meth:`to_dict` wrote."""
        from ..errors import InputError

        def arr(key: str) -> np.ndarray:
            return np.array([np.nan if v is None else v for v in d[key]], float)

        def meas(key: str) -> Measurement:
            m = d[key]
            return Measurement(*(math.nan if m[k] is None else m[k] for k in ("value", "error")))

        try:
            return cls(
                background_shape=str(d["background_shape"]),
                window=(float(d["window"][0]), float(d["window"][1])),
                blind=(float(d["blind"][0]), float(d["blind"][1])),
                parameters=tuple(d["parameters"]),
                values={k: math.nan if v is None else float(v) for k, v in d["values"].items()},
                errors={k: math.nan if v is None else float(v) for k, v in d["errors"].items()},
                covariance=np.array([[np.nan if c is None else c for c in row]
                                     for row in d["covariance"]], float),
                edges=arr("edges"), observed=arr("observed"), expected=arr("expected"),
                blinded=np.array(d["blinded"], bool),
                background_yield=meas("background_yield"), blinded_yield=meas("blinded_yield"),
                sideband_events=float(d["sideband_events"]), gof_chi2=float(d["gof_chi2"]
                                                                            or math.nan),
                gof_ndf=int(d["gof_ndf"]), gof_p_value=float(d["gof_p_value"] or math.nan),
                nll=float(d["nll"] or math.nan), valid=bool(d["valid"]),
                problems=tuple(d.get("problems") or ()), minimizer=str(d.get("minimizer", "")),
                unit=str(d.get("unit", "GeV")))
        except (KeyError, TypeError, ValueError, IndexError) as exc:
            raise InputError(f"not a sideband fit written by SidebandFit.to_dict: {exc!r}") \
                from None


def sideband_fit(hist: Any, signal: Any, background: Any, window: tuple[float, float],
                 blind: tuple[float, float]) -> SidebandFit:
    """Fit ``background`` to the bins of ``hist`` outside the blinded window ``blind``.

    ``signal`` only completes the likelihood core's model (its yield is held at 0).  The
    bins used are those :func:`peaksift.blinding.blinded_bins` does not hide, inside
    ``window``.
    """
    from scipy import special

    from ..blinding import blinded_bins
    from ..likelihood import BinnedCost, Model, minimize, refine
    from ..likelihood.starts import background_start

    edges_all = np.asarray(hist.edges, float)
    lo, hi = float(window[0]), float(window[1])
    inside = (edges_all[:-1] >= lo - 1e-9) & (edges_all[1:] <= hi + 1e-9)
    first, last = int(np.argmax(inside)), int(inside.size - np.argmax(inside[::-1]))
    edges = edges_all[first:last + 1]
    n = np.asarray(hist.values(), float)[first:last]
    # scaled Poisson for weighted bins, as every fit (all 1 for unweighted counts)
    scale = np.asarray(hist.scaled_poisson_factors(), float)[first:last]
    hidden = blinded_bins(edges, blind)
    used = ~hidden
    model = Model(signal, background, (float(edges[0]), float(edges[-1])))
    names = list(model.parameter_names)
    lower = np.array([p.lower for p in model.parameters], float)
    upper = np.array([p.upper for p in model.parameters], float)
    _, bsl, biy = model.blocks[-1]
    is_fixed = np.ones(len(names), bool)
    is_fixed[bsl] = False
    is_fixed[biy] = False
    total = float(np.sum(n[used]))
    lower[biy], upper[biy] = 0.0, 5.0 * max(total, 1.0) + 10.0
    base = np.array([p.start for p in model.parameters], float)
    base = np.where(np.isfinite(base), base, 0.5 * (np.where(np.isfinite(lower), lower, 0.0)
                                                   + np.where(np.isfinite(upper), upper, 0.0)))
    for _, _, iy in model.blocks[:-1]:
        base[iy] = 0.0
    base[biy] = max(total, 1.0)
    v0 = background_start(model, edges, n, scale, used, base, is_fixed, lower, upper)
    free = np.flatnonzero(~is_fixed)
    cost = BinnedCost(model, v0, free, [], edges, n, scale, used)
    lo_f, hi_f = lower[free], upper[free]
    free_names = [names[i] for i in free]
    # (refined in the minimiser's compiled call where it has one: the same numbers)
    mo = minimize(cost, v0[free], lo_f, hi_f, free_names, refine_below=math.inf)
    x, f, cov, posdef = refine(cost, mo, lo_f, hi_f)
    full = v0.copy()
    full[free] = x
    problems = []
    if not mo.converged:
        problems.append(f"minimiser did not converge ({mo.method})")
    if not posdef:
        problems.append("covariance not positive definite")
    expected = _expected(model, edges, full)

    def inside_yield(xf: np.ndarray) -> float:
        v = full.copy()
        v[free] = xf
        return float(np.sum(_expected(model, edges, v)[hidden]))

    b_in = inside_yield(x)
    grad = np.zeros(x.size)  # d(b_in)/dx by central differences, steps of 1e-3 errors
    errs = np.sqrt(np.clip(np.diag(cov), 0.0, None)) if posdef else np.full(x.size, np.nan)
    for i in range(x.size):
        h = 1e-3 * errs[i] if np.isfinite(errs[i]) and errs[i] > 0 else 1e-6 * max(abs(x[i]), 1)
        xp, xm = x.copy(), x.copy()
        xp[i] += h
        xm[i] -= h
        grad[i] = (inside_yield(xp) - inside_yield(xm)) / (2 * h)
    b_in_err = float(np.sqrt(max(grad @ cov @ grad, 0.0))) if posdef else math.nan
    chi2 = float(2.0 * f)  # the saturated NLL: 2 NLL is the Baker-Cousins chi-square
    ndf = int(np.sum(used)) - int(free.size)
    p = float(special.chdtrc(ndf, chi2)) if ndf > 0 and math.isfinite(chi2) else math.nan
    ib = names.index("background_yield")
    ifree = list(free).index(ib)
    bnames = tuple(names[i] for i in free)
    observed = np.where(hidden, np.nan, n)
    return SidebandFit(
        background_shape=model.background.name, window=(float(edges[0]), float(edges[-1])),
        blind=(float(blind[0]), float(blind[1])), parameters=bnames,
        values={k: float(full[names.index(k)]) for k in bnames},
        errors={k: float(e) for k, e in zip(bnames, errs)},
        covariance=cov, edges=edges, observed=observed, expected=expected, blinded=hidden,
        background_yield=Measurement(float(full[ib]), float(errs[ifree])),
        blinded_yield=Measurement(b_in, b_in_err), sideband_events=total, gof_chi2=chi2,
        gof_ndf=ndf, gof_p_value=p, nll=float(f), valid=not problems,
        problems=tuple(problems), minimizer=mo.method, unit=getattr(hist, "unit", "GeV"))


def _expected(model: Any, edges: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Background expected per bin at full parameter vector ``v`` (all bins)."""
    shape, sl, iy = model.blocks[-1]
    return float(v[iy]) * np.asarray(shape.bin_fractions(edges, list(v[sl]), model.window),
                                     float)
