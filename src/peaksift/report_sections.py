"""The sections of the meeting report (:mod:`peaksift.report` renders them).

Each ``section_*`` function takes the results dictionary (the content of ``results.json``)
and the figure names available, and returns a list of blocks: ``("h2", text)``,
``("h3", text)``, ``("p", text)``, ``("table", head, rows)``, ``("list", items)``,
``("figure", name, caption)``.  :data:`peaksift.report.SECTIONS` lists them in report
order; a new section is one function here and one entry there.  Numbers go through
:mod:`peaksift._format`, so they read as on the command line and in the figures.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from typing import Any

from ._format import (
    as_finite,
    fixed,
    format_interval,
    format_pm,
    number,
    p_value,
    significance,
)

CAUTION = (
    "A local significance is not a discovery. The numbers here come from one dataset and the "
    "choices in its configuration; the analysis group's own statistical procedures and review "
    "decide what, if anything, is claimed."
)

# figure name -> caption, in report order
CAPTIONS = {
    "spectrum": "Selected mass spectrum with the signal-plus-background fit at the best mass "
                "hypothesis, its signal component, and the pulls (data - fit) / error per bin.",
    "spectrum_log": "The same spectrum on a logarithmic scale.",
    "pvalue_scan": "Local p-value of the background-only hypothesis at each mass hypothesis, "
                   "with the whole-sigma levels (1 to 5) that fall in the axis range and the "
                   "best point marked; dashed, the median p-value expected for a signal of "
                   "the fitted size; the global significance of the largest excess is noted.",
    "limits": "Upper limits at each mass hypothesis: observed, and the expected median with its "
              "68% and 95% bands under the background-only hypothesis.",
    "candidates": "Transverse momentum (logarithmic scale) and rapidity of the pairs, for "
                  "the candidates in the search window (stated on the figure).",
    "calibration": "Calibration fit of the standard-candle peak in its own window.",
    "background_envelope": "Discrete profiling of the background function at the best mass: "
                           "twice the profiled negative log-likelihood plus the penalty per "
                           "free parameter against the signal yield, one curve per candidate "
                           "function; the envelope (thick) is their minimum, and its rise by 1 "
                           "gives the 68% interval.",
    "dedx": "Measured dE/dx against momentum of the paired collection's tracks (density, log "
            "momentum axis), with the expected Bethe curve of each mass hypothesis times the "
            "calibrated scale; the pairing hypotheses carry the selection band (drawn with the "
            "resolution at the reference number of samples).",
}

# captions that differ while the run is blinded (no fit drawn, nothing shown inside)
BLINDED_CAPTIONS = {
    "spectrum": "Selected mass spectrum while blinded: the bins overlapping the blinded window "
                "(hatched) are hidden, and no signal-plus-background fit or pulls are drawn "
                "until the run is unblinded.",
    "pvalue_scan": "Local p-value of the background-only hypothesis at each mass hypothesis "
                   "outside the blinded window (none is computed inside it), with the "
                   "whole-sigma levels (1 to 5) that fall in the axis range; the global "
                   "significance of the largest excess is noted.",
    "limits": "Upper limits at each mass hypothesis: observed outside the blinded window only, "
              "and the expected median with its 68% and 95% bands under the "
              "background-only hypothesis everywhere.",
}

_WITHHELD_CANDIDATES = ("The candidates' transverse momentum and rapidity figure is withheld "
                        "while the run is blinded (its histograms include the candidates inside "
                        "the blinded window).")


def _blinded(r: Mapping[str, Any]) -> bool:
    return bool((r.get("blinding") or {}).get("active"))


def _caption(name: str, r: Mapping[str, Any]) -> str:
    if _blinded(r) and name in BLINDED_CAPTIONS:
        return BLINDED_CAPTIONS[name]
    return CAPTIONS.get(name, name)


def _window_count_label(r: Mapping[str, Any]) -> str:
    """What ``input.candidates`` counts: the fit window, or only its sidebands while blinded."""
    w = ((r.get("config") or {}).get("spectrum") or {}).get("window")
    txt = f"candidates in the fit window {_num(w[0])}-{_num(w[1])} GeV" if w \
        else "candidates in the fit window"
    if _blinded(r):
        hr = (r.get("blinding") or {}).get("hidden_range") or \
            (r.get("blinding") or {}).get("window")
        hid = f" {_num(hr[0])}-{_num(hr[1])} GeV" if hr else ""
        txt += f" outside the blinded bins{hid} (sidebands only while blinded)"
    return txt


# ---------------------------------------------------------------------------- formatting
def _num(x: Any, digits: int = 4) -> str:
    """:func:`peaksift._format.number`: one number format for the summary, report and
    figures (thousands separated by a comma)."""
    return number(x, digits)


def _with_intervals(rows: list[tuple[str, str]], fit: Mapping[str, Any]) -> None:
    """The fitted mass, width and yield rows with their profile-likelihood intervals where
    the fit has them, and a row saying what the fit held, constrained or bounded."""
    iv = fit.get("intervals") or {}
    wname = fit.get("width_parameter") or "width"
    which = {"Fitted peak mass": ("peak_mass", "mass", "GeV"),
             f"Fitted width ({wname})": ("width", wname, "GeV"),
             "Signal yield": ("signal_yield", "signal_yield", "")}
    for i, (label, _) in enumerate(rows):
        if label in which and which[label][1] in iv:
            key, par, unit = which[label]
            lo, hi = iv[par]
            rows[i] = (label, format_interval(_ve(fit.get(key))[0], lo, hi, unit)
                       + " (profile-likelihood interval)")
    text = fit_settings_text(fit.get("settings") or {})
    if text:
        at = next((i for i, (label, _) in enumerate(rows) if label == "Signal yield"),
                  len(rows) - 1)
        rows.insert(at + 1, ("Fit settings", text))


def fit_settings_text(st: Mapping[str, Any]) -> str:
    """What ``fit.settings`` held, constrained or bounded, in words."""
    tie = st.get("sigma_from_resolution") or {}
    parts = []
    for k, v in (st.get("fixed") or {}).items():
        parts.append(f"{k} fixed to the resolution model, {_num(v)} GeV at "
                     f"{_num(tie.get('at_mass'), 5)} GeV" if tie and k == "sigma"
                     else f"{k} fixed at {_num(v, 6)}")
    for k, c in (st.get("constraints") or {}).items():
        src = "the resolution model, " if tie and k == "sigma" else ""
        rel = " (relative, log-normal)" if c.get("kind") == "lognormal" else " (Gaussian)"
        parts.append(f"{k} constrained to {src}{_num(c.get('center'))} \u00b1 "
                     f"{_num(c.get('width'), 3)}{rel}")
    for k, (a, b) in (st.get("bounds") or {}).items():
        parts.append(f"{k} bounded to [{_num(a)}, {_num(b)}]")
    return "; ".join(parts)


def _ve(d: Any) -> tuple[Any, Any]:
    if isinstance(d, Mapping):
        return d.get("value"), d.get("error")
    return d, None


# ------------------------------------------------------------------------------ blocks
#: one piece of a report: ("h2"|"h3"|"p"|"caution", text), ("table", head, rows),
#: ("list", items), ("figure", name, caption)
Block = tuple[Any, ...]
Section = Callable[[Mapping[str, Any], Mapping[str, Any]], list[Block]]


def figure_block(fig: Mapping[str, Any], name: str, caption: str) -> list[Block]:
    return [("figure", name, caption)] if name in fig else []


# ------------------------------------------------------------------------------ result
def _summary_rows(r: Mapping[str, Any]) -> list[tuple[str, str]]:
    best = r.get("best") or {}
    fit = r.get("fit") or {}
    bl = r.get("blinding") or {}
    rows = [
        ("Best mass hypothesis", f"{fixed(best.get('mass'))} GeV"),
        ("Local significance", significance(best, "local")),
        ("Global significance", significance(best, "global")),
    ]
    if not bl.get("active"):
        rows += [
            ("Fitted peak mass", format_pm(*_ve(fit.get("peak_mass")), "GeV")),
            (f"Fitted width ({fit.get('width_parameter') or 'width'})",
             format_pm(*_ve(fit.get("width")), "GeV")),
            ("Signal yield", format_pm(*_ve(fit.get("signal_yield")))),
            ("Background yield (window)", format_pm(*_ve(fit.get("background_yield")))),
        ]
        _with_intervals(rows, fit)
    rows.append(("Goodness of fit", _gof_text(fit.get("gof") or {})))
    if bl.get("active"):
        w = bl.get("window") or [None, None]
        hr = bl.get("hidden_range")
        bins = (f" (spectrum bins {_num(hr[0])}-{_num(hr[1])} GeV)"
                if hr and list(hr) != list(w) else "")
        rows.insert(0, ("BLINDED", (f"data in {_num(w[0])}-{_num(w[1])} GeV{bins} are hidden "
                                   "as intended: no observed numbers there and no "
                                   "signal-plus-background fit until the run is unblinded "
                                   "(--unblind); candidate counts are those of the sidebands")))
    else:
        rows.append(("Fit valid", "yes" if fit.get("valid") else
                     "NO: " + "; ".join(fit.get("problems") or ["see the fit section"])))
    return rows


def _gof_text(gof: Mapping[str, Any]) -> str:
    if not gof or gof.get("chi2") is None:  # no fit (blinded) or no goodness of fit
        return "n/a"
    ndf = gof.get("ndf")
    return (f"\u03c7\u00b2 = {_num(gof.get('chi2'))} for "
            f"{'n/a' if ndf is None else ndf} degrees of freedom "
            f"(p = {p_value(gof.get('p_value'))})")


def _lee_sentence(r: Mapping[str, Any]) -> str:
    """The look-elsewhere treatment in one technical sentence (method, range, N0 or toys)."""
    best = r.get("best") or {}
    scan = r.get("scan") or {}
    masses = scan.get("masses") or []
    fin = [v for v in map(as_finite, masses) if v is not None]
    method = best.get("global_method") or "n/a"
    rng = (f" over the scanned range {fixed(min(fin))}-{fixed(max(fin))} GeV "
           f"({len(masses)} hypotheses)") if fin else ""
    toys = best.get("n_toys", best.get("toys"))
    how = {
        "upcrossings": "from upcrossings of the q0 scan (Gross and Vitells 2010)",
        "toys": "from background-only toys of the whole scan",
    }
    desc = next((v for k, v in how.items() if str(method).startswith(k)), f"by '{method}'")
    if str(method).startswith("upcrossings") and best.get("N0") is not None:
        n0e = best.get("N0_error")
        toy_txt = (f"; mean number of upcrossings N0 = {format_pm(best['N0'], n0e)}"
                   + f" of the level u0 = {_num(best.get('u0'), 3)}"
                   + (f", from {best['n0_source']}" if best.get("n0_source") else ""))
    else:
        toy_txt = f", {toys} toys" if toys else ""
    return (f"The look-elsewhere effect is included in the global significance, estimated "
            f"{desc}{rng}{toy_txt}. The local significance does not include it.")


def _lee_plain(r: Mapping[str, Any]) -> str:
    """What the local and global numbers mean, in plain words."""
    best = r.get("best") or {}
    pl = p_value(best.get("p_local"), best.get("log10_p_local"))
    pg = p_value(best.get("p_global"), best.get("log10_p_global"))
    text = (f"In plain words: if there were no signal anywhere, a fluctuation at least as large "
            f"as the one seen would appear at this one mass with probability {pl} (the local "
            f"p-value), and somewhere in the scanned range with probability {pg} (the global "
            f"p-value), because the scan tried many masses and one of them is bound to "
            f"fluctuate up.")
    if str(best.get("global_method") or "").startswith("upcrossings") and best.get("N0"):
        text += (f" The upcrossing method counts how often background-only scans cross a low "
                 f"level (u0 = {_num(best.get('u0'), 3)} in q0, about "
                 f"{fixed(math.sqrt(max(float(best.get('u0') or 0), 0)), 1)} \u03c3): "
                 f"N0 = {_num(best['N0'], 3)} crossings per scan on average; that number, "
                 f"scaled to the observed height of the excess, estimates how many "
                 f"independent places the scan could have found one.")
    return text


def section_result(r: Mapping[str, Any], fig: Mapping[str, Any]) -> list[Block]:
    """The headline numbers, the look-elsewhere effect in words, known particles, and the
    spectrum and p-value figures."""
    out: list[Block] = [("h2", "Result"), ("table", ["quantity", "value"], _summary_rows(r)),
                        ("p", _lee_sentence(r)), ("p", _lee_plain(r)),
                        ("h3", "Known particles near the best peak")]
    km = r.get("known_matches")
    if km:
        out.append(("table", ["particle", "mass [GeV]", "width [GeV]", "distance [\u03c3]"],
                    _known_rows(km)))
    else:
        out.append(("p", ("No known particle matches (particle-data tables, within 3 combined "
                         "standard deviations, charge compatible with the pair).")))
    for name in ("spectrum", "spectrum_log", "pvalue_scan"):
        out += figure_block(fig, name, _caption(name, r))
    return out


def _known_rows(km: Sequence[Any]) -> list[list[str]]:
    return [[str(k.get("name")), _num(k.get("mass"), 6), _num(k.get("width"), 4),
             fixed(k.get("distance_sigma"))] for k in km if isinstance(k, Mapping)]


# ------------------------------------------------------------------ background-only fit
def section_background_fit(r: Mapping[str, Any], fig: Mapping[str, Any]) -> list[Block]:
    """The background-only fit: its goodness of fit and every fitted parameter."""
    b = r.get("background_fit")
    if not isinstance(b, Mapping) or not b:
        return []
    if b.get("kind") == "sideband_fit":
        return _sideband_fit(b)
    gof = b.get("gof") or {}
    rows = [["goodness of fit", _gof_text(gof)],
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
    gof = {"chi2": b.get("gof_chi2"), "ndf": b.get("gof_ndf"), "p_value": b.get("gof_p_value")}
    lo, hi = (b.get("blind") or [None, None])[:2]
    rows = [["goodness of fit (sidebands only)", _gof_text(gof)],
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
                 format_pm(*_ve(b.get("blinded_yield")))])
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
    fm, fe = _ve(c.get("fitted_mass"))
    shape = str(c.get("signal_shape", ""))
    if c.get("width_fixed_to_table"):
        width = f"fixed to the tables' {_num(c.get('table_width'), 4)} GeV"
    elif shape in ("voigt", "breitwigner"):
        width = "fitted (calibration.fix_width = false)"
    else:
        width = (f"not a parameter of the {shape} shape: its core width absorbs the natural "
                 "width (calibration.fix_width applies to shapes with a natural width only)")
    rows = [
        ("Particle (tables)", (f"{c.get('particle')}: {_num(c.get('table_mass'), 6)} GeV, "
                              f"natural width {_num(c.get('table_width'), 4)} GeV")),
        ("Fit", (f"{shape} + {c.get('background_shape')} in "
                f"{fixed((c.get('window') or [None])[0], 1)}-"
                f"{fixed((c.get('window') or [None, None])[1], 1)} GeV")),
        ("Fitted mass", format_pm(fm, fe, "GeV")),
        ("Fitted core width (sigma)", format_pm(*_ve(c.get("fitted_resolution")), "GeV")),
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
    rows = [("material (Bethe curve)", str(resp.get("material"))),
            ("measured field", str(resp.get("field"))),
            ("relative resolution", _num(resp.get("resolution")))]
    if resp.get("samples_field"):
        rows.append(("resolution scaling", (f"x ({_num(resp.get('reference_samples'))} / n)^"
                     f"{_num(resp.get('samples_exponent'))}, n from "
                     f"'{resp.get('samples_field')}'")))
    fit = d.get("calibration_fit")
    if fit:
        sc = fit.get("scale") or {}
        rows.append(("scale (fitted)", (f"{_num(sc.get('value'), 5)} ± "
                     f"{_num(sc.get('error'), 2)} on {_num(fit.get('tracks_used'))} tracks")))
        rs = fit.get("resolution")
        if rs:
            rows.append(("resolution (fitted)", (f"{_num(rs.get('value'))} ± "
                         f"{_num(rs.get('error'), 2)}")))
    else:
        rows.append(("scale (given)", _num(resp.get("scale"), 5)))
    if pr.get("hypotheses"):
        rows.append(("mass hypotheses per leg", ", ".join(pr["hypotheses"])))
        if len(set(pr["hypotheses"])) == 2:
            rows.append(("two assignments", str(pr.get("assignment"))))
    rows.append(("tracks read", _num(d.get("tracks_read"))))
    return rows


def section_identification(r: Mapping[str, Any], fig: Mapping[str, Any]) -> list[Block]:
    """The dE/dx identification (response, calibration fit, hypotheses) and its figure."""
    ident = _identification_rows(r)
    if not ident:
        return []
    return [("h2", "Particle identification (dE/dx)"), ("table", ["quantity", "value"], ident),
            *figure_block(fig, "dedx", CAPTIONS["dedx"])]


# ----------------------------------------------------------------------------- warnings
def section_warnings(r: Mapping[str, Any], fig: Mapping[str, Any]) -> list[Block]:
    """The results.json ``warnings``, first, so nobody quotes a number without them."""
    texts = [str(w.get("message")) for w in r.get("warnings") or [] if isinstance(w, Mapping)]
    if not texts:
        return []
    return [("h2", "Warnings"), ("p", "Read these before quoting any number below."),
            ("list", [f"Warning: {t}" for t in texts])]


# ------------------------------------------------------------------------------- limits
def _cl_percent(lim: Mapping[str, Any]) -> str:
    cl = as_finite(lim.get("cl", 0.95))
    return _num(100 * cl, 3) if cl is not None else "n/a"


def _limit_rows(r: Mapping[str, Any]) -> tuple[list[str], list[list[str]]]:
    """Every limit point: observed, expected and the +-1, +-2 sigma band edges."""
    lim = r.get("limits") or {}
    m = lim.get("masses") or []
    if not m:
        return [], []
    unit = lim.get("unit", "events")
    head = ["mass [GeV]", f"observed [{unit}]", f"expected [{unit}]", "\u22122\u03c3",
            "\u22121\u03c3", "+1\u03c3", "+2\u03c3", "method"]
    rows = []
    for i in range(len(m)):
        def g(k: str, i: int = i) -> str:  # one precision down the whole table
            v = lim.get(k) or []
            return fixed(v[i], 2) if i < len(v) else "n/a"
        rows.append([fixed(m[i]), g("observed"), g("expected"), g("expected_minus2"),
                     g("expected_minus1"), g("expected_plus1"), g("expected_plus2"),
                     _limit_method(lim, i)])
    return head, rows


def _limit_method(lim: Mapping[str, Any], i: int) -> str:
    """How the limit at mass ``i`` was computed, with its low-count warnings."""
    def at(key: str) -> Any:
        v = lim.get(key) or []
        return v[i] if i < len(v) else None

    how = at("methods") or lim.get("method", "asymptotic")
    b = at("background_under_signal")
    extra = [f"b_eff {_num(b, 2)}"] if b is not None and (
        at("asymptotic_doubtful") or how == "toys") else []
    if at("asymptotic_doubtful"):
        extra.insert(0, "DOUBTFUL")
    if at("below_floor"):
        extra.append("below counting floor")
    return f"{how} ({', '.join(extra)})" if extra else str(how)


def _limit_notes(r: Mapping[str, Any]) -> list[str]:
    """The limits' notes, and what the method column means when a mass is flagged."""
    lim = r.get("limits") or {}
    notes = [str(n) for n in lim.get("notes") or []]
    if any(lim.get("asymptotic_doubtful") or []) or "toys" in (lim.get("methods") or []):
        notes.append(f"b_eff: background events expected under the signal; below "
                     f"{_num(lim.get('low_count_background'))} the asymptotic CLs formulae "
                     "misplace the expected bands (DOUBTFUL where they were still used).")
    return notes


