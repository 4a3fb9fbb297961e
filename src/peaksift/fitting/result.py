"""The result of a free fit: a frozen value with a summary, a dict for results.json and back.

``FitResult`` holds values, errors, profile-likelihood (MINOS-type) intervals when asked,
the covariance, validity with its reasons, the peak summary (mass, width, FWHM), the
goodness of fit and the binned data with the fitted expectation and pulls.  It compares
with ``==``; its mappings cannot be changed through it; ``to_dict()`` / ``from_dict()`` go to
and from JSON; ``to_minuit()`` gives an ``iminuit.Minuit`` set up at the minimum.  A fit
makes the parts read less often than made (notes, covariance, correlations, FWHM, goodness
of fit, the figure's bins) at their first access (:meth:`FitResult._in_parts`): the same
values, whenever they are read.
"""

from __future__ import annotations

import html
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .. import shapes as _shapes
from .._format import chi_square, format_interval, p_value, value_decimals
from .._json import finite as number
from .._values import FrozenValue, Measurement
from .._vocabulary import FITS, model_text
from ..errors import FitError
from ..likelihood import Model, new_minuit

__all__ = ["FitResult", "format_value"]

#: shape options that change a shape's parameters (kept so ``from_dict`` rebuilds the model)
_SHAPE_OPTIONS = {"exppoly": ("order",), "bernstein": ("degree",), "dijet": ("npar", "sqrt_s")}


def shape_spec(shape: Any) -> dict[str, Any]:
    """``{"name": ..., option: value}``: enough to rebuild ``shape`` with shapes.get."""
    out: dict[str, Any] = {"name": shape.name}
    for k in _SHAPE_OPTIONS.get(shape.name, ()):
        out[k] = getattr(shape, k)
    return out


def format_value(v: float, e: float) -> str:
    """``v ± e`` rounded to two significant digits of the error (a value smaller than its
    error keeps three significant digits: :func:`peaksift._format.value_decimals`)."""
    if not math.isfinite(v):
        return "n/a"
    if not (math.isfinite(e) and e > 0):
        return f"{v:.6g}"
    digits = max(0, 1 - math.floor(math.log10(e)))
    return f"{v:.{value_decimals(v, e)}f} ± {e:.{digits}f}"


def _plain_lower(low: Any) -> dict[str, Any] | None:
    """``lower_minimum`` as plain JSON types (None stays None)."""
    if low is None:
        return None
    out: dict[str, Any] = {}
    for k, v in low.items():
        if isinstance(v, (bool, str)):
            out[k] = v
        else:
            out[k] = number(v)
    return out


def _kind(kind: Any) -> str:
    """A fit's ``kind``, checked against :data:`peaksift._vocabulary.FITS`."""
    if kind not in FITS or kind == "scan":
        raise ValueError(f"kind {kind!r} is not a fit's (one of free_fit, background_only, "
                         "calibration)")
    return str(kind)


def _normalised(d: dict[str, Any]) -> dict[str, Any]:
    """The fields in ``d`` (some or all of a FitResult's) in the form the result keeps,
    in place: float arrays and dicts of their own, the peak's numbers as Measurements."""
    for name in ("covariance", "correlations", "edges", "observed", "observed_weight_sq_sum",
                 "expected", "pulls"):
        if name in d:
            d[name] = np.array(d[name], float)
    for name in ("values", "errors", "flags", "bounds", "constraints"):
        if name in d:
            d[name] = dict(d[name] or {})
    if d.get("intervals") is not None:
        d["intervals"] = dict(d["intervals"])
    # one convention for a number with its error (peaksift._values.Measurement)
    for name in ("peak_mass", "peak_width", "fwhm"):
        if name in d:
            d[name] = Measurement(d[name], d[f"{name}_error"])
    return d


