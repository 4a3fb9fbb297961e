"""What a scan returns: :class:`ScanResult` (q0, Z and p at each mass, the best hypothesis, the global significance, the plot)."""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field, fields
from functools import partial
from typing import Any

import numpy as np

from .._json import plain
from .._values import FrozenValue
from ..errors import FitError
from . import lee
from .scan_prepared import handed_out_model
from .shape_profile import run_nuisance_toy_batch
from .significance import log10_p, log_p_from_q0, p_from_q0
from .toys import ScanModel, fit_background, profile_signal, run_toys


# ------------------------------------------------------------------------ result
@dataclass(frozen=True, repr=False, eq=False)
class ScanResult(FrozenValue):
    """Outcome of :func:`scan` (a frozen value).

    Attributes
    ----------
    masses, sigma : ndarray
        Mass hypotheses and the resolution used at each (GeV).
    q0, z_local, p_local : ndarray
        Discovery statistic, local significance sqrt(q0) and asymptotic local p-value
        1 - Phi(sqrt(q0)); NaN inside a blinded range.
    signal_yield, signal_yield_error, background_yield : ndarray
        Profiled fit at each hypothesis (events; the signal yield may be negative).
    z_expected : ndarray or None
        Median expected local significance of ``expected_signal`` (Asimov), everywhere.
    best_index, best_mass : int, float
        Hypothesis with the largest q0 among the unblinded ones.
    refit : FitResult or None
        Fit at the best mass with mass and width free (None when blinded or if it failed).
    blind : (float, float) or None
        Blinded mass range; ``blinded`` marks the hypotheses inside it.
    weight_scale : float
        Weighted spectra: the overall ``sum w / sum w^2`` of the window, for information
        (1 unweighted).  The likelihood itself scales every bin by its own
        ``k_i = values_i / variances_i`` (scaled Poisson, as :func:`peaksift.fit`; empty bins get
        the overall value); yields are in weighted units.
    """

    masses: np.ndarray
    sigma: np.ndarray
    q0: np.ndarray
    z_local: np.ndarray
    p_local: np.ndarray
    signal_yield: np.ndarray
    signal_yield_error: np.ndarray
    background_yield: np.ndarray
    converged: np.ndarray
    best_index: int
    best_mass: float
    refit: Any
    window: tuple[float, float]
    blind: tuple[float, float] | None
    blinded: np.ndarray
    signal_shape: str
    background_shape: str
    weight_scale: float
    z_expected: np.ndarray | None = None
    notes: tuple[str, ...] = ()
    unit: str = "GeV"
    model: ScanModel | None = field(default=None, compare=False)
    nuisances: dict | None = None
    nuisance_factors: dict | None = None

    @property
    def mass(self) -> np.ndarray:
        """The same array as ``masses`` (an alias kept for code written when results.json
        called the masses ``mass``)."""
        return self.masses

    # --------------------------------------------------------------- summary
    @property
    def best(self) -> dict[str, float]:
        i = self.best_index
        return {"mass": float(self.best_mass), "z_local": float(self.z_local[i]),
                "p_local": float(self.p_local[i]), "q0": float(self.q0[i])}

    def __repr__(self) -> str:
        from .._format import mass_text, no_best

        b = self.best
        blind = "" if self.blind is None else f", blinded {self.blind[0]:g}-{self.blind[1]:g}"
        why = no_best(b["z_local"], self.blinded)
        best = (f"no best: {why}" if why else f"best {mass_text(b['mass'])} {self.unit}: "
                f"Z_local = {b['z_local']:.2f}, p_local = {p_text(b)}")
        n = self.masses.size
        return (f"ScanResult({n} mass{'es' if n != 1 else ''} {self.masses[0]:g}-"
                f"{self.masses[-1]:g} {self.unit}, {best}{blind})")

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict: the search's ``scan`` keys (``masses``, ``z_local``, ``p_local``,
        ``signal_yield``) as lists, plus errors, q0, sigma, blinding and the best point.
        Blinded entries are ``None``."""
        d = {
            "masses": self.masses, "z_local": self.z_local, "p_local": self.p_local,
            "signal_yield": self.signal_yield, "signal_yield_error": self.signal_yield_error,
            "background_yield": self.background_yield, "q0": self.q0, "sigma": self.sigma,
            "z_expected": self.z_expected, "blind": None if self.blind is None else
            list(self.blind), "blinded": [bool(v) for v in self.blinded],
            "best": self.best, "window": list(self.window), "signal_shape": self.signal_shape,
            "background_shape": self.background_shape, "weight_scale": self.weight_scale,
            "unit": self.unit, "notes": list(self.notes),
            "converged": [bool(v) for v in self.converged], "best_index": int(self.best_index),
            "refit": None if self.refit is None else self.refit.to_dict(),
        }
        if self.nuisances is not None:  # only with signal nuisances: old dicts stay as they were
            d["nuisances"] = self.nuisances
            d["nuisance_factors"] = self.nuisance_factors
        return plain(d)

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> ScanResult:
        """The ScanResult that :meth:`to_dict` wrote (or a results.json ``scan``), without
        the model: no toys or expected curves from it, everything else as it was."""
        from ..fitting.result import FitResult

        def arr(key: str) -> np.ndarray:
            return np.array([np.nan if v is None else v for v in d[key]], float)

        try:
            # results.json files written before the key took the attribute's name call the
            # masses "mass": still read, so the results of earlier runs load
            masses = arr("masses" if "masses" in d else "mass")
            blinded = np.array(d.get("blinded") or [False] * masses.size, bool)
            q0 = arr("q0")
            best = d.get("best_index")
            if best is None:
                best = int(np.nanargmax(np.where(blinded, -np.inf, np.nan_to_num(q0, nan=-1))))
            blind = d.get("blind")
            ze = d.get("z_expected")
            return cls(
                masses=masses, sigma=arr("sigma"), q0=q0, z_local=arr("z_local"),
                p_local=arr("p_local"), signal_yield=arr("signal_yield"),
                signal_yield_error=arr("signal_yield_error"),
                background_yield=arr("background_yield"),
                converged=np.array(d.get("converged") or [True] * masses.size, bool),
                best_index=int(best), best_mass=float(masses[int(best)]),
                refit=None if not d.get("refit") else FitResult.from_dict(d["refit"]),
                window=tuple(float(v) for v in d["window"]),
                blind=None if blind is None else (float(blind[0]), float(blind[1])),
                blinded=blinded, signal_shape=str(d["signal_shape"]),
                background_shape=str(d["background_shape"]),
                weight_scale=float(d.get("weight_scale") or 1.0),
                z_expected=None if ze is None else arr("z_expected"),
                notes=tuple(d.get("notes") or ()), unit=str(d.get("unit", "GeV")))
        except (KeyError, TypeError, ValueError, IndexError) as exc:
            raise FitError(f"not a scan result written by ScanResult.to_dict: {exc!r}") from None

    def _repr_html_(self) -> str:
        import html

        from .._format import no_best
        from .._vocabulary import model_text

        b = self.best
        why = no_best(b["z_local"], self.blinded)
        rows = "".join(f"<tr><td>{html.escape(k)}</td><td>{html.escape(v)}</td></tr>" for k, v in (
            ("masses", (f"{self.masses.size}, {self.masses[0]:.2f}-{self.masses[-1]:.2f} "
                       f"{self.unit}")),
            ("model", model_text("scan", self.signal_shape, self.background_shape)),
            ("best mass", f"none: {why}" if why else f"{b['mass']:.2f} {self.unit}"),
            ("Z local", "n/a" if why else f"{b['z_local']:.2f} (p = {p_text(b)})"),
            ("blinded", "no" if self.blind is None else
             f"{self.blind[0]:g}-{self.blind[1]:g} {self.unit}")))
        return (f"<div><b>ScanResult</b> (a local significance is not a discovery; see "
                f"global_significance)<table>{rows}</table></div>")

    # ------------------------------------------------------ look-elsewhere
    def toy_scans(self, toys: int, *, seed: int = 0, workers: int | None = None,
                  progress: bool | None = None, executor: Any = None) -> np.ndarray:
        """q0 scans of ``toys`` background-only pseudo-experiments, ``(toys, n_unblinded)``."""
        if self.model is None:
            raise FitError("this ScanResult carries no model (rebuilt from a dict?); rerun scan")
        if self.model.masses.size == 0:
            raise FitError("every mass hypothesis of this scan is blinded; there is no "
                           "observed excess to assess (unblind, or scan outside the blind range)")
        unit = (run_nuisance_toy_batch if "signal_nuisances" in self.model.extras else None)
        return run_toys(self.model, toys, seed=seed, workers=workers, progress=progress,
                        executor=executor, batch_function=unit)

    def global_significance(self, method: str = "upcrossings", *, toys: int | None = None,
                            seed: int = 0, u0: float = 0.5, workers: int | None = None,
                            progress: bool | None = None, executor: Any = None
                            ) -> dict[str, Any]:
        """Global significance of the best excess (look-elsewhere effect in the scan range).

        Parameters
        ----------
        method : "upcrossings" or "toys"
            ``"toys"``: p_global is the fraction of background-only toys whose largest q0
            reaches the observed one (binomial error).  ``"upcrossings"``: Gross and Vitells,
            EPJC 70 (2010) 525, ``p_global = p_local + N0 exp(-(q0 - u0)/2)`` with the mean
            number of upcrossings N0 of the level ``u0`` estimated from toys.
        toys : int, optional
            Number of toys (default 1000 for ``"toys"``, 200 for ``"upcrossings"``; 0 with
            upcrossings counts N0 on the observed scan instead, stated in ``n0_source``).
        seed, workers, progress, executor :
            Passed to :func:`peaksift.stats.toys.run_toys` (``executor``: e.g.
            :func:`peaksift.execution.map_tasks` bound to an engine).

        Returns
        -------
        dict with ``mass``, ``z_local``, ``p_local``, ``z_global``, ``p_global``,
        ``global_method``, ``p_global_error``, ``n_toys`` (toys used), ``n_failed_toys``
        (toys left out because a fit failed, NaN q0) and, for upcrossings, ``u0``, ``N0``,
        ``N0_error``, ``n0_source``, ``p_global_capped`` (then ``p_global_error`` is None);
        for toys ``n_toys_above``, ``z_global_is_lower_bound``.

        Notes
        -----
        With a blinded range the unblinded hypotheses form separate contiguous segments;
        upcrossings are counted within each segment and summed (a pair of hypotheses on
        the two sides of the blinded range is not an upcrossing).
        """
        def scans(n: int) -> np.ndarray:
            return self.toy_scans(n, seed=seed, workers=workers, progress=progress,
                                  executor=executor)

        res = lee.global_from_scan(self.q0, self.best_index, self.blinded, scans,
                                   method=method, toys=toys, u0=u0)
        out = {"mass": float(self.best_mass), "z_local": float(self.z_local[self.best_index]),
               "p_local": float(self.p_local[self.best_index])}
        out.update(res)
        return plain(out)

    def expected_z(self, signal_yield: float) -> np.ndarray:
        """Median expected local significance of a signal of ``signal_yield`` events at every
        mass hypothesis (Asimov data: the background-only fit plus that signal; Cowan et al.,
        EPJC 71 (2011) 1554, sec. 3.1), in the bins the scan used.  NaN where blinded.
        Needs the scan's model (not kept by :meth:`from_dict`)."""
        if self.model is None:
            raise FitError("this ScanResult carries no model (rebuilt from a dict?); rerun "
                           "scan with expected_signal= instead")
        m = self.model
        out = np.full(self.masses.size, np.nan)
        if m.masses.size == 0:
            return out
        s = np.full(m.masses.size, float(signal_yield))
        asimov = np.broadcast_to(m.expected_background, m.fractions.shape) + \
            s[:, None] * m.fractions
        th = np.repeat(m.theta[None, :], m.masses.size, axis=0)
        _, _, nll0 = fit_background(m, asimov, th)
        r = profile_signal(m, asimov, m.fractions, s_start=s, theta_start=th,
                           b_start=np.full(m.masses.size, m.bkg_yield))
        q = np.where(r["s"] > 0, np.maximum(2.0 * (nll0 - r["nll"]), 0.0), 0.0)
        out[~self.blinded] = np.sqrt(q)
        return out

    # ------------------------------------------------------------------ plot
    def plot(self, path: Any = None, *, ax: Any = None, fig: Any = None,
             title: str | None = None, global_result: Mapping[str, Any] | None = None,
             run: Any = None, symbol: str | None = None,
             expected: tuple[np.ndarray, str] | None = None) -> Any:
        """Local p-value against mass (log scale) with the whole-sigma levels (1 to 5) that
        fall in the axis range and the best hypothesis marked.

        Blinded hypotheses are not drawn (the range is hatched).  The expected p-value is
        drawn dashed: ``expected = (z_expected, label)`` when given, else the scan's own
        ``z_expected``.  ``global_result`` (from :meth:`global_significance`) is noted above
        the axes; ``run`` (a :class:`peaksift._annotations.RunLabel`) labels the run; ``symbol``
        is the mass symbol (mathtext).  Draws on ``ax`` or an empty ``fig`` when given, on
        a new Figure (made without pyplot) otherwise; saves to ``path``; returns the Figure.
        """
        from .._annotations import draw_header, shade_blinded
        from .._format import fixed, mass_text
        from .._style import COLORS, figure_style, target_axes

        with figure_style():
            fig, ax = target_axes(fig, ax)
            m = self.masses
            p = np.where(self.blinded, np.nan, np.maximum(self.p_local, 1e-300))
            ax.plot(m, p, color=COLORS["observed"], label="observed")
            pmin = float(np.nanmin(p)) if np.any(np.isfinite(p)) else 0.1
            if expected is None and self.z_expected is not None:
                expected = (self.z_expected, "expected for the signal hypothesis")
            if expected is not None:
                ze = np.asarray(expected[0], float)
                pe = np.maximum(p_from_q0(np.nan_to_num(ze) ** 2), 1e-300)
                pe = np.where(np.isfinite(ze), pe, np.nan)
                ax.plot(m, pe, ls="--", color=COLORS["expected"], label=expected[1])
                if np.any(np.isfinite(pe)):  # a strong expected curve may leave the axis
                    pmin = min(pmin, max(float(np.nanmin(pe)), float(p_from_q0(25.0))))
            # the axis reaches the whole-sigma level just below the lowest curve point
            z_low = min(max(math.ceil(_z_of_p(pmin) + 1e-9), 2), 8)
            lowest = max(float(p_from_q0(float(z_low * z_low))) * 0.4, float(p_from_q0(64.0)))
            ax.set_yscale("log")
            ax.set_ylim(lowest, 1.0)
            ax.set_xlim(m[0], m[-1])
            for k in range(1, 6):
                pk = float(p_from_q0(float(k * k)))
                if pk < lowest:
                    break
                ax.axhline(pk, color=COLORS["accent"], lw=0.8, ls=":", zorder=1)
                ax.text(1.0, pk, f" {k}$\\sigma$", va="center", ha="left",
                        color=COLORS["accent"], fontsize=9, clip_on=False,
                        transform=ax.get_yaxis_transform())
            if np.any(np.isfinite(p)):
                i = self.best_index
                pb = max(float(p[i]), lowest)
                ax.plot([m[i]], [pb], marker="o", ms=6, mfc="white", mec=COLORS["signal"],
                        mew=1.5, ls="none", zorder=5,
                        label=f"best: {fixed(m[i])} {self.unit}, $Z_{{local}}$ = "
                              f"{fixed(self.z_local[i])}")
            shade_blinded(ax, self.blind)
            ax.set_xlabel(f"${symbol or 'm'}$ hypothesis [{self.unit}]")
            ax.set_ylabel("local p-value")
            note = title or ""
            if global_result is not None and global_result.get("z_global") is not None:
                note = (f"best {mass_text(global_result['mass'])} {self.unit}:  "
                        f"$Z_{{local}}$ = {fixed(global_result['z_local'])},  "
                        f"$Z_{{global}}$ = {fixed(global_result['z_global'])} "
                        f"({global_result['global_method']})")
            place_scan_legend(ax)
            draw_header(ax, run, note)
            if path is not None:
                fig.savefig(path)
        return fig