def limit_assumptions(r: Mapping[str, Any]) -> str:
    """What the limits assumed, in words: L, the efficiency, their uncertainties."""
    lim = r.get("limits") or {}
    a = lim.get("assumptions") or {}
    if not a:  # an older results file: the config echo says the same
        cfg = (r.get("config") or {}).get("limits") or {}
        if cfg.get("luminosity") is not None:
            a = {k: cfg.get(k) for k in ("luminosity", "luminosity_uncertainty", "efficiency",
                                         "efficiency_uncertainty", "constraint")}
    if not a or a.get("luminosity") is None:
        return ("Limits on the signal yield in events (no luminosity given): no luminosity "
                "or efficiency enters.")
    lu, eu = as_finite(a.get("luminosity_uncertainty")) or 0.0, \
        as_finite(a.get("efficiency_uncertainty")) or 0.0
    eff = a.get("efficiency")
    eff_txt = _num(eff, 3) if eff is not None else (
        "{}-{} (depends on mass)".format(*[_num(x, 3) for x in a.get("efficiency_range")
                                           or (None, None)]))
    kind = {"lognormal": "log-normal", "gaussian": "Gaussian"}.get(str(a.get("constraint")),
                                                                  str(a.get("constraint")))
    unit = lim.get("unit", "fb")
    return (f"Assumptions: integrated luminosity L = {_num(a['luminosity'])} fb\u207b\u00b9 "
            f"\u00b1 {_num(100 * lu, 3)}%, signal efficiency \u00d7 acceptance \u03b5 = "
            f"{eff_txt} \u00b1 {_num(100 * eu, 3)}% (relative uncertainties, {kind} "
            f"constrained nuisance parameters); the limit on \u03c3 \u00d7 B in {unit} is the "
            "limit on the signal yield divided by L \u00d7 \u03b5.")


