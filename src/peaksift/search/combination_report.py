"""The combination's report and command-line summary, from its results.json alone.

* :func:`combination_blocks`            -- the report as blocks (the vocabulary of
  :mod:`peaksift.report`): the caution, the combined result with its normalisation
  nuisances, a table of the channels and one table per channel, the combined limits, the
  figures (the combined p-values, each channel's spectrum and p-values), the notes.
* :func:`render_combination_markdown` / :func:`render_combination_html` -- report.md and
  the self-contained report.html.
* :func:`combination_summary_text`      -- the few lines ``peaksift search`` prints.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from .._format import as_finite, fixed, format_pm, mass_text, number, p_value
from .._vocabulary import FITS
from ..report import CAUTION, blocks_html, blocks_markdown, run_line
from ..report_sections import (
    CAPTIONS,
    OTHER_CAPTIONS,
    fitted_text,
    models_text,
    section_warnings,
)
from ..stats.envelope_choice import read_channel_entries
from .doubts import doubtful_limits_note

__all__ = ["combination_blocks", "combination_summary_text", "render_combination_html",
           "render_combination_markdown"]


def _f(x: Any, digits: int = 3) -> str:
    return "n/a" if x is None else number(x, digits)


# the single-channel report's formats: masses, significances and limits with two decimals,
# a value with its error rounded to the error's two digits
def _m(x: Any) -> str:
    return fixed(x, 2)


def _lumi_unit(unit: Any) -> str:
    return str(unit or "").replace("^-1", "\u207b\u00b9")


def channel_rows(name: str, r: Mapping[str, Any]) -> list[str]:
    """One row of the channels table from a channel's results.json dict."""
    best = r.get("best") or {}
    fit = r.get("fit") or {}
    lim = r.get("limits") or {}
    exp = [v for v in (lim.get("expected") or []) if v is not None]
    eff = (r.get("signal_model") or {}).get("points", {}).get("efficiency", {}).get("value")
    return [name, mass_text(best.get("mass")), _m(best.get("z_local")),
            p_value(best.get("p_local")), _m(best.get("z_global")),
            fitted_text(fit, "peak_mass") + ("" if fit.get("valid", True) else " (fit NOT valid)"),
            f"{_m(min(exp))}-{_m(max(exp))} {lim.get('unit', '')}" if exp else "n/a",
            "from samples" if eff else "given"]


def _channel_table(name: str, r: Mapping[str, Any]) -> list[Any]:
    """One channel's own table: its selection window, fit, significances, normalisation."""
    cfg = r.get("config") or {}
    lim_cfg = cfg.get("limits") or {}
    best = r.get("best") or {}
    fit = r.get("fit") or {}
    scan = r.get("scan") or {}
    window = scan.get("window") or []
    rows = [["search window", f"{_m(window[0])}-{_m(window[1])} GeV" if window
             else "n/a"],
            *(["model", text] for text in models_text(r)),
            ["best mass hypothesis", f"{mass_text(best.get('mass'))} GeV"],
            ["local significance", (f"{_m(best.get('z_local'))} σ "
             f"(p = {p_value(best.get('p_local'))})")],
            ["global significance", (f"{_m(best.get('z_global'))} σ "
             f"(p = {p_value(best.get('p_global'))})")]]
    for key, label in (("peak_mass", "fitted peak mass [GeV]"),
                       ("signal_yield", "fitted signal events")):
        if fit.get(key):
            rows.append([label, fitted_text(fit, key)])
    if fit and not fit.get("valid", True):
        rows.append(["fit status", "NOT valid: " + "; ".join(str(p) for p in
                                                       fit.get("problems") or [])])
    rows.append(["luminosity", (f"{_f(lim_cfg.get('luminosity'))} "
                 f"{_lumi_unit(lim_cfg.get('luminosity_unit'))} ± "
                 f"{_f(100 * (lim_cfg.get('luminosity_uncertainty') or 0.0), 2)}%")])
    sm = r.get("signal_model")
    eff = "from the signal samples (interpolated)" if sm else _f(lim_cfg.get("efficiency"))
    rows.append(["efficiency x acceptance", (f"{eff} ± "
                 f"{_f(100 * (lim_cfg.get('efficiency_uncertainty') or 0.0), 2)}%")])
    if (r.get("systematics") or {}):
        rows.append(["systematics", "in this channel's own results only"])
    return [("h3", f"Channel {name}"), ("table", ["quantity", "value"], rows)]


