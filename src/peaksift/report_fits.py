"""The report's fit sections: the background-only fit (or, while blinded, the background
fitted on the sidebands), the calibration peak, and the dE/dx identification's calibration.

Built from results.json alone, like every section (:mod:`peaksift.report_sections`).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from ._format import as_finite, fixed, format_pm, number, p_value
from ._vocabulary import model_text
from .report_sections import (
    CAPTIONS,
    Block,
    figure_block,
    gof_text,
    num_text,
    sideband_gof,
    value_error,
)


# ------------------------------------------------------------------ background-only fit
def section_background_fit(r: Mapping[str, Any], fig: Mapping[str, Any]) -> list[Block]:
    """The background-only fit: its goodness of fit and every fitted parameter."""
    b = r.get("background_fit")
    if not isinstance(b, Mapping) or not b:
        return []
    if b.get("kind") == "sideband_fit":
        return _sideband_fit(b)
    gof = b.get("gof") or {}
    rows = [["goodness of fit", gof_text(gof)],
            ["background shape", str(b.get("background_shape", "n/a"))],
            ["fit valid", "yes" if b.get("valid") else
             "NO: " + "; ".join(b.get("problems") or ["n/a"])]]
    for name, p in (b.get("parameters") or {}).items():
        if not isinstance(p, Mapping) or p.get("fixed"):
            continue  # the signal's parameters are held at zero yield
        rows.append([name.replace("_", " "), format_pm(p.get("value"), p.get("error"))])
    pv = as_finite(gof.get("p_value"))
    out: list[Block] = [("h2", "Background-only fit"), ("table", ["quantity", "value"], rows)]
    if pv is not None and pv < 0.05:
        out.append(("p", (f"The background-only model describes the spectrum poorly "
                         f"(p = {p_value(pv)} < 0.05): part of that may be the excess "
                         "itself; if it remains without it, the background shape is doubtful "
                         "and so are the significances built on it.")))
    return out


def _sideband_fit(b: Mapping[str, Any]) -> list[Block]:
    """The background fitted on the sidebands of a blinded spectrum."""
    gof = sideband_gof(b)
    lo, hi = (b.get("blind") or [None, None])[:2]
    rows = [["goodness of fit (sidebands only)", gof_text(gof)],
            ["background shape", str(b.get("background_shape", "n/a"))],
            ["fit valid", "yes" if b.get("valid") else
             "NO: " + "; ".join(b.get("problems") or ["n/a"])],
            ["events in the sidebands", number(b.get("sideband_events"))]]
    values, errors = b.get("values") or {}, b.get("errors") or {}
    for name in b.get("parameters") or []:
        label = ("background yield (whole window, extrapolated)"
                 if name == "background_yield" else name.replace("_", " "))
        rows.append([label, format_pm(values.get(name), errors.get(name))])
    rows.append([f"background expected in {fixed(lo, 1)}-{fixed(hi, 1)} GeV (blinded)",
                 format_pm(*value_error(b.get("blinded_yield")))])
    out: list[Block] = [
        ("h2", "Background fit on the sidebands"),
        ("p", (f"The spectrum is blinded in {fixed(lo, 1)}-{fixed(hi, 1)} GeV: the background "
               "function is fitted to the bins outside that window only, and its "
               "normalisation carried across it (drawn dashed there on the spectrum "
               "figure). The count inside stays hidden until the analysis is unblinded.")),
        ("table", ["quantity", "value"], rows)]
    pv = as_finite(gof.get("p_value"))
    if pv is not None and pv < 0.05:
        out.append(("p", (f"The background function describes the sidebands poorly "
                         f"(p = {p_value(pv)} < 0.05): its extrapolation under the blinded "
                         "window, and every significance built on it, are doubtful.")))
    return out


# -------------------------------------------------------------------------- calibration
def _calibration_rows(r: Mapping[str, Any]) -> list[tuple[str, str]] | None:
    c = r.get("calibration")
    if not c:
        return None
    fm, fe = value_error(c.get("fitted_mass"))
    shape = str(c.get("signal_shape", ""))
    if c.get("width_fixed_to_table"):
        width = f"fixed to the tables' {num_text(c.get('table_width'), 4)} GeV"
    elif shape in ("voigt", "breitwigner"):
        width = "fitted (calibration.fix_width = false)"
    else:
        width = (f"not a parameter of the {shape} shape: its core width absorbs the natural "
                 "width (calibration.fix_width applies to shapes with a natural width only)")
    rows = [
        ("Particle (tables)", (f"{c.get('particle')}: {num_text(c.get('table_mass'), 6)} GeV, "
                              f"natural width {num_text(c.get('table_width'), 4)} GeV")),
        ("Model", (f"{model_text('calibration', shape, str(c.get('background_shape')))} in "
                  f"{fixed((c.get('window') or [None])[0], 1)}-"
                  f"{fixed((c.get('window') or [None, None])[1], 1)} GeV")),
        ("Fitted mass", format_pm(fm, fe, "GeV")),
        ("Fitted core width (sigma)", format_pm(*value_error(c.get("fitted_resolution")), "GeV")),
        ("Natural width", width),
        ("Mass-scale shift (fit - tables)",
         (f"{fixed(c.get('shift'), 3, signed=True)} GeV = "
         f"{fixed(c.get('shift_relative_permille'), 2, signed=True)} \u2030")),
        ("Shift over the statistical error",
         (f"{fixed(c.get('shift_sigma'), 1, signed=True)} \u03c3 (fit error \u2295 tables' "
         "error only: a large calibration sample measures the scale so precisely that a "
         "per-mille offset is many of these \u03c3; it is a scale offset to correct or "
         "assign, not a failed match)")),
        ("Fit valid", "yes" if c.get("valid") else "NO"),
    ]
    km = c.get("known_matches")
    if km is not None:
        rows.append(("Identified as",
                     ", ".join(f"{k.get('name')} at {fixed(k.get('distance_sigma'))} \u03c3 of "
                               "the matching scale (fit error \u2295 resolution \u2295 half "
                               "the natural width)"
                               for k in km if isinstance(k, Mapping))
                     or "no known particle at the fitted mass (check the mass scale)"))
    return rows


def section_calibration(r: Mapping[str, Any], fig: Mapping[str, Any]) -> list[Block]:
    """The standard-candle fit and what its shift means."""
    cal = _calibration_rows(r)
    if not cal:
        return []
    return [("h2", "Calibration peak"), ("table", ["quantity", "value"], cal),
            *figure_block(fig, "calibration", CAPTIONS["calibration"])]


# ----------------------------------------------------------------------- identification
def _identification_rows(r: Mapping[str, Any]) -> list[tuple[str, str]] | None:
    """The dE/dx identification the pairing used: response and its calibration fit."""
    d = r.get("identification")
    if not d:
        return None
    resp = d.get("response") or {}
    pr = ((r.get("config") or {}).get("pairing") or {})
    mat = resp.get("material")  # a built-in's name, or an own material's constants
    rows = [("material (Bethe curve)", str(mat.get("name") if isinstance(mat, Mapping)
                                           else mat)),
            ("measured field", str(resp.get("field"))),
            ("relative resolution", num_text(resp.get("resolution")))]
    if resp.get("samples_field"):
        rows.append(("resolution scaling", (f"x ({num_text(resp.get('reference_samples'))} / n)^"
                     f"{num_text(resp.get('samples_exponent'))}, n from "
                     f"'{resp.get('samples_field')}'")))
    fit = d.get("calibration_fit")
    if fit:
        sc = fit.get("scale") or {}
        rows.append(("scale (fitted)", (f"{num_text(sc.get('value'), 5)} ± "
                     f"{num_text(sc.get('error'), 2)} on {num_text(fit.get('tracks_used'))} tracks")))
        rs = fit.get("resolution")
        if rs and rs.get("error"):  # given, not fitted: error 0 (None in earlier files)
            rows.append(("resolution (fitted)", (f"{num_text(rs.get('value'))} ± "
                         f"{num_text(rs.get('error'), 2)}")))
    else:
        rows.append(("scale (given)", num_text(resp.get("scale"), 5)))
    if pr.get("hypotheses"):
        rows.append(("mass hypotheses per leg", ", ".join(pr["hypotheses"])))
        if len(set(pr["hypotheses"])) == 2:
            rows.append(("two assignments", str(pr.get("assignment"))))
    rows.append(("tracks read", num_text(d.get("tracks_read"))))
    return rows


def section_identification(r: Mapping[str, Any], fig: Mapping[str, Any]) -> list[Block]:
    """The dE/dx identification (response, calibration fit, hypotheses) and its figure."""
    ident = _identification_rows(r)
    if not ident:
        return []
    return [("h2", "Particle identification (dE/dx)"), ("table", ["quantity", "value"], ident),
            *figure_block(fig, "dedx", CAPTIONS["dedx"])]