def section_limits(r: Mapping[str, Any], fig: Mapping[str, Any]) -> list[Block]:
    """Every limit point with its bands, the assumptions, the notes and the figure."""
    head, rows = _limit_rows(r)
    if not rows:
        return []
    lim = r.get("limits") or {}
    out: list[Block] = [
        ("h2", "Upper limits"),
        ("p", (f"{_cl_percent(lim)}% CL CLs upper limits ({lim.get('method', 'asymptotic')}) "
              f"at all {len(rows)} mass points, unit {lim.get('unit', 'events')}; the "
              "expected limit is the median under the background-only hypothesis and "
              "\u00b11\u03c3/\u00b12\u03c3 the edges of its 68%/95% band.")),
        ("p", limit_assumptions(r)),
        *figure_block(fig, "limits", _caption("limits", r)),
        ("table", head, rows)]
    notes = _limit_notes(r)
    if notes:
        out.append(("list", notes))
    return out


# ---------------------------------------------------------------------------- selection
def _cutflow_rows(r: Mapping[str, Any]) -> list[tuple[str, str]]:
    """Per requirement, in order, from the same pass over the data; then the pairing's."""
    inp = r.get("input") or {}
    req = inp.get("requirements") or {}
    cf = inp.get("cutflow") or {}
    rows: list[tuple[str, str]] = [(str(k), _num(v)) for k, v in req.items()]
    pairing = {"events_with_pair": "events with a pair passing the charge requirement",
               "candidates": "candidates (pairs kept by the choice)"}
    if req:
        rows += [(label, _num(cf[k])) for k, label in pairing.items() if k in cf]
    else:
        rows = [(str(k).replace("_", " "), _num(v)) for k, v in cf.items()]
    if rows and inp.get("candidates") is not None:
        rows.append((_window_count_label(r), _num(inp["candidates"])))
    return rows


