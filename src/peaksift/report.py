"""The search's written outputs: results.json, report.md and a self-contained report.html.

Everything here works from the plain results dictionary (the content of ``results.json``,
:meth:`peaksift.search.SearchResult.to_dict`) and a mapping of figure names to PNG files, so a
report can be rebuilt from a results file without rerunning the search.

* :func:`write_results_json` -- ``results.json``, written atomically (temporary name, rename).
* :func:`render_markdown` / :func:`render_html` -- the meeting report as text; the HTML embeds
  every figure as a base64 ``data:`` URI and needs no other file.
* :func:`write_report` -- both reports into a directory, atomically.

Numbers are written through :mod:`peaksift._format` (shared with the command-line summary):
a missing or non-finite value reads "n/a", and a p-value below the smallest double is given
as a power of ten from its ``log10_p_*`` entry.

The report always carries the caution that a local significance is not a discovery, says how
the look-elsewhere effect was treated, and defers to the analysis group's statistical
procedures and review.
"""

from __future__ import annotations

import base64
import html
import json
import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from ._files import atomic_write
from ._format import (
    as_finite,
    fixed,
    format_interval,
    format_pm,
    number,
    p_value,
    significance,
)
from ._json import plain

__all__ = [
    "CAUTION",
    "atomic_write",
    "fit_settings_text",
    "format_interval",
    "format_pm",
    "render_html",
    "render_markdown",
    "write_report",
    "write_results_json",
]

CAUTION = (
    "A local significance is not a discovery. The numbers here come from one dataset and the "
    "choices in its configuration; the analysis group's own statistical procedures and review "
    "decide what, if anything, is claimed."
)

# figure name -> caption, in report order
_CAPTIONS = {
    "spectrum": "Selected mass spectrum with the signal-plus-background fit at the best mass "
                "hypothesis, its signal component, and the pulls (data - fit) / error per bin.",
    "spectrum_log": "The same spectrum on a logarithmic scale.",
    "pvalue_scan": "Local p-value of the background-only hypothesis at each mass hypothesis, "
                   "with the 1 to 5 sigma levels; the global significance of the largest "
                   "excess is noted.",
    "limits": "Upper limits at each mass hypothesis: observed, and the expected median with its "
              "68% and 95% bands under the background-only hypothesis.",
    "candidates": "Transverse momentum and rapidity of the pairs, for the candidates in the "
                  "mass range that was collected (stated on the figure).",
    "calibration": "Calibration fit of the standard-candle peak in its own window.",
    "background_envelope": "Discrete profiling of the background function at the best mass: "
                           "twice the profiled negative log-likelihood plus the penalty per "
                           "free parameter against the signal yield, one curve per candidate "
                           "function; the envelope (thick) is their minimum, and its rise "
                           "by 1 gives the 68% interval.",
    "dedx": "Measured dE/dx against momentum of the paired collection's tracks (density, log "
            "momentum axis), with the expected Bethe curve of each mass hypothesis times the "
            "calibrated scale; the pairing hypotheses carry the selection band (drawn with the "
            "resolution at the reference number of samples).",
}

