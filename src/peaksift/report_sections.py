"""The sections of the meeting report (:mod:`peaksift.report` renders them).

Each ``section_*`` function takes the results dictionary (the content of ``results.json``)
and the figure names available, and returns a list of blocks: ``("h2", text)``,
``("h3", text)``, ``("p", text)``, ``("table", head, rows)``, ``("list", items)``,
``("figure", name, caption)``.  :data:`peaksift.report.SECTIONS` lists them in report
order; a new section is one function (here or in the module of its topic) and one entry
there.  Numbers go through :mod:`peaksift._format`, so they read as on the command line and
in the figures.

Here: the block types, the figure captions, the helpers every section module shares
(:func:`num_text`, :func:`value_error`, :func:`gof_text`, :func:`caption_for`, ...), and the
result, warnings, other-figures, provenance and caution sections.  By topic:
:mod:`peaksift.report_fits` (background-only or sideband fit, calibration, identification),
:mod:`peaksift.report_limits`, :mod:`peaksift.report_selection` (cuts and cut flow),
:mod:`peaksift.report_background` (background model and systematics).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from typing import Any

from ._format import (
    as_finite,
    chi_square,
    fit_interval_text,
    fixed,
    format_pm,
    mass_text,
    number,
    p_value,
    significance,
)
from ._vocabulary import FITS, model_text

CAUTION = (
    "A local significance is not a discovery. The numbers here come from one dataset and the "
    "choices in its configuration; the analysis group's own statistical procedures and review "
    "decide what, if anything, is claimed."
)

# figure name -> caption, in report order
CAPTIONS = {
    "spectrum": f"Selected mass spectrum with the {FITS['free_fit'][0]} (signal plus "
                "background, started at the best mass hypothesis: its own fitted mass is in "
                "its box), its signal component, and the pulls (data - fit) / error per bin.",
    "spectrum_log": "The same spectrum on a logarithmic scale.",
    "pvalue_scan": "Local p-value of the background-only hypothesis at each mass hypothesis, "
                   "with the whole-sigma levels (1 to 5) that fall in the axis range and the "
                   "best point marked; dashed, the median p-value expected for a signal of "
                   "the size the scan fitted at its best mass; the global significance of the largest excess is noted. "
                   "With systematics, the bold curve includes them (background function "
                   "profiled as an envelope, signal nuisances profiled) and the thin one is "
                   "the single-function scan without them.",
    "limits": "Upper limits at each mass hypothesis: observed, and the expected median with its "
              "68% and 95% bands under the background-only hypothesis. With systematics, "
              "the limits with every one profiled (mass scale, resolution, background "
              "function, L and ε) are drawn over these, which carry the L and ε "
              "uncertainties only.",
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

# captions of the figures no section places (drawn at the end of the report, in this order
# after those a caller added under other names)
OTHER_CAPTIONS = {
    "signal_model_parameters": "Signal model from the simulated samples: each shape "
                               "parameter and the efficiency x acceptance against the "
                               "generated mass, with the polynomial the scan and the limits "
                               "interpolate and its 1 sigma band.",
    "signal_model_shapes": "The simulated samples' mass distributions with the shapes fitted "
                           "to them.",
}

# captions that differ while the run is blinded (no fit drawn, nothing shown inside)
BLINDED_CAPTIONS = {
    "spectrum": "Selected mass spectrum while blinded: the bins overlapping the blinded window "
                "(hatched) are hidden. The background function fitted to the sidebands is "
                "drawn solid, its extrapolation across the blinded window dashed, with the "
                "pulls of the sideband bins beneath; no signal-plus-background fit is made "
                "until the run is unblinded.",
    "pvalue_scan": "Local p-value of the background-only hypothesis at each mass hypothesis "
                   "outside the blinded window (none is computed inside it), with the "
                   "whole-sigma levels (1 to 5) that fall in the axis range; the global "
                   "significance of the largest excess is noted.",
    "limits": "Upper limits at each mass hypothesis: observed outside the blinded window only, "
              "and the expected median with its 68% and 95% bands under the "
              "background-only hypothesis everywhere.",
}



def is_blinded(r: Mapping[str, Any]) -> bool:
    return bool((r.get("blinding") or {}).get("active"))


def caption_for(name: str, r: Mapping[str, Any]) -> str:
    if is_blinded(r) and name in BLINDED_CAPTIONS:
        return BLINDED_CAPTIONS[name]
    return CAPTIONS.get(name, name)


def window_count_label(r: Mapping[str, Any]) -> str:
    """What ``input.candidates`` counts: the fit window, or only its sidebands while blinded."""
    w = ((r.get("config") or {}).get("spectrum") or {}).get("window")
    txt = f"candidates in the fit window {num_text(w[0])}-{num_text(w[1])} GeV" if w \
        else "candidates in the fit window"
    if is_blinded(r):
        hr = (r.get("blinding") or {}).get("hidden_range") or \
            (r.get("blinding") or {}).get("window")
        hid = f" {num_text(hr[0])}-{num_text(hr[1])} GeV" if hr else ""
        txt += f" outside the blinded bins{hid} (sidebands only while blinded)"
    return txt


# ---------------------------------------------------------------------------- formatting
def num_text(x: Any, digits: int = 4) -> str:
    """:func:`peaksift._format.number`: one number format for the summary, report and
    figures (thousands separated by a comma)."""
    return number(x, digits)


def fitted_text(fit: Mapping[str, Any], key: str, unit: str = "") -> str:
    """A fitted number of results.json ``fit`` (``peak_mass``, ``width``, ``signal_yield``,
    ...) as the fit figure's table and the summary quote it: its profile-likelihood interval
    where the fit has one, else value ± error."""
    par = {"peak_mass": "mass", "width": fit.get("width_parameter") or "width"}.get(key, key)
    iv = (fit.get("intervals") or {}).get(par)
    value, error = value_error(fit.get(key))
    if iv:
        return fit_interval_text(fit, key, par, unit)
    return format_pm(value, error, unit)


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
            rows[i] = (label, fit_interval_text(fit, key, par, unit,
                                                label="profile-likelihood interval"))
    text = fit_settings_text(fit.get("settings") or {})
    if text:
        at = next((i for i, (label, _) in enumerate(rows) if label == "Signal yield"),
                  len(rows) - 1)
        rows.insert(at + 1, ("Fit settings", text))


#: the signal parameters measured in GeV (the others are yields, shape numbers, fractions)
_MASS_LIKE = ("mass", "sigma", "width")


def fit_settings_text(st: Mapping[str, Any]) -> str:
    """What ``fit.settings`` held, constrained or bounded, in words."""
    tie = st.get("sigma_from_resolution") or {}
    parts = []
    for k, v in (st.get("fixed") or {}).items():
        parts.append(f"{k} fixed to the resolution model, {num_text(v)} GeV at "
                     f"{num_text(tie.get('at_mass'), 5)} GeV" if tie and k == "sigma"
                     else f"{k} fixed at {num_text(v, 6)}")
    for k, c in (st.get("constraints") or {}).items():
        src = "the resolution model, " if tie and k == "sigma" else ""
        unit = "GeV" if k in _MASS_LIKE else ""
        if c.get("kind") == "lognormal":  # its width is relative: a fraction, no unit
            text = (f"{num_text(c.get('center'))}{' ' + unit if unit else ''} within a relative "
                    f"{num_text(c.get('width'), 3)} (log-normal)")
        else:  # value ± error as everywhere else (PDG rounding, one format)
            text = f"{format_pm(c.get('center'), c.get('width'), unit)} (Gaussian)"
        parts.append(f"{k} constrained to {src}{text}")
    for k, (a, b) in (st.get("bounds") or {}).items():
        parts.append(f"{k} bounded to [{num_text(a)}, {num_text(b)}]")
    return "; ".join(parts)


def value_error(d: Any) -> tuple[Any, Any]:
    if isinstance(d, Mapping):
        return d.get("value"), d.get("error")
    return d, None


# ------------------------------------------------------------------------------ models
def fit_models(r: Mapping[str, Any]) -> dict[str, dict[str, Any]]:
    """The models of the scan and of the free fit in a results dictionary (results.json
    ``models``; for a file written before that entry, rebuilt from the scan's and the fit's
    own entries): ``{"scan": {"fit": "scan", "signal": ..., "background": ...,
    "envelope": [...] with systematics}, "free_fit": {...}}`` (no free fit while blinded)."""
    if isinstance(r.get("models"), Mapping) and r["models"]:
        return {k: dict(v) for k, v in r["models"].items() if isinstance(v, Mapping)}
    out: dict[str, dict[str, Any]] = {}
    scan, fit = r.get("scan") or {}, r.get("fit") or {}
    if scan.get("signal_shape"):
        out["scan"] = {"fit": FITS["scan"][0], "signal": str(scan["signal_shape"]),
                       "background": str(scan.get("background_shape"))}
        env = (((r.get("systematics") or {}).get("envelope") or {}).get("labels"))
        if env:  # the significances with systematics profile the background function
            out["scan"]["envelope"] = [str(x) for x in env]
    if fit.get("signal_shapes"):
        out["free_fit"] = {"fit": FITS["free_fit"][0], "signal": list(fit["signal_shapes"]),
                           "background": str(fit.get("background_shape"))}
    return out


def models_text(r: Mapping[str, Any], fits: Sequence[str] = ("scan", "free_fit"), *,
                gives: bool = True) -> list[str]:
    """The models of ``fits`` (the scan's and the free fit's) as the report and the summary
    name them (:func:`peaksift._vocabulary.model_text`), each with the numbers it gives."""
    models = fit_models(r)
    return [model_text(k, m.get("signal", "n/a"), m.get("background", "n/a"),
                       envelope=m.get("envelope") or (), gives=gives)
            for k in fits if (m := models.get(k))]


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
    # with [systematics] the headline numbers are the profiled ones: say so where they stand
    tag = " (with systematics)" if r.get("systematics") else ""
    rows = [("Model", text) for text in models_text(r)] + [
        ("Best mass hypothesis", f"{mass_text(best.get('mass'))} GeV"),
        ("Local significance" + tag, significance(best, "local")),
        ("Global significance" + tag, significance(best, "global")),
    ]
    if not bl.get("active"):
        rows += [
            ("Fitted peak mass", format_pm(*value_error(fit.get("peak_mass")), "GeV")),
            (f"Fitted width ({fit.get('width_parameter') or 'width'})",
             format_pm(*value_error(fit.get("width")), "GeV")),
            ("Signal yield", format_pm(*value_error(fit.get("signal_yield")))),
            ("Background yield (window)", format_pm(*value_error(fit.get("background_yield")))),
        ]
        _with_intervals(rows, fit)
    bf = r.get("background_fit")
    if bl.get("active") and isinstance(bf, Mapping) and bf.get("kind") == "sideband_fit":
        # no signal-plus-background fit while blinded: the sideband fit's is the one there is
        rows.append(("Goodness of fit (background fit on the sidebands only)",
                     gof_text(sideband_gof(bf))))
    else:
        rows.append((f"Goodness of fit ({FITS['free_fit'][0]})", gof_text(fit.get("gof") or {})))
    if bl.get("active"):
        w = bl.get("window") or [None, None]
        hr = bl.get("hidden_range")
        bins = (f" (spectrum bins {num_text(hr[0])}-{num_text(hr[1])} GeV)"
                if hr and list(hr) != list(w) else "")
        rows.insert(0, ("BLINDED", (f"data in {num_text(w[0])}-{num_text(w[1])} GeV{bins} are hidden "
                                   "as intended: no observed numbers there and no "
                                   "signal-plus-background fit until the run is unblinded "
                                   "(--unblind); candidate counts are those of the sidebands")))
    else:
        rows.append((f"Valid ({FITS['free_fit'][0]})", "yes" if fit.get("valid") else
                     "NO: " + "; ".join(fit.get("problems") or ["see the fit section"])))
    return rows


def gof_text(gof: Mapping[str, Any]) -> str:
    if not gof or gof.get("chi2") is None:  # no fit (blinded) or no goodness of fit
        return "n/a"
    ndf = gof.get("ndf")
    return (f"\u03c7\u00b2 = {chi_square(gof.get('chi2'))} for "
            f"{'n/a' if ndf is None else ndf} degrees of freedom "
            f"(p = {p_value(gof.get('p_value'))})")


def sideband_gof(b: Mapping[str, Any]) -> dict[str, Any]:
    """The goodness of fit of a results.json ``background_fit`` of kind ``sideband_fit``, in
    the form :func:`gof_text` reads."""
    return {"chi2": b.get("gof_chi2"), "ndf": b.get("gof_ndf"), "p_value": b.get("gof_p_value")}


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
                   + f" of the level u0 = {num_text(best.get('u0'), 3)}"
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
                 f"level (u0 = {num_text(best.get('u0'), 3)} in q0, about "
                 f"{fixed(math.sqrt(max(float(best.get('u0') or 0), 0)), 1)} \u03c3): "
                 f"N0 = {num_text(best['N0'], 3)} crossings per scan on average; scaled to "
                 f"the observed height of the excess (N0 exp(-(q0 - u0)/2), Gross and Vitells "
                 f"2010), it is the expected number of up-crossings of that height (at small "
                 f"values the chance that the scan crosses it), which added to the local "
                 f"p-value gives the global one.")
    trials = _trials_factor(best)
    if trials is not None:
        text += (f" The global p-value is {num_text(trials, 2)} times the local one: the "
                 f"scan's effective number of independent tries.")
    return text


def _trials_factor(best: Mapping[str, Any]) -> float | None:
    """p_global / p_local (from the log10 values where the p-values underflow), or None."""
    lg, ll = best.get("log10_p_global"), best.get("log10_p_local")
    try:
        f = 10.0 ** (float(lg) - float(ll))
    except (TypeError, ValueError, OverflowError):
        return None
    return f if math.isfinite(f) and f >= 1.0 else None


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
        out += figure_block(fig, name, caption_for(name, r))
    return out


def _known_rows(km: Sequence[Any]) -> list[list[str]]:
    return [[str(k.get("name")), num_text(k.get("mass"), 6), num_text(k.get("width"), 4),
             fixed(k.get("distance_sigma"))] for k in km if isinstance(k, Mapping)]


# ----------------------------------------------------------------------------- warnings
def section_warnings(r: Mapping[str, Any], fig: Mapping[str, Any]) -> list[Block]:
    """The results.json ``warnings``, first, so nobody quotes a number without them."""
    texts = [str(w.get("message")) for w in r.get("warnings") or [] if isinstance(w, Mapping)]
    if not texts:
        return []
    return [("h2", "Warnings"), ("p", "Read these before quoting any number below."),
            ("list", [f"Warning: {t}" for t in texts])]


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
    return [("figure", name, OTHER_CAPTIONS.get(name, name)) for name in fig
            if name not in CAPTIONS]


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