def _selection_rows(r: Mapping[str, Any]) -> list[tuple[str, str]]:
    cfg = r.get("config") or {}
    ob = cfg.get("objects") or {}
    pr = cfg.get("pairing") or {}
    sp = cfg.get("spectrum") or {}
    md = cfg.get("model") or {}
    res = md.get("resolution") or {}
    rows = [("Objects", f"{ob.get('collection')}"
                        + (f" + {ob['second_collection']}" if ob.get("second_collection") else "")),
            ("Object cut", ob.get("cut") or "none")]
    if ob.get("second_cut"):
        rows.append(("Second-object cut", ob["second_cut"]))
    rows.append(("Event cut", ob.get("event_cut") or "none"))
    rows.append(("Pairing", f"charge {pr.get('charge')}, choose {pr.get('choose')}"))
    w = sp.get("window") or [None, None]
    rows.append(("Fit window", f"{_num(w[0])}-{_num(w[1])} GeV in {sp.get('bins')} bins"))
    rows.append(("Model", f"signal {md.get('signal')}, background {md.get('background')}"
                 + (f" {md.get('background_options')}" if md.get("background_options") else "")))
    kind = next((k for k in ("relative", "absolute", "table") if res.get(k) is not None), None)
    if kind:
        val = res[kind]
        txt = {"relative": f"\u03c3/m = {val}", "absolute": f"\u03c3 = {val} GeV",
               "table": f"table {val}"}[kind]
        rows.append(("Resolution model", txt + (f", natural width {res.get('natural_width')} GeV"
                                                if res.get("natural_width") else "")))
    bl = r.get("blinding") or {}
    if bl.get("enabled"):
        bw = bl.get("window") or [None, None]
        rows.append(("Blinding", f"{_num(bw[0])}-{_num(bw[1])} GeV "
                     + ("UNBLINDED for this run" if bl.get("unblinded") else "hidden")))
    return rows


