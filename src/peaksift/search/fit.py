"""One signal-plus-background fit at a chosen mass: :func:`run_fit` (``peaksift fit``)."""

from __future__ import annotations

import os
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ..config import Config, load_config
from ..errors import ConfigError
from .common import _collect, _fill, _require_candidates, _shape, _where
from .result import _plain
from .staging import _apply_overrides, _staged

FIT_FILES = ("fit.json", "fit.png")
#: the mark in fit.json that says ``peaksift fit`` wrote it
_FIT_MARK = "peaksift fit"


@dataclass(frozen=True)
class _FitSettings:
    """The free fit's parameter settings from ``[model]``, as :func:`peaksift.fit` takes them."""

    fixed: Mapping[str, float]
    constraints: Mapping[str, Any]  # name -> peaksift.likelihood.Constraint
    limits: Mapping[str, tuple[float, float]]
    intervals: tuple[str, ...]
    tie: Mapping[str, Any] | None
    tied: Mapping[str, Any] | None = None  # name -> peaksift.likelihood.Tie

    def arguments(self) -> dict[str, Any]:
        """``fixed=``, ``limits=``, ``constraints=``, ``intervals=``, ``tied=`` for
        :func:`fit`."""
        return {"fixed": dict(self.fixed) or None, "limits": dict(self.limits) or None,
                "constraints": dict(self.constraints) or None,
                "intervals": list(self.intervals) or False,
                "tied": dict(self.tied) if self.tied else None}

    def background_only(self, signal: Any, start: Mapping[str, float]) -> dict[str, Any]:
        """The same for the background-only fit: the signal yield is 0, so the signal's
        parameters are held (at the start) and their constraints and bounds do not apply."""
        sig = {p.name for p in signal.parameters} | {"signal_yield"}
        fixed = {**self.fixed, **start, "signal_yield": 0.0}
        return {"fixed": fixed,
                "limits": {k: v for k, v in self.limits.items() if k not in sig} or None,
                "constraints": {k: v for k, v in self.constraints.items()
                                if k not in sig and k not in fixed} or None}

    def echo(self, start: Mapping[str, float]) -> dict[str, Any]:
        """The results.json ``fit.settings``: what was held, constrained, bounded, where
        the fit started and which intervals were asked for."""
        return {"fixed": dict(self.fixed),
                "constraints": {k: c.to_dict() for k, c in self.constraints.items()},
                "bounds": {k: list(v) for k, v in self.limits.items()},
                "sigma_from_resolution": dict(self.tie) if self.tie else None,
                "start": dict(start), "intervals": list(self.intervals)}


def _fit_settings(cfg: Config, signal: Any, mass: float, *, hold_mass: bool = False
                  ) -> _FitSettings:
    """``model.fix`` / ``constrain`` / ``bounds`` / ``sigma_from_resolution`` for a free fit
    starting at ``mass``; ``hold_mass`` fixes the mass.  ``sigma_from_resolution = "fixed"``
    ties sigma to the resolution at the fitted mass (recomputed inside the likelihood);
    ``"constrained"`` centres its constraint on the resolution at the starting mass.

    The intervals asked for (``model.intervals``) are those of the peak mass, the signal's
    width parameter and the signal yield, each only while it floats.
    """
    from ..likelihood import Constraint, resolution_tie

    md = cfg.model
    fixed = dict(md.fix)
    cons = {k: Constraint(c["kind"], c["center"], c["width"]) for k, c in md.constrain.items()}
    tie, tied = None, None
    if md.sigma_from_resolution != "free":
        res = md.resolution.resolution  # the Resolution value of [model.resolution]
        s = float(res.sigma(mass))
        tie = {"mode": md.sigma_from_resolution, "at_mass": float(mass), "sigma": s,
               "relative_uncertainty": md.resolution_uncertainty,
               "resolution_model": res.kind}
        held = hold_mass or "mass" in fixed
        if md.sigma_from_resolution == "fixed" and held:
            fixed["sigma"] = float(res.sigma(fixed.get("mass", mass)))
        elif md.sigma_from_resolution == "fixed":
            tie["follows"] = "the fitted mass"
            tied = {"sigma": resolution_tie(res)}
        else:  # Gaussian around the resolution, of relative width resolution_uncertainty
            cons["sigma"] = Constraint.gaussian(s, float(md.resolution_uncertainty) * s)
    if hold_mass:
        fixed["mass"] = float(mass)
    wanted: tuple[str, ...] = ()
    if md.intervals and fixed.get("signal_yield") != 0.0:  # no signal: its shape is held too
        widths = signal.width_parameters()
        wanted = tuple(k for k in ("mass", widths[0] if widths else "", "signal_yield")
                       if k and k not in fixed and k not in (tied or {}))
    return _FitSettings(fixed=fixed, constraints=cons, limits=dict(md.bounds),
                        intervals=wanted, tie=tie, tied=tied)


