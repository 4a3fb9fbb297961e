"""The combination's report sections and command-line summary, from its results.json alone.

* :func:`render_combination_markdown` -- report.md of a combination: the combined result,
  one table per channel (its best excess, significances, fitted peak, limits), the
  combined limits, the figures, and the caution.
* :func:`combination_summary_text`    -- the few lines ``peaksift search`` prints.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from .._format import number, p_value
from ..report import CAUTION

__all__ = ["combination_summary_text", "render_combination_markdown"]


def _f(x: Any, digits: int = 3) -> str:
    return "n/a" if x is None else number(x, digits)


def _table(head: Sequence[str], rows: Sequence[Sequence[str]]) -> str:
    out = ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
    out += ["| " + " | ".join(r) + " |" for r in rows]
    return "\n".join(out)


def channel_rows(name: str, r: Mapping[str, Any]) -> list[str]:
    """One row of the per-channel table from a channel's results.json dict."""
    best = r.get("best") or {}
    fit = r.get("fit") or {}
    peak = fit.get("peak_mass") or {}
    lim = r.get("limits") or {}
    exp = lim.get("expected") or []
    exp = [v for v in exp if v is not None]
    eff = (r.get("signal_model") or {}).get("points", {}).get("efficiency", {}).get("value")
    return [name, _f(best.get("mass"), 4), _f(best.get("z_local"), 3),
            p_value(best.get("p_local")), _f(best.get("z_global"), 3),
            f"{_f(peak.get('value'), 4)} ± {_f(peak.get('error'), 2)}",
            f"{_f(min(exp), 3)}-{_f(max(exp), 3)} {lim.get('unit', '')}" if exp else "n/a",
            "from samples" if eff else "given"]


def render_combination_markdown(d: Mapping[str, Any],
                                figures: Mapping[str, str] | None = None) -> str:
    """report.md of a combination (``d`` is its results.json)."""
    c = d["combined"]
    g = c.get("global") or {}
    best = c.get("best") or {}
    lines = [f"# Combined search: {', '.join(d['channel_names'])}", "",
             f"> {CAUTION}", "",
             "## Combination", "",
             ("One cross-section x branching fraction shared by every channel; the likelihood "
             "is the product of the channels' (each with its own background, signal model, "
             "efficiency and luminosity)."), "",
             _table(["quantity", "value"], [
                 ["best mass hypothesis", f"{_f(best.get('mass'), 5)} GeV"],
                 ["local significance", (f"{_f(best.get('z_local'))} sigma "
                                        f"(p = {p_value(best.get('p_local'))})")],
                 ["global significance", (f"{_f(g.get('z_global'))} sigma "
                                         f"(p = {p_value(g.get('p_global'))}, "
                                         f"{g.get('global_method', 'n/a')}; toys generate "
                                         "every channel)")],
                 ["fitted sigma x B at the best mass",
                  f"{_f(best.get('cross_section'))} {c.get('unit', '')}"],
             ]), ""]
    lines += [f"**Note:** {n}." for n in c.get("notes") or []]
    lines += ["", "## Channels", "",
              _table(["channel", "best mass [GeV]", "Z local", "p local", "Z global",
                      "fitted mass [GeV]", "expected limits", "efficiency"],
                     [channel_rows(n, r) for n, r in d["channels"].items()]), "",
              ("Each channel's numbers are those of its own search (its own configuration "
              "run alone gives the same)."), ""]
    lim = c.get("limits")
    if lim:
        rows = []
        masses = lim["masses"]
        step = max(1, len(masses) // 12)
        for i in range(0, len(masses), step):
            rows.append([_f(masses[i], 4), _f(lim["observed"][i]), _f(lim["expected"][i]),
                         f"{_f(lim['expected_minus1'][i])}-{_f(lim['expected_plus1'][i])}"])
        lines += [(f"## Combined upper limits ({100 * lim['cl']:.0f}% CLs, asymptotic, "
                  f"{lim['unit']})"), "",
                  _table(["mass [GeV]", "observed", "expected", "expected ±1 sigma"], rows), ""]
        lines += [f"- {n}" for n in lim.get("notes") or []]
        lines += [""]
    if figures:
        lines += ["## Figures", ""]
        lines += [f"![{k}]({v})" for k, v in figures.items() if v.endswith(".png")]
        lines += [""]
    notes = list(c.get("notes") or [])
    for n, r in d["channels"].items():
        notes += [f"{n}: signal model: {x}" for x in (r.get("signal_model") or {}).get("notes")
                  or []]
    if notes:
        lines += ["## Notes", ""] + [f"- {n}" for n in notes] + [""]
    return "\n".join(lines)


def combination_summary_text(d: Mapping[str, Any]) -> str:
    """The command line's summary of a combination."""
    c = d["combined"]
    best = c.get("best") or {}
    g = c.get("global") or {}
    lines = ["peaksift search: combination of " + ", ".join(d["channel_names"]),
             f"  best mass hypothesis       {_f(best.get('mass'), 5)} GeV",
             f"  local significance         {_f(best.get('z_local'))} sigma",
             (f"  global significance        {_f(g.get('z_global'))} sigma "
             f"({g.get('global_method', 'n/a')})")]
    for n, r in d["channels"].items():
        b = r.get("best") or {}
        lines.append(f"  {n:<26} best {_f(b.get('mass'), 5)} GeV, "
                     f"Z_local {_f(b.get('z_local'))}")
    doubtful = [n for n, r in d["channels"].items()
                if (r.get("signal_model") or {}).get("doubtful")]
    if doubtful:
        lines.append(f"  signal model doubtful in   {', '.join(doubtful)} (see the report)")
    if "outputs" in d:
        lines.append(f"  outputs                    {d['outputs']['dir']}")
    lines.append("  (a local significance is not a discovery; see the report's caution)")
    return "\n".join(lines)