def section_selection(r: Mapping[str, Any], fig: Mapping[str, Any]) -> list[Block]:
    """The selection settings, the per-requirement cut flow and the candidates figure."""
    inp = r.get("input") or {}
    out: list[Block] = [("h2", "Selection and cut flow"),
                        ("table", ["setting", "value"], _selection_rows(r))]
    flow = _cutflow_rows(r)
    if flow:
        out += [("p", ("Each requirement is counted after the ones above it, in the order "
                      "they are applied, in the same pass over the data that filled the "
                      "spectrum (objects are counted in events passing the event cut).")),
                ("table", ["step", "count"], flow)]
    out.append(("p", (f"Events read: {_num(inp.get('events_read'))}; events with a candidate: "
                     f"{_num(inp.get('events_selected'))}; {_window_count_label(r)}: "
                     f"{_num(inp.get('candidates'))}.")))
    if "candidates" in fig:
        out += figure_block(fig, "candidates", CAPTIONS["candidates"])
    elif _blinded(r):
        out.append(("p", _WITHHELD_CANDIDATES))
    return out


# --------------------------------------------------------------------------- provenance
def _provenance_rows(r: Mapping[str, Any]) -> list[tuple[str, str]]:
    pv = r.get("provenance") or {}
    rows = [
        ("peaksift", str(r.get("peaksift_version", "n/a"))),
        ("Started (UTC)", str(pv.get("started", "n/a"))),
        ("Finished (UTC)", str(pv.get("finished", "n/a"))),
        ("Config", f"{pv.get('config_path', 'n/a')} (sha256 {pv.get('config_sha256', 'n/a')})"),
        ("Random seed", str(pv.get("seed", "n/a"))),
    ]
    eng = pv.get("execution") or {}
    if eng:
        rows.append(("Execution", ", ".join(f"{k} {v}" for k, v in eng.items()
                                            if v not in (None, ""))))
    for k, v in (pv.get("versions") or {}).items():
        if k != "peaksift":
            rows.append((k, str(v)))
    return rows


def section_other_figures(r: Mapping[str, Any], fig: Mapping[str, Any]) -> list[Block]:
    """Figures no section placed (added by callers), so none is silently dropped."""
    return [("figure", name, name) for name in fig if name not in CAPTIONS]


def section_provenance(r: Mapping[str, Any], fig: Mapping[str, Any]) -> list[Block]:
    """Versions, times, config and input hashes, skipped files."""
    out: list[Block] = [("h2", "Provenance"), ("table", ["item", "value"], _provenance_rows(r))]
    files = (r.get("provenance") or {}).get("inputs") or []
    if files:
        out.append(("table", ["input file", "sha256"],
                    [[f["path"], f["sha256"] or "not recorded"] for f in files], "hash"))
    skipped = (r.get("input") or {}).get("files_skipped") or []
    if skipped:
        out += [("p", "Files skipped (unreadable):"),
                ("list", [f"{s.get('path', s)}: {s.get('reason', '')}" if isinstance(s, Mapping)
                          else str(s) for s in skipped])]
    return out


def section_caution(r: Mapping[str, Any], fig: Mapping[str, Any]) -> list[Block]:
    return [("h2", "Caution"), ("p", CAUTION + " " + _lee_sentence(r))]


