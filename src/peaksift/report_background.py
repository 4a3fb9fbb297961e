"""The report's "Background model" section: how the background function was chosen and what
the systematic uncertainties did to the significance (present when ``[systematics]`` is set).

Built from results.json alone, like every section in :mod:`peaksift.report_sections`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

from ._format import fixed, mass_text, number, p_value
from .report_sections import CAPTIONS, Block, figure_block


def _candidate_rows(sy: Mapping[str, Any]) -> list[list[str]]:
    ch = sy["background_choice"]
    inenv = set((sy.get("envelope") or {}).get("labels") or [])
    sp = sy.get("spurious_signal") or {}
    rows = []
    for c in ch["candidates"]:
        spc = sp.get(c["label"])
        spurious = "-" if not spc else (
            f"{math.copysign(spc['max_ratio'], spc.get('signal', 1.0)):+.2f} at "
            f"{spc['mass']:.1f} GeV"
            + (f"; {spc['ratio_at_best']:+.2f} at the best mass"
               if spc.get("ratio_at_best") is not None else "")
            + (" (flagged)" if spc["flagged"] else ""))
        status = ("kept" + (", in envelope" if c["label"] in inenv else "")) if c["chosen"] \
            else ""
        rows.append([c["label"], number(c["nll"], 8), str(c["n_parameters"]),
                     number(c["gof_p_value"], 3),
                     number(c["order_p_value"], 3) if c["order_p_value"] is not None else "-",
                     spurious, status])
    return rows


def _limit_blocks(lim: Any) -> list[Block]:
    """The upper limits with and without systematics side by side, at every mass (the one
    that matters is never the one a stride skips), in the Upper limits table's format."""
    if not isinstance(lim, Mapping) or not lim.get("with_systematics"):
        return []
    w, wo = lim["with_systematics"], lim["without_systematics"]
    mass = list(w.get("masses") or [])
    if not mass:
        return []

    def at(d: Mapping[str, Any], key: str, i: int) -> str:
        v = d.get(key) or []
        return fixed(v[i], 2) if i < len(v) else "n/a"

    methods = list(w.get("methods") or [])
    toy = [i < len(methods) and methods[i] == "toys" for i in range(len(mass))]
    rows = [[mass_text(mass[i]) + (" (toys)" if toy[i] else ""), at(wo, "observed", i),
             at(w, "observed", i), at(wo, "expected", i), at(w, "expected", i)]
            for i in range(len(mass))]
    how = ("asymptotic" if not any(toy) else
           f"asymptotic; at {sum(toy)} low-count masses toys with the same profiling")
    unit = w.get("unit") or ""
    cl = 100 * float(w.get("cl") or 0.95)
    out: list[Block] = [
        ("p", (f"Upper limits at {cl:g}% CL ({unit}), CLs: the plain ones (the single "
               "function of the model with the luminosity and efficiency uncertainties, as "
               f"in the Upper limits section) beside those with systematics ({how}), which "
               "profile " + ", ".join(lim.get("profiled") or []) + ".")),
        ("table", ["mass [GeV]", "observed, plain", "observed, with systematics",
                   "expected, plain", "expected, with systematics"], rows)]
    out += [("p", f"Note: {n}.") for n in lim.get("notes") or []]
    return out


def section_background_model(r: Mapping[str, Any], fig: Mapping[str, Any]) -> list[Block]:
    """Candidate functions, the order test, spurious signal, the envelope, the significance
    with and without systematics side by side, and the nuisance pulls."""
    sy = r.get("systematics")
    if not sy:
        return []
    out: list[Block] = [("h2", "Background model")]
    nu = sy.get("nuisances") or {}
    active = [f"{k.replace('_', ' ')} {100 * v['size']:.3g}% ({v['kind']})"
              for k, v in nu.items() if v.get("size")]
    out.append(("p", "Signal nuisance parameters profiled at every hypothesis and in every "
                "toy: " + (", ".join(active) if active else "none")
                + f"; toys keep the constraints {sy.get('toy_constraints', 'fixed')}."))
    ch = sy.get("background_choice")
    if ch:
        out.append(("p", (f"Candidate background functions fitted to the "
                    f"{'sidebands' if ch.get('blind') else 'spectrum'} ({ch['n_bins']} bins). "
                    f"Order test: {ch['test']}; an order is kept when the next one's p-value "
                    f"is at least {ch['size']:g}. Spurious signal: the largest fitted signal on "
                    "the background template over its statistical error (with its sign), the "
                    "mass where it is largest, and its value at the best mass hypothesis.")))
        out.append(("table", ["function", "NLL", "free parameters", "goodness-of-fit p",
                              "order test p", "spurious signal / stat. error", "status"],
                    _candidate_rows(sy)))
    env = sy.get("envelope") or {}
    if env:
        out.append(("p", (f"Discrete profiling (Dauncey et al., JINST 10 (2015) P04015) over "
                    f"{', '.join(env['labels'])} with a penalty of {env['penalty']:g} per "
                    f"free parameter; at the best mass the envelope takes "
                    f"{env['best']['function']}, and without signal "
                    f"{env['labels'][env['null_choice']]}.")))
    w, wo = sy.get("with_systematics") or {}, sy.get("without_systematics") or {}
    # the formats of the Result table: masses and Z with two decimals, p-values as p_value
    keys = (("best mass [GeV]", "mass", fixed), ("local Z", "z_local", fixed),
            ("local p", "p_local", p_value), ("global Z", "z_global", fixed),
            ("global p", "p_global", p_value))
    out.append(("table", ["quantity", "single function, no systematics", "with systematics"],
                [[lab, f(wo.get(k)), f(w.get(k))] for lab, k, f in keys]))
    fm = sy.get("fitted_mass") or {}
    if fm:
        out.append(("p", (f"Fitted mass {fixed(fm['value'])} GeV: statistical errors "
                    f"+{fixed(fm['stat_error_plus'])} -{fixed(fm['stat_error_minus'])}"
                    f" GeV; with the mass scale ({100 * fm['mass_scale']['size']:.3g}%, "
                    f"{fm['mass_scale']['kind']}) profiled +{fixed(fm['error_plus'])} "
                    f"-{fixed(fm['error_minus'])} GeV.")))
    pulls = sy.get("nuisance_pulls") or {}
    if pulls:
        out.append(("table", ["nuisance parameter", "pull at the best mass [sigma]"],
                    [[k.replace("_", " "), f"{v:+.2f}"] for k, v in pulls.items()]))
    out += _limit_blocks(sy.get("limits"))
    notes = list(sy.get("notes") or [])
    out += [("p", f"Note: {n}.") for n in notes]
    out += figure_block(fig, "background_envelope", CAPTIONS["background_envelope"])
    return out