def p_text(best: Mapping[str, float]) -> str:
    """The local p-value of a scan's or a combination's ``best`` (its ``p_local`` and
    ``q0``) as the report writes it: past the float's underflow, its exponent from q0
    (``10^-2607.3``, where the notebook table read 'p = 0' and the repr '< 2.2e-308')."""
    from .._format import p_value

    return p_value(best["p_local"], log10_p(log_p_from_q0(best["q0"])))


def place_scan_legend(ax: Any, handles: Any = None, labels: Any = None, **kwargs: Any) -> Any:
    """The legend of a p-value figure in the lower left corner, or the first other place
    (the other lower and middle places: the curves start at p ~ 0.5, at the top) where it
    covers fewer of the axes' curves and markers (drawn in data coordinates: not
    the sigma levels).  A curve counts over its whole drawn line
    (:func:`peaksift._value_table.line_segments`): at a huge excess the observed p-value falls
    by hundreds of decades between two masses, a near-vertical line with no sample inside
    the visible axis, which ran through the legend.  Returns the Legend."""
    from .._value_table import line_segments, touched

    log = ax.get_yscale() == "log"
    xs, los, his = [], [], []
    for line in ax.get_lines():
        if line.get_transform() != ax.transData:  # axhline's levels: axes-wide
            continue
        x, y = (np.asarray(a, float) for a in line.get_data())
        if x.size > 1 and line.get_linestyle() not in ("None", "none", ""):
            x, lo, hi = line_segments(x, y, log=log)
        else:  # markers
            lo = hi = y
        xs.append(x)
        los.append(lo)
        his.append(hi)
    x, lo, hi = (np.concatenate(a) if a else np.empty(0) for a in (xs, los, his))
    # notes written inside the axes (the clipped excess stated in numbers): not covered
    notes = [t for t in ax.texts if t.get_visible() and t.get_text()
             and t.get_transform() == ax.transAxes]
    renderer = ax.figure.canvas.get_renderer()
    args = () if handles is None else (handles, labels)
    best = None
    for loc in ("lower left", "lower right", "center left", "center right", "lower center",
                "center"):
        leg = ax.legend(*args, loc=loc, **kwargs)
        box = leg.get_window_extent(renderer)
        n = touched(ax, leg, x, lo, hi) + 1000 * sum(
            box.overlaps(t.get_window_extent(renderer)) for t in notes)
        if best is None or n < best[0]:
            best = (n, loc)
        if n == 0:
            return leg
    # no place is free (a wide legend over curves that cross the whole height): the one
    # crossed least, on an opaque ground, so no line runs through its text
    leg = ax.legend(*args, loc=best[1], **kwargs)
    leg.set_frame_on(True)
    leg.get_frame().set(facecolor="white", edgecolor="none", alpha=0.92)
    leg.set_zorder(6)
    return leg