def _fit_start(cfg: Config, signal: Any, mass: float, settings: _FitSettings
               ) -> dict[str, float]:
    """Starting values of the signal: the mass, sigma from the resolution model there, the
    natural width (at least a tenth of sigma); held parameters are left to ``fixed``, and a
    start outside ``model.bounds`` is moved inside (the search's best scan mass may lie
    outside the bounds of the fitted mass)."""
    res = cfg.model.resolution
    names = [p.name for p in signal.parameters]
    start = {"mass": float(mass)}
    if "sigma" in names:
        start["sigma"] = float(res.sigma(mass))
    if "width" in names:
        start["width"] = max(float(res.natural_width), 0.1 * float(res.sigma(mass)))
    out = {}
    for k, v in start.items():
        if k not in settings.fixed and k not in (settings.tied or {}):
            a, b = settings.limits.get(k, (-np.inf, np.inf))
            out[k] = min(max(v, a), b)
    return out


def run_fit(
    config: str | os.PathLike[str] | Mapping[str, Any] | Config,
    mass: float,
    *,
    hold_mass: bool = False,
    out: str | os.PathLike[str] | None = None,
    engine: str | None = None,
    unblind: bool = False,
    progress: bool | None = None,
    share_folder: bool = False,
) -> Any:
    """One signal-plus-background fit of the configured spectrum, started at ``mass`` GeV.

    The fit's mass starts at ``mass`` (no search for other starting peaks) and floats, or
    stays there with ``hold_mass``; everything else is set as for the search's free fit
    (``model.fix``, ``constrain``, ``bounds``, ``sigma_from_resolution`` with sigma taken at
    ``mass``, ``intervals``).  A free fit that settles in a minimum above the lowest one the
    fitter finds from its own starts says so (``FitResult.lower_minimum`` and its notes:
    :mod:`peaksift.fitting.elsewhere`).  Refused while the
    configuration is blinded unless ``unblind`` is given.

    Parameters
    ----------
    out : path, optional
        Directory for ``fit.json`` (:meth:`FitResult.to_dict` plus a ``run`` entry: config,
        start, held mass, settings) and ``fit.png`` (the fit figure), under the output-folder
        contract (:mod:`peaksift._output`): the folder must be new, empty, or hold only
        files peaksift wrote, unless ``share_folder``; nothing else in it is touched.

    Returns
    -------
    FitResult
    """
    from .._progress import progress_wanted

    progress = progress_wanted(progress)  # None: a terminal or a notebook
    from ..fitting import fit

    cfg = _apply_overrides(load_config(config), toys=None, seed=None, engine=engine)
    lo, hi = cfg.spectrum.window
    mass = float(mass)
    if cfg.blinding.enabled and not unblind:
        raise ConfigError(f"config {cfg.source}: blinding.enabled = true: a free fit would look "
                          "inside the blinded window; pass --unblind to fit anyway")
    if not (lo < mass < hi):
        raise ConfigError(f"--mass {mass:g} GeV lies outside spectrum.window [{lo:g}, {hi:g}]; "
                          "choose a mass inside the fit window")
    if "mass" in cfg.model.fix:
        raise ConfigError(f"{_where(cfg)}: model.fix.mass = {cfg.model.fix['mass']:g} holds the "
                          "mass, so a fit at --mass cannot start elsewhere; remove model.fix.mass "
                          "(use --hold-mass to hold the mass at --mass)")
    a, b = cfg.model.bounds.get("mass", (lo, hi))
    if not a <= mass <= b:
        raise ConfigError(f"{_where(cfg)}: --mass {mass:g} GeV lies outside model.bounds.mass "
                          f"[{a:g}, {b:g}]; choose a mass inside them")
    sig = _shape(cfg.model.signal, cfg.model.signal_options)
    bkg = _shape(cfg.model.background, cfg.model.background_options)
    settings = _fit_settings(cfg, sig, mass, hold_mass=hold_mass)
    start = _fit_start(cfg, sig, mass, settings)
    target = None if out is None else Path(out).expanduser().resolve()
    with _staged(target, "fit", share_folder) as stage:
        col, _, _ = _collect(cfg, progress=progress)
        hist = _fill(col, cfg, lo, hi, cfg.spectrum.bins)
        _require_candidates(cfg, col, hist)
        binned, data = _fit_data(cfg, col, hist)
        fr = fit(data, sig, bkg, (lo, hi), binned=binned, start=start, **settings.arguments())
        fr = _note_tie_drift(fr, cfg, settings)
        if stage is not None:
            from ..plotting import figure_labels

            _write_fit(stage.path, fr, {
                "written_by": _FIT_MARK, "config": cfg.source, "config_sha256": cfg.sha256,
                "mass_start": mass, "mass_held": bool(hold_mass),
                "settings": settings.echo(start)}, figure_labels(cfg))
    return fr