def _channel_warnings(d: Mapping[str, Any]) -> list[dict[str, str]]:
    """Every channel's doubts (its results.json ``warnings``), each named by its channel."""
    return [{"topic": str(w.get("topic")), "message": f"{n}: {w.get('message')}"}
            for n, r in d["channels"].items() for w in r.get("warnings") or []
            if isinstance(w, Mapping)]


def combination_warnings(d: Mapping[str, Any]) -> list[dict[str, str]]:
    """What a reader must know before quoting the combination (its results.json
    ``warnings``, the report's Warnings, the summary's WARNING lines): every channel's
    doubts named by its channel, the combined q0 that took a lower well of a mass scale
    than the nearest (as a search's significance warning,
    ``stats.joint_wells.several_minima_notes``), and the combined limits' notes that are
    warnings (as a search's; toy limits that do not profile the background envelope)."""
    out = _channel_warnings(d)
    out += [{"topic": "significance", "message": f"combined significance: {note}"}
            for note in (d.get("combination") or {}).get("notes") or []
            if "several minima" in note]
    out += [{"topic": "limits", "message": f"combined limits: {note}"}
            for note in (d.get("limits") or {}).get("notes") or []
            if doubtful_limits_note(note) or "do not profile the choice" in note]
    return out


def combination_run_line(d: Mapping[str, Any]) -> str:
    """The run label under the title: the first channel's run name and sqrt(s), and each
    channel's luminosity (one figure when they agree)."""
    chans = list((d.get("channels") or {}).items())
    if not chans:
        return ""
    first = run_line({"config": {**(chans[0][1].get("config") or {}), "limits": {}}})
    lumis = {n: ((r.get("config") or {}).get("limits") or {}).get("luminosity")
             for n, r in chans}
    known = {n: v for n, v in lumis.items() if v}
    if len(set(known.values())) == 1 and len(known) == len(lumis):
        lumi = f"{number(next(iter(known.values())))} fb\u207b\u00b9"
    else:
        lumi = ", ".join(f"{n} {number(v)} fb\u207b\u00b9" for n, v in known.items())
    return ", ".join(p for p in (first, lumi) if p)


def _cross_section_text(c: Mapping[str, Any]) -> str:
    """The combined fit's sigma x B at the best mass with its error (results.json
    ``combination``: ``cross_section_error`` at ``best_index``)."""
    best = c.get("best") or {}
    errors, i = c.get("cross_section_error") or [], c.get("best_index")
    error = errors[i] if isinstance(i, int) and 0 <= i < len(errors) else None
    return format_pm(best.get("cross_section"), error, str(c.get("unit") or ""))


