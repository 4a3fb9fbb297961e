"""The report's upper-limits section: every limit point with its +-1/+-2 sigma expected
bands, the method per mass, and the assumptions (luminosity, efficiency, their
uncertainties) that convert a yield into sigma x B.

Built from results.json alone, like every section (:mod:`peaksift.report_sections`).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from ._format import as_finite, fixed, mass_text
from ._vocabulary import method_words
from .report_sections import Block, caption_for, figure_block, num_text


# ------------------------------------------------------------------------------- limits
def _cl_percent(lim: Mapping[str, Any]) -> str:
    cl = as_finite(lim.get("cl", 0.95))
    return num_text(100 * cl, 3) if cl is not None else "n/a"


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
        rows.append([mass_text(m[i]), g("observed"), g("expected"), g("expected_minus2"),
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
    extra = [f"b_eff {num_text(b, 2)}"] if b is not None and (
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
                     f"{num_text(lim.get('low_count_background'))} the asymptotic CLs formulae "
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
    eff_txt = num_text(eff, 3) if eff is not None else (
        "{}-{} (depends on mass)".format(*[num_text(x, 3) for x in a.get("efficiency_range")
                                           or (None, None)]))
    kind = {"lognormal": "log-normal", "gaussian": "Gaussian"}.get(str(a.get("constraint")),
                                                                  str(a.get("constraint")))
    unit = lim.get("unit", "fb")
    return (f"Assumptions: integrated luminosity L = {num_text(a['luminosity'])} fb\u207b\u00b9 "
            f"\u00b1 {num_text(100 * lu, 3)}%, signal efficiency \u00d7 acceptance \u03b5 = "
            f"{eff_txt} \u00b1 {num_text(100 * eu, 3)}% (relative uncertainties, {kind} "
            f"constrained nuisance parameters); the limit on \u03c3 \u00d7 B in {unit} is the "
            "limit on the signal yield divided by L \u00d7 \u03b5.")


def _which_limits(r: Mapping[str, Any]) -> str:
    """With [systematics], which limits these are: results.json ``limits`` carry the
    luminosity and efficiency uncertainties only, while the Result quotes those with every
    systematic (``systematics.limits``): said, so that nobody copies the wrong table."""
    sy = r.get("systematics")
    if not (isinstance(sy, Mapping) and isinstance(sy.get("limits"), Mapping)
            and sy["limits"].get("with_systematics")):
        return ""
    return (" These are the plain limits, with the luminosity and efficiency uncertainties "
            "only; the limits with every systematic profiled, which the Result quotes, are "
            "in the Background model section's table.")


def section_limits(r: Mapping[str, Any], fig: Mapping[str, Any]) -> list[Block]:
    """Every limit point with its bands, the assumptions, the notes and the figure."""
    head, rows = _limit_rows(r)
    if not rows:
        return []
    lim = r.get("limits") or {}
    out: list[Block] = [
        ("h2", "Upper limits"),
        ("p", (f"{_cl_percent(lim)}% CL CLs upper limits "
              f"({method_words(str(lim.get('method', 'asymptotic')))}) "
              f"at all {len(rows)} mass points, unit {lim.get('unit', 'events')}; the "
              "expected limit is the median under the background-only hypothesis and "
              "\u00b11\u03c3/\u00b12\u03c3 the edges of its 68%/95% band."
              + _which_limits(r))),
        ("p", limit_assumptions(r)),
        *figure_block(fig, "limits", caption_for("limits", r)),
        ("table", head, rows)]
    notes = _limit_notes(r)
    if notes:
        out.append(("list", notes))
    return out