@dataclass(frozen=True, repr=False, eq=False)
class FitResult(FrozenValue):
    """Outcome of :func:`peaksift.fit` (a frozen value).

    Attributes
    ----------
    parameters : tuple of str
        Parameter names in model order.
    values, errors : mapping
        Best-fit values and symmetric errors from the observed Hessian of the negative
        log-likelihood at the minimum (sandwich errors for weighted unbinned fits; fixed
        parameters have error 0).  Read-only.
    intervals : mapping or None
        ``name -> (lower, upper)`` profile-likelihood (MINOS-type) errors, negative and
        positive, where they were asked for and could be made.
    covariance, correlations : ndarray
        Over all parameters in order (rows/columns of fixed parameters are zero).
    nll : float
        Minimum of the negative log-likelihood (binned: in the saturated form).
    valid : bool
        True only when the minimiser converged, no free parameter sits at a bound, and the
        covariance is positive definite (tested on the unit-diagonal scaled Hessian).
    problems : tuple of str
        Why the fit is not valid.  ``notes`` hold warnings that do not invalidate it (a
        parameter within one error of a bound, symmetric errors that under-cover, ...).
    peak_mass, peak_width, fwhm : Measurement
        Of the first signal component (``peak_width`` is its natural ``width`` if it has one,
        else ``sigma``; its name in ``width_parameter``): floats carrying ``.error`` (also in
        ``*_error``); ``signal_yield`` and ``background_yield`` likewise.
    gof_chi2, gof_ndf, gof_p_value, gof_note
        Baker-Cousins saturated-model chi-square of the binned data, its ndf (bins - free
        parameters), the chi-square p-value and what approximation applies.
    minimizer : str
        ``"fisher-scoring"`` or ``"iminuit-migrad"``.
    starts_tried, starts_nll : int, tuple
        How many starting points were minimised, and the minimum each reached: the lowest
        wins, whatever the validity of the others.  (The start finder's starts: an invalid
        minimum's restarts and continuation count in ``n_calls`` only.)
    edges, observed, observed_weight_sq_sum, expected, pulls : ndarray
        Binning used for the goodness of fit and figures; pulls are (n - mu)/sqrt(var),
        var = mu * weight_sq_sum/weight_sum for weighted bins.
    bounds : mapping
        ``name -> (lower, upper)`` used in the fit.
    kind : str
        Which fit this is, as every output names it (a key of
        :data:`peaksift._vocabulary.FITS`): ``"free_fit"``, ``"background_only"`` (every
        signal yield held at 0), ``"calibration"`` (set by the search's calibration).
    lower_minimum : mapping or None
        For a fit whose peak mass was started by the caller (``start={"mass": M}``): the
        lower minimum the fitter's own starts reach elsewhere in the window, when lower by
        more than 0.1 in -2 ln L and is itself a valid fit wider than a bin -- ``mass``,
        ``width`` (of ``width_parameter``), ``signal_yield``, ``kind`` (``"peak"`` or
        ``"dip"``), ``delta_minus_two_ln_l`` (:mod:`peaksift.fitting.elsewhere`); None
        otherwise.
    """

    parameters: tuple[str, ...]
    values: Any
    errors: Any
    fixed: tuple[str, ...]
    covariance: np.ndarray
    correlations: np.ndarray
    intervals: Any
    nll: float
    valid: bool
    problems: tuple[str, ...]
    notes: tuple[str, ...]
    flags: Any
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
    observed_weight_sq_sum: np.ndarray
    expected: np.ndarray
    pulls: np.ndarray
    bounds: Any
    constraints: Any
    model: Model = field(compare=False)
    starts_tried: int = 1
    starts_nll: tuple[float, ...] = ()
    n_calls: int = field(default=0, compare=False)
    unit: str = "GeV"
    minimizer: str = "fisher-scoring"
    gof_note: str = ""
    cost: Any = field(default=None, repr=False, compare=False)
    lower_minimum: Any = None
    kind: str = "free_fit"

    def __post_init__(self) -> None:
        _normalised(self.__dict__)  # (what object.__setattr__ writes, without its call)
        super().__post_init__()

    @classmethod
    def _in_parts(cls, now: dict[str, Any], later: Any, normal: bool = False) -> FitResult:
        """The FitResult of the fields ``now`` and ``later()``'s (every other field), the
        latter computed at the first access of any of them (:meth:`FrozenValue._deferred`):
        the same value as ``FitResult(**now, **later())``.  ``normal``: ``now`` is in the
        form the result keeps already (:func:`_normalised`'s, its mappings read-only and
        the caller's no more: a fit's own fields), so it is only frozen."""
        return cls._deferred(now if normal else _normalised(now),
                             lambda: _normalised(later()))

    # ---------------------------------------------------------------- summary
    @property
    def signal_yield(self) -> Measurement:
        """Fitted signal yield with its error (unpacks as ``value, error``)."""
        return Measurement(self.values["signal_yield"], self.errors["signal_yield"])

    @property
    def background_yield(self) -> Measurement:
        """Fitted background yield with its error."""
        return Measurement(self.values["background_yield"], self.errors["background_yield"])

    @property
    def width(self) -> Measurement:
        """The peak width with its error, as results.json's ``width`` (= ``peak_width``)."""
        return self.peak_width

    def measurement(self, name: str) -> Measurement:
        """Any parameter's fitted value with its error."""
        return Measurement(self.values[name], self.errors[name])

    @property
    def minos(self) -> Any:
        """Alias of :attr:`intervals` (the profile-likelihood errors)."""
        return self.intervals

    # results.json groups some fields; each group is an attribute of the same name too
    @property
    def gof(self) -> dict[str, Any]:
        """Goodness of fit: ``chi2``, ``ndf``, ``p_value``, ``note`` (the ``gof_*`` fields)."""
        return {"chi2": number(self.gof_chi2), "ndf": int(self.gof_ndf),
                "p_value": number(self.gof_p_value), "note": self.gof_note}

    @property
    def bins(self) -> dict[str, Any]:
        """The binning of the goodness of fit and the figure: ``edges``, ``observed``,
        ``observed_weight_sq_sum``, ``expected``, ``pulls``."""
        return {"edges": self.edges, "observed": self.observed,
                "observed_weight_sq_sum": self.observed_weight_sq_sum,
                "expected": self.expected, "pulls": self.pulls}

    @property
    def signal_shapes(self) -> list[str]:
        """Names of the signal shapes, in order."""
        return [s.name for s in self.model.signals]

    @property
    def background_shape(self) -> str:
        """Name of the background shape."""
        return self.model.background.name

    @property
    def shapes(self) -> dict[str, Any]:
        """The shapes with their options: ``signals`` (a list) and ``background``."""
        return {"signals": [shape_spec(s) for s in self.model.signals],
                "background": shape_spec(self.model.background)}

    def to_minuit(self) -> Any:
        """An ``iminuit.Minuit`` on this fit's cost, at the minimum, with its bounds, for
        MIGRAD/HESSE/MINOS of your own.  Raises FitError for a result read from JSON."""
        if self.cost is None:
            raise FitError("this FitResult has no cost function (it was read from a dict); "
                           "refit with peaksift.fit to get an iminuit object")
        free = [n for n in self.parameters if n not in self.fixed]
        lo = np.array([self.bounds[n][0] for n in free], float)
        hi = np.array([self.bounds[n][1] for n in free], float)
        x = np.array([self.values[n] for n in free], float)
        errs = np.array([self.errors[n] for n in free], float)
        return new_minuit(self.cost, np.clip(x, lo, hi), lo, hi, free, errs)

    # ------------------------------------------------------------------- JSON
    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict with the results.json ``fit`` keys, plus everything else."""

        def ve(v: float, e: float) -> dict[str, float | None]:
            return {"value": number(v), "error": number(e)}

        iv = self.intervals
        return {
            "valid": bool(self.valid),
            "peak_mass": ve(self.peak_mass, self.peak_mass_error),
            "width": ve(self.peak_width, self.peak_width_error),
            "signal_yield": ve(*self.signal_yield),
            "background_yield": ve(*self.background_yield),
            "gof": self.gof,
            "width_parameter": self.width_parameter,
            "fwhm": ve(self.fwhm, self.fwhm_error),
            "problems": list(self.problems),
            "notes": list(self.notes),
            "flags": {k: bool(v) for k, v in self.flags.items()},
            "signal_shapes": self.signal_shapes,
            "shapes": self.shapes,
            "background_shape": self.background_shape,
            "window": [float(self.window[0]), float(self.window[1])],
            "binned": bool(self.binned),
            "binned_reason": self.binned_reason,
            "weighted": bool(self.weighted),
            "weight_treatment": self.weight_treatment,
            "n_events": number(self.n_events),
            "nll": number(self.nll),
            "minimizer": self.minimizer,
            "starts_tried": int(self.starts_tried),
            "starts_nll": [number(v) for v in self.starts_nll],
            "parameters": {n: ve(self.values[n], self.errors[n])
                           | {"fixed": n in self.fixed,
                              "bounds": [number(self.bounds[n][0]), number(self.bounds[n][1])]}
                           for n in self.parameters},
            "constraints": {k: c.to_dict() for k, c in self.constraints.items()},
            "intervals": None if iv is None else
            {k: [number(a), number(b)] for k, (a, b) in iv.items()},
            "minos": None if iv is None else
            {k: [number(a), number(b)] for k, (a, b) in iv.items()},
            "covariance": [[number(c) for c in row] for row in self.covariance],
            "correlations": [[number(c) for c in row] for row in self.correlations],
            "bins": {k: [number(x) for x in v] for k, v in self.bins.items()},
            "unit": self.unit,
            "lower_minimum": _plain_lower(self.lower_minimum),
            "kind": self.kind,
        }

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> FitResult:
        """The FitResult that :meth:`to_dict` wrote (without the cost: no ``to_minuit``)."""
        from ..likelihood import Constraint

        try:
            sh = d["shapes"]
            sig = [_shapes.get(s["name"], **{k: v for k, v in s.items() if k != "name"})
                   for s in sh["signals"]]
            bkg = sh["background"]
            model = Model(sig, _shapes.get(bkg["name"], **{k: v for k, v in bkg.items()
                                                          if k != "name"}), tuple(d["window"]))
            pars = d["parameters"]
            names = tuple(model.parameter_names)

            def val(x: Any) -> float:
                return math.nan if x is None else float(x)

            cov = np.array([[val(c) for c in row] for row in d["covariance"]], float)
            err = np.sqrt(np.clip(np.diag(cov), 0, None))
            with np.errstate(invalid="ignore", divide="ignore"):
                corr = cov / np.outer(err, err)
            if d.get("correlations") is not None:  # as fitted, not recomputed
                corr = np.array([[val(c) for c in row] for row in d["correlations"]], float)
            b = d["bins"]
            iv = d.get("intervals")
            return cls(
                parameters=names,
                values={n: val(pars[n]["value"]) for n in names},
                errors={n: val(pars[n]["error"]) for n in names},
                fixed=tuple(n for n in names if pars[n]["fixed"]),
                covariance=cov, correlations=np.where(np.isfinite(corr), corr, 0.0),
                intervals=None if iv is None else {k: (val(a), val(c)) for k, (a, c) in iv.items()},
                nll=val(d["nll"]), valid=bool(d["valid"]), problems=tuple(d["problems"]),
                notes=tuple(d.get("notes", ())), flags=d["flags"], binned=bool(d["binned"]),
                binned_reason=d["binned_reason"], weighted=bool(d["weighted"]),
                weight_treatment=d["weight_treatment"],
                window=(float(d["window"][0]), float(d["window"][1])),
                n_events=val(d["n_events"]),
                peak_mass=val(d["peak_mass"]["value"]), peak_mass_error=val(d["peak_mass"]["error"]),
                peak_width=val(d["width"]["value"]), peak_width_error=val(d["width"]["error"]),
                width_parameter=d["width_parameter"], fwhm=val(d["fwhm"]["value"]),
                fwhm_error=val(d["fwhm"]["error"]), gof_chi2=val(d["gof"]["chi2"]),
                gof_ndf=int(d["gof"]["ndf"]), gof_p_value=val(d["gof"]["p_value"]),
                gof_note=d["gof"]["note"],
                edges=np.array(b["edges"], float), observed=np.array(b["observed"], float),
                observed_weight_sq_sum=np.array(b["observed_weight_sq_sum"], float),
                expected=np.array(b["expected"], float),
                pulls=np.array([val(p) for p in b["pulls"]], float),
                bounds={n: (val(pars[n]["bounds"][0]) if pars[n]["bounds"][0] is not None
                            else -math.inf,
                            val(pars[n]["bounds"][1]) if pars[n]["bounds"][1] is not None
                            else math.inf) for n in names},
                constraints={k: Constraint(**c) for k, c in d.get("constraints", {}).items()},
                model=model, starts_tried=int(d.get("starts_tried", 1)),
                starts_nll=tuple(val(v) for v in d.get("starts_nll", ())),
                unit=d.get("unit", "GeV"), minimizer=d.get("minimizer", ""),
                lower_minimum=_plain_lower(d.get("lower_minimum")),
                kind=_kind(d.get("kind", "free_fit")),
            )
        except (KeyError, TypeError, ValueError, IndexError) as exc:
            raise FitError(f"not a fit result written by FitResult.to_dict: {exc!r}") from None

    def held(self, name: str) -> str:
        """How a parameter that is not free was held: ``"tied"`` when it was computed from
        another (its error carried from that one's, so it has one), else ``"fixed"``."""
        e = self.errors[name]
        return "tied" if e is not None and math.isfinite(e) and e > 0 else "fixed"

    # ------------------------------------------------------------------ show
    def __repr__(self) -> str:
        model = model_text(self.kind, [s.name for s in self.model.signals],
                           self.model.background.name)
        head = (f"FitResult({'valid' if self.valid else 'INVALID'}; {model}, "
                f"{'binned' if self.binned else 'unbinned'}, "
                f"window {self.window[0]:g}-{self.window[1]:g} {self.unit})")
        lines = [head]
        if self.problems:
            lines.append("  problems: " + "; ".join(self.problems))
        if self.notes:
            lines.append("  notes: " + "; ".join(self.notes))
        w = max(len(n) for n in self.parameters)
        for n in self.parameters:
            tag = f" ({self.held(n)})" if n in self.fixed else ""
            if self.intervals and n in self.intervals:  # rounded as the summary's
                ends = format_interval(self.values[n], *self.intervals[n],
                                       bounds=self.bounds[n]).partition(" ")[2]
                tag += f"  interval {ends}" if ends else ""
            lines.append(f"  {n:<{w}} = {format_value(self.values[n], self.errors[n])}{tag}")
        lines.append(f"  peak: mass {format_value(self.peak_mass, self.peak_mass_error)} "
                     f"{self.unit}, FWHM {format_value(self.fwhm, self.fwhm_error)} {self.unit}")
        lines.append(f"  {self._gof_text()}")
        return "\n".join(lines)

    def _gof_text(self) -> str:
        """The goodness of fit as the repr and the notebook table quote it: not defined
        without degrees of freedom (an unbinned fit's binning may leave none, or fewer than
        none: the notebook table read 'chi2/ndf = 5.5/-1, p = n/a')."""
        if self.gof_ndf > 0 and math.isfinite(self.gof_chi2):
            return (f"GoF (Baker-Cousins): chi2/ndf = {chi_square(self.gof_chi2)}/{self.gof_ndf}, "
                    f"p = {p_value(self.gof_p_value)}")
        return ("GoF: not defined (no degrees of freedom left"
                + (", unbinned fit" if not self.binned else "") + ")")

    def _repr_html_(self) -> str:
        status = ("<b>valid</b>" if self.valid else
                  "<b>INVALID</b>: " + html.escape("; ".join(self.problems)))
        # value and error as the repr, the report and the figure round them (two significant
        # digits of the error), not a value with more digits than its error carries
        parts = {n: format_value(self.values[n], self.errors[n]).partition(" \u00b1 ")
                 for n in self.parameters}
        rows = "".join(
            f"<tr><td>{html.escape(n)}</td><td>{parts[n][0]}</td><td>{parts[n][2]}</td>"
            f"<td>{'fixed' if n in self.fixed else ''}</td></tr>" for n in self.parameters)
        notes = ("<p>notes: " + html.escape("; ".join(self.notes)) + "</p>") if self.notes else ""
        model = model_text(self.kind, [s.name for s in self.model.signals],
                           self.model.background.name)
        return (f"<div><p>{html.escape(model)}; {status}; "
                f"{'binned' if self.binned else 'unbinned'} "
                f"({html.escape(self.binned_reason)}); {html.escape(self._gof_text())}</p>"
                f"{notes}"
                f"<table><tr><th>parameter</th><th>value</th><th>error</th><th></th></tr>"
                f"{rows}</table><p>peak mass "
                f"{html.escape(format_value(self.peak_mass, self.peak_mass_error))} "
                f"{self.unit}; FWHM {html.escape(format_value(self.fwhm, self.fwhm_error))} "
                f"{self.unit}</p></div>")

    def plot(self, path: Any = None, *, fig: Any = None, title: str | None = None,
             run: Any = None, symbol: str | None = None, note: str = "",
             log: bool = False, kind: str | None = None) -> Any:
        """Data, total model, signal and background, with pulls underneath and the fitted
        numbers in a table; returns a matplotlib Figure drawn without pyplot (the user's
        backend is left alone).  ``fig``: draw on this empty Figure instead; ``run``: a
        run label; ``symbol``: the mass symbol (mathtext, e.g. ``m_{\\mu\\mu}``); ``log``: a
        logarithmic count axis; ``kind``: which fit this is (default its own ``kind``;
        ``"free_fit"``, ``"calibration"``: the table's title names the model so).  See
        :func:`peaksift.fitting.figure.fit_figure`."""
        from .figure import fit_figure

        return fit_figure(self, path, title=title, fig=fig, run=run, symbol=symbol,
                          note=note, log=log, kind=self.kind if kind is None else kind)