def combination_blocks(d: Mapping[str, Any], figures: Mapping[str, Any] | None = None
                       ) -> list[Any]:
    """The combination's report as blocks (``d`` is its results.json)."""
    fig = dict(figures or {})
    c = d["combination"]
    g = d.get("best") or {}
    best = c.get("best") or {}
    out: list[Any] = [("h1", f"Combined search: {', '.join(d['channels'])}")]
    run = combination_run_line(d)
    if run:
        out.append(("p", run))
    out += [("caution", CAUTION),
            *section_warnings({"warnings": combination_warnings(d)}, fig),
                      ("h2", "Combination"),
                      ("p", ("One cross-section x branching fraction shared by every channel; the "
                       "likelihood is the product of the channels' (each with its own "
                       "background, signal model, efficiency and luminosity), with the "
                       "luminosity and efficiency uncertainties as constrained nuisances."))]
    rows = [["best mass hypothesis", f"{mass_text(best.get('mass'))} GeV"],
            ["local significance", (f"{_m(best.get('z_local'))} σ "
             f"(p = {p_value(best.get('p_local'))})")],
            ["global significance", (f"{_m(g.get('z_global'))} σ "
             f"(p = {p_value(g.get('p_global'))}, {g.get('global_method', 'n/a')}; toys "
             "generate every channel)")],
            ["fitted sigma x B at the best mass", _cross_section_text(c)]]
    for name, v in (d.get("nuisances_at_best") or {}).items():
        label = nuisance_label(name, v, list(d["channels"]))
        if "shift_at_best" in v:
            rows.append([f"shape factor {label} (k - 1 at the best mass)",
                         fixed(v.get("shift_at_best"), 3, signed=True)])
        else:
            rows.append([f"nuisance {label} (pull at the best mass)",
                         fixed(v.get("pull_at_best"), 2, signed=True)])
    env = read_channel_entries(c.get("envelope")) or {}  # files of earlier layouts too
    if env and best.get("mass") is not None and c.get("masses"):
        j = min(range(len(c["masses"])), key=lambda i: abs(c["masses"][i] - best["mass"]))
        for name, e in env.items():
            if e.get("chosen") and e["chosen"][j] is not None:
                what = f"background function of {name} at the best mass (discrete profiling)"
                rows.append([what, (f"{e['labels'][e['chosen'][j]]} (of "
                                    f"{', '.join(e['labels'])})")])
    out.append(("table", ["quantity", "value"], rows))
    if "pvalue_combined" in fig:
        out.append(("figure", "pvalue_combined", ("Local p-value of each channel and of their "
                    "combination against the mass hypothesis (a local excess is not a "
                    "discovery).")))
    out += [("h2", "Channels"),
            ("table", ["channel", "best mass [GeV]", "Z local", "p local", "Z global",
                       f"{FITS['free_fit'][0]} mass [GeV]", "expected limits (lowest-highest)",
                       "efficiency"],
             [channel_rows(n, r) for n, r in d["channels"].items()]),
            ("p", ("Each channel's numbers are those of its own search (its own configuration "
             "run alone gives the same)."))]
    for n, r in d["channels"].items():
        out += _channel_table(n, r)
        for key, what in (("spectrum", f"mass spectrum with the {FITS['free_fit'][0]}"),
                          ("pvalue_scan", "local p-value scan")):
            if f"{n}/{key}" in fig:
                out.append(("figure", f"{n}/{key}", f"Channel {n}: {what}."))
        # the channel's other figures written beside them (its own limits, candidates,
        # calibration, signal model): none left out of the report
        for key in fig:
            sub = key.partition("/")[2]
            if key.startswith(f"{n}/") and sub not in ("spectrum", "pvalue_scan"):
                out.append(("figure", key, f"Channel {n}: "
                            + CAPTIONS.get(sub, OTHER_CAPTIONS.get(sub, sub))))
    lim = d.get("limits")
    if lim:  # every mass: the point that matters is never the one a stride skips
        masses = lim["masses"]
        methods = lim.get("methods") or ["asymptotic"] * len(masses)
        rows = [[mass_text(masses[i]), _m(lim["observed"][i]), _m(lim["expected"][i]),
                 f"{_m(lim['expected_minus1'][i])} to {_m(lim['expected_plus1'][i])}",
                 f"{_m(lim['expected_minus2'][i])} to {_m(lim['expected_plus2'][i])}",
                 methods[i]] for i in range(len(masses))]
        out.append(("h2", f"Combined upper limits ({100 * lim['cl']:.0f}% CLs, {lim['unit']})"))
        if "limits_combined" in fig:
            out.append(("figure", "limits_combined", (
                "Combined upper limits on sigma x B at each mass hypothesis: observed, and the "
                "expected median with its 68% and 95% bands under the background-only "
                "hypothesis; thin, each channel's own expected limit.")))
        out += [("table", ["mass [GeV]", "observed", "expected", "expected ±1 sigma",
                           "expected ±2 sigma", "method"], rows)]
        if lim.get("notes"):
            out.append(("list", list(lim["notes"])))
    notes = list(d.get("notes") or [])
    for n, r in d["channels"].items():
        notes += [f"{n}: signal model: {x}" for x in (r.get("signal_model") or {}).get("notes")
                  or []]
    if notes:
        out += [("h2", "Notes"), ("list", notes)]
    return out