def _with_note(fr: Any, note: str) -> Any:
    """``fr`` (a frozen FitResult) with one more note."""
    import dataclasses

    return dataclasses.replace(fr, notes=(*fr.notes, note))


#: the tied sigma and the resolution at the fitted mass may differ by this fraction before
#: the fit says so (our choice)
_TIE_DRIFT = 0.01


def _note_tie_drift(fr: Any, cfg: Config, settings: _FitSettings) -> Any:
    """``fr`` with a note when sigma was tied to the resolution at a starting mass where the
    resolution differs by more than ``_TIE_DRIFT`` from the one at the fitted mass."""
    tie = settings.tie
    if fr is None or not tie or settings.tied or not np.isfinite(fr.peak_mass):
        return fr  # a sigma tied inside the likelihood follows the fitted mass exactly
    there = float(cfg.model.resolution.sigma(fr.peak_mass))
    if abs(there - tie["sigma"]) <= _TIE_DRIFT * there:
        return fr
    return _with_note(fr, f"sigma was tied to the resolution at the starting mass "
                          f"{tie['at_mass']:.6g} {fr.unit} ({tie['sigma']:.4g} {fr.unit}); at the "
                          f"fitted mass {fr.peak_mass:.6g} {fr.unit} it is {there:.4g} {fr.unit}: "
                          "start the fit there (peaksift fit --mass) for a consistent sigma")


def _write_fit(target: Path, fr: Any, run: Mapping[str, Any], labels: Any = None
               ) -> dict[str, Path]:
    """``fit.png`` and ``fit.json`` into ``target``, each atomically; the figure is drawn
    in memory first (without pyplot), so a failure to draw leaves no file."""
    import io

    from .._files import atomic_write
    from .._style import figure_style
    from ..report import write_results_json

    fig = fr.plot(note=f"fit started at {run['mass_start']:.2f} GeV"
                  + (" (mass held)" if run["mass_held"] else ""),
                  run=getattr(labels, "run", None), symbol=getattr(labels, "symbol", None))
    buf = io.BytesIO()
    with figure_style():
        fig.savefig(buf, format="png")
    from .doubts import fit_doubts

    d = _plain(fr.to_dict())
    # the fit's doubts, as results.json's "warnings" (the same words)
    d = {**d, "warnings": fit_doubts(d, _started(run)), "run": _plain(dict(run))}
    png = atomic_write(target / "fit.png", buf.getvalue())
    return {"fit.json": write_results_json(d, target / "fit.json"), "fit.png": png}


def _started(run: Mapping[str, Any]) -> str:
    """Where ``peaksift fit``'s mass started, in the words of its warnings."""
    held = " (held there)" if run.get("mass_held") else ""
    return f"at the given mass {run.get('mass_start'):g} GeV{held}"


def _fit_data(cfg: Config, col: Any, hist: Any) -> tuple[bool | None, Any]:
    """What the free fits get: the histogram (binned, or ``auto``: the fitter's choice for a
    histogram is binned), or the window masses with their weights for ``fit = "unbinned"``."""
    binned = {"auto": None, "binned": True, "unbinned": False}[cfg.model.fit]
    if binned is not False:
        return binned, hist
    from ..histogram import in_range

    lo, hi = cfg.spectrum.window
    m = np.asarray(col.window_mass, dtype=float)
    sel = in_range(m, lo, hi)
    if cfg.input.weights and hist.is_weighted:
        return binned, (m[sel], np.asarray(col.window_weight, dtype=float)[sel])
    return binned, m[sel]


# ------------------------------------------------------------------------------- demo
#: the configuration of the demo search; ``demo_data/search.toml`` is this text, and