# captions that differ while the run is blinded (no fit drawn, nothing shown inside)
_BLINDED_CAPTIONS = {
    "spectrum": "Selected mass spectrum while blinded: the bins overlapping the blinded window "
                "(hatched) are hidden, and no signal-plus-background fit or pulls are drawn "
                "until the run is unblinded.",
    "pvalue_scan": "Local p-value of the background-only hypothesis at each mass hypothesis "
                   "outside the blinded window (none is computed inside it), with the 1 to 5 "
                   "sigma levels; the global significance of the largest excess is noted.",
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
    if _blinded(r) and name in _BLINDED_CAPTIONS:
        return _BLINDED_CAPTIONS[name]
    return _CAPTIONS.get(name, name)


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


# ------------------------------------------------------------------------------- writing
def write_results_json(results: Mapping[str, Any], path: str | os.PathLike[str]) -> Path:
    """Write the results dictionary as indented JSON, atomically; NaN/inf become ``null``."""
    text = json.dumps(plain(results), indent=2, allow_nan=False)
    return atomic_write(path, text + "\n")


# ---------------------------------------------------------------------------- formatting
def _num(x: Any, digits: int = 4) -> str:
    """:func:`peaksift._format.number` with a thin space between thousands (typeset text)."""
    return number(x, digits, sep="\u2009")


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


# ------------------------------------------------------------------------------ sections
def _summary_rows(r: Mapping[str, Any]) -> list[tuple[str, str]]:
    best = r.get("best") or {}
    fit = r.get("fit") or {}
    rows = [
        ("Best mass hypothesis", f"{_num(best.get('mass'), 5)} GeV"),
        ("Local significance", significance(best, "local")),
        ("Global significance", significance(best, "global")),
        ("Fitted peak mass", format_pm(*_ve(fit.get("peak_mass")), "GeV")),
        (f"Fitted width ({fit.get('width_parameter') or 'width'})",
         format_pm(*_ve(fit.get("width")), "GeV")),
        ("Signal yield", format_pm(*_ve(fit.get("signal_yield")))),
        ("Background yield (window)", format_pm(*_ve(fit.get("background_yield")))),
    ]
    _with_intervals(rows, fit)
    gof = fit.get("gof") or {}
    if gof:
        if gof.get("chi2") is None:  # no fit (blinded) or no goodness of fit
            rows.append(("Goodness of fit", "n/a"))
        else:
            ndf = gof.get("ndf")
            rows.append(("Goodness of fit", (f"\u03c7\u00b2 = {_num(gof.get('chi2'))} for "
                                            f"{'n/a' if ndf is None else ndf} degrees of "
                                            f"freedom (p = {p_value(gof.get('p_value'))})")))
    bl = r.get("blinding") or {}
    if bl.get("active"):
        w = bl.get("window") or [None, None]
        hr = bl.get("hidden_range")
        bins = (f" (spectrum bins {_num(hr[0])}-{_num(hr[1])} GeV)"
                if hr and list(hr) != list(w) else "")
        rows.insert(0, ("BLINDED", (f"data in {_num(w[0])}-{_num(w[1])} GeV{bins} are hidden: "
                                   "no observed numbers there and no signal-plus-background "
                                   "fit until the run is unblinded (--unblind); candidate "
                                   "counts are those of the sidebands")))
    else:
        rows.append(("Fit valid", "yes" if fit.get("valid") else
                     "NO: " + "; ".join(fit.get("problems") or ["see the fit section"])))
    return rows


def _lee_sentence(r: Mapping[str, Any]) -> str:
    best = r.get("best") or {}
    scan = r.get("scan") or {}
    masses = scan.get("mass") or []
    fin = [v for v in map(as_finite, masses) if v is not None]
    method = best.get("global_method") or "n/a"
    rng = (f" over the scanned range {_num(min(fin), 5)}-{_num(max(fin), 5)} GeV "
           f"({len(masses)} hypotheses)") if fin else ""
    toys = best.get("n_toys", best.get("toys"))
    how = {
        "upcrossings": "from upcrossings of the q0 scan (Gross and Vitells 2010)",
        "toys": "from background-only toys of the whole scan",
    }
    desc = next((v for k, v in how.items() if str(method).startswith(k)), f"by '{method}'")
    if str(method).startswith("upcrossings") and best.get("N0") is not None:
        n0e = best.get("N0_error")
        toy_txt = (f"; mean number of upcrossings N0 = {_num(best['N0'], 3)}"
                   + (f" \u00b1 {_num(n0e, 2)}" if n0e is not None else "")
                   + f" of the level u0 = {_num(best.get('u0'), 3)}"
                   + (f", from {best['n0_source']}" if best.get("n0_source") else ""))
    else:
        toy_txt = f", {toys} toys" if toys else ""
    return (f"The look-elsewhere effect is included in the global significance, estimated "
            f"{desc}{rng}{toy_txt}. The local significance does not include it.")


def _cutflow_rows(r: Mapping[str, Any]) -> list[tuple[str, str]]:
    inp = r.get("input") or {}
    cf = inp.get("cutflow") or {}
    rows = [(str(k).replace("_", " "), _num(v)) for k, v in cf.items()]
    if rows and inp.get("candidates") is not None:
        rows.append((_window_count_label(r), _num(inp["candidates"])))
    return rows


def _calibration_rows(r: Mapping[str, Any]) -> list[tuple[str, str]] | None:
    c = r.get("calibration")
    if not c:
        return None
    fm, fe = _ve(c.get("fitted_mass"))
    rows = [
        ("Particle (tables)", (f"{c.get('particle')} : {_num(c.get('table_mass'), 6)} GeV, "
                              f"width {_num(c.get('table_width'), 4)} GeV")),
        ("Fitted mass", format_pm(fm, fe, "GeV")),
        ("Fitted core width (sigma)", format_pm(*_ve(c.get("fitted_resolution")), "GeV")),
        ("Shift (fit - tables)", (f"{_num(c.get('shift'), 3)} GeV = "
                                 f"{_num(c.get('shift_relative_permille'), 3)} \u2030, "
                                 f"{_num(c.get('shift_sigma'), 3)} \u03c3 (statistical "
                                 "errors of fit and tables)")),
        ("Fit valid", "yes" if c.get("valid") else "NO"),
    ]
    km = c.get("known_matches")
    if km is not None:
        rows.append(("Known particles at the fitted mass",
                     ", ".join(f"{k.get('name')} ({fixed(k.get('distance_sigma'), 1)} \u03c3)"
                               for k in km if isinstance(k, Mapping))
                     or "none (check the mass scale)"))
    return rows


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


def _cl_percent(lim: Mapping[str, Any]) -> str:
    cl = as_finite(lim.get("cl", 0.95))
    return _num(100 * cl, 3) if cl is not None else "n/a"


def _known_rows(km: Sequence[Any]) -> list[list[str]]:
    return [[str(k.get("name")), _num(k.get("mass"), 6), _num(k.get("width"), 4),
             _num(k.get("distance_sigma"), 3)] for k in km if isinstance(k, Mapping)]


def _limit_rows(r: Mapping[str, Any], max_rows: int = 12) -> tuple[list[str], list[list[str]]]:
    lim = r.get("limits") or {}
    m = lim.get("mass") or []
    if not m:
        return [], []
    idx = list(range(len(m)))
    if len(idx) > max_rows:
        step = (len(idx) - 1) / (max_rows - 1)
        idx = sorted({round(i * step) for i in range(max_rows)})
    unit = lim.get("unit", "events")
    head = ["mass [GeV]", f"observed [{unit}]", f"expected [{unit}]", "expected -1\u03c3",
            "expected +1\u03c3", "method"]
    rows = []
    for i in idx:
        def g(k: str, i: int = i) -> str:
            v = lim.get(k) or []
            x = as_finite(v[i]) if i < len(v) else None
            return f"{x:#.3g}".rstrip(".") if x is not None else "n/a"
        rows.append([fixed(m[i]), g("observed"), g("expected"), g("expected_minus1"),
                     g("expected_plus1"), _limit_method(lim, i)])
    return head, rows


def _limit_method(lim: Mapping[str, Any], i: int) -> str:
    """How the limit at mass ``i`` was computed, with its low-count warnings."""
    def at(key: str) -> Any:
        v = lim.get(key) or []
        return v[i] if i < len(v) else None

    how = at("methods") or lim.get("method", "asymptotic")
    b = at("background_under_signal")
    extra = [f"b_eff {float(b):#.2g}".rstrip(".")] if b is not None and (
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


# ------------------------------------------------------------------------------ markdown
def _md_table(head: Sequence[str], rows: Sequence[Sequence[str]]) -> str:
    def esc(s: str) -> str:
        return str(s).replace("|", "\\|")
    out = ["| " + " | ".join(esc(h) for h in head) + " |",
           "|" + "|".join("---" for _ in head) + "|"]
    out += ["| " + " | ".join(esc(c) for c in row) + " |" for row in rows]
    return "\n".join(out)


def _title(r: Mapping[str, Any]) -> str:
    cfg = r.get("config") or {}
    t = (cfg.get("output") or {}).get("title")
    if t:
        return str(t)
    ob = cfg.get("objects") or {}
    a = ob.get("collection", "object")
    b = ob.get("second_collection")
    ch = (cfg.get("pairing") or {}).get("charge", "")
    chs = {"opposite": "opposite-charge ", "same": "same-charge "}.get(ch, "")
    return f"Resonance search in {chs}{a}-{b} pairs" if b and b != a else \
        f"Resonance search in {chs}{a} pairs"


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


def _warning_texts(r: Mapping[str, Any]) -> list[str]:
    return [str(w.get("message")) for w in r.get("warnings") or [] if isinstance(w, Mapping)]


def _warnings_md(r: Mapping[str, Any]) -> list[str]:
    """The ``## Warnings`` section (results.json ``warnings``), empty when there are none."""
    texts = _warning_texts(r)
    if not texts:
        return []
    return ["## Warnings", "", "Read these before quoting any number below.", "",
            *[f"- **Warning:** {t}" for t in texts], ""]


def _warnings_html(r: Mapping[str, Any]) -> list[str]:
    texts = _warning_texts(r)
    if not texts:
        return []
    items = "".join(f"<li><strong>Warning:</strong> {_h(t)}</li>" for t in texts)
    return ["<h2>Warnings</h2>", "<p>Read these before quoting any number below.</p>",
            f'<ul class="caution">{items}</ul>']


def render_markdown(results: Mapping[str, Any], figures: Mapping[str, str] | None = None) -> str:
    """The meeting report as Markdown; ``figures`` maps figure names to relative PNG paths."""
    r = results
    fig = dict(figures or {})
    out = [f"# {_title(r)}", "", f"> **Caution.** {CAUTION}", "", *_warnings_md(r), "## Result",
           ""]
    out.append(_md_table(["quantity", "value"], _summary_rows(r)))
    out += ["", _lee_sentence(r), ""]
    km = r.get("known_matches")
    out.append("### Known particles near the best peak")
    out.append("")
    if km:
        out.append(_md_table(["particle", "mass [GeV]", "width [GeV]", "distance [\u03c3]"],
                             _known_rows(km)))
    else:
        out.append("No known particle matches (particle-data tables, within 3 combined "
                   "standard deviations, charge compatible with the pair).")
    out.append("")
    for name in ("spectrum", "spectrum_log", "pvalue_scan"):
        if name in fig:
            out += [f"![{name}]({fig[name]})", "", f"*{_caption(name, r)}*", ""]
    out += background_model_markdown(r, fig)
    cal = _calibration_rows(r)
    if cal:
        out += ["## Calibration peak", "", _md_table(["quantity", "value"], cal), ""]
        if "calibration" in fig:
            out += [f"![calibration]({fig['calibration']})", "", f"*{_CAPTIONS['calibration']}*",
                    ""]
    ident = _identification_rows(r)
    if ident:
        out += ["## Particle identification (dE/dx)", "",
                _md_table(["quantity", "value"], ident), ""]
        if "dedx" in fig:
            out += [f"![dedx]({fig['dedx']})", "", f"*{_CAPTIONS['dedx']}*", ""]
    head, rows = _limit_rows(r)
    if rows:
        lim = r.get("limits") or {}
        out += ["## Upper limits", "",
                (f"{_cl_percent(lim)}% CL CLs upper limits "
                f"({lim.get('method', 'asymptotic')}), unit: {lim.get('unit', 'events')}."), "",
                _md_table(head, rows), ""]
        notes = _limit_notes(r)
        if notes:
            out += [f"- {n}" for n in notes] + [""]
        if "limits" in fig:
            out += [f"![limits]({fig['limits']})", "", f"*{_caption('limits', r)}*", ""]
    inp = r.get("input") or {}
    out += ["## Selection and cut flow", "", _md_table(["setting", "value"], _selection_rows(r)),
            "", _md_table(["step", "count"], _cutflow_rows(r)) if _cutflow_rows(r) else "", ""]
    out.append(f"Events read: {_num(inp.get('events_read'))}; events with a candidate: "
               f"{_num(inp.get('events_selected'))}; {_window_count_label(r)}: "
               f"{_num(inp.get('candidates'))}.")
    out.append("")
    if "candidates" in fig:
        out += [f"![candidates]({fig['candidates']})", "", f"*{_CAPTIONS['candidates']}*", ""]
    elif _blinded(r):
        out += [_WITHHELD_CANDIDATES, ""]
    out += ["## Provenance", "", _md_table(["item", "value"], _provenance_rows(r)), ""]
    files = (r.get("provenance") or {}).get("inputs") or []
    if files:
        out += [_md_table(["input file", "sha256"], [[f["path"], f["sha256"]] for f in files]), ""]
    skipped = inp.get("files_skipped") or []
    if skipped:
        out += ["Files skipped (unreadable):", ""]
        out += [f"- {s.get('path', s)}: {s.get('reason', '')}" if isinstance(s, Mapping)
                else f"- {s}" for s in skipped]
        out.append("")
    out += ["## Caution", "", CAUTION + " " + _lee_sentence(r), ""]
    return "\n".join(out)


# ---------------------------------------------------------------------------------- html
_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Helvetica,Arial,sans-serif;max-width:60rem;
margin:2rem auto;padding:0 1rem;color:#1b1b1f;line-height:1.45}
h1{font-size:1.6rem;margin-bottom:.3rem}h2{font-size:1.25rem;margin-top:2rem;
border-bottom:1px solid #d6d8dc}h3{font-size:1.05rem}
table{border-collapse:collapse;margin:.6rem 0 1rem;font-size:.93rem}
th,td{border:1px solid #d6d8dc;padding:.25rem .6rem;text-align:left;vertical-align:top}
th{background:#f2f4f6}td.num{text-align:right;font-variant-numeric:tabular-nums}
.caution{background:#fff6e5;border-left:4px solid #e0a458;padding:.6rem .9rem;margin:1rem 0}
figure{margin:1rem 0}figure img{max-width:100%;height:auto;border:1px solid #eceef1}
figcaption{font-size:.9rem;color:#4a4d55}code{font-size:.9em}
.hash{font-family:ui-monospace,Menlo,Consolas,monospace;font-size:.8rem;word-break:break-all}
"""


def _h(s: Any) -> str:
    return html.escape(str(s), quote=True)


def _html_table(head: Sequence[str], rows: Sequence[Sequence[str]], *,
                mono_last: bool = False) -> str:
    out = ["<table>", "<tr>" + "".join(f"<th>{_h(x)}</th>" for x in head) + "</tr>"]
    for row in rows:
        cells = []
        for j, c in enumerate(row):
            cls = ' class="hash"' if (mono_last and j == len(row) - 1) else ""
            cells.append(f"<td{cls}>{_h(c)}</td>")
        out.append("<tr>" + "".join(cells) + "</tr>")
    out.append("</table>")
    return "\n".join(out)


def _img(path: str | os.PathLike[str], name: str, cap: str | None = None) -> str:
    data = base64.b64encode(Path(path).read_bytes()).decode("ascii")
    cap = _CAPTIONS.get(name, name) if cap is None else cap
    return (f'<figure id="fig-{_h(name)}"><img alt="{_h(name)}" '
            f'src="data:image/png;base64,{data}"><figcaption>{_h(cap)}</figcaption></figure>')


def render_html(results: Mapping[str, Any], figures: Mapping[str, str | os.PathLike[str]]
                | None = None) -> str:
    """The meeting report as one self-contained HTML page (figures embedded as base64 PNG)."""
    r = results
    fig = dict(figures or {})
    title = _title(r)
    b: list[str] = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
                    f"<title>{_h(title)}</title>", f"<style>{_CSS}</style></head><body>",
                    f"<h1>{_h(title)}</h1>",
                    f'<div class="caution"><strong>Caution.</strong> {_h(CAUTION)}</div>',
                    *_warnings_html(r),
                    "<h2>Result</h2>", _html_table(["quantity", "value"], _summary_rows(r)),
                    f"<p>{_h(_lee_sentence(r))}</p>",
                    "<h3>Known particles near the best peak</h3>"]
    km = r.get("known_matches")
    if km:
        b.append(_html_table(["particle", "mass [GeV]", "width [GeV]", "distance [\u03c3]"],
                             _known_rows(km)))
    else:
        b.append("<p>No known particle matches (particle-data tables, within 3 combined "
                 "standard deviations, charge compatible with the pair).</p>")
    for name in ("spectrum", "spectrum_log", "pvalue_scan"):
        if name in fig:
            b.append(_img(fig[name], name, _caption(name, r)))
    b += background_model_html(r, fig)
    cal = _calibration_rows(r)
    if cal:
        b += ["<h2>Calibration peak</h2>", _html_table(["quantity", "value"], cal)]
        if "calibration" in fig:
            b.append(_img(fig["calibration"], "calibration"))
    ident = _identification_rows(r)
    if ident:
        b += ["<h2>Particle identification (dE/dx)</h2>",
              _html_table(["quantity", "value"], ident)]
        if "dedx" in fig:
            b.append(_img(fig["dedx"], "dedx"))
    head, rows = _limit_rows(r)
    if rows:
        lim = r.get("limits") or {}
        b += ["<h2>Upper limits</h2>",
              (f"<p>{_h(_cl_percent(lim))}% CL CLs upper limits "
              f"({_h(lim.get('method', 'asymptotic'))}), unit: {_h(lim.get('unit', 'events'))}."
              "</p>"), _html_table(head, rows)]
        notes = _limit_notes(r)
        if notes:
            b.append("<ul>" + "".join(f"<li>{_h(n)}</li>" for n in notes) + "</ul>")
        if "limits" in fig:
            b.append(_img(fig["limits"], "limits", _caption("limits", r)))
    inp = r.get("input") or {}
    b += ["<h2>Selection and cut flow</h2>", _html_table(["setting", "value"], _selection_rows(r))]
    if _cutflow_rows(r):
        b.append(_html_table(["step", "count"], _cutflow_rows(r)))
    b.append(f"<p>Events read: {_h(_num(inp.get('events_read')))}; events with a candidate: "
             f"{_h(_num(inp.get('events_selected')))}; {_h(_window_count_label(r))}: "
             f"{_h(_num(inp.get('candidates')))}.</p>")
    if "candidates" in fig:
        b.append(_img(fig["candidates"], "candidates"))
    elif _blinded(r):
        b.append(f"<p>{_h(_WITHHELD_CANDIDATES)}</p>")
    for name, path in fig.items():
        if name not in _CAPTIONS and name != "background_envelope":
            b.append(_img(path, name))
    b += ["<h2>Provenance</h2>", _html_table(["item", "value"], _provenance_rows(r))]
    files = (r.get("provenance") or {}).get("inputs") or []
    if files:
        b.append(_html_table(["input file", "sha256"], [[f["path"], f["sha256"]] for f in files],
                             mono_last=True))
    skipped = inp.get("files_skipped") or []
    if skipped:
        b.append("<p>Files skipped (unreadable):</p><ul>" + "".join(
            f"<li>{_h(s.get('path', s) if isinstance(s, Mapping) else s)}: "
            f"{_h(s.get('reason', '') if isinstance(s, Mapping) else '')}</li>" for s in skipped)
            + "</ul>")
    b += ["<h2>Caution</h2>", f"<p>{_h(CAUTION)} {_h(_lee_sentence(r))}</p>", "</body></html>"]
    return "\n".join(b) + "\n"


def write_report(results: Mapping[str, Any], outdir: str | os.PathLike[str],
                 figures: Mapping[str, str | os.PathLike[str]]) -> dict[str, Path]:
    """Write ``report.md`` (figures by relative path) and ``report.html`` (figures embedded).

    ``figures`` maps figure names (``spectrum``, ``pvalue_scan``, ...) to PNG files inside
    ``outdir``.
    """
    outdir = Path(outdir)
    rel = {k: Path(os.path.relpath(Path(v), outdir)).as_posix() for k, v in figures.items()}
    md = atomic_write(outdir / "report.md", render_markdown(results, rel))
    ht = atomic_write(outdir / "report.html", render_html(results, figures))
    return {"markdown": md, "html": ht}


# ------------------------------------------------------------------ background model
def _background_model_parts(r: Mapping[str, Any]) -> list[tuple[str, Any]] | None:
    """The "Background model" section as (kind, content) parts, from results.json alone:
    ``("p", text)``, ``("table", (head, rows))``, ``("fig", name)``."""
    sy = r.get("systematics")
    if not sy:
        return None
    parts: list[tuple[str, Any]] = []
    nu = sy.get("nuisances") or {}
    active = [f"{k.replace('_', ' ')} {100 * v['size']:.3g}% ({v['kind']})"
              for k, v in nu.items() if v.get("size")]
    parts.append(("p", "Signal nuisance parameters profiled at every hypothesis and in every "
                  "toy: " + (", ".join(active) if active else "none") +
                  f"; toys keep the constraints {sy.get('toy_constraints', 'fixed')}."))
    ch = sy.get("background_choice")
    env = sy.get("envelope") or {}
    sp = sy.get("spurious_signal") or {}
    if ch:
        inenv = set(env.get("functions") or [])
        rows = []
        for c in ch["candidates"]:
            spc = sp.get(c["label"])
            rows.append([c["label"], _num(c["nll"], 8), str(c["n_parameters"]),
                         _num(c["gof_p_value"], 3),
                         _num(c["order_p_value"], 3) if c["order_p_value"] is not None else "-",
                         (f"{spc['max_ratio']:.2f}" + (" (flagged)" if spc["flagged"] else ""))
                         if spc else "-",
                         "kept" + (", in envelope" if c["label"] in inenv else "")
                         if c["chosen"] else ""])
        parts.append(("p", (f"Candidate background functions fitted to the "
                      f"{'sidebands' if ch.get('blind') else 'spectrum'} ({ch['n_bins']} bins). "
                      f"Order test: {ch['test']}; an order is kept when the next one's p-value "
                      f"is at least {ch['size']:g}. Spurious signal: the largest fitted signal "
                      "on the background template over its statistical error.")))
        parts.append(("table", (["function", "NLL", "free parameters", "goodness-of-fit p",
                                 "order test p", "spurious signal / stat. error", "status"],
                                rows)))
    if env:
        parts.append(("p", (f"Discrete profiling (Dauncey et al., JINST 10 (2015) P04015) over "
                      f"{', '.join(env['functions'])} with a penalty of {env['penalty']:g} per "
                      f"free parameter; at the best mass the envelope takes "
                      f"{env['chosen_at_best']}, and without signal {env['null_choice']}.")))
    w, wo = sy.get("with_systematics") or {}, sy.get("without_systematics") or {}
    keys = (("best mass [GeV]", "mass"), ("local Z", "z_local"), ("local p", "p_local"),
            ("global Z", "z_global"), ("global p", "p_global"))
    parts.append(("table", (["quantity", "single function, no systematics",
                             "with systematics"],
                            [[lab, _num(wo.get(k)), _num(w.get(k))] for lab, k in keys])))
    pulls = sy.get("nuisance_pulls") or {}
    if pulls:
        parts.append(("table", (["nuisance parameter", "pull at the best mass [sigma]"],
                                [[k.replace("_", " "), f"{v:+.2f}"] for k, v in pulls.items()])))
    notes = list(sy.get("notes") or [])
    if sy.get("limits"):
        notes.append(sy["limits"])
    for n in notes:
        parts.append(("p", f"Note: {n}."))
    parts.append(("fig", "background_envelope"))
    return parts


def background_model_markdown(r: Mapping[str, Any], fig: Mapping[str, str]) -> list[str]:
    """The report's "Background model" section as Markdown lines (empty without systematics)."""
    parts = _background_model_parts(r)
    if not parts:
        return []
    out = ["## Background model", ""]
    for kind, c in parts:
        if kind == "p":
            out += [c, ""]
        elif kind == "table":
            out += [_md_table(*c), ""]
        elif c in fig:
            out += [f"![{c}]({fig[c]})", "", f"*{_CAPTIONS[c]}*", ""]
    return out


def background_model_html(r: Mapping[str, Any], fig: Mapping[str, Any]) -> list[str]:
    """The report's "Background model" section as HTML pieces (empty without systematics)."""
    parts = _background_model_parts(r)
    if not parts:
        return []
    out = ["<h2>Background model</h2>"]
    for kind, c in parts:
        if kind == "p":
            out.append(f"<p>{_h(c)}</p>")
        elif kind == "table":
            out.append(_html_table(*c))
        elif c in fig:
            out.append(_img(fig[c], c, _CAPTIONS[c]))
    return out