def render_combination_markdown(d: Mapping[str, Any],
                                figures: Mapping[str, str] | None = None) -> str:
    """report.md of a combination (``figures``: name -> relative PNG path)."""
    fig = dict(figures or {})
    return blocks_markdown(combination_blocks(d, fig), fig)


def render_combination_html(d: Mapping[str, Any], figures: Mapping[str, Any] | None = None
                            ) -> str:
    """report.html of a combination, self-contained (``figures``: name -> PNG file)."""
    fig = dict(figures or {})
    return blocks_html(f"Combined search: {', '.join(d['channels'])}",
                       combination_blocks(d, fig), fig, combination_run_line(d))


#: a combination's nuisances in words, by the kind their names start with (the names are
#: ``<kind>_<channel>``, a luminosity's ``luminosity_<group>``: ``stats.channel_norms``,
#: ``stats.channels``)
_NUISANCE_WORDS = {"efficiency": "efficiency x acceptance", "luminosity": "luminosity",
                   "mass_scale": "mass scale", "mass_resolution": "mass resolution"}


def nuisance_label(name: str, entry: Mapping[str, Any], channels: list[str]) -> str:
    """A combination's nuisance as the report names it: ``efficiency x acceptance of
    dimuon``, ``luminosity shared by dimuon and dielectron`` (the channels its log-normal
    scale reaches, ``entry["log_scale"]``), ``mass scale of dimuon``; a name of another
    form as it is."""
    for kind, words in _NUISANCE_WORDS.items():
        if name.startswith(kind + "_"):
            rest = name[len(kind) + 1:]
            scale = entry.get("log_scale") if isinstance(entry, Mapping) else None
            members = [c for c, a in zip(channels, scale or ()) if as_finite(a)]
            if len(members) > 1:
                return f"{words} shared by {', '.join(members[:-1])} and {members[-1]}"
            return f"{words} of {rest}"
    return name


def combination_summary_text(d: Mapping[str, Any]) -> str:
    """The command line's summary of a combination."""
    best = d["combination"].get("best") or {}
    g = d.get("best") or {}
    lines = ["peaksift search: combination of " + ", ".join(d["channels"]),
             f"  best mass hypothesis       {mass_text(best.get('mass'))} GeV",
             f"  local significance         {_m(best.get('z_local'))} sigma",
             (f"  global significance        {_m(g.get('z_global'))} sigma "
             f"({g.get('global_method', 'n/a')})"),
             f"  sigma x B at best mass     {_cross_section_text(d['combination'])}"]
    for n, r in d["channels"].items():
        b = r.get("best") or {}
        lines.append(f"  {n:<26} best {mass_text(b.get('mass'))} GeV, "
                     f"Z_local {_m(b.get('z_local'))}"
                     + "".join(f" ({t})" for t in models_text(r, ["scan"], gives=False)))
    doubtful = [n for n, r in d["channels"].items()
                if (r.get("signal_model") or {}).get("doubtful")]
    if doubtful:
        lines.append(f"  signal model doubtful in   {', '.join(doubtful)} (see the report)")
    # every warning but a channel's signal model's (the line above names those channels)
    lines += [f"  WARNING: {w['message']}" for w in combination_warnings(d)
              if w["topic"] != "signal_model"]
    if "outputs" in d:
        lines.append(f"  outputs                    {d['outputs']['dir']}")
    lines.append("  (a local significance is not a discovery; see the report's caution)")
    return "\n".join(lines)
