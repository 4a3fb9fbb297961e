"""Every figure of a search result: :func:`search_figures` writes them, :func:`search_figure`
returns one (``SearchResult.plot``); :data:`SEARCH_FIGURES` names them in the report's order."""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from .._format import fixed, mass_text
from .candidates import candidates_figure
from .envelope import envelope_figure
from .labels import FigureLabels, figure_labels, save
from .limits import _limits_figure
from .scan import _scan_figure
from .spectrum import (
    _fit_figure,
    calibration_figure,
    calibration_fit_figure,
    spectrum_figure,
)

__all__ = ["SEARCH_FIGURES", "search_figure", "search_figures"]


#: the figures of a search, in the order the report shows them
SEARCH_FIGURES = ("spectrum", "pvalue_scan", "limits", "candidates", "background_envelope",
                  "calibration")


def search_figures(result: Any, outdir: str | os.PathLike[str], *,
                   formats: Sequence[str] = ("png", "pdf"), log_scale: bool = False,
                   calibration: tuple[Any, Any] | None = None,
                   labels: FigureLabels | None = None,
                   names: Sequence[str] = SEARCH_FIGURES,
                   expected: tuple[Any, str] | None = None) -> dict[str, Path]:
    """Every figure of a search result among ``names`` (default: all) that the result has
    the results for; returns figure name -> PNG path (``spectrum`` brings ``spectrum_log``
    with ``log_scale``).  ``expected``: the p-value scan's expected curve
    (:func:`scan_expectation`), computed here when not given."""
    labels = labels or figure_labels(getattr(result, "config", None))
    out: dict[str, Path] = {}
    for name in names:
        if (name == "calibration" and calibration is not None
                and calibration[1] is not None and result.calibration):
            out[name] = calibration_figure(result.calibration, calibration[1], outdir,
                                           formats, labels)
            continue  # (the fit in hand, not read back from the result's dict)
        for log in ([False, True] if name == "spectrum" and log_scale else [False]):
            fig = search_figure(result, name, labels=labels, log=log, expected=expected)
            if fig is not None:
                key = f"{name}_log" if log else name
                out[key] = save(fig, outdir, key, formats)
    return out


def search_figure(result: Any, name: str = "spectrum", *, labels: FigureLabels | None = None,
                  log: bool = False, expected: tuple[Any, str] | None = None) -> Any:
    """The Figure ``name`` (one of :data:`SEARCH_FIGURES`) of a search result, or None when
    the result has nothing to draw for it (no limits, blinded candidates, no envelope, no
    calibration).  While blinded the spectrum shows the sideband fit; the calibration
    figure is drawn from the fit the result keeps (``calibration["fit"]``)."""
    labels = labels or figure_labels(getattr(result, "config", None))
    blind = result.blinding.get("window") if result.blinding.get("active") else None
    env = (getattr(result, "systematics", None) or {}).get("envelope") or {}
    if name == "spectrum" and result.fit is None:  # blinded: the blinded bins hidden
        return spectrum_figure(result.histogram, log=log, blind=blind, labels=labels,
                               title=_fit_title(result), background=result.background_fit)
    if name == "spectrum":
        return _fit_figure(result.fit, log=log, blind=blind, title=_fit_title(result),
                           labels=labels)
    if name == "pvalue_scan":
        return _scan_figure(result, labels, expected)
    if name == "limits" and result.limits is not None:
        return _limits_figure(result, labels)
    if name == "candidates" and blind is None and result.collected is not None:
        return candidates_figure(result.collected, labels)  # (they include the blinded window)
    if name == "background_envelope" and env.get("profile"):
        return envelope_figure(result.systematics, labels=labels)
    cal = getattr(result, "calibration", None) or {}
    if name == "calibration" and cal.get("fit"):
        from ..fitting.result import FitResult

        return calibration_fit_figure(cal, FitResult.from_dict(cal["fit"]), labels)
    return None


def _fit_title(result: Any) -> str:
    best = result.best
    zl, zg = fixed(best.get("z_local")), fixed(best.get("z_global"))
    parts = [f"best hypothesis {mass_text(best.get('mass'))} GeV"]
    if zl != "n/a":
        parts.append(f"$Z_{{local}}$ = {zl}")
    if zg != "n/a":
        gt = "> " if best.get("z_global_is_lower_bound") else ""
        parts.append(f"$Z_{{global}}$ = {gt}{zg}")
    # the same rule as the report's Result table: with [systematics] the significances are
    # the profiled ones, not the single function's drawn below
    tag = " (with systematics)" if getattr(result, "systematics", None) else ""
    return ",  ".join(parts) + tag