def _z_of_p(p: float) -> float:
    """Z of a one-sided p-value (1 - Phi(Z) = p), for the axis range."""
    from scipy.special import ndtri

    return float(-ndtri(min(max(p, 1e-300), 0.5)))


#: ScanResult's fields by name (every one must be given to :func:`fresh_result`)
_FIELDS = frozenset(f.name for f in fields(ScanResult))

# The model's default (None) lives in the dataclass's __init__ alone: with no class
# attribute of that name, a result made without it (a kept scan's, fresh_result) finds it
# through FrozenValue.__getattr__, made when it is first read.
del ScanResult.model


def fresh_result(values: dict[str, Any], own: frozenset[str], *,
                 kept: bool = False, model: tuple | None = None) -> ScanResult:
    """``ScanResult(**values)`` (every field given) as :class:`~peaksift._values.FrozenValue`
    makes it, for less: the arrays named in ``own``, made for this result alone, are made
    read-only in place rather than through a read-only view (the other arrays get their
    view, so the caller's stay writable); the frozen dataclass's ``__init__`` (a
    ``object.__setattr__`` per field) skipped.  The construction cost ~20 us of a 100-bin
    scan with cold caches.  A mapping among the values: the usual construction.
    ``kept``: the values of a kept scan (``scan_kept.kept_scan``: every field, no mapping,
    every array not in ``own`` a read-only view already), taken as they are; with
    ``model`` (a kept preparation's :func:`.scan_prepared.model_parts`) and no ``model``
    among the values, the model is made when it is first read (a deferred field of
    :class:`~peaksift._values.FrozenValue`: its six array copies cost ~18 us of a 100-bin
    scan with cold caches, and most scans' models are never read)."""
    if kept:
        obj = object.__new__(ScanResult)
        d = obj.__dict__
        d.update(values)
        for name in own:   # (setflags: no flags object made, ~0.3 us of ~0.8 each)
            values[name].setflags(write=False)
        if model is not None:
            d["_later"] = partial(_later_model, model)
        return obj
    if values.keys() != _FIELDS:
        return ScanResult(**values)
    obj = object.__new__(ScanResult)
    d = obj.__dict__
    d.update(values)
    for name, v in values.items():
        t = type(v)
        if t is np.ndarray:
            if name not in own:
                v = d[name] = v.view()
            v.setflags(write=False)
        elif t is dict or isinstance(v, np.ndarray):
            return ScanResult(**values)   # (an array made read-only above stays so: no matter)
    return obj


def _later_model(parts: tuple) -> dict[str, Any]:
    """A kept scan's deferred field: its model, as the kept preparation hands it out."""
    return {"model": handed_out_model(parts)}
